"""``python -m allolaw``: the same as the ``allolaw`` command."""

from allolaw.cli import run

run()
