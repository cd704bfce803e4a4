"""Seeded synthetic datasets with known truth, in the ``clean.csv`` format.

Every simulator returns a :class:`Simulated`: the table (one row per species, columns as in
DEVELOPERS.md), the taxon levels, the log reference size and a ``truth`` dict holding every
parameter used, under the variable names of the model (``intercept``, ``exponent``,
``taxon_exponent__<level>`` …). Invented data: for tests and recovery studies only.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

__all__ = [
    "Simulated",
    "as_clean_table",
    "quick_sample",
    "simulate_breakpoint",
    "simulate_curvature",
    "simulate_law",
    "simulate_pooled",
    "simulate_size_error",
    "simulate_taxa",
]


@dataclass
class Simulated:
    """A simulated clean table with its truth."""

    data: pd.DataFrame
    levels: list[str]
    log_reference_size: float
    truth: dict[str, Any] = field(default_factory=dict)


def simulate_law(
    *,
    seed: int,
    taxa: tuple[int, ...] = (),
    level_names: tuple[str, ...] = ("order", "family", "genus"),
    species_per_taxon: int = 10,
    n_species: int = 50,
    intercept: float = 1.0,
    exponent: float = 0.75,
    curvature: float = 0.0,
    intercept_sd: float = 0.3,
    exponent_sd: float = 0.05,
    curvature_sd: float = 0.0,
    sigma: float = 0.1,
    log_size_mean: float = 0.0,
    log_size_sd: float = 1.5,
    taxon_size_spread: float = 0.0,
    log_reference_size: float = 0.0,
    size_error_sd: float = 0.0,
    trait_error_sd: float = 0.0,
    replicates: int | None = None,
    break_log_size: float | None = None,
    exponent_above: float | None = None,
    hinge_width: float = 0.1,
    student_t_nu: float | None = None,
) -> Simulated:
    """Simulate one scaling-law dataset from the generative model of ``build_model``.

    Kept as one straight sequence of draws (taxa, sizes, law, errors) on purpose: the order of
    the random draws fixes every seeded test's data.

    Parameters
    ----------
    seed
        Random seed.
    taxa
        Taxa per parent at each level, outer to inner: ``(3, 2)`` is 3 orders with 2 families
        each. Empty for no taxa (then ``n_species`` species).
    species_per_taxon
        Species in each innermost taxon.
    taxon_size_spread
        SD of the centres of the innermost taxa's size ranges around ``log_size_mean``; the
        species of a taxon spread around its centre with ``log_size_sd``.
    size_error_sd, trait_error_sd
        Measurement-error SD of the species value on the log scale. With ``replicates=None``
        the SD is reported exactly (``sd_source = given``); with ``replicates=k`` each species
        has k replicate measurements with SD ``error·sqrt(k)``, and the reported SD is their
        standard error (``sd_source = replicates``).
    break_log_size, exponent_above
        A smooth hinge (width ``hinge_width``) at ``break_log_size``.
    student_t_nu
        Student-t residuals with this many degrees of freedom instead of normal ones.
    """
    rng = np.random.default_rng(seed)
    names = list(level_names[: len(taxa)])
    truth: dict[str, Any] = {
        "intercept": intercept,
        "exponent": exponent,
        "sigma": sigma,
        "log_reference_size": log_reference_size,
    }
    # taxa: labels per level and per-taxon totals along the path
    paths: list[list[int]] = [[]]
    labels_per_level: list[list[str]] = []
    totals = {"intercept": [intercept], "exponent": [exponent], "curvature": [curvature]}
    sds = {"intercept": intercept_sd, "exponent": exponent_sd, "curvature": curvature_sd}
    for depth, count in enumerate(taxa):
        new_paths, labels = [], []
        new_totals: dict[str, list[float]] = {k: [] for k in totals}
        for parent, path in enumerate(paths):
            for k in range(count):
                new_paths.append([*path, k])
                labels.append(f"{names[depth]}_{'_'.join(str(p + 1) for p in [*path, k])}")
                for term in totals:
                    new_totals[term].append(totals[term][parent] + rng.normal(0, sds[term]))
        paths, totals = new_paths, new_totals
        labels_per_level.append(labels)
        for term in totals:
            truth[f"taxon_{term}__{names[depth]}"] = dict(zip(labels, totals[term], strict=True))
        for term, sd in sds.items():
            truth[f"{term}_sd__{names[depth]}"] = sd
    n_inner = len(paths)
    per_taxon = species_per_taxon if taxa else n_species
    inner = np.repeat(np.arange(n_inner), per_taxon)
    n = inner.size
    centres = log_size_mean + rng.normal(0, taxon_size_spread, n_inner) if taxon_size_spread \
        else np.full(n_inner, log_size_mean)
    true_x = centres[inner] + rng.normal(0, log_size_sd, n)
    a = np.asarray(totals["intercept"])[inner]
    b = np.asarray(totals["exponent"])[inner]
    c = np.asarray(totals["curvature"])[inner]
    dx = true_x - log_reference_size
    mu = a + b * dx + c * dx**2
    if break_log_size is not None:
        above = exponent if exponent_above is None else exponent_above
        change = above - exponent
        mu = mu + change * (
            _softplus(true_x - break_log_size, hinge_width)
            - _softplus(log_reference_size - break_log_size, hinge_width)
        )
        truth["break_log_size"] = break_log_size
        truth["exponent_above"] = above
    if curvature or curvature_sd:
        truth["curvature"] = curvature
    noise = rng.standard_t(student_t_nu, n) if student_t_nu else rng.normal(0, 1, n)
    true_y = mu + sigma * noise
    obs_x, sd_x, within_x = _measure(rng, true_x, size_error_sd, replicates)
    obs_y, sd_y, within_y = _measure(rng, true_y, trait_error_sd, replicates)
    # the label of the ancestor at each depth of each species' innermost taxon
    taxa_columns = {
        name: [labels_per_level[depth][_ancestor(paths[t], depth, taxa)] for t in inner]
        for depth, name in enumerate(names)
    }
    data = clean_frame(
        [f"species_{i + 1:03d}" for i in range(n)], obs_x, obs_y, taxa=taxa_columns,
        sd_log_size=sd_x, sd_log_trait=sd_y, replicates=replicates, within=(within_x, within_y),
        source=f"simulated (seed {seed})", source_label="simulated",
    )
    truth["true_log_size"] = true_x
    if size_error_sd > 0:
        truth["reliability"] = log_size_sd**2 / (log_size_sd**2 + size_error_sd**2)
    return Simulated(data=data, levels=names, log_reference_size=log_reference_size, truth=truth)


def quick_sample(
    model: Any,
    *,
    seed: int,
    draws: int = 300,
    warmup: int = 300,
    chains: int = 2,
    target_acceptance: float = 0.9,
) -> Any:
    """A small seeded NUTS run (numpyro, chains in sequence, posterior only) for tests.

    The pipeline samples with :func:`allolaw.model.sampling.fit_model`, which also adds the
    log-likelihood and predictive groups; tests of the model itself need the posterior only.
    """
    import pymc as pm

    return pm.sample(
        draws=draws,
        tune=warmup,  # PyMC's own keywords
        chains=chains,
        target_accept=target_acceptance,
        random_seed=seed,
        progressbar=False,
        model=model,
        nuts_sampler="numpyro",
        nuts_sampler_kwargs={"chain_method": "sequential"},
        compute_convergence_checks=False,
    )


def simulate_pooled(*, seed: int, n_species: int = 60, **kwargs: Any) -> Simulated:
    """One law, no taxa."""
    return simulate_law(seed=seed, taxa=(), n_species=n_species, **kwargs)


def simulate_taxa(
    *, seed: int, taxa: tuple[int, ...] = (3, 2), species_per_taxon: int = 8, **kwargs: Any
) -> Simulated:
    """Nested taxa (default 3 orders × 2 families) with varying intercepts and exponents."""
    return simulate_law(seed=seed, taxa=taxa, species_per_taxon=species_per_taxon, **kwargs)


def simulate_size_error(
    *,
    seed: int,
    reliability: float,
    n_species: int = 300,
    exponent: float = 0.75,
    log_size_sd: float = 1.0,
    **kwargs: Any,
) -> Simulated:
    """Size measured with error so that var(true)/var(measured) equals ``reliability``.

    The error SD is ``log_size_sd·sqrt((1 − λ)/λ)`` with λ the reliability ratio
    (Frost & Thompson 2000).
    """
    error_sd = log_size_sd * float(np.sqrt((1.0 - reliability) / reliability))
    return simulate_law(
        seed=seed, n_species=n_species, exponent=exponent, log_size_sd=log_size_sd,
        size_error_sd=error_sd, **kwargs,
    )


def simulate_curvature(
    *,
    seed: int,
    curvature: float = -0.08,
    taxa: tuple[int, ...] = (4,),
    level_names: tuple[str, ...] = ("genus",),
    species_per_taxon: int = 12,
    taxon_size_spread: float = 1.5,
    log_size_sd: float = 0.8,
    **kwargs: Any,
) -> Simulated:
    """A curved law; the taxa sit in different size ranges (so curvature looks like taxa)."""
    return simulate_law(
        seed=seed, taxa=taxa, level_names=level_names, species_per_taxon=species_per_taxon,
        curvature=curvature, taxon_size_spread=taxon_size_spread, log_size_sd=log_size_sd,
        **kwargs,
    )


def simulate_breakpoint(
    *,
    seed: int,
    break_log_size: float = 0.5,
    exponent: float = 0.9,
    exponent_above: float = 0.5,
    taxa: tuple[int, ...] = (3,),
    level_names: tuple[str, ...] = ("group",),
    species_per_taxon: int = 25,
    exponent_sd: float = 0.0,
    **kwargs: Any,
) -> Simulated:
    """A law whose exponent changes at ``break_log_size`` (smooth hinge); taxa vary intercept."""
    return simulate_law(
        seed=seed, taxa=taxa, level_names=level_names, species_per_taxon=species_per_taxon,
        exponent=exponent, exponent_above=exponent_above, break_log_size=break_log_size,
        exponent_sd=exponent_sd, **kwargs,
    )


def _ancestor(path: list[int], depth: int, taxa: tuple[int, ...]) -> int:
    # index of the ancestor taxon at `depth` in that level's label list (row-major order)
    index = 0
    for d in range(depth + 1):
        index = index * taxa[d] + path[d]
    return index


def _measure(
    rng: np.random.Generator, true: np.ndarray, error_sd: float, replicates: int | None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    n = true.size
    if error_sd <= 0:
        return true.copy(), np.zeros(n), np.full(n, np.nan)
    if replicates is None:
        return true + rng.normal(0, error_sd, n), np.full(n, error_sd), np.full(n, np.nan)
    per_rep = error_sd * np.sqrt(replicates)
    reps = true[:, None] + rng.normal(0, per_rep, (n, replicates))
    within = reps.std(axis=1, ddof=1) if replicates > 1 else np.full(n, np.nan)
    return reps.mean(axis=1), within / np.sqrt(replicates), within


def _softplus(d: np.ndarray | float, width: float) -> np.ndarray:
    return width * np.logaddexp(0.0, np.asarray(d) / width)


def as_clean_table(
    species: list[str] | np.ndarray,
    log_size: np.ndarray,
    log_trait: np.ndarray,
    *,
    taxa: dict[str, list[str] | np.ndarray] | None = None,
    sd_log_size: np.ndarray | float | None = None,
    sd_log_trait: np.ndarray | float | None = None,
    source: str = "table",
) -> pd.DataFrame:
    """Wrap arrays (e.g. a published table) as a ``clean.csv`` table, one row per species."""
    return clean_frame(species, log_size, log_trait, taxa=taxa, sd_log_size=sd_log_size,
                       sd_log_trait=sd_log_trait, source=source, source_label=source)


def clean_frame(
    species: list[str] | np.ndarray,
    log_size: np.ndarray,
    log_trait: np.ndarray,
    *,
    taxa: dict[str, list[str] | np.ndarray] | None = None,
    sd_log_size: np.ndarray | float | None = None,
    sd_log_trait: np.ndarray | float | None = None,
    replicates: int | None = None,
    within: tuple[np.ndarray, np.ndarray] | None = None,
    within_cov: np.ndarray | None = None,
    source: str,
    source_label: str,
) -> pd.DataFrame:
    """One ``clean.csv`` table, one row per species: the single place the test data build it.

    Parameters
    ----------
    taxa
        Level name -> each species' taxon label, outer level first.
    sd_log_size, sd_log_trait
        Error SDs of the species values (``None``: no error column, source ``none``).
    replicates
        Rows per species; with it the SDs are marked as coming from replicates
        (``sd_source = replicates``), as ``allolaw prepare`` writes them, else ``given``.
    within
        Replicate SDs of log size and log trait (the ``within_sd_*`` columns, squared in
        ``replicate_var_*``); NaN without.
    within_cov
        Replicate covariance of log size and log trait (``replicate_cov_log_size_trait``);
        NaN without.
    source
        Provenance kept in ``data.attrs["source"]``; ``source_label`` fills the ``source`` column.
    """
    n = len(log_size)
    frame: dict[str, Any] = {"species": [str(s) for s in species]}
    for level, labels in (taxa or {}).items():
        frame[level] = [str(v) for v in labels]

    def column(sd: np.ndarray | float | None) -> np.ndarray:
        return np.full(n, np.nan) if sd is None else np.broadcast_to(sd, (n,)).astype(float)

    def within_sd(axis: int) -> np.ndarray:
        return np.full(n, np.nan) if within is None else column(within[axis])

    def sd_source(sd: np.ndarray | float | None) -> str:
        if sd is None:
            return "none"
        return "given" if replicates is None else "replicates"

    frame.update(
        log_size=np.asarray(log_size, dtype=float),
        log_trait=np.asarray(log_trait, dtype=float),
        n_rows=np.full(n, replicates or 1, dtype=int),
        within_sd_log_size=within_sd(0),
        within_sd_log_trait=within_sd(1),
        sd_log_size=column(sd_log_size),
        sd_log_trait=column(sd_log_trait),
        sd_source_size=sd_source(sd_log_size),
        sd_source_trait=sd_source(sd_log_trait),
        # replicate variances and counts, as ``allolaw prepare`` writes them (model/error_sd.py)
        replicate_var_log_size=within_sd(0) ** 2,
        replicate_n_size=np.full(n, replicates or 1, dtype=int),
        replicate_var_log_trait=within_sd(1) ** 2,
        replicate_n_trait=np.full(n, replicates or 1, dtype=int),
        replicate_cov_log_size_trait=column(within_cov),
        source=source_label,
        flag_outlier=False,
        flag_singleton_taxon=False,
    )
    data = pd.DataFrame(frame)
    data.attrs["source"] = source
    return data
