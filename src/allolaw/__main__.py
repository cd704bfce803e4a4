"""``python -m allolaw``: the same as the ``allolaw`` command."""

import sys

from allolaw.cli import main

sys.exit(main())
