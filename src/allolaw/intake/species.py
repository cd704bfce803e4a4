"""Species: usable rows to one row per species, taxonomy checks, outlier flags.

Usable rows of one species are merged on the natural-log scale. One species placed in two taxa
(or one taxon under two parents) stops the stage: either reading would bias the taxon
estimates. Rows are flagged, not dropped, when their robust z is beyond a threshold; a flagged
replicate still counts in its own species' mean, but not in the pooled within-species SD that
species with a single row receive.
"""

from __future__ import annotations

import itertools
import math
from typing import Any

import numpy as np
import pandas as pd

from allolaw.errors import UserError
from allolaw.intake.rows import Rows

__all__ = [
    "aggregate_species",
    "check_taxonomy",
    "flag_outliers",
    "flagged_rows",
    "order_clean",
    "robust_z",
    "singleton_taxa",
    "usable_frame",
]

# 1.4826 × MAD estimates the SD of a normal distribution (Rousseeuw & Croux 1993, eq. 1.3).
_MAD_TO_SD = 1.482602218505602
_THEIL_SEN_MAX_ROWS = 2000
_SHOW_CONFLICTS = 5  # species (or taxa) listed in a taxonomy message; the rest are counted


def aggregate_species(
    rows: pd.DataFrame, *, levels: list[str], covariates: list[str] | None = None
) -> tuple[pd.DataFrame, dict[str, Any]]:
    """Merge usable rows into one row per species, on the natural-log scale.

    Parameters
    ----------
    rows
        One row per usable input row with columns ``species``, the level columns, ``source``,
        ``log_size``, ``log_trait``, ``sd_log_size_row``, ``sd_log_trait_row`` (NaN where no SD
        column was given) and ``cov_<name>``; optionally ``flag_note`` (non-empty: an outlier,
        left out of the pooled SD).
    levels
        Taxon level columns, outer → inner.
    covariates
        Covariate names (columns ``cov_<name>``).

    Returns
    -------
    clean : DataFrame
        ``log_size``/``log_trait`` = mean of logs; ``within_sd_log_*`` = SD of logs between
        replicates (ddof 1; NaN for one replicate); ``replicate_var_log_*`` = their sample
        variance (ddof 1; NaN for one replicate) and ``replicate_n_size``/``replicate_n_trait``
        the number of values behind it; ``replicate_cov_log_size_trait`` = the sample
        covariance of log size and log trait over the species' rows, paired by row (ddof 1;
        NaN for one replicate or a row without both values); ``sd_log_*`` = SD of the species mean:
        ``given`` when every row has an SD (sqrt(Σ sdᵢ²)/n), else ``replicates`` (within SD /
        sqrt(n)) for n ≥ 2, else ``pooled`` (pooled within SD / sqrt(1)), else ``none`` (NaN)
        when no species of the dataset has two replicates.
    pooled : dict
        The pooled within-species SD per axis and the species and degrees of freedom behind it.

    Notes
    -----
    The pooled within-species SD is the usual pooled standard deviation,
    ``sqrt(Σₛ (nₛ − 1) sₛ² / Σₛ (nₛ − 1))`` over species with nₛ ≥ 2 usable replicates that
    are not flagged as outliers.
    """
    covariates = covariates or []
    groups = rows.groupby("species", sort=False)
    clean = groups[levels].first() if levels else pd.DataFrame(index=groups.size().index)
    clean["n_rows"] = groups.size()
    unflagged = rows if "flag_note" not in rows else rows[rows["flag_note"] == ""]
    pooled: dict[str, Any] = {}
    multi = clean["n_rows"] >= 2
    for axis in ("size", "trait"):
        col = f"log_{axis}"
        clean[col] = groups[col].mean()
        clean[f"within_sd_{col}"] = groups[col].std(ddof=1)
        # the replicate variance and count, as the model reads them (a scaled chi-square
        # given the species' true error variance; model/error_sd.py)
        clean[f"replicate_var_{col}"] = groups[col].var(ddof=1)
        clean[f"replicate_n_{axis}"] = clean["n_rows"]
        pooled[axis] = _pooled_sd(unflagged, col)
        pooled_sd = math.nan if pooled[axis]["sd"] is None else pooled[axis]["sd"]
        row_sd = rows[f"sd_log_{axis}_row"]
        given_all = groups[f"sd_log_{axis}_row"].count() == clean["n_rows"]
        given_sd = np.sqrt((row_sd**2).groupby(rows["species"], sort=False).sum()) / clean[
            "n_rows"
        ]
        replicate_sd = clean[f"within_sd_{col}"] / np.sqrt(clean["n_rows"])
        clean[f"sd_{col}"] = np.where(given_all, given_sd,
                                      np.where(multi, replicate_sd, pooled_sd))
        clean[f"sd_source_{axis}"] = np.where(
            given_all,
            "given",
            np.where(multi, "replicates", "none" if math.isnan(pooled_sd) else "pooled"),
        )
    clean["replicate_cov_log_size_trait"] = _replicate_covariance(rows, clean["n_rows"])
    for name in covariates:
        clean[f"cov_{name}"] = groups[f"cov_{name}"].mean()
    clean["source"] = groups["source"].unique().map(lambda labels: ";".join(sorted(labels)))
    return clean.reset_index(), pooled


