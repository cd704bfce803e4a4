"""Rows: one source's data lines checked, converted to canonical units, kept or dropped.

Each data line becomes one entry of :class:`Rows` with its file, line, species and either an
empty reason (usable, with its values in canonical units) or the reason it is dropped. Checks
that concern a whole column run first over every line and stop the stage: a unit column whose
cells differ only in letter case (``mg`` and ``Mg``), a numeric column written with decimal
commas, a numeric column without a single number.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, NamedTuple

from allolaw.errors import UserError, format_location
from allolaw.intake.cells import (
    has_decimal_comma,
    has_decimal_point,
    is_missing,
    normalise_name,
    parse_number,
)
from allolaw.intake.reading import Table
from allolaw.intake.units import Conversion, conversion

__all__ = ["ROLE_KEYS", "Rows", "parse_rows"]

ROLE_KEYS = ("size", "trait", "size_sd", "trait_sd")


@dataclass
class Rows:
    """Per data line: where it came from, its values, and its fate so far (``""`` = usable).

    ``values[i]`` holds ``size``, ``trait``, ``size_sd``, ``trait_sd`` (canonical units; SDs NaN
    when not given), ``levels`` and ``cov`` (dicts by level and covariate name), ``source``
    and ``sd_scale``.
    """

    file: list[str] = field(default_factory=list)
    line: list[int] = field(default_factory=list)
    species: list[str] = field(default_factory=list)
    reason: list[str] = field(default_factory=list)
    values: list[dict[str, Any]] = field(default_factory=list)
    renamed: int = 0  # names changed by Unicode normalisation (not by spaces alone)

    def add(self, file: str, line: int, species: str, reason: str,
            values: dict[str, Any]) -> None:
        """Append one data line."""
        self.file.append(file)
        self.line.append(line)
        self.species.append(species)
        self.reason.append(reason)
        self.values.append(values)


class _Column(NamedTuple):
    key: str  # a role key, or "cov:<name>"
    column: str  # column of the file
    canonical: str | None  # canonical unit, None for a plain number
    quantity: str | None
    unit_key: str | None  # key of `units` / `unit_columns` that gives its unit


@dataclass
class _Source:
    file: str
    label: str
    index: dict[str, int]
    species: str
    levels: list[tuple[str, str]]  # (level name, column)
    numeric: list[_Column]
    units: dict[str, str]
    unit_columns: dict[str, str]
    label_column: str | None
    sd_scale: str
    energy: float


def parse_rows(table: Table, source: dict[str, Any], ds: dict[str, Any], *,
               levels: list[str], covariates: list[str], covariate_units: dict[str, str],
               energy: float, rows: Rows,
               conversions: dict[tuple[str, str, str, str], dict[str, Any]]) -> None:
    """Check and convert every data line of ``table``; append them to ``rows``.

    Raises
    ------
    UserError
        A value column without a unit, unit cells differing only in case, an unknown or
        wrong-kind unit, decimal commas in a column, a column without any number.
    """
    src = _source_plan(table, source, ds, levels, covariates, covariate_units, energy)
    _check_columns(table, src)
    cache: dict[tuple[str, str], Conversion] = {}
    seen: dict[tuple[str, ...], int] = {}
    width = len(table.header)
    for record in table.records:
        cells = record.cells
        at = src.index[src.species]
        species_cell = cells[at] if at < len(cells) else ""
        species = normalise_name(species_cell)
        if record.problem:
            rows.add(src.file, record.line, species, record.problem, {})
            continue
        if len(cells) < width or any(c.strip() for c in cells[width:]):
            reason = (f"has {len(cells)} fields, the header has {width} (stray or missing "
                      "delimiter?)")
            rows.add(src.file, record.line, species, reason, {})
            continue
        cells = cells[:width]
        if species != " ".join(species_cell.split()):
            rows.renamed += 1
        reason, values = _row_values(src, record.line, cells, species, cache, conversions)
        if not reason:
            key_cells = tuple(c.strip() for c in cells)
            first = seen.setdefault(key_cells, record.line)
            if first != record.line:
                reason = f"exact duplicate of line {first} (every cell identical)"
        rows.add(src.file, record.line, species, reason, values)


def _row_values(src: _Source, line: int, cells: list[str], species: str,
                cache: dict[tuple[str, str], Conversion],
                conversions: dict[tuple[str, str, str, str], dict[str, Any]],
                ) -> tuple[str, dict[str, Any]]:
    """The reason a line is dropped (or ``""``) and its values in canonical units."""
    if is_missing(species):
        return f"missing species in column {src.species!r}", {}
    values: dict[str, Any] = {"sd_scale": src.sd_scale, "levels": {}, "cov": {}}
    for level, column in src.levels:
        taxon = normalise_name(cells[src.index[column]])
        if is_missing(taxon):
            return f"missing taxon in column {column!r} ({level})", {}
        values["levels"][level] = taxon
    for col in src.numeric:
        text = cells[src.index[col.column]].strip()
        number, problem = parse_number(text)
        is_sd = col.key.endswith("_sd")
        if problem == "missing" and is_sd:
            values[col.key] = float("nan")
            continue
        if problem == "missing":
            return f"missing value in column {col.column!r} (cell {text!r})", {}
        if problem:
            return f"{problem} in column {col.column!r}: {text!r}", {}
        if not math.isfinite(number):
            return f"non-finite value in column {col.column!r}: {text!r}", {}
        if col.key in ("size", "trait") and number <= 0:
            return f"non-positive value in column {col.column!r}: {text!r} (log undefined)", {}
        if is_sd and number < 0:
            return f"negative SD in column {col.column!r}: {text!r}", {}
        if col.canonical is not None:
            unit, reason = _unit_of(src, col, cells)
            if reason:
                return reason, {}
            conv = _conversion(src, col, unit, line, cache, conversions)
            number = number * conv.factor + conv.offset
            if not math.isfinite(number) or (col.key in ("size", "trait") and number <= 0):
                return (
                    f"value out of range after conversion to {col.canonical} in column "
                    f"{col.column!r}: {text} {unit} is {number:g} {col.canonical}"
                ), {}
        if col.key.startswith("cov:"):
            values["cov"][col.key[4:]] = number
        else:
            values[col.key] = number
    label = cells[src.index[src.label_column]].strip() if src.label_column else ""
    values["source"] = label if not is_missing(label) else src.label
    return "", values


def _unit_of(src: _Source, col: _Column, cells: list[str]) -> tuple[str, str]:
    assert col.unit_key is not None
    if col.unit_key in src.unit_columns:
        unit_column = src.unit_columns[col.unit_key]
        unit = cells[src.index[unit_column]].strip()
        if is_missing(unit):
            return unit, f"missing unit in column {unit_column!r} for {col.column!r}"
        return unit, ""
    return src.units[col.unit_key], ""


def _conversion(src: _Source, col: _Column, unit: str, line: int,
                cache: dict[tuple[str, str], Conversion],
                conversions: dict[tuple[str, str, str, str], dict[str, Any]]) -> Conversion:
    assert col.canonical is not None
    assert col.unit_key is not None
    conv = cache.get((col.key, unit))
    if conv is None:
        unit_column = src.unit_columns.get(col.unit_key)
        where = (
            format_location(src.file, line, unit_column, unit)
            if unit_column
            else f"{src.file}: units.{col.unit_key} of column {col.column!r}"
        )
        conv = conversion(unit, col.canonical, col.quantity, energy_per_ml_o2_joule=src.energy,
                          where=where)
        if col.key.endswith("_sd") and conv.offset != 0.0:
            msg = f"{where}: an SD cannot be in an offset unit ({unit!r})"
            raise UserError(msg)
        cache[(col.key, unit)] = conv
        conversions[(src.file, col.column, unit, col.canonical)] = {
            "file": src.file, "column": col.column, **conv.to_dict(), "rows": 0,
        }
    conversions[(src.file, col.column, unit, col.canonical)]["rows"] += 1
    return conv


def _source_plan(table: Table, source: dict[str, Any], ds: dict[str, Any], levels: list[str],
                 covariates: list[str], covariate_units: dict[str, str],
                 energy: float) -> _Source:
    cols = source["columns"]
    file = str(source["file"])
    units = dict(source.get("units") or {})
    unit_columns = dict(source.get("unit_columns") or {})
    sd_scale = source.get("sd_scale", "original")
    for name in covariates:
        if name in ROLE_KEYS and (name in units or name in unit_columns):
            msg = (
                f"{file}: covariate column {name!r} has the name of a role key, so "
                f"`units: {{{name}: ...}}` is ambiguous; rename the column in the file"
            )
            raise UserError(msg)
        if (name in units or name in unit_columns) and name not in covariate_units:
            msg = (
                f"{file}: covariate {name!r} has a unit in the source but no canonical unit: "
                f"add it under `covariates:` of the dataset (e.g. {{{name}: K}})"
            )
            raise UserError(msg)
    numeric = [
        _Column("size", cols["size"], ds["size"]["unit"], ds["size"]["quantity"], "size"),
        _Column("trait", cols["trait"], ds["trait"]["unit"], ds["trait"]["quantity"], "trait"),
    ]
    for key in ("size_sd", "trait_sd"):
        if cols.get(key):
            axis = key.removesuffix("_sd")
            if sd_scale == "log":
                numeric.append(_Column(key, cols[key], None, None, None))
            else:
                given = key in units or key in unit_columns
                numeric.append(_Column(key, cols[key], ds[axis]["unit"], ds[axis]["quantity"],
                                       key if given else axis))
    for name in covariates:
        canonical = covariate_units.get(name)
        numeric.append(_Column(f"cov:{name}", name, canonical, None,
                               name if canonical else None))
    for col in numeric:
        if col.canonical is not None and col.unit_key not in units | unit_columns:
            msg = (
                f"{file}: column {col.column!r} ({col.key.removeprefix('cov:')}) has no unit: "
                f"give `units: {{{col.unit_key}: ...}}` or `unit_columns: "
                f"{{{col.unit_key}: <column>}}` for this source (canonical unit: {col.canonical})"
            )
            raise UserError(msg)
    known = {c.unit_key for c in numeric if c.unit_key} | {c.key for c in numeric}
    for setting, mapping in (("unit_columns", unit_columns), ("units", units)):
        for key in mapping:
            if key not in known:
                msg = f"{file}: {setting} key {key!r} is not a mapped numeric column"
                raise UserError(msg)
    return _Source(
        file=file, label=table.label,
        index={name: i for i, name in enumerate(table.header) if name},
        species=cols["species"],
        levels=list(zip(levels, cols.get("levels", []), strict=True)),
        numeric=numeric, units=units, unit_columns=unit_columns,
        label_column=cols.get("source"), sd_scale=sd_scale, energy=energy,
    )


def _check_columns(table: Table, src: _Source) -> None:
    """Whole-column checks over every well-formed line, before any row is parsed."""
    width = len(table.header)
    unit_seen: dict[str, dict[str, tuple[str, int]]] = {c: {} for c in src.unit_columns.values()}
    styles = {c.column: {"comma": [], "point": 0, "number": 0, "other": []} for c in src.numeric}
    for line, cells, problem in table.records:
        if problem or len(cells) < width:
            continue
        for column, seen in unit_seen.items():
            unit = cells[src.index[column]].strip()
            if is_missing(unit):
                continue
            first = seen.setdefault(unit.casefold(), (unit, line))
            if first[0] != unit:
                where = format_location(src.file, line, column, unit)
                msg = (
                    f"{where}: differs only in letter case from {first[0]!r} on line "
                    f"{first[1]}; letter case changes a unit (mg is milligram, Mg megagram): "
                    "write one spelling"
                )
                raise UserError(msg)
        for column, style in styles.items():
            text = cells[src.index[column]].strip()
            if has_decimal_comma(text):
                style["comma"].append((line, text))
            elif not parse_number(text)[1]:
                style["number"] += 1
                style["point"] += has_decimal_point(text)
            elif not is_missing(text):
                style["other"].append((line, text))
    for column, style in styles.items():
        if style["comma"] and not style["point"]:
            line, text = style["comma"][0]
            where = format_location(src.file, line, column, text)
            msg = (
                f"{where}: this column writes decimal commas ({len(style['comma'])} "
                "cells, and no cell with a decimal point); allolaw reads decimal points only: "
                "save the file with '.' as the decimal mark"
            )
            raise UserError(msg)
        if style["other"] and not style["number"] and not style["comma"]:
            line, text = style["other"][0]
            where = format_location(src.file, line, column, text)
            msg = (
                f"{where}: no cell of this column is a number ({len(style['other'])} cells); "
                "is the column mapping right?"
            )
            raise UserError(msg)
