"""The prepare stage: sources → checked rows → species table, ledger, prepared.json, manifest.

Outputs are written in a fixed order, each atomically: the old ``manifest.json`` is removed
first, then ``clean.csv``, ``ledger.csv``, ``prepared.json`` and last the new manifest. A run
that stops anywhere in between leaves no manifest that matches the files, so the readers of
later stages refuse the set (see :mod:`allolaw.intake.manifest`).
"""

from __future__ import annotations

import json
import logging
import math
import os
import re
import signal
from typing import Any

import pandas as pd

from allolaw import __version__
from allolaw.config import dataset_config
from allolaw.errors import UserError
from allolaw.intake.cells import MISSING_STRINGS, neutralise_formula
from allolaw.intake.individuals import label_individuals, species_level_name
from allolaw.intake.ledger import (
    build_ledger,
    check_accounting,
    check_drop_share,
    drop_reasons,
)
from allolaw.intake.manifest import config_section_sha256, write_manifest
from allolaw.intake.reading import Table, read_table
from allolaw.intake.rows import Rows, parse_rows
from allolaw.intake.species import (
    aggregate_species,
    check_taxonomy,
    flag_outliers,
    flagged_rows,
    order_clean,
    singleton_taxa,
    usable_frame,
)
from allolaw.intake.tree import apply_tree, write_pruned_tree
from allolaw.intake.units import DEFAULT_ENERGY_PER_ML_O2_JOULE, check_unit
from allolaw.io import atomic_path, write_text
from allolaw.paths import clean_path, ledger_path, manifest_path, prepared_path

__all__ = ["KILL_HOOK", "prepare_dataset"]

log = logging.getLogger(__name__)

# Tests only: kill the process with SIGKILL after the k-th rename of the outputs (0 = before
# the first), to check that no mix of old and new outputs is ever read.
KILL_HOOK = "ALLOLAW_TEST_KILL_AFTER_RENAME"
_DATASET_NAME = re.compile(r"[A-Za-z0-9_-]+")
_TEXT_OUTPUTS = ("species", "source", "merged_into")
# Column names of clean.csv and of the working frame; a level may not take one of them.
_RESERVED = frozenset({
    "species", "log_size", "log_trait", "n_rows", "within_sd_log_size", "within_sd_log_trait",
    "sd_log_size", "sd_log_trait", "sd_source_size", "sd_source_trait", "source",
    "flag_outlier", "flag_singleton_taxon", "flag_note", "row", "file", "line",
    "sd_log_size_row", "sd_log_trait_row", "replicate_var_log_size", "replicate_n_size",
    "replicate_var_log_trait", "replicate_n_trait", "replicate_cov_log_size_trait",
})


def prepare_dataset(config: dict[str, Any], dataset: str) -> str:
    """Read, convert, validate and aggregate one dataset; write its outputs.

    Writes ``clean.csv`` (one row per species), ``ledger.csv`` (one row per data line),
    ``prepared.json`` and, last, ``manifest.json`` under ``<results_dir>/<dataset>/``.

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
        For structural problems (config/README.md lists them); the old manifest is removed
        first, so a failed run never leaves an older set that later stages would read.
    """
    if not _DATASET_NAME.fullmatch(dataset):
        msg = f"dataset name {dataset!r} must be letters, digits, '_' or '-' only"
        raise UserError(msg)
    ds = dataset_config(config, dataset)
    results = config.get("results_dir", "results")
    manifest_path(results, dataset).unlink(missing_ok=True)
    energy = float(config.get("energy_per_ml_o2_joule", DEFAULT_ENERGY_PER_ML_O2_JOULE))
    warnings: list[str] = []
    columns, levels = _dataset_levels(ds, dataset, warnings)
    covariate_units: dict[str, str] = dict(ds.get("covariates") or {})
    covariates = _dataset_covariates(ds, dataset)
    tables, rows, conversions = _read_rows(ds, dataset, levels=levels, covariates=covariates,
                                           covariate_units=covariate_units, energy=energy,
                                           warnings=warnings)
    usable = [i for i, r in enumerate(rows.reason) if not r]
    rows_are = ds.get("rows_are", "species_values")
    if rows_are == "individuals":  # the species becomes the innermost level (intake/individuals)
        inner = species_level_name(ds, levels, _RESERVED)
        label_individuals(rows, usable, inner)
        levels = [*levels, inner]
        columns = [*columns, str(ds["sources"][0]["columns"]["species"])]
    frame = usable_frame(rows, usable, levels, covariates)
    check_taxonomy(frame, levels)
    frame, outliers = _outliers(ds, dataset, rows, frame)
    frame, tree = apply_tree(ds, dataset, rows, frame)  # species not in the tree: dropped

    clean, pooled, singletons = _species_table(frame, levels, covariates, outliers["species"])
    ledger = build_ledger(rows, frame)
    counts = check_accounting(ledger, tables, len(clean))

    reference_size, log_reference, reference_rule = _reference(ds, clean, dataset)
    prepared = {
        "dataset": dataset,
        "allolaw_version": __version__,
        "canonical_units": {"size": ds["size"]["unit"], "trait": ds["trait"]["unit"],
                            "covariates": covariate_units},
        "quantities": {"size": ds["size"]["quantity"], "trait": ds["trait"]["quantity"]},
        "reference_size": reference_size,
        "log_reference_size": log_reference,
        "reference_size_rule": reference_rule,
        "rows_are": rows_are,
        "levels": levels,
        "level_columns": columns,
        "covariates": covariates,
        "sources": [_source_record(t) for t in tables],
        "conversions": sorted(conversions.values(),
                              key=lambda c: (c["file"], c["column"], c["from"])),
        "energy_per_ml_o2_joule": energy,
        "counts": {"input": len(rows.line), **counts, "species": len(clean)},
        "drop_reasons": drop_reasons(ledger),
        "missing_strings": sorted(MISSING_STRINGS),
        "pooled_within_sd": pooled,
        "outliers": outliers,
        "singleton_taxa": singletons,
        "tree": tree,
    }
    warnings += _neutralise(clean, ledger, levels)
    prepared["warnings"] = warnings
    for warning in warnings:
        log.warning("%s: %s", dataset, warning)
    inputs = [{"file": t.file, "sha256": t.sha256} for t in tables]
    if tree is not None:
        inputs.append({"file": tree["file"], "sha256": tree["sha256"]})
    write_pruned_tree(results, dataset, tree, clean["species"].tolist())
    _write_outputs(results, dataset, clean, ledger, prepared, inputs,
                   config_section_sha256(ds, energy))
    rows_are_word = "individuals" if rows_are == "individuals" else "species"
    summary = (
        f"{dataset}: {len(rows.line)} input rows → {len(clean)} {rows_are_word} "
        f"({counts['kept']} kept, {counts['merged']} merged, {counts['dropped']} dropped); "
        f"wrote {clean_path(results, dataset).parent}/"
    )
    log.info(summary)
    return summary


