"""The prepare stage: read source tables, convert units, validate, aggregate species.

One dataset of the config may have several source files (CSV or TSV). Each data row is read
with its file and line number, checked, converted to the canonical units of the dataset, and
then either used or dropped with a reason. Usable rows of one species are merged into one
species row (mean of natural logs). Every input row ends in the ledger as ``kept``, ``merged``
or ``dropped``, and the code checks that the three add up to the input.

Problems in a row that make it unusable (a missing or non-positive value, text in a numeric
cell, a missing taxon, an exact duplicate line) drop the row with a reason. Problems with the
structure (a missing file or column, an unknown unit, an empty file, one species placed in two
taxa) stop with :class:`allolaw.errors.UserError` naming file, line, column and value.

One species placed in two taxa is an error, not a drop: the taxonomy is then ambiguous and
either reading would bias the taxon estimates; the message lists every row involved so the
user can fix the table. The same holds for a taxon placed under two parent taxa.
"""

from __future__ import annotations

import csv
import hashlib
import io
import itertools
import json
import logging
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from allolaw import __version__
from allolaw.config import dataset_config
from allolaw.errors import UserError, format_location
from allolaw.io import atomic_path, write_json
from allolaw.paths import clean_path, ledger_path, prepared_path
from allolaw.units import DEFAULT_ENERGY_PER_ML_O2_JOULE, Conversion, check_unit, conversion

__all__ = [
    "LEDGER_COLUMNS",
    "MISSING_STRINGS",
    "aggregate_species",
    "prepare_dataset",
    "read_clean",
    "read_prepared",
    "robust_z",
]

log = logging.getLogger(__name__)

LEDGER_COLUMNS = ["file", "line", "species", "fate", "merged_into", "reason"]

# Cell texts read as "missing" (compared after stripping spaces, case-insensitive).
MISSING_STRINGS = frozenset(
    {"", "na", "n/a", "n.a.", "nan", "null", "none", "missing", "?", "-", "—", "–", "#n/a"}
)

# 1.4826 × MAD estimates the SD of a normal distribution (Rousseeuw & Croux 1993, eq. 1.3).
_MAD_TO_SD = 1.482602218505602
_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
_INFINITE = frozenset({"inf", "+inf", "-inf", "infinity", "+infinity", "-infinity"})
_DECIMAL_COMMA = re.compile(r"^[+-]?\d+,\d+$")
_PROGRESS_EVERY = 100_000
_THEIL_SEN_MAX_ROWS = 2000


@dataclass
class _Table:
    """One source file as read: header, data rows with their line numbers, and facts."""

    path: Path
    label: str
    header: list[str]
    rows: list[tuple[int, list[str]]]
    delimiter: str
    sha256: str
    blank_lines: int


@dataclass
class _Rows:
    """Per input row: where it came from, its parsed values, and its fate so far."""

    file: list[str] = field(default_factory=list)
    line: list[int] = field(default_factory=list)
    species: list[str] = field(default_factory=list)
    reason: list[str] = field(default_factory=list)  # "" while usable
    values: list[dict[str, Any]] = field(default_factory=list)


