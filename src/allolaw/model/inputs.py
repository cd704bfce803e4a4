"""Reading the model's inputs from a clean table: columns, taxon levels and their nesting.

Every problem the user can fix raises :class:`~allolaw.errors.UserError` naming file, line,
column and value.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from allolaw.errors import UserError
from allolaw.model.error_sd import ReplicateErrors, read_replicate_errors
from allolaw.model.spec import ModelSpec

__all__ = ["BOLTZMANN_EV_PER_K", "select_levels"]


#: Boltzmann constant in eV/K (CODATA value, rounded as in Gillooly et al. 2001).
BOLTZMANN_EV_PER_K = 8.617e-5


def select_levels(spec: ModelSpec, levels: list[str]) -> list[str]:
    """The taxon levels a spec uses for a dataset with ``levels`` (outer to inner).

    Raises
    ------
    UserError
        If the spec lists a level the dataset does not have.
    """
    chosen = spec.taxa["levels"]
    if not spec.taxa["vary"] and spec.curvature != "shared_and_taxa":
        return []
    if chosen == "none":
        return []
    if chosen == "all":
        return list(levels)
    if chosen == "innermost":
        return list(levels[-1:])
    unknown = [lvl for lvl in chosen if lvl not in levels]
    if unknown:
        msg = (
            f"{spec.source or spec.name}: key 'taxa.levels': bad value {unknown[0]!r}: the "
            f"dataset's levels are {list(levels)}"
        )
        raise UserError(msg)
    return [lvl for lvl in levels if lvl in chosen]


@dataclass
class Taxa:
    labels: list[str]
    index: np.ndarray  # per species, into labels
    parent: np.ndarray | None  # per taxon, into the labels of the next level out


@dataclass
class Inputs:
    species: list[str]
    log_size: np.ndarray
    log_trait: np.ndarray
    sd_size: np.ndarray | None = None
    sd_trait: np.ndarray | None = None
    taxa: dict[str, Taxa] = field(default_factory=dict)
    covariates: dict[str, np.ndarray] = field(default_factory=dict)
    # per axis with `replicates` errors: which SDs are estimated, replicate variances, counts
    replicate_errors: dict[str, ReplicateErrors] = field(default_factory=dict)


def read_inputs(data: pd.DataFrame, spec: ModelSpec, *, levels: list[str]) -> Inputs:
    source = data.attrs.get("source", "clean.csv")
    used = select_levels(spec, levels)
    needed = ["species", "log_size", "log_trait", *used]
    if spec.size_error in ("known", "replicates"):
        needed.append("sd_log_size")
    if spec.trait_error in ("known", "replicates"):
        needed.append("sd_log_trait")
    needed += [f"cov_{c['column']}" for c in spec.covariates]
    missing = [c for c in needed if c not in data.columns]
    if missing:
        msg = (
            f"{source}: column '{missing[0]}' is needed by model spec '{spec.name}' but is "
            f"missing (columns: {', '.join(map(str, data.columns))})"
        )
        raise UserError(msg)
    if len(data) < 3:
        msg = f"{source}: {len(data)} species; a scaling law needs at least 3"
        raise UserError(msg)
    species = [str(s) for s in data["species"]]
    if len(set(species)) != len(species):
        dup = pd.Series(species)[pd.Series(species).duplicated()].iloc[0]
        msg = f"{source}: column 'species', value {dup!r}: species appears twice"
        raise UserError(msg)
    for column in ("log_size", "log_trait"):
        _check_finite(data, column, source)
    inputs = Inputs(
        species=species,
        log_size=data["log_size"].to_numpy(dtype=float),
        log_trait=data["log_trait"].to_numpy(dtype=float),
    )
    if spec.size_error in ("known", "replicates"):
        inputs.sd_size = _error_sd(data, "size", spec, source, inputs)
    if spec.trait_error in ("known", "replicates"):
        inputs.sd_trait = _error_sd(data, "trait", spec, source, inputs)
    parent_labels: pd.Series | None = None
    previous: str | None = None
    for level in used:
        labels_col = data[level]
        if labels_col.isna().any():
            row = int(np.flatnonzero(labels_col.isna().to_numpy())[0])
            msg = (
                f"{source}: line {row + 2}, column '{level}', species {species[row]!r}: "
                "missing taxon label"
            )
            raise UserError(msg)
        labels_col = labels_col.astype(str)
        # first-appearance order; factorize keeps it linear in rows (individuals: 1e5 rows)
        codes, uniques = pd.factorize(labels_col.to_numpy())
        labels = [str(u) for u in uniques]
        index = codes.astype(int)
        parent = None
        if parent_labels is not None and previous is not None:
            outer = list(inputs.taxa[previous].labels)
            parent = np.empty(len(labels), dtype=int)
            by_taxon = pd.Series(parent_labels.to_numpy()).groupby(codes, sort=True).unique()
            for k, label in enumerate(labels):
                parents = sorted(set(by_taxon.iloc[k]))
                if len(parents) != 1:
                    msg = (
                        f"{source}: column '{level}', value {label!r}: the taxon sits in "
                        f"several taxa of level '{previous}' ({', '.join(parents)}); inner "
                        "levels must nest in outer ones"
                    )
                    raise UserError(msg)
                parent[k] = outer.index(parents[0])
        inputs.taxa[level] = Taxa(labels=labels, index=index, parent=parent)
        parent_labels, previous = labels_col, level
    for cov in spec.covariates:
        column = f"cov_{cov['column']}"
        _check_finite(data, column, source)
        values = data[column].to_numpy(dtype=float)
        if cov["transform"] == "boltzmann":
            if np.any(values <= 0):
                row = int(np.flatnonzero(values <= 0)[0])
                msg = (
                    f"{source}: line {row + 2}, column '{column}', value {values[row]!r}: a "
                    "Boltzmann covariate needs temperatures in kelvin (> 0)"
                )
                raise UserError(msg)
            values = 1.0 / (BOLTZMANN_EV_PER_K * values)
        inputs.covariates[cov["column"]] = values
    return inputs


def _check_finite(data: pd.DataFrame, column: str, source: str) -> None:
    values = pd.to_numeric(data[column], errors="coerce").to_numpy(dtype=float)
    bad = ~np.isfinite(values)
    if bad.any():
        row = int(np.flatnonzero(bad)[0])
        value = _plain(data[column].iloc[row])
        msg = (
            f"{source}: line {row + 2}, column '{column}', value {value!r}: "
            "not a finite number"
        )
        raise UserError(msg)


def _error_sd(data: pd.DataFrame, axis: str, spec: ModelSpec, source: str,
              inputs: Inputs) -> np.ndarray:
    column = f"sd_log_{axis}"
    mode = spec.size_error if axis == "size" else spec.trait_error
    sd = pd.to_numeric(data[column], errors="coerce").to_numpy(dtype=float)
    if mode == "known":
        origin_col = f"sd_source_{axis}"
        if origin_col in data.columns:
            origin = data[origin_col].astype(str).to_numpy()
            not_given = np.flatnonzero(origin != "given")
            if not_given.size:
                row = int(not_given[0])
                msg = (
                    f"{source}: line {row + 2}, column '{origin_col}', value {origin[row]!r}: "
                    f"model spec '{spec.name}' has {axis}_error 'known', which needs SDs given "
                    f"in the data for every species (use 'replicates' to accept other sources)"
                )
                raise UserError(msg)
    estimated = np.zeros(sd.shape, dtype=bool)
    if mode == "replicates":  # SDs not given are estimated (model/error_sd.py)
        inputs.replicate_errors[axis] = read_replicate_errors(data, axis, spec.name, source)
        estimated = inputs.replicate_errors[axis].estimated
    # a given size SD of 0 would make the true size a point mass: refused, not floored
    bad = ~estimated & (~np.isfinite(sd) | (sd < 0) | ((sd == 0) & (axis == "size")))
    if bad.any():
        row = int(np.flatnonzero(bad)[0])
        value = _plain(data[column].iloc[row])
        least = "> 0" if axis == "size" else "≥ 0"
        msg = (
            f"{source}: line {row + 2}, column '{column}', value {value!r}: "
            f"model spec '{spec.name}' needs a measurement-error SD ({least}) for every species"
            + (" (an exact size needs size_error: none)" if axis == "size" else "")
        )
        raise UserError(msg)
    return np.where(estimated, np.nan, sd)


def _plain(value: Any) -> Any:
    # numpy scalars print as np.float64(...); messages show the plain value
    return value.item() if hasattr(value, "item") else value
