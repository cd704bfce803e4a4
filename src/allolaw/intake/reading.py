"""Reading a source file: bytes, text, physical lines, records, delimiter and header.

A file is read one physical line at a time (a line ends at ``\\r\\n``, ``\\n`` or ``\\r``), so
one malformed line can never hide the lines after it. Every physical line is one of: a blank
line (no non-empty field, e.g. ``,,,`` or ``""``; counted, not a row), the header (the first
non-blank line) or a data line (one ledger row each). A quote that opens on a line and does not
close on it either runs over a line break inside a quoted cell (every line of that record is
dropped with a reason: allolaw reads one row per line) or is never closed (that line alone is
dropped, and reading goes on with the next line). A quoted cell never runs over a blank line
(nothing but spaces, delimiters and empty quotes) or more than 50 lines. Text right after a
closing quote (``"9"9``, which a lenient reader would read as ``99``) drops the line.
"""

from __future__ import annotations

import csv
import hashlib
import logging
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any, NamedTuple

from allolaw.errors import UserError

__all__ = ["Record", "Table", "mapped_columns", "read_table", "split_lines"]

log = logging.getLogger(__name__)

_PROGRESS_EVERY = 100_000
# How many lines a quoted cell may run over before the quote counts as never closed.
_QUOTE_WINDOW = 50
_LINE_END = re.compile(r"\r\n|\r|\n")
_BLANK = re.compile(r"[\s,;|]*")
_NAMES = {",": "comma", "\t": "tab", ";": "semicolon", "|": "pipe"}


class Record(NamedTuple):
    """One data line: its 1-based physical line number, its fields, and a problem or ``""``."""

    line: int
    cells: list[str]
    problem: str


@dataclass
class Table:
    """One source file as read: header, one record per data line, and line counts."""

    path: Path
    file: str  # as written in the config; the ledger's `file`
    label: str
    header: list[str]
    header_line: int
    records: list[Record]
    delimiter: str
    sha256: str
    blank_lines: int
    physical_lines: int


def read_table(source: dict[str, Any]) -> Table:
    """Read one source of the config into a :class:`Table`.

    Raises
    ------
    UserError
        Missing, unreadable, compressed, non-UTF-8 or empty file; no header; duplicate column
        names; a mapped column missing from the header (with a hint where one fits); no data
        line.
    """
    path = Path(source["file"])
    raw = _read_bytes(path)
    text = _decode(raw, path)
    delimiter = _delimiter(source, path)
    lines = split_lines(text)
    header_line, header, blank, records = _split_records(lines, delimiter, path)
    _check_header(path, header, header_line)
    columns = mapped_columns(source)
    missing = [c for c in columns if c not in header]
    if missing:
        hint = _header_hint(lines, header_line, header, delimiter, columns, missing)
        msg = (
            f"{path}, line {header_line}: mapped column(s) {', '.join(map(repr, missing))} "
            f"not in the header (columns read: {', '.join(map(repr, header))}){hint}"
        )
        raise UserError(msg)
    if not records:
        msg = f"{path}: the file has a header (line {header_line}) but no data rows"
        raise UserError(msg)
    label = str(source.get("label") or path.stem)
    digest = hashlib.sha256(raw).hexdigest()
    return Table(path, str(source["file"]), label, header, header_line, records, delimiter,
                 digest, blank, len(lines))


def split_lines(text: str) -> list[str]:
    """Physical lines of ``text`` (``\\r\\n``, ``\\n`` or ``\\r`` ends a line)."""
    lines = _LINE_END.split(text)
    if lines and lines[-1] == "":
        lines.pop()  # a final line end does not start another line
    return lines


def mapped_columns(source: dict[str, Any]) -> list[str]:
    """Every column of the file the source maps, in config order, without repeats."""
    cols = source["columns"]
    names = [cols["species"], cols["size"], cols["trait"], *cols.get("levels", [])]
    names += [cols[k] for k in ("size_sd", "trait_sd", "source") if cols.get(k)]
    names += list(cols.get("covariates", []))
    names += list((source.get("unit_columns") or {}).values())
    return list(dict.fromkeys(names))


def _read_bytes(path: Path) -> bytes:
    if not path.is_file():
        msg = f"{path}: source file not found (paths are relative to the folder you run from)"
        raise UserError(msg)
    try:
        raw = path.read_bytes()
    except OSError as err:
        msg = f"{path}: cannot read the file ({err.strerror})"
        raise UserError(msg) from None
    if raw.startswith(b"\x1f\x8b"):
        msg = f"{path}: the file is gzip-compressed; unpack it (gunzip) and name the .csv file"
        raise UserError(msg)
    if raw.startswith(b"PK\x03\x04"):
        msg = (
            f"{path}: the file is a zip archive (or a spreadsheet such as .xlsx); save the "
            "sheet as CSV (UTF-8) and name that file"
        )
        raise UserError(msg)
    return raw


def _decode(raw: bytes, path: Path) -> str:
    try:
        text = raw.decode("utf-8-sig")  # strips a byte-order mark if there is one
    except UnicodeDecodeError as err:
        line = len(split_lines(raw[: err.start].decode("utf-8", "replace") + "x"))
        msg = (
            f"{path}, line {line}: not UTF-8 text (byte {raw[err.start]:#04x} at offset "
            f"{err.start}); save the file as UTF-8"
        )
        raise UserError(msg) from None
    if not text.strip():
        msg = f"{path}: the file is empty"
        raise UserError(msg)
    return text