def prepare_dataset(config: dict[str, Any], dataset: str) -> str:
    """Read, convert, validate and aggregate one dataset; write its three outputs.

    Writes ``clean.csv`` (one row per species), ``ledger.csv`` (one row per input row) and
    ``prepared.json`` under ``<results_dir>/<dataset>/``, each atomically.

    Parameters
    ----------
    config
        The validated batch config (defaults filled), as from :func:`allolaw.config.load_config`.
    dataset
        Name of the dataset under ``datasets:``.

    Returns
    -------
    str
        A one-line summary: rows read, species kept, rows merged and dropped.

    Raises
    ------
    UserError
        For structural problems: missing file or column, unknown unit, empty file, header only,
        duplicate header names, wrong delimiter, conflicting taxonomy, no usable row.
    """
    ds = dataset_config(config, dataset)
    energy = float(config.get("energy_per_ml_o2_joule", DEFAULT_ENERGY_PER_ML_O2_JOULE))
    levels = _dataset_levels(ds, dataset)
    covariate_units: dict[str, str] = dict(ds.get("covariates") or {})
    covariates = _dataset_covariates(ds, dataset)
    where_cfg = f"config datasets.{dataset}"
    check_unit(ds["size"]["unit"], ds["size"]["quantity"], where=f"{where_cfg}.size.unit")
    check_unit(ds["trait"]["unit"], ds["trait"]["quantity"], where=f"{where_cfg}.trait.unit")
    for name, unit in covariate_units.items():
        check_unit(unit, None, where=f"{where_cfg}.covariates.{name}")

    rows = _Rows()
    sources: list[dict[str, Any]] = []
    conversions: dict[tuple[str, str, str, str], dict[str, Any]] = {}
    for source in ds["sources"]:
        table = _read_table(source)
        sources.append(
            {
                "file": str(source["file"]),
                "label": table.label,
                "sha256": table.sha256,
                "rows": len(table.rows),
                "delimiter": table.delimiter,
                "blank_lines_ignored": table.blank_lines,
            }
        )
        _parse_rows(
            table,
            source,
            ds,
            levels=levels,
            covariates=covariates,
            covariate_units=covariate_units,
            energy=energy,
            rows=rows,
            conversions=conversions,
        )

    n_input = len(rows.line)
    usable = [i for i, r in enumerate(rows.reason) if not r]
    if not usable:
        msg = (
            f"dataset '{dataset}': none of the {n_input} input rows is usable; "
            f"first reason: {rows.file[0]}, line {rows.line[0]}: {rows.reason[0]}"
        )
        raise UserError(msg)
    frame = _usable_frame(rows, usable, levels, covariates)
    _check_taxonomy(frame, levels)

    outlier_cfg = ds.get("outliers") or {}
    threshold = float(outlier_cfg.get("robust_z", 5.0))
    remove = bool(outlier_cfg.get("remove", False))
    flags = _flag_outliers(frame, threshold=threshold)
    frame["flag_note"] = ""
    for idx, note in flags.items():
        frame.loc[idx, "flag_note"] = note
    if remove and flags:
        for idx, note in flags.items():
            rows.reason[int(frame.loc[idx, "row"])] = f"outlier removed ({note})"
        frame = frame.drop(index=list(flags)).reset_index(drop=True)
        if frame.empty:
            msg = f"dataset '{dataset}': every usable row was removed as an outlier"
            raise UserError(msg)

    clean, pooled = aggregate_species(frame, levels=levels, covariates=covariates)
    singletons = _singleton_taxa(clean, levels)
    clean["flag_singleton_taxon"] = False
    for level, taxa in singletons.items():
        clean.loc[clean[level].isin(taxa), "flag_singleton_taxon"] = True
    outlier_species = set(frame.loc[frame["flag_note"] != "", "species"])
    clean["flag_outlier"] = clean["species"].isin(outlier_species)
    clean = _order_clean(clean, levels, covariates)

    ledger = _ledger(rows, frame)
    counts = ledger["fate"].value_counts().to_dict()
    n_kept = int(counts.get("kept", 0))
    n_merged = int(counts.get("merged", 0))
    n_dropped = int(counts.get("dropped", 0))
    if n_input != n_kept + n_merged + n_dropped or len(ledger) != n_input:
        msg = (
            f"ledger does not add up: {n_input} input rows != {n_kept} kept + {n_merged} "
            f"merged + {n_dropped} dropped"
        )
        raise RuntimeError(msg)
    if n_kept != len(clean):
        msg = f"ledger has {n_kept} kept rows but clean.csv has {len(clean)} species"
        raise RuntimeError(msg)

    reference_size = ds.get("reference_size")
    if reference_size is None:
        log_reference = float(clean["log_size"].mean())
        reference_size = math.exp(log_reference)
        reference_rule = "geometric mean of the species sizes"
    else:
        reference_size = float(reference_size)
        log_reference = math.log(reference_size)
        reference_rule = "config"
    results = config.get("results_dir", "results")
    drop_reasons = (
        ledger.loc[ledger["fate"] == "dropped", "reason"].map(_reason_kind).value_counts()
    )
    prepared = {
        "dataset": dataset,
        "allolaw_version": __version__,
        "canonical_units": {
            "size": ds["size"]["unit"],
            "trait": ds["trait"]["unit"],
            "covariates": covariate_units,
        },
        "quantities": {"size": ds["size"]["quantity"], "trait": ds["trait"]["quantity"]},
        "reference_size": reference_size,
        "log_reference_size": log_reference,
        "reference_size_rule": reference_rule,
        "levels": levels,
        "covariates": covariates,
        "sources": sources,
        "conversions": sorted(
            conversions.values(), key=lambda c: (c["file"], c["column"], c["from"])
        ),
        "energy_per_ml_o2_joule": energy,
        "counts": {
            "input": n_input,
            "kept": n_kept,
            "merged": n_merged,
            "dropped": n_dropped,
            "species": len(clean),
        },
        "drop_reasons": {str(k): int(v) for k, v in drop_reasons.items()},
        "missing_strings": sorted(MISSING_STRINGS),
        "pooled_within_sd": pooled,
        "outliers": {
            "robust_z": threshold,
            "removed": remove,
            "rows": [
                {"file": str(file), "line": int(line), "species": species, "note": note}
                for file, line, species, note in _flag_rows(rows, frame)
            ],
            "species": sorted(outlier_species),
        },
        "singleton_taxa": singletons,
    }
    out_clean = clean_path(results, dataset)
    with atomic_path(out_clean) as tmp:
        clean.to_csv(tmp, index=False, lineterminator="\n")
    with atomic_path(ledger_path(results, dataset)) as tmp:
        ledger.to_csv(tmp, index=False, lineterminator="\n")
    write_json(prepared_path(results, dataset), prepared)
    summary = (
        f"{dataset}: {n_input} input rows → {len(clean)} species "
        f"({n_kept} kept, {n_merged} merged, {n_dropped} dropped); "
        f"wrote {out_clean.parent}/"
    )
    log.info(summary)
    return summary