def _read_rows(ds: dict[str, Any], dataset: str, *, levels: list[str], covariates: list[str],
               covariate_units: dict[str, str], energy: float, warnings: list[str],
               ) -> tuple[list[Table], Rows, dict[tuple[str, str, str, str], dict[str, Any]]]:
    """Check the canonical units, read every source and parse its lines."""
    where_cfg = f"config datasets.{dataset}"
    check_unit(ds["size"]["unit"], ds["size"]["quantity"], where=f"{where_cfg}.size.unit")
    check_unit(ds["trait"]["unit"], ds["trait"]["quantity"], where=f"{where_cfg}.trait.unit")
    for name, unit in covariate_units.items():
        check_unit(unit, None, where=f"{where_cfg}.covariates.{name}")
    tables = _read_sources(ds, dataset)
    rows = Rows()
    conversions: dict[tuple[str, str, str, str], dict[str, Any]] = {}
    for table, source in zip(tables, ds["sources"], strict=True):
        parse_rows(table, source, ds, levels=levels, covariates=covariates,
                   covariate_units=covariate_units, energy=energy, rows=rows,
                   conversions=conversions)
    if rows.renamed:
        warnings.append(
            f"{rows.renamed} species names changed by Unicode normalisation (NFC, invisible "
            "format characters removed): spellings that differ only so are one species"
        )
    check_drop_share(rows, tables, max_share=float(ds.get("max_dropped_share", 0.5)))
    if all(rows.reason):
        msg = (
            f"dataset '{dataset}': none of the {len(rows.line)} input rows is usable; "
            f"first reason: {rows.file[0]}, line {rows.line[0]}: {rows.reason[0]}"
        )
        raise UserError(msg)
    return tables, rows, conversions


def _species_table(frame: pd.DataFrame, levels: list[str], covariates: list[str],
                   outlier_species: list[str],
                   ) -> tuple[pd.DataFrame, dict[str, Any], dict[str, list[str]]]:
    """clean.csv in contract order, the pooled SDs and the singleton taxa."""
    clean, pooled = aggregate_species(frame, levels=levels, covariates=covariates)
    singletons = singleton_taxa(clean, levels)
    clean["flag_singleton_taxon"] = False
    for level, taxa in singletons.items():
        clean.loc[clean[level].isin(taxa), "flag_singleton_taxon"] = True
    clean["flag_outlier"] = clean["species"].isin(outlier_species)
    return order_clean(clean, levels, covariates), pooled, singletons


def _read_sources(ds: dict[str, Any], dataset: str) -> list[Table]:
    tables: list[Table] = []
    for k, source in enumerate(ds["sources"]):
        table = read_table(source)
        for other in tables:
            same_path = os.path.realpath(other.path) == os.path.realpath(table.path)
            if same_path or (other.sha256 == table.sha256
                             and not source.get("allow_identical_content", False)):
                what = "the same file as" if same_path else "byte-identical to"
                msg = (
                    f"config datasets.{dataset}.sources[{k}]: {table.file} is {what} "
                    f"{other.file}; reading it twice would turn every row into a replicate. "
                    "Remove one source"
                    + ("" if same_path else ", or set `allow_identical_content: true` on this "
                       "source if two identical files are really two studies")
                )
                raise UserError(msg)
        tables.append(table)
    return tables


