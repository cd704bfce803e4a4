"""Seeded datasets whose truth departs from the model the way real comparative data do.

The calibration studies (:mod:`allolaw.testing.calibration`) simulate from the model's own
assumptions, so they test the code, not the model. The simulators here break one assumption
each, in the ``clean.csv`` format and with the truth under the model's variable names
(:class:`allolaw.testing.data.Simulated`):

* :func:`simulate_spread_taxa` — taxa sit at different places along the size axis, so the
  true log sizes are not one normal population; the size error is known per species and the
  within-taxon reliability (within-taxon true-size variance over that plus the error
  variance) differs by taxon. With one reliability for all taxa it gives the two designs of
  :data:`DESIGNS` (``wide_20x12``, ``wide_8x15``).
* :func:`simulate_correlated_errors` — species values are means of individuals, and an
  individual's trait follows its own size (within-species slope = between-species slope), so
  the size and trait errors of a species mean are correlated.
* :func:`simulate_taxon_scatter` — the residual SD differs by taxon.
* :func:`simulate_three_levels` — three nested taxon levels, each spread along the size axis.

Invented data, for the misspecification study (``benchmarks/misspecification.py``) and tests.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from allolaw.testing.data import Simulated, clean_frame

__all__ = [
    "DESIGNS",
    "simulate_correlated_errors",
    "simulate_spread_taxa",
    "simulate_taxon_scatter",
    "simulate_three_levels",
]

#: The two fixed designs: genera × species, spread of genus mean log sizes (SD), within-genus
#: true log-size SD and species-mean size-error SD; every genus exponent 0.75.
DESIGNS: dict[str, dict[str, Any]] = {
    "wide_20x12": {"genera": 20, "species_per_genus": 12, "centre_sd": 1.5,
                   "within_sd": 0.3, "size_error_sd": 0.1},
    "wide_8x15": {"genera": 8, "species_per_genus": 15, "centre_sd": 1.5,
                  "within_sd": 0.4, "size_error_sd": 0.3},
}


def simulate_spread_taxa(
    *,
    seed: int,
    genera: int = 10,
    species_per_genus: int = 12,
    centre_sd: float = 1.5,
    within_sd: float = 0.4,
    reliability: tuple[float, float] | None = (0.6, 0.95),
    size_error_sd: float | None = None,
    error_spread: float = 0.5,
    intercept: float = 1.0,
    exponent: float = 0.75,
    intercept_sd: float = 0.3,
    exponent_sd: float = 0.0,
    sigma: float = 0.1,
) -> Simulated:
    """Genera spread along the size axis, size error known per species.

    Parameters
    ----------
    centre_sd
        SD of the genus mean true log sizes (normal around 0).
    within_sd
        SD of true log sizes within a genus.
    reliability
        ``(low, high)``: the genera's within-genus reliabilities, evenly spaced from low to
        high and assigned to genera in random order. The genus error variance is
        ``within_sd²·(1 − λ)/λ``. Ignored when ``size_error_sd`` is given.
    size_error_sd
        One error SD for every species (the fixed designs of :data:`DESIGNS`).
    error_spread
        Each species' error variance is the genus error variance times a factor uniform on
        ``1 ± error_spread`` (mean 1), so the SDs are known per species but not equal; 0 with
        ``size_error_sd``.

    Notes
    -----
    ``truth["within_reliability"]`` maps each genus to its target reliability
    ``within_sd² / (within_sd² + mean error variance)``.
    """
    rng = np.random.default_rng(seed)
    tree = _tree(rng, (genera,), ("genus",), species_per_genus, intercept, exponent,
                 intercept_sd, exponent_sd, (centre_sd,))
    if size_error_sd is not None:
        lam = np.full(genera, within_sd**2 / (within_sd**2 + size_error_sd**2))
        error_spread = 0.0
    else:
        low, high = reliability if reliability is not None else (1.0, 1.0)
        lam = rng.permutation(np.linspace(low, high, genera))
    error_var = within_sd**2 * (1.0 - lam) / lam
    factor = rng.uniform(1.0 - error_spread, 1.0 + error_spread, tree.n)
    sd_x = np.sqrt(error_var[tree.inner] * factor)
    true_x, true_y = tree.draw_species(rng, within_sd, sigma)
    obs_x = true_x + sd_x * rng.normal(size=tree.n)
    sim = _assemble(tree, seed, obs_x, true_y, sd_x, np.zeros(tree.n))
    sim.truth.update(sigma=sigma, true_log_size=true_x, within_sd=within_sd,
                     within_reliability=dict(zip(tree.labels[-1], lam.tolist(), strict=True)))
    return sim


def simulate_correlated_errors(
    *,
    seed: int,
    genera: int = 8,
    species_per_genus: int = 12,
    individuals: int = 4,
    individual_size_sd: float = 0.3,
    individual_trait_sd: float = 0.1,
    within_species_exponent: float | None = None,
    centre_sd: float = 1.0,
    within_sd: float = 0.5,
    intercept: float = 1.0,
    exponent: float = 0.75,
    intercept_sd: float = 0.3,
    exponent_sd: float = 0.0,
    sigma: float = 0.1,
) -> Simulated:
    """Species means of individuals whose trait follows their own size.

    Individual j of species i has log size ``X_i + d_ij`` and log trait
    ``Y_i + β_w·d_ij + e_ij`` (``d ~ N(0, individual_size_sd)``, ``e ~ N(0,
    individual_trait_sd)``, β_w the within-species exponent, by default the between-species
    one). The species row holds the means and their standard errors (``sd_source =
    replicates``, as ``allolaw prepare`` writes them), so the errors of a species mean are
    correlated with correlation ``β_w·s_d / sqrt(β_w²·s_d² + s_e²)``, recorded as
    ``truth["error_correlation"]``.
    """
    rng = np.random.default_rng(seed)
    beta_w = exponent if within_species_exponent is None else within_species_exponent
    tree = _tree(rng, (genera,), ("genus",), species_per_genus, intercept, exponent,
                 intercept_sd, exponent_sd, (centre_sd,))
    true_x, true_y = tree.draw_species(rng, within_sd, sigma)
    d = rng.normal(0.0, individual_size_sd, (tree.n, individuals))
    e = rng.normal(0.0, individual_trait_sd, (tree.n, individuals))
    ind_x = true_x[:, None] + d
    ind_y = true_y[:, None] + beta_w * d + e
    within_x = ind_x.std(axis=1, ddof=1)
    within_y = ind_y.std(axis=1, ddof=1)
    root_k = np.sqrt(individuals)
    cov = ((ind_x - ind_x.mean(axis=1, keepdims=True))
           * (ind_y - ind_y.mean(axis=1, keepdims=True))).sum(axis=1) / (individuals - 1)
    sim = _assemble(tree, seed, ind_x.mean(axis=1), ind_y.mean(axis=1), within_x / root_k,
                    within_y / root_k, replicates=individuals, within=(within_x, within_y),
                    within_cov=cov)
    s_d, s_e = individual_size_sd, individual_trait_sd
    sim.truth.update(
        sigma=sigma, true_log_size=true_x, true_log_trait=true_y,
        within_species_exponent=beta_w,
        error_correlation=beta_w * s_d / float(np.sqrt(beta_w**2 * s_d**2 + s_e**2)),
    )
    return sim


def simulate_taxon_scatter(
    *,
    seed: int,
    genera: int = 8,
    species_per_genus: int = 15,
    sigma_range: tuple[float, float] = (0.05, 0.5),
    centre_sd: float = 1.0,
    within_sd: float = 0.6,
    size_error_sd: float = 0.1,
    intercept: float = 1.0,
    exponent: float = 0.75,
    intercept_sd: float = 0.3,
    exponent_sd: float = 0.0,
) -> Simulated:
    """The residual SD differs by genus: evenly spaced on the log scale over ``sigma_range``.

    The genus SDs go to genera in random order; ``truth["taxon_sigma__genus"]`` maps each
    genus to its SD and ``truth["sigma"]`` is their root mean square (the single SD a model
    with one residual SD would aim at).
    """
    rng = np.random.default_rng(seed)
    tree = _tree(rng, (genera,), ("genus",), species_per_genus, intercept, exponent,
                 intercept_sd, exponent_sd, (centre_sd,))
    sigmas = rng.permutation(np.geomspace(sigma_range[0], sigma_range[1], genera))
    true_x, true_y = tree.draw_species(rng, within_sd, sigmas[tree.inner])
    sd_x = np.full(tree.n, size_error_sd)
    obs_x = true_x + sd_x * rng.normal(size=tree.n)
    sim = _assemble(tree, seed, obs_x, true_y, sd_x, np.zeros(tree.n))
    sim.truth.update(sigma=float(np.sqrt(np.mean(sigmas**2))), true_log_size=true_x,
                     taxon_sigma__genus=dict(zip(tree.labels[-1], sigmas.tolist(), strict=True)))
    return sim


def simulate_three_levels(
    *,
    seed: int,
    taxa: tuple[int, int, int] = (3, 2, 3),
    species_per_genus: int = 8,
    centre_sds: tuple[float, float, float] = (1.0, 0.7, 0.5),
    within_sd: float = 0.3,
    size_error_sd: float = 0.15,
    intercept: float = 1.0,
    exponent: float = 0.75,
    intercept_sd: float = 0.2,
    exponent_sd: float = 0.04,
    sigma: float = 0.1,
) -> Simulated:
    """Orders, families and genera, each level spread along the size axis.

    A taxon's mean log size is its parent's plus a normal deviation with that level's SD of
    ``centre_sds``; intercept and exponent deviate from the parent's at every level.
    """
    rng = np.random.default_rng(seed)
    tree = _tree(rng, taxa, ("order", "family", "genus"), species_per_genus, intercept,
                 exponent, intercept_sd, exponent_sd, centre_sds)
    true_x, true_y = tree.draw_species(rng, within_sd, sigma)
    sd_x = np.full(tree.n, size_error_sd)
    obs_x = true_x + sd_x * rng.normal(size=tree.n)
    sim = _assemble(tree, seed, obs_x, true_y, sd_x, np.zeros(tree.n))
    sim.truth.update(sigma=sigma, true_log_size=true_x)
    return sim


@dataclass
class _Tree:
    names: list[str]
    labels: list[list[str]]  # per level, the taxon labels in order
    species_labels: list[np.ndarray]  # per level, each species' taxon label
    inner: np.ndarray  # each species' innermost taxon index
    centre: np.ndarray  # each species' taxon mean true log size
    a: np.ndarray
    b: np.ndarray
    truth: dict[str, Any]

    @property
    def n(self) -> int:
        return int(self.inner.size)

    def mean_trait(self, true_x: np.ndarray) -> np.ndarray:
        # log reference size 0
        return self.a + self.b * true_x

    def draw_species(
        self, rng: np.random.Generator, within_sd: float, sigma: float | np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """True log sizes around each taxon's mean, true log traits on the taxon laws."""
        true_x = self.centre + rng.normal(0.0, within_sd, self.n)
        true_y = self.mean_trait(true_x) + sigma * rng.normal(size=self.n)
        return true_x, true_y


