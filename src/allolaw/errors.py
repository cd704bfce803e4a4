"""Errors the user can fix.

Anything caused by the user's files or settings is raised as :class:`UserError`; the CLI prints
its message (which names file, line, column and value where there is one) and exits with
status 2, without a traceback.
"""

from __future__ import annotations

__all__ = ["UserError", "format_location"]


class UserError(Exception):
    """A problem in the user's input: a file, a config key, a model spec."""

def format_location(
    file: str | None = None,
    line: int | None = None,
    column: str | None = None,
    value: object = None,
) -> str:
    """Return ``"file, line N, column 'c', value 'v'"`` with the parts that are known."""
    parts = []
    if file is not None:
        parts.append(str(file))
    if line is not None:
        parts.append(f"line {line}")
    if column is not None:
        parts.append(f"column '{column}'")
    if value is not None:
        parts.append(f"value {value!r}")
    return ", ".join(parts)