def _source_record(table: Table) -> dict[str, Any]:
    return {
        "file": table.file, "label": table.label, "sha256": table.sha256,
        "rows": len(table.records), "delimiter": table.delimiter,
        "blank_lines_ignored": table.blank_lines, "header_line": table.header_line,
        "physical_lines": table.physical_lines,
    }


def _outliers(ds: dict[str, Any], dataset: str, rows: Rows,
              frame: pd.DataFrame) -> tuple[pd.DataFrame, dict[str, Any]]:
    cfg = ds.get("outliers") or {}
    threshold = float(cfg.get("robust_z", 5.0))
    remove = bool(cfg.get("remove", False))
    flags = flag_outliers(frame, threshold=threshold)
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
    outliers = {
        "robust_z": threshold,
        "removed": remove,
        "rows": [{"file": str(f), "line": int(n), "species": s, "note": note}
                 for f, n, s, note in flagged_rows(rows, frame)],
        "species": sorted(set(frame.loc[frame["flag_note"] != "", "species"])),
    }
    return frame, outliers


def _reference(ds: dict[str, Any], clean: pd.DataFrame, dataset: str) -> tuple[float, float, str]:
    given = ds.get("reference_size")
    if given is None:
        log_reference = float(clean["log_size"].mean())
        return math.exp(log_reference), log_reference, "geometric mean of the species sizes"
    size = float(given)
    if not (math.isfinite(size) and size > 0 and math.isfinite(math.log(size))):
        msg = (f"config datasets.{dataset}.reference_size: must be a positive finite number, "
               f"got {given!r}")
        raise UserError(msg)
    return size, math.log(size), "config"


def _neutralise(clean: pd.DataFrame, ledger: pd.DataFrame, levels: list[str]) -> list[str]:
    """Prefix ``'`` to text cells a spreadsheet would run as formulas; say how many."""
    changed = 0
    for frame, names in ((clean, ["species", *levels, "source"]),
                         (ledger, ["species", "merged_into"])):
        for name in names:
            new = frame[name].astype(str).map(neutralise_formula)
            changed += int((new != frame[name].astype(str)).sum())
            frame[name] = new
    if not changed:
        return []
    return [f"{changed} text cells of clean.csv / ledger.csv start with =, +, -, @ or a tab "
            "and were written with a leading apostrophe, so spreadsheets show them as text"]


def _write_outputs(results: str, dataset: str, clean: pd.DataFrame, ledger: pd.DataFrame,
                   prepared: dict[str, Any], inputs: list[dict[str, str]],
                   config_sha256: str) -> None:
    """Write the outputs in order, the manifest last (see the module docstring)."""
    text = json.dumps(prepared, indent=2, sort_keys=True, allow_nan=False) + "\n"
    _kill_point(0)
    with atomic_path(clean_path(results, dataset)) as tmp:
        clean.to_csv(tmp, index=False, lineterminator="\n")
    _kill_point(1)
    with atomic_path(ledger_path(results, dataset)) as tmp:
        ledger.to_csv(tmp, index=False, lineterminator="\n")
    _kill_point(2)
    write_text(prepared_path(results, dataset), text)
    _kill_point(3)
    write_manifest(results, dataset, inputs=inputs, config_sha256=config_sha256)
    _kill_point(4)


def _kill_point(k: int) -> None:
    if os.environ.get(KILL_HOOK) == str(k):
        os.kill(os.getpid(), signal.SIGKILL)


def _dataset_levels(ds: dict[str, Any], dataset: str,
                    warnings: list[str]) -> tuple[list[str], list[str]]:
    """Level columns of the first source, and the level names used in the outputs."""
    lists = [list(s["columns"].get("levels", [])) for s in ds["sources"]]
    if any(len(x) != len(lists[0]) for x in lists):
        msg = (
            f"config datasets.{dataset}: every source must map the same number of taxon levels "
            f"(got {[len(x) for x in lists]})"
        )
        raise UserError(msg)
    columns = lists[0]
    if len(set(columns)) != len(columns):
        msg = f"config datasets.{dataset}: a column is named twice in levels: {columns}"
        raise UserError(msg)
    names = []
    for column in columns:
        name = column
        while name in _RESERVED or name in names or name.startswith(("cov_", "flag_")):
            name = f"{name}_level"
        if name != column:
            warnings.append(f"taxon level column {column!r} is named {name!r} in the outputs "
                            "(its own name is taken by a column of clean.csv)")
        names.append(name)
    return columns, names


def _dataset_covariates(ds: dict[str, Any], dataset: str) -> list[str]:
    lists = [list(s["columns"].get("covariates", [])) for s in ds["sources"]]
    if any(sorted(x) != sorted(lists[0]) for x in lists):
        msg = f"config datasets.{dataset}: every source must map the same covariate columns"
        raise UserError(msg)
    return lists[0]
