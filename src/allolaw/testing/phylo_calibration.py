"""Calibration of the phylogenetic law on small invented trees: SBC and a misspecification check.

Both studies use the likelihood of the fits with shared ancestry
(:func:`allolaw.phylogeny.log_density`: ``log trait ~ N(a + b·(x − x_ref), σ²(λC + (1 − λ)D))``
on a tree scaled to unit height) inside a small PyMC model with the law's parameters, compiled
once per study with nutpie on the JAX backend (as the fits) and refitted per replicate with new
data; the full model builder is not used, so latent sizes and taxon terms are not part of it.

* :func:`phylo_sbc`: simulation-based calibration (Talts et al. 2018). Each replicate draws
  a, b, σ, λ from the priors, simulates log traits on one fixed random tree (invented:
  allolaw's seeded generator) and fixed log sizes, fits, and records the rank of each true
  value among thinned posterior draws and whether the central 90% interval holds it. With a
  correct likelihood and sampler the ranks are uniform and the intervals hold the truth 90% of
  the time.
* :func:`tree_misspecification`: data with strong shared ancestry (λ = 1; the log sizes also
  evolve along the tree, as body size does) fitted by the same law with independent residuals
  (no tree) and with the tree; the share of replicates whose 90% interval of the exponent
  holds the truth, for both. Ignoring the tree makes the intervals too narrow (Felsenstein
  1985: species are not independent data points).

References
----------
Felsenstein, J. (1985). Phylogenies and the comparative method. Am. Nat. 125, 1–15.
Talts, S., Betancourt, M., Simpson, D., Vehtari, A. & Gelman, A. (2018). Validating Bayesian
inference algorithms with simulation-based calibration. arXiv:1804.06788.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from allolaw.phylogeny.density import log_density
from allolaw.phylogeny.simulate import random_tree
from allolaw.phylogeny.tree import Phylogeny

__all__ = ["PARAMETERS", "PRIORS", "CalibrationResult", "phylo_sbc", "tree_misspecification"]

#: The law's parameters, in the order of the result arrays.
PARAMETERS = ("intercept", "exponent", "sigma", "ancestry_signal")
#: Priors of the study (also the simulation's): normal (mean, sd), half-normal sd, beta(a, b).
PRIORS = {"intercept": (0.0, 1.0), "exponent": (0.75, 0.25), "sigma": 0.5,
          "ancestry_signal": (1.0, 1.0)}


@dataclass
class CalibrationResult:
    """Per replicate and parameter: truth, rank among ``n_ranks − 1`` thinned draws, interval."""

    parameters: tuple[str, ...]
    n_ranks: int
    truth: list[list[float]] = field(default_factory=list)
    ranks: list[list[int]] = field(default_factory=list)
    lower: list[list[float]] = field(default_factory=list)
    upper: list[list[float]] = field(default_factory=list)
    divergences: list[int] = field(default_factory=list)

    def coverage(self) -> dict[str, float]:
        """Share of replicates whose central 90% interval holds the truth, per parameter."""
        t, lo, hi = (np.asarray(v, float) for v in (self.truth, self.lower, self.upper))
        hits = (lo <= t) & (t <= hi)
        return {p: float(hits[:, k].mean()) for k, p in enumerate(self.parameters)}

    def rank_histograms(self, bins: int = 5) -> dict[str, list[int]]:
        """Counts of the ranks in ``bins`` equal bins of ``0 … n_ranks − 1``, per parameter."""
        r = np.asarray(self.ranks)
        return {p: np.histogram(r[:, k], bins=bins, range=(0, self.n_ranks))[0].tolist()
                for k, p in enumerate(self.parameters)}


def phylo_sbc(
    n_replicates: int, *, n_species: int = 30, seed: int = 1, draws: int = 300,
    tune: int = 300, n_ranks: int = 100,
) -> CalibrationResult:
    """Run the SBC study (see the module docstring); 2 chains per replicate on one core."""
    phylo, x, rng = _design(n_species, seed, tree_sizes=False)
    model_fit = _compile(phylo, x, with_tree=True)
    out = CalibrationResult(PARAMETERS, n_ranks)
    for rep in range(n_replicates):
        truth = _draw_prior(rng)
        y = _simulate(truth, x, phylo, rng)
        post, div = _sample(model_fit, y, seed * 10_000 + rep, draws, tune)
        _record(out, truth, post, PARAMETERS, n_ranks, div)
    return out


def tree_misspecification(
    n_replicates: int, *, n_species: int = 30, seed: int = 2, draws: int = 300,
    tune: int = 300,
) -> dict[str, CalibrationResult]:
    """Fit data with λ = 1 (sizes along the tree too) without and with the tree.

    The other parameters are drawn from :data:`PRIORS` per replicate; returns one result per
    fit (``"without_tree"``, ``"with_tree"``) with the exponent's truth, ranks and intervals.
    """
    phylo, x, rng = _design(n_species, seed, tree_sizes=True)
    compiled = {"without_tree": _compile(phylo, x, with_tree=False),
                "with_tree": _compile(phylo, x, with_tree=True)}
    out = {k: CalibrationResult(("exponent",), 100) for k in compiled}
    for rep in range(n_replicates):
        truth = _draw_prior(rng)
        truth["ancestry_signal"] = 1.0
        y = _simulate(truth, x, phylo, rng)
        for k, fit in compiled.items():
            post, div = _sample(fit, y, seed * 10_000 + rep, draws, tune)
            _record(out[k], truth, post, ("exponent",), 100, div)
    return out


# --- pieces ---------------------------------------------------------------------------------
def _design(n: int, seed: int, *, tree_sizes: bool) -> tuple[Phylogeny, np.ndarray, Any]:
    from allolaw.model.phylo_terms import scale_to_unit_height, simulate_residuals

    rng = np.random.default_rng(seed)
    phylo = scale_to_unit_height(random_tree(n, seed=seed, ultrametric=True))
    # with tree_sizes, log sizes (centred) by Brownian motion along the tree, SD 1 at a tip
    x = simulate_residuals(1.0, 1.0, phylo, rng=rng) if tree_sizes else rng.normal(0.0, 1.0, n)
    return phylo, x - x.mean(), rng


def _draw_prior(rng: np.random.Generator) -> dict[str, float]:
    return {"intercept": float(rng.normal(*PRIORS["intercept"])),
            "exponent": float(rng.normal(*PRIORS["exponent"])),
            "sigma": float(abs(rng.normal(0.0, PRIORS["sigma"]))),
            "ancestry_signal": float(rng.beta(*PRIORS["ancestry_signal"]))}


def _simulate(truth: dict[str, float], x: np.ndarray, phylo: Phylogeny,
              rng: np.random.Generator) -> np.ndarray:
    from allolaw.model.phylo_terms import simulate_residuals

    resid = simulate_residuals(truth["sigma"], truth["ancestry_signal"], phylo, rng=rng)
    return truth["intercept"] + truth["exponent"] * x + resid


def _compile(phylo: Phylogeny, x: np.ndarray, *, with_tree: bool) -> Any:
    import nutpie
    import pymc as pm

    logging.getLogger("pymc").setLevel(logging.ERROR)
    with pm.Model() as model:
        y = pm.Data("y", np.zeros(len(x)))
        a = pm.Normal("intercept", *PRIORS["intercept"])
        b = pm.Normal("exponent", *PRIORS["exponent"])
        s = pm.HalfNormal("sigma", PRIORS["sigma"])
        mu = a + b * x
        if with_tree:
            lam = pm.Beta("ancestry_signal", *PRIORS["ancestry_signal"])
            pm.Potential("trait", log_density(y - mu, s, lam, phylo))
        else:
            pm.Potential("trait", pm.logp(pm.Normal.dist(mu, s), y).sum())
    return nutpie.compile_pymc_model(model, backend="jax", gradient_backend="pytensor",
                                     freeze_model=False)


def _sample(compiled: Any, y: np.ndarray, seed: int, draws: int, tune: int) -> tuple[Any, int]:
    import nutpie

    idata = nutpie.sample(compiled.with_data(y=y), draws=draws, tune=tune, chains=2, cores=1,
                          seed=seed, progress_bar=False)
    return idata.posterior, int(idata.sample_stats["diverging"].sum())


def _record(out: CalibrationResult, truth: dict[str, float], post: Any,
            names: tuple[str, ...], n_ranks: int, div: int) -> None:
    row_t, row_r, row_lo, row_hi = [], [], [], []
    for name in names:
        d = post[name].to_numpy().ravel()
        thin = d[np.linspace(0, len(d) - 1, n_ranks - 1).astype(int)]
        lo, hi = np.quantile(d, [0.05, 0.95])
        row_t.append(truth[name])
        row_r.append(int(np.sum(thin < truth[name])))
        row_lo.append(float(lo))
        row_hi.append(float(hi))
    out.truth.append(row_t)
    out.ranks.append(row_r)
    out.lower.append(row_lo)
    out.upper.append(row_hi)
    out.divergences.append(div)