def _replicate_covariance(rows: pd.DataFrame, n_rows: pd.Series) -> pd.Series:
    # sample covariance (ddof 1) of log size and log trait over a species' rows, paired by
    # row; NaN for one row or when a row lacks either value (the model reads it,
    # model/error_correlation.py)
    x, y = rows["log_size"], rows["log_trait"]
    species = rows["species"]
    complete = (x.notna() & y.notna()).groupby(species, sort=False).all()
    dx = x - x.groupby(species, sort=False).transform("mean")
    dy = y - y.groupby(species, sort=False).transform("mean")
    total = (dx * dy).groupby(species, sort=False).sum(min_count=1)
    cov = total / (n_rows.where(n_rows >= 2) - 1)
    return cov.where(complete & (n_rows >= 2)).reindex(n_rows.index)


def _pooled_sd(rows: pd.DataFrame, col: str) -> dict[str, Any]:
    groups = rows.groupby("species", sort=False)[col]
    n = groups.size()
    sd = groups.std(ddof=1)
    multi = n >= 2
    dof = int((n[multi] - 1).sum())
    value = float(np.sqrt(((n[multi] - 1) * sd[multi] ** 2).sum() / dof)) if dof > 0 else None
    return {"sd": value, "species": int(multi.sum()), "dof": dof}


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


def usable_frame(rows: Rows, usable: list[int], levels: list[str],
                 covariates: list[str]) -> pd.DataFrame:
    """One record per usable row: logs of the canonical values and log-scale row SDs."""
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
            **{level: v["levels"][level] for level in levels},
            "source": v["source"],
            "log_size": math.log(size),
            "log_trait": math.log(trait),
            "sd_log_size_row": _log_sd(v.get("size_sd"), size, v["sd_scale"]),
            "sd_log_trait_row": _log_sd(v.get("trait_sd"), trait, v["sd_scale"]),
        }
        for name in covariates:
            record[f"cov_{name}"] = v["cov"][name]
        records.append(record)
    return pd.DataFrame.from_records(records)


def _log_sd(sd: float | None, value: float, scale: str) -> float:
    if sd is None or math.isnan(sd):
        return float("nan")
    if scale == "log":
        return float(sd)
    # Delta method: SD(ln X) ≈ SD(X) / X (first-order Taylor expansion of ln at X).
    return float(sd) / value


