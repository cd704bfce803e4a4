"""Cells: missing-value words, numbers, name normalisation and safe text for CSV outputs."""

from __future__ import annotations

import re
import unicodedata

__all__ = [
    "FORMULA_PREFIXES",
    "MISSING_STRINGS",
    "has_decimal_comma",
    "has_decimal_point",
    "is_missing",
    "neutralise_formula",
    "normalise_name",
    "parse_number",
]

# Cell texts read as "missing" (compared after stripping spaces, case-insensitive).
MISSING_STRINGS = frozenset(
    {"", "na", "n/a", "n.a.", "nan", "null", "none", "missing", "?", "-", "—", "–", "#n/a"}
)

# A text cell starting with one of these is run as a formula by spreadsheets; outputs get a
# leading apostrophe (common practice, no source: the usual CSV-injection guard).
FORMULA_PREFIXES = ("=", "+", "-", "@", "\t", "\r")

_NUMBER = re.compile(r"[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?")
_INFINITE = frozenset({"inf", "+inf", "-inf", "infinity", "+infinity", "-infinity"})
_DECIMAL_COMMA = re.compile(r"[+-]?\d+,\d+")
_DECIMAL_POINT = re.compile(r"[+-]?\d*\.\d+([eE][+-]?\d+)?")


def is_missing(text: str) -> bool:
    """Whether a stripped cell text is one of :data:`MISSING_STRINGS` (any case)."""
    return text.strip().lower() in MISSING_STRINGS


def parse_number(text: str) -> tuple[float, str]:
    """Read a numeric cell; return ``(value, problem)``, problem ``""`` when it is a number.

    ``problem`` is ``"missing"`` for a missing-value word, else a short reason.
    """
    if text.lower() in MISSING_STRINGS:
        return float("nan"), "missing"
    if _NUMBER.fullmatch(text):
        return float(text), ""
    if text.lower() in _INFINITE:
        return float(text), ""
    if _DECIMAL_COMMA.fullmatch(text):
        return float("nan"), "decimal comma, not a number,"
    return float("nan"), "not a number"


def has_decimal_comma(text: str) -> bool:
    """Whether a cell reads like a number written with a decimal comma (``3,5``)."""
    return bool(_DECIMAL_COMMA.fullmatch(text))


def has_decimal_point(text: str) -> bool:
    """Whether a cell is a number written with a decimal point (``3.5``, ``.5e3``)."""
    return bool(_DECIMAL_POINT.fullmatch(text))


def normalise_name(text: str) -> str:
    """One spelling per name: Unicode NFC, no format characters, single spaces, trimmed.

    Format characters (Unicode category Cf: zero-width space, zero-width joiner, soft hyphen,
    byte-order mark …) are invisible, so two names differing only in them are one name.
    """
    text = unicodedata.normalize("NFC", text)
    text = "".join(ch for ch in text if unicodedata.category(ch) != "Cf")
    return " ".join(text.split())


def neutralise_formula(text: str) -> str:
    """Prefix an apostrophe to text a spreadsheet would run as a formula (``=1+1``)."""
    if text and text.startswith(FORMULA_PREFIXES):
        return "'" + text
    return text