def read_clean(results_dir: str | Path, dataset: str) -> pd.DataFrame:
    """Read ``clean.csv`` of a prepared dataset (taxon and species columns as text).

    Raises
    ------
    UserError
        If the dataset has not been prepared.
    """
    path = clean_path(results_dir, dataset)
    prepared = read_prepared(results_dir, dataset)
    if not path.is_file():
        msg = f"{path} not found: run `allolaw prepare --dataset {dataset}` first"
        raise UserError(msg)
    text = {"species", *prepared.get("levels", []), "source", "sd_source_size",
            "sd_source_trait"}
    frame = pd.read_csv(path, dtype=str, keep_default_na=False)
    for name in frame.columns:
        if name in text:
            continue
        if name.startswith("flag_"):
            frame[name] = frame[name].map({"True": True, "False": False}).astype(bool)
        elif name == "n_rows":
            frame[name] = frame[name].astype(int)
        else:
            frame[name] = pd.to_numeric(frame[name].replace("", np.nan)).astype(float)
    return frame


def read_prepared(results_dir: str | Path, dataset: str) -> dict[str, Any]:
    """Read ``prepared.json`` of a prepared dataset.

    Raises
    ------
    UserError
        If the dataset has not been prepared.
    """
    path = prepared_path(results_dir, dataset)
    if not path.is_file():
        msg = f"{path} not found: run `allolaw prepare --dataset {dataset}` first"
        raise UserError(msg)
    return json.loads(path.read_text(encoding="utf-8"))


def aggregate_species(
    rows: pd.DataFrame, *, levels: list[str], covariates: list[str] | None = None
) -> tuple[pd.DataFrame, dict[str, Any]]:
    """Merge usable rows into one row per species, on the natural-log scale.

    Parameters
    ----------
    rows
        One row per usable input row with columns ``species``, the level columns, ``source``,
        ``log_size``, ``log_trait``, ``sd_log_size_row``, ``sd_log_trait_row`` (NaN where no SD
        column was given) and ``cov_<name>``.
    levels
        Taxon level columns, outer → inner.
    covariates
        Covariate names (columns ``cov_<name>``).

    Returns
    -------
    clean : DataFrame
        ``log_size``/``log_trait`` = mean of logs; ``within_sd_log_*`` = SD of logs between
        replicates (ddof 1; NaN for one replicate); ``sd_log_*`` = SD of the species mean:
        ``given`` when every row has an SD (sqrt(Σ sdᵢ²)/n), else ``replicates`` (within SD /
        sqrt(n)) for n ≥ 2, else ``pooled`` (pooled within SD / sqrt(1)), else ``none`` (NaN)
        when no species of the dataset has two replicates.
    pooled : dict
        The pooled within-species SD per axis and the species and degrees of freedom behind it.

    Notes
    -----
    The pooled within-species SD is the usual pooled standard deviation,
    ``sqrt(Σₛ (nₛ − 1) sₛ² / Σₛ (nₛ − 1))`` over species with nₛ ≥ 2 usable replicates.
    """
    covariates = covariates or []
    groups = rows.groupby("species", sort=False)
    clean = groups[levels].first() if levels else pd.DataFrame(index=groups.size().index)
    clean["n_rows"] = groups.size()
    pooled: dict[str, Any] = {}
    for axis in ("size", "trait"):
        col = f"log_{axis}"
        clean[col] = groups[col].mean()
        clean[f"within_sd_{col}"] = groups[col].std(ddof=1)
        multi = clean["n_rows"] >= 2
        dof = (clean.loc[multi, "n_rows"] - 1).sum()
        if dof > 0:
            pooled_sd = float(
                np.sqrt(
                    ((clean.loc[multi, "n_rows"] - 1) * clean.loc[multi, f"within_sd_{col}"] ** 2)
                    .sum() / dof
                )
            )
        else:
            pooled_sd = float("nan")
        pooled[axis] = {
            "sd": None if math.isnan(pooled_sd) else pooled_sd,
            "species": int(multi.sum()),
            "dof": int(dof),
        }
        row_sd = rows[f"sd_log_{axis}_row"]
        given_all = groups[f"sd_log_{axis}_row"].count() == clean["n_rows"]
        given_sd = np.sqrt((row_sd**2).groupby(rows["species"], sort=False).sum()) / clean[
            "n_rows"
        ]
        replicate_sd = clean[f"within_sd_{col}"] / np.sqrt(clean["n_rows"])
        sd = np.where(given_all, given_sd, np.where(multi, replicate_sd, pooled_sd))
        src = np.where(
            given_all,
            "given",
            np.where(multi, "replicates", "none" if math.isnan(pooled_sd) else "pooled"),
        )
        clean[f"sd_{col}"] = sd
        clean[f"sd_source_{axis}"] = src
    for name in covariates:
        clean[f"cov_{name}"] = groups[f"cov_{name}"].mean()
    clean["source"] = groups["source"].unique().map(lambda labels: ";".join(sorted(labels)))
    clean = clean.reset_index()
    return clean, pooled