def _tree(
    rng: np.random.Generator,
    taxa: tuple[int, ...],
    names: tuple[str, ...],
    per_taxon: int,
    intercept: float,
    exponent: float,
    intercept_sd: float,
    exponent_sd: float,
    centre_sds: tuple[float, ...],
) -> _Tree:
    # nested taxa, outer to inner; every taxon's intercept, exponent and mean log size
    # deviate from its parent's (normal, with the level's SDs)
    truth: dict[str, Any] = {"intercept": intercept, "exponent": exponent,
                             "log_reference_size": 0.0}
    values = np.array([[intercept, exponent, 0.0]])
    parents: list[np.ndarray] = []
    labels: list[list[str]] = []
    codes = [""]
    for depth, count in enumerate(taxa):
        parent = np.repeat(np.arange(len(codes)), count)
        codes = [f"{codes[p]}_{k + 1}" for p in range(len(codes)) for k in range(count)]
        level_labels = [f"{names[depth]}{c}" for c in codes]
        scale = np.array([intercept_sd, exponent_sd, centre_sds[depth]])
        values = values[parent] + rng.normal(0.0, 1.0, (parent.size, 3)) * scale
        for k, term in enumerate(("intercept", "exponent")):
            truth[f"taxon_{term}__{names[depth]}"] = dict(
                zip(level_labels, values[:, k].tolist(), strict=True))
        truth[f"taxon_log_size_mean__{names[depth]}"] = dict(
            zip(level_labels, values[:, 2].tolist(), strict=True))
        truth[f"intercept_sd__{names[depth]}"] = intercept_sd
        truth[f"exponent_sd__{names[depth]}"] = exponent_sd
        parents.append(parent)
        labels.append(level_labels)
    inner = np.repeat(np.arange(len(codes)), per_taxon)
    species_labels = []
    index = inner
    for depth in range(len(taxa) - 1, -1, -1):
        species_labels.insert(0, np.asarray(labels[depth])[index])
        index = parents[depth][index]
    return _Tree(names=list(names[: len(taxa)]), labels=labels, species_labels=species_labels,
                 inner=inner, centre=values[inner, 2], a=values[inner, 0], b=values[inner, 1],
                 truth=truth)


def _assemble(
    tree: _Tree,
    seed: int,
    log_size: np.ndarray,
    log_trait: np.ndarray,
    sd_size: np.ndarray,
    sd_trait: np.ndarray,
    *,
    replicates: int | None = None,
    within: tuple[np.ndarray, np.ndarray] | None = None,
    within_cov: np.ndarray | None = None,
) -> Simulated:
    data = clean_frame(
        [f"species_{i + 1:03d}" for i in range(tree.n)], log_size, log_trait,
        taxa=dict(zip(tree.names, tree.species_labels, strict=True)),
        sd_log_size=sd_size, sd_log_trait=sd_trait, replicates=replicates, within=within,
        within_cov=within_cov, source=f"simulated (seed {seed})", source_label="simulated",
    )
    return Simulated(data=data, levels=list(tree.names), log_reference_size=0.0,
                     truth=dict(tree.truth))