def _split_records(
    lines: list[str], delimiter: str, path: Path
) -> tuple[int, list[str], int, list[Record]]:
    """Header line number, header, blank-line count and one record per data line."""
    header: list[str] | None = None
    header_line = 0
    blank = 0
    records: list[Record] = []
    i = 0
    while i < len(lines):
        cells, span, problem = _record_at(lines, i, delimiter)
        if span > 1:
            first, last = i + 1, i + span
            if header is None:
                msg = f"{path}, line {first}: the header has a quoted cell running to line {last}"
                raise UserError(msg)
            reason = (
                f"a quoted cell holds a line break (one record over lines {first}-{last}); "
                "allolaw reads one row per line: remove the line break"
            )
            records += [Record(n, [], reason) for n in range(first, last + 1)]
            i += span
            continue
        if not any(c.strip() for c in cells) and not problem:
            blank += 1
        elif header is None:
            if problem:
                msg = f"{path}, line {i + 1}: the header line has {problem}"
                raise UserError(msg)
            header = [c.strip() for c in cells]
            header_line = i + 1
        else:
            records.append(Record(i + 1, cells, problem))
            if len(records) % _PROGRESS_EVERY == 0:
                log.info("%s: read %d rows", path, len(records))
        i += 1
    if header is None:
        msg = (
            f"{path}: no header: every one of its {len(lines)} lines holds only empty fields "
            f"(read with delimiter {_shown(delimiter)!r})"
        )
        raise UserError(msg)
    return header_line, header, blank, records


def _record_at(lines: list[str], i: int, delimiter: str) -> tuple[list[str], int, str]:
    """Fields of the record starting at line ``i``, how many lines it takes, and a problem."""
    line = lines[i]
    if '"' not in line:
        return line.split(delimiter), 1, ""
    cells = next(csv.reader([line], delimiter=delimiter), [])
    state = _quote_state(line, delimiter)
    if state == "closed":
        return cells, 1, ""
    if state == "malformed":
        return cells, 1, (
            "malformed quoting (text right after a closing quote, as in '\"9\"9'); quote the "
            "whole cell or none of it"
        )
    window = [lines[i]]
    for later in lines[i + 1 : i + _QUOTE_WINDOW]:
        if _BLANK.fullmatch(later.replace('""', "")):
            break  # a blank line is never part of a record
        window.append(later)
    reader = csv.reader((x + "\n" for x in window), delimiter=delimiter)
    joined = next(reader, [])
    span = reader.line_num
    if span > 1 and _quote_state("\n".join(window[:span]), delimiter) == "closed":
        return joined, span, ""
    return cells, 1, "an unclosed quote (a quote opens a cell and never closes on this line)"


def _quote_state(text: str, delimiter: str) -> str:
    """``closed``, ``open`` (ends inside a quoted cell) or ``malformed`` (strict CSV)."""
    try:
        for _ in csv.reader([text], delimiter=delimiter, strict=True):
            pass
    except csv.Error as err:
        return "open" if "unexpected end of data" in str(err) else "malformed"
    return "closed"


def _delimiter(source: dict[str, Any], path: Path) -> str:
    setting = source.get("delimiter", "auto")
    if setting and setting != "auto":
        return setting
    return "\t" if path.suffix.lower() in {".tsv", ".tab"} else ","


def _shown(delimiter: str) -> str:
    return "\\t" if delimiter == "\t" else delimiter


def _header_hint(lines: list[str], header_line: int, header: list[str], delimiter: str,
                 columns: list[str], missing: list[str]) -> str:
    first = lines[header_line - 1].strip()
    later = next((n for n in range(header_line, min(len(lines), header_line + 20))
                  if all(c in lines[n] for c in columns)), None)
    if re.fullmatch(r'"?sep=.?"?', first, flags=re.IGNORECASE):
        return (
            f"; line {header_line} is a spreadsheet 'sep=' line, not the header: delete it "
            "(and set `delimiter:` for this source if it is not a comma)"
        )
    if first.startswith("#"):
        where = f" (the header seems to be line {later + 1})" if later is not None else ""
        return (
            f"; line {header_line} starts with '#': allolaw takes the first non-blank line as "
            f"the header, so delete comment lines above it{where}"
        )
    folded = {h.casefold(): h for h in header}
    near = [(c, folded[c.casefold()]) for c in missing if c.casefold() in folded]
    if near:
        pairs = ", ".join(f"{h!r} for {c!r}" for c, h in near)
        return f"; the header has {pairs}: names must match exactly, letter case included"
    return _delimiter_hint(lines[header_line - 1], delimiter, columns)


def _delimiter_hint(header_line: str, delimiter: str, columns: list[str]) -> str:
    for other in (",", "\t", ";", "|"):
        if other == delimiter or other not in header_line:
            continue
        cells = [c.strip() for c in next(csv.reader([header_line], delimiter=other))]
        if all(c in cells for c in columns):
            return (
                f"; the file looks {_NAMES[other]}-separated, not "
                f"{_NAMES.get(delimiter, repr(delimiter))}-separated: set "
                f"`delimiter: \"{_shown(other)}\"` for this source"
            )
    return ""


def _check_header(path: Path, header: list[str], line: int) -> None:
    seen: dict[str, int] = {}
    for position, name in enumerate(header, start=1):
        if not name:
            continue
        if name in seen:
            msg = (
                f"{path}, line {line}: duplicate column name {name!r} "
                f"(fields {seen[name]} and {position}); every column needs its own name"
            )
            raise UserError(msg)
        seen[name] = position