def check_taxonomy(frame: pd.DataFrame, levels: list[str]) -> None:
    """Stop if a species sits in two taxa, or a taxon under two parents.

    The message lists the rows of the first few species or taxa and counts the rest.
    """
    if not levels:
        return
    paths = frame.groupby("species", sort=False)[levels].nunique()
    conflicted = paths.index[(paths > 1).any(axis=1)].tolist()
    if conflicted:
        parts = [
            f"species {species!r} — "
            + _listing(frame.loc[frame["species"] == species], lambda r: " / ".join(
                str(r[level]) for level in levels))
            for species in conflicted[:_SHOW_CONFLICTS]
        ]
        msg = (
            f"{len(conflicted)} species placed in more than one taxon ({' / '.join(levels)}): "
            f"{' | '.join(parts)}{_more(len(conflicted), 'species')}; fix the table so each "
            "species has one taxon"
        )
        raise UserError(msg)
    for outer, inner in itertools.pairwise(levels):
        parents = frame.groupby(inner, sort=False)[outer].nunique()
        bad = parents.index[parents > 1].tolist()
        if bad:
            parts = [
                f"{inner} {taxon!r} — " + _listing(frame[frame[inner] == taxon],
                                                    lambda r: str(r[outer]))  # noqa: B023
                for taxon in bad[:_SHOW_CONFLICTS]
            ]
            msg = (
                f"{len(bad)} {inner} placed in more than one {outer}: {' | '.join(parts)}"
                f"{_more(len(bad), inner)}; fix the table so each taxon has one parent"
            )
            raise UserError(msg)


def _listing(sub: pd.DataFrame, describe: Any) -> str:
    shown = [f"{r['file']}, line {r['line']}: {describe(r)}"
             for _, r in sub.head(_SHOW_CONFLICTS).iterrows()]
    more = f"; and {len(sub) - _SHOW_CONFLICTS} more rows" if len(sub) > _SHOW_CONFLICTS else ""
    return "; ".join(shown) + more


def _more(count: int, what: str) -> str:
    extra = count - _SHOW_CONFLICTS
    return f" | and {extra} more {what} (first {_SHOW_CONFLICTS} shown)" if extra > 0 else ""


def flag_outliers(frame: pd.DataFrame, *, threshold: float) -> dict[int, str]:
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


def flagged_rows(rows: Rows, frame: pd.DataFrame) -> list[tuple[str, int, str, str]]:
    """Flagged rows, whether still in the frame or removed (then their reason says so)."""
    out = []
    prefix = "outlier removed ("
    for i, reason in enumerate(rows.reason):
        if reason.startswith(prefix):
            out.append((rows.file[i], rows.line[i], rows.species[i], reason[len(prefix):-1]))
    flagged = frame[frame["flag_note"] != ""]
    out += list(flagged[["file", "line", "species", "flag_note"]].itertuples(index=False,
                                                                             name=None))
    return sorted(out)


def singleton_taxa(clean: pd.DataFrame, levels: list[str]) -> dict[str, list[str]]:
    """Per level, the taxa with a single species."""
    out: dict[str, list[str]] = {}
    for level in levels:
        counts = clean.groupby(level)["species"].nunique()
        out[level] = sorted(str(t) for t in counts.index[counts == 1])
    return out


def order_clean(clean: pd.DataFrame, levels: list[str], covariates: list[str]) -> pd.DataFrame:
    """The columns of ``clean.csv`` in contract order, rows sorted by taxa then species."""
    columns = [
        "species", *levels, "log_size", "log_trait", "n_rows",
        "within_sd_log_size", "within_sd_log_trait", "sd_log_size", "sd_log_trait",
        "sd_source_size", "sd_source_trait", "replicate_var_log_size", "replicate_n_size",
        "replicate_var_log_trait", "replicate_n_trait", "replicate_cov_log_size_trait",
        *[f"cov_{c}" for c in covariates],
        "source", "flag_outlier", "flag_singleton_taxon",
    ]
    return clean.sort_values([*levels, "species"], kind="stable")[columns].reset_index(drop=True)
