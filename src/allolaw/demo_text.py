"""Small helpers shared by the demo generators (``demo``, ``demo_individuals``).

The generators write their tables as text; these keep that text the same on every platform
and describe the planted blemishes in one shape.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["blemish", "centred", "fmt"]


def centred(x: np.ndarray) -> np.ndarray:
    """``x`` minus its mean (taxon deviations that sum to zero over the taxa drawn)."""
    return x - x.mean()


def fmt(value: float, digits: int = 4) -> str:
    """Significant digits, positional notation, no trailing zeros: stable text everywhere."""
    return np.format_float_positional(value, precision=digits, unique=False, fractional=False,
                                      trim="-")


def blemish(file: str, line: int, column: str | None, what: str, fate: str) -> dict[str, Any]:
    """One planted flaw of a demo file and the fate the intake must give its line."""
    return {"file": file, "line": line, "column": column, "what": what, "expected_fate": fate}