def robust_z(values: Any) -> np.ndarray:
    """Robust z-scores ``(x − median) / (1.4826 · MAD)``; zeros when the MAD is 0.

    References
    ----------
    Rousseeuw, P. J. & Croux, C. (1993). Alternatives to the median absolute deviation.
    Journal of the American Statistical Association 88, 1273–1283.
    Iglewicz, B. & Hoaglin, D. C. (1993). How to Detect and Handle Outliers. ASQC.
    """
    x = np.asarray(values, dtype=float)
    centre = np.median(x)
    mad = np.median(np.abs(x - centre)) * _MAD_TO_SD
    if not mad > 0:
        return np.zeros_like(x)
    return (x - centre) / mad


# ----------------------------------------------------------------------------------------------
# reading


def _read_table(source: dict[str, Any]) -> _Table:
    path = Path(source["file"])
    if not path.is_file():
        msg = f"{path}: source file not found (paths are relative to the folder you run from)"
        raise UserError(msg)
    try:
        raw = path.read_bytes()
    except OSError as err:
        msg = f"{path}: cannot read the file ({err.strerror})"
        raise UserError(msg) from None
    digest = hashlib.sha256(raw).hexdigest()
    try:
        text = raw.decode("utf-8-sig")  # strips a byte-order mark if there is one
    except UnicodeDecodeError as err:
        line = raw[: err.start].count(b"\n") + 1
        msg = (
            f"{path}, line {line}: not UTF-8 text (byte {raw[err.start]:#04x} at offset "
            f"{err.start}); save the file as UTF-8"
        )
        raise UserError(msg) from None
    if not text.strip():
        msg = f"{path}: the file is empty"
        raise UserError(msg)
    delimiter = _delimiter(source, path)
    records = _records(text, delimiter, path)
    blank = 0
    header: list[str] | None = None
    header_line = 0
    rows: list[tuple[int, list[str]]] = []
    for line, cells in records:
        if not any(c.strip() for c in cells):
            blank += 1
            continue
        if header is None:
            header = [c.strip() for c in cells]
            header_line = line
            continue
        rows.append((line, cells))
        if len(rows) % _PROGRESS_EVERY == 0:
            log.info("%s: read %d rows", path, len(rows))
    assert header is not None  # the text is not blank, so one record has a non-empty cell
    _check_header(path, header, header_line)
    columns = _mapped_columns(source)
    missing = [c for c in columns if c not in header]
    if missing:
        first_line = text.splitlines()[header_line - 1] if text.splitlines() else ""
        msg = (
            f"{path}, line {header_line}: mapped column(s) {', '.join(map(repr, missing))} "
            f"not in the header (columns read: {', '.join(map(repr, header))})"
            f"{_delimiter_hint(first_line, delimiter, columns)}"
        )
        raise UserError(msg)
    if not rows:
        msg = f"{path}: the file has a header (line {header_line}) but no data rows"
        raise UserError(msg)
    label = str(source.get("label") or path.stem)
    return _Table(path, label, header, rows, delimiter, digest, blank)


