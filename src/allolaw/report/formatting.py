"""Number, percent, unit and time formatting for the report pages (also Jinja2 filters).
"""

from __future__ import annotations

import datetime as dt
import math
import re
from typing import Any

import numpy as np

STATUS_ORDER = {"pass": 0, "info": 0, "warn": 1, "missing": 2, "fail": 3}


def unit_text(unit: str) -> str:
    # pint spellings to print: um**3 → µm³ (the "u" prefix is micro)
    text = re.sub(r"\*\*2\b", "²", unit)
    text = re.sub(r"\*\*3\b", "³", text)
    return re.sub(r"\bu(?=[a-zA-Z])", "µ", text)


def fmt(value: Any, digits: int = 3) -> str:
    """Numbers with ``digits`` significant decimals for small values; text as given."""
    if value is None:
        return "–"
    if isinstance(value, bool | np.bool_):
        return "yes" if value else "no"
    if isinstance(value, int | np.integer):
        return str(int(value))
    if isinstance(value, float | np.floating):
        v = float(value)
        if not math.isfinite(v):
            return "NaN" if math.isnan(v) else ("∞" if v > 0 else "−∞")
        if v == int(v) and abs(v) < 1e6:
            return str(int(v))
        a = abs(v)
        if a >= 1e5 or a < 1e-3:
            return f"{v:.{digits}g}"
        if a >= 100:
            return f"{v:.1f}"
        return f"{v:.{digits}f}"
    if isinstance(value, str):
        try:
            return fmt(float(value), digits) if value.strip() not in ("",) and _numeric(
                value) else value
        except ValueError:
            return value
    return str(value)


def _numeric(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return text.strip().lower() not in ("nan", "inf", "-inf", "infinity")


def pct(value: Any) -> str:
    if value is None or isnan(value):
        return "–"
    return f"{100 * float(value):.1f}%"


def isnan(value: Any) -> bool:
    return isinstance(value, float | np.floating) and math.isnan(float(value))


def as_float(value: Any) -> float | None:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return None
    return None if math.isnan(v) else v


def truthy(value: Any) -> bool:
    if isinstance(value, str):
        return value.strip().lower() in ("true", "1", "yes")
    return bool(value) if value is not None and not isnan(value) else False


def now() -> str:
    return dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