def _records(text: str, delimiter: str, path: Path) -> list[tuple[int, list[str]]]:
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter)
    records = []
    previous = 0
    try:
        for cells in reader:
            records.append((previous + 1, cells))
            previous = reader.line_num
    except csv.Error as err:
        msg = f"{path}, line {reader.line_num}: cannot split into fields ({err})"
        raise UserError(msg) from None
    return records


def _delimiter(source: dict[str, Any], path: Path) -> str:
    setting = source.get("delimiter", "auto")
    if setting and setting != "auto":
        return setting
    return "\t" if path.suffix.lower() in {".tsv", ".tab"} else ","


def _delimiter_hint(header_line: str, delimiter: str, columns: list[str]) -> str:
    names = {",": "comma", "\t": "tab", ";": "semicolon", "|": "pipe"}
    for other in (",", "\t", ";", "|"):
        if other == delimiter or other not in header_line:
            continue
        cells = [c.strip() for c in next(csv.reader([header_line], delimiter=other))]
        if all(c in cells for c in columns):
            shown = "\\t" if other == "\t" else other
            return (
                f"; the file looks {names[other]}-separated, not {names[delimiter]}-separated: "
                f"set `delimiter: \"{shown}\"` for this source"
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


def _mapped_columns(source: dict[str, Any]) -> list[str]:
    cols = source["columns"]
    names = [cols["species"], cols["size"], cols["trait"], *cols.get("levels", [])]
    names += [cols[k] for k in ("size_sd", "trait_sd", "source") if cols.get(k)]
    names += list(cols.get("covariates", []))
    names += list((source.get("unit_columns") or {}).values())
    return list(dict.fromkeys(names))


# ----------------------------------------------------------------------------------------------
# parsing rows


def _parse_rows(
    table: _Table,
    source: dict[str, Any],
    ds: dict[str, Any],
    *,
    levels: list[str],
    covariates: list[str],
    covariate_units: dict[str, str],
    energy: float,
    rows: _Rows,
    conversions: dict[tuple[str, str, str, str], dict[str, Any]],
) -> None:
    cols = source["columns"]
    units = dict(source.get("units") or {})
    unit_columns = dict(source.get("unit_columns") or {})
    index = {name: i for i, name in enumerate(table.header) if name}
    file = str(source["file"])
    sd_scale = source.get("sd_scale", "original")
    for name in covariates:
        if (name in units or name in unit_columns) and name not in covariate_units:
            msg = (
                f"{file}: covariate {name!r} has a unit in the source but no canonical unit: "
                f"add it under `covariates:` of the dataset (e.g. {{{name}: K}})"
            )
            raise UserError(msg)

    # What each value key reads, and in which canonical unit it ends.
    numeric: dict[str, tuple[str, str | None, str | None]] = {
        "size": (cols["size"], ds["size"]["unit"], ds["size"]["quantity"]),
        "trait": (cols["trait"], ds["trait"]["unit"], ds["trait"]["quantity"]),
    }
    for key in ("size_sd", "trait_sd"):
        if cols.get(key):
            axis = key.removesuffix("_sd")
            if sd_scale == "log":
                numeric[key] = (cols[key], None, None)
            else:
                numeric[key] = (cols[key], ds[axis]["unit"], ds[axis]["quantity"])
    for name in covariates:
        numeric[name] = (name, covariate_units.get(name), None)
    for key, (column, canonical, _) in numeric.items():
        if canonical is None:
            continue
        if key in unit_columns or key in units:
            continue
        if key in ("size_sd", "trait_sd") and (key.removesuffix("_sd") in unit_columns
                                               or key.removesuffix("_sd") in units):
            continue  # an SD column is in the unit of its value unless told otherwise
        msg = (
            f"{file}: column {column!r} ({key}) has no unit: give `units: {{{key}: ...}}` or "
            f"`unit_columns: {{{key}: <column>}}` for this source (canonical unit: {canonical})"
        )
        raise UserError(msg)
    for key in unit_columns:
        if key not in numeric:
            msg = f"{file}: unit_columns key {key!r} is not a mapped numeric column"
            raise UserError(msg)
    for key in units:
        if key not in numeric:
            msg = f"{file}: units key {key!r} is not a mapped numeric column"
            raise UserError(msg)

    cache: dict[tuple[str, str], Conversion] = {}
    non_numeric: dict[str, list[tuple[int, str]]] = {k: [] for k in numeric}
    numeric_ok: dict[str, int] = dict.fromkeys(numeric, 0)
    seen_lines: dict[tuple[str, ...], int] = {}
    width = len(table.header)
    label_col = cols.get("source")

    for line, cells in table.rows:
        extra = cells[width:]
        if len(cells) < width or any(c.strip() for c in extra):
            reason = (
                f"has {len(cells)} fields, the header has {width} (stray or missing delimiter?)"
                if not any("\n" in c for c in cells)
                else f"has {len(cells)} fields, the header has {width}; a quote opened on this "
                "line runs over line ends (unclosed quote?)"
            )
            _add(rows, file, line, _cell(cells, index, cols["species"]), reason, {})
            continue
        cells = cells[:width]
        species = " ".join(cells[index[cols["species"]]].split())
        reason = ""
        values: dict[str, Any] = {"_sd_scale": sd_scale}
        if species.lower() in MISSING_STRINGS:
            reason = f"missing species in column {cols['species']!r}"
        for level, column in zip(levels, cols.get("levels", []), strict=True):
            if reason:
                break
            taxon = " ".join(cells[index[column]].split())
            if taxon.lower() in MISSING_STRINGS:
                reason = f"missing taxon in column {column!r} ({level})"
            values[level] = taxon
        for key, (column, canonical, quantity) in numeric.items():
            if reason:
                break
            text = cells[index[column]].strip()
            number, problem = _number(text)
            if problem == "missing":
                if key in ("size_sd", "trait_sd"):
                    values[key] = float("nan")
                    continue
                reason = f"missing value in column {column!r} (cell {text!r})"
                break
            if problem:
                non_numeric[key].append((line, text))
                reason = f"{problem} in column {column!r}: {text!r}"
                break
            numeric_ok[key] += 1
            if not math.isfinite(number):
                reason = f"non-finite value in column {column!r}: {text!r}"
                break
            if key in ("size", "trait") and number <= 0:
                reason = f"non-positive value in column {column!r}: {text!r} (log undefined)"
                break
            if key in ("size_sd", "trait_sd") and number < 0:
                reason = f"negative SD in column {column!r}: {text!r}"
                break
            if canonical is None:
                values[key] = number
                continue
            unit_key = key
            if key in ("size_sd", "trait_sd") and key not in unit_columns and key not in units:
                unit_key = key.removesuffix("_sd")
            if unit_key in unit_columns:
                unit_column = unit_columns[unit_key]
                unit = cells[index[unit_column]].strip()
                if unit.lower() in MISSING_STRINGS:
                    reason = f"missing unit in column {unit_column!r} for {column!r}"
                    break
            else:
                unit_column = None
                unit = units[unit_key]
            conv = cache.get((key, unit))
            if conv is None:
                where = (
                    format_location(file, line, unit_column, unit)
                    if unit_column
                    else f"{file}: units.{unit_key} of column {column!r}"
                )
                conv = conversion(unit, canonical, quantity, energy_per_ml_o2_joule=energy,
                                  where=where)
                if key in ("size_sd", "trait_sd") and conv.offset != 0.0:
                    msg = f"{where}: an SD cannot be in an offset unit ({unit!r})"
                    raise UserError(msg)
                cache[(key, unit)] = conv
                conversions[(file, column, unit, canonical)] = {
                    "file": file,
                    "column": column,
                    **conv.to_dict(),
                    "rows": 0,
                }
            conversions[(file, column, unit, canonical)]["rows"] += 1
            values[key] = number * conv.factor + conv.offset
        if not reason:
            key_cells = tuple(c.strip() for c in cells)
            first = seen_lines.get(key_cells)
            if first is not None:
                reason = f"exact duplicate of line {first} (every cell identical)"
            else:
                seen_lines[key_cells] = line
        if not reason:
            label = cells[index[label_col]].strip() if label_col else ""
            values["source"] = label if label.lower() not in MISSING_STRINGS else table.label
        _add(rows, file, line, species, reason, values)

    for key, bad in non_numeric.items():
        if bad and numeric_ok[key] == 0:
            line, text = bad[0]
            column = numeric[key][0]
            hint = (
                "; decimal commas? write 3.5, not 3,5" if _DECIMAL_COMMA.match(text) else
                "; is the column mapping right?"
            )
            where = format_location(file, line, column, text)
            msg = f"{where}: no cell of this column is a number ({len(bad)} cells){hint}"
            raise UserError(msg)


def _add(rows: _Rows, file: str, line: int, species: str, reason: str,
         values: dict[str, Any]) -> None:
    rows.file.append(file)
    rows.line.append(line)
    rows.species.append(species)
    rows.reason.append(reason)
    rows.values.append(values)


def _cell(cells: list[str], index: dict[str, int], column: str) -> str:
    i = index.get(column)
    return " ".join(cells[i].split()) if i is not None and i < len(cells) else ""


def _number(text: str) -> tuple[float, str]:
    if text.lower() in MISSING_STRINGS:
        return float("nan"), "missing"
    if _NUMBER.match(text):
        return float(text), ""
    if text.lower() in _INFINITE:
        return float(text), ""
    if _DECIMAL_COMMA.match(text):
        return float("nan"), "decimal comma, not a number,"
    return float("nan"), "not a number"


# ----------------------------------------------------------------------------------------------
# checks across rows


def _usable_frame(rows: _Rows, usable: list[int], levels: list[str],
                  covariates: list[str]) -> pd.DataFrame:
    records = []
    for i in usable:
        v = rows.values[i]
        size = v["size"]
        trait = v["trait"]
        record = {
            "row": i,
            "file": rows.file[i],
            "line": rows.line[i],
            "species": rows.species[i],
            **{level: v[level] for level in levels},
            "source": v["source"],
            "log_size": math.log(size),
            "log_trait": math.log(trait),
            "sd_log_size_row": _log_sd(v.get("size_sd"), size, v.get("_sd_scale")),
            "sd_log_trait_row": _log_sd(v.get("trait_sd"), trait, v.get("_sd_scale")),
        }
        for name in covariates:
            record[f"cov_{name}"] = v[name]
        records.append(record)
    return pd.DataFrame.from_records(records)


def _log_sd(sd: float | None, value: float, scale: str | None) -> float:
    if sd is None or math.isnan(sd):
        return float("nan")
    if scale == "log":
        return float(sd)
    # Delta method: SD(ln X) ≈ SD(X) / X (first-order Taylor expansion of ln at X).
    return float(sd) / value


def _check_taxonomy(frame: pd.DataFrame, levels: list[str]) -> None:
    if not levels:
        return
    # One species, one path of taxa.
    paths = frame.groupby("species", sort=False)[levels].nunique()
    conflicted = paths.index[(paths > 1).any(axis=1)].tolist()
    if conflicted:
        parts = []
        for species in conflicted:
            sub = frame.loc[frame["species"] == species, ["file", "line", *levels]]
            listing = "; ".join(
                f"{row[0]}, line {row[1]}: {' / '.join(map(str, row[2:]))}"
                for row in sub.itertuples(index=False, name=None)
            )
            parts.append(f"species {species!r} — {listing}")
        msg = (
            f"{len(conflicted)} species placed in more than one taxon ({' / '.join(levels)}); "
            f"every row involved: {' | '.join(parts)}; fix the table so each species has one "
            "taxon"
        )
        raise UserError(msg)
    # One taxon, one parent.
    for outer, inner in itertools.pairwise(levels):
        parents = frame.groupby(inner, sort=False)[outer].nunique()
        bad = parents.index[parents > 1].tolist()
        if bad:
            taxon = bad[0]
            sub = frame[frame[inner] == taxon]
            listing = "; ".join(
                f"{f}, line {ln}: {o}" for f, ln, o in zip(sub["file"], sub["line"], sub[outer],
                                                           strict=True)
            )
            msg = (
                f"{inner} {taxon!r} is placed in more than one {outer}: {listing}; "
                "fix the table so each taxon has one parent"
            )
            raise UserError(msg)


def _flag_outliers(frame: pd.DataFrame, *, threshold: float) -> dict[int, str]:
    """Robust z of log size, and of the log-trait residual from a Theil–Sen line.

    References
    ----------
    Theil, H. (1950). A rank-invariant method of linear and polynomial regression analysis.
    Sen, P. K. (1968). Estimates of the regression coefficient based on Kendall's tau. JASA 63.
    """
    from scipy.stats import theilslopes

    if len(frame) < 5:
        return {}
    x = frame["log_size"].to_numpy()
    y = frame["log_trait"].to_numpy()
    if len(x) > _THEIL_SEN_MAX_ROWS:
        # The line only centres the residuals; an evenly spaced subset keeps it O(n).
        pick = np.linspace(0, len(x) - 1, _THEIL_SEN_MAX_ROWS).astype(int)
        slope, intercept, *_ = theilslopes(y[pick], x[pick])
    else:
        slope, intercept, *_ = theilslopes(y, x)
    z_size = robust_z(x)
    z_resid = robust_z(y - (intercept + slope * x))
    flags: dict[int, str] = {}
    for idx, zs, zr in zip(frame.index, z_size, z_resid, strict=True):
        notes = []
        if abs(zs) > threshold:
            notes.append(f"robust z of log size {zs:.1f}")
        if abs(zr) > threshold:
            notes.append(f"robust z of log trait residual {zr:.1f}")
        if notes:
            flags[int(idx)] = "; ".join(notes) + f" beyond ±{threshold:g}"
    return flags


def _flag_rows(rows: _Rows, frame: pd.DataFrame) -> list[tuple[str, int, str, str]]:
    # Flagged rows, whether still in the frame or removed (then their reason says so).
    out = []
    prefix = "outlier removed ("
    for i, reason in enumerate(rows.reason):
        if reason.startswith(prefix):
            out.append((rows.file[i], rows.line[i], rows.species[i], reason[len(prefix):-1]))
    flagged = frame[frame["flag_note"] != ""]
    out += list(flagged[["file", "line", "species", "flag_note"]].itertuples(index=False,
                                                                             name=None))
    return sorted(out)


def _singleton_taxa(clean: pd.DataFrame, levels: list[str]) -> dict[str, list[str]]:
    out: dict[str, list[str]] = {}
    for level in levels:
        counts = clean.groupby(level)["species"].nunique()
        out[level] = sorted(str(t) for t in counts.index[counts == 1])
    return out


def _order_clean(clean: pd.DataFrame, levels: list[str], covariates: list[str]) -> pd.DataFrame:
    columns = [
        "species",
        *levels,
        "log_size",
        "log_trait",
        "n_rows",
        "within_sd_log_size",
        "within_sd_log_trait",
        "sd_log_size",
        "sd_log_trait",
        "sd_source_size",
        "sd_source_trait",
        *[f"cov_{c}" for c in covariates],
        "source",
        "flag_outlier",
        "flag_singleton_taxon",
    ]
    return clean.sort_values([*levels, "species"], kind="stable")[columns].reset_index(drop=True)


def _ledger(rows: _Rows, frame: pd.DataFrame) -> pd.DataFrame:
    fate = ["dropped" if r else "" for r in rows.reason]
    merged_into = [""] * len(fate)
    reason = list(rows.reason)
    notes = dict(zip(frame["row"], frame["flag_note"], strict=True))
    seen: set[str] = set()
    for i in frame["row"]:  # input order: files in config order, then line
        species = rows.species[i]
        note = f"flagged: {notes[i]}" if notes.get(i) else ""
        if species in seen:
            fate[i] = "merged"
            merged_into[i] = species
            reason[i] = "; ".join(x for x in ("replicate merged into the species mean", note) if x)
        else:
            seen.add(species)
            fate[i] = "kept"
            reason[i] = note
    ledger = pd.DataFrame(
        {
            "file": rows.file,
            "line": rows.line,
            "species": rows.species,
            "fate": fate,
            "merged_into": merged_into,
            "reason": reason,
        },
        columns=LEDGER_COLUMNS,
    )
    if (ledger["fate"] == "").any():
        msg = "internal error: a usable row was neither kept nor merged"
        raise RuntimeError(msg)
    return ledger


def _reason_kind(reason: str) -> str:
    # "missing value in column 'x' (cell 'NA')" → "missing value in column 'x'"
    kind = re.split(r"[:(]", reason, maxsplit=1)[0]
    return re.sub(r" of line \d+", "", kind).strip()


def _dataset_levels(ds: dict[str, Any], dataset: str) -> list[str]:
    lists = [list(s["columns"].get("levels", [])) for s in ds["sources"]]
    if any(len(x) != len(lists[0]) for x in lists):
        msg = (
            f"config datasets.{dataset}: every source must map the same number of taxon levels "
            f"(got {[len(x) for x in lists]})"
        )
        raise UserError(msg)
    # Levels are named by the first source's column names (DEVELOPERS.md: "as in levels:").
    return lists[0]


def _dataset_covariates(ds: dict[str, Any], dataset: str) -> list[str]:
    lists = [list(s["columns"].get("covariates", [])) for s in ds["sources"]]
    if any(sorted(x) != sorted(lists[0]) for x in lists):
        msg = f"config datasets.{dataset}: every source must map the same covariate columns"
        raise UserError(msg)
    return lists[0]
