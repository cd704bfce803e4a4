"""Shared ancestry in the model: the trait's residuals evolve along the dataset's tree.

With ``shared_ancestry`` other than ``none`` the observed ``trait`` is one multivariate
normal over the species, ``log trait ~ N(μ, σ²(λC + (1 − λ)D))`` with ``C`` the tree
covariance, ``D`` its diagonal and Pagel's λ (``ancestry_signal``; fixed at 1 for ``full``).
Its log density comes from :func:`allolaw.phylogeny.log_density` (Gaussian messages from the
tips to the root, no n × n matrix); the predictive draws simulate Brownian motion down the
λ-scaled tree, also without a matrix.

The joint density is one number per draw, so PSIS-LOO needs pointwise values of another
kind: :func:`add_ancestry_log_likelihood` writes ``log p(y_i | y_−i, θ)`` per species and
draw (:func:`allolaw.phylogeny.loo_log_density`) into ``log_likelihood["trait"]``, which puts
the model on the same footing as models with independent residuals when compared by LOO
(Bürkner, Gabry & Vehtari 2020).

With errors in size, the latent true log sizes evolve along the same tree
(:func:`size_tree_population`: Brownian motion from a root mean, λ = 1 for the sizes).

Branch lengths are divided by the largest root-to-tip distance (:func:`scale_to_unit_height`),
so σ is the residual SD of a species at the full height of the tree, on the same scale as
the residual SD of a model without shared ancestry.

References
----------
Bürkner, P.-C., Gabry, J. & Vehtari, A. (2020). Efficient leave-one-out cross-validation for
Bayesian non-factorized normal and Student-t models. Comput. Stat. 36, 1243–1261.
Felsenstein, J. (1985). Phylogenies and the comparative method. Am. Nat. 125, 1–15.
Pagel, M. (1999). Inferring the historical patterns of biological evolution. Nature 401,
877–884.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from allolaw.errors import UserError
from allolaw.phylogeny import (
    Phylogeny,
    log_density,
    loo_log_density,
    read_tree,
    size_log_density,
)

if TYPE_CHECKING:
    import arviz as az
    import pymc as pm

__all__ = [
    "SIGNAL",
    "SIZE_TREE_MEAN",
    "SIZE_TREE_SD",
    "AncestryTerm",
    "add_ancestry_log_likelihood",
    "ancestry_term",
    "has_ancestry",
    "load_phylogeny",
    "scale_to_unit_height",
    "simulate_residuals",
    "size_tree_population",
    "tree_species",
]

#: Name of Pagel's λ in the posterior.
SIGNAL = "ancestry_signal"
#: Names of the root mean and the SD per unit tree height of the true log sizes on the tree.
SIZE_TREE_MEAN = "size_tree_mean"
SIZE_TREE_SD = "size_tree_sd"
# attribute of the pm.Model that carries the term for the log-likelihood step
_ATTRIBUTE = "allolaw_ancestry"


@dataclass(frozen=True)
class AncestryTerm:
    """The pieces of the tree likelihood that the LOO step recomputes per draw."""

    mu: Any
    sigma: Any
    lam: Any
    phylogeny: Phylogeny
    observed: np.ndarray


def load_phylogeny(path: str | Path, species: list[str]) -> Phylogeny:
    """Read the dataset's pruned tree (``results/<d>/tree.nwk``) for the species of clean.csv.

    Every species must be a tip (prepare has dropped the others); the tree is scaled to
    unit height (:func:`scale_to_unit_height`).

    Raises
    ------
    UserError
        If the file is missing or a species is not a tip of it.
    """
    if not Path(path).is_file():
        msg = (f"{path}: no tree for a model with shared ancestry; give the dataset a "
               "`tree:` in the config and rerun `allolaw prepare`")
        raise UserError(msg)
    return scale_to_unit_height(read_tree(path, species, missing="stop").phylogeny)


def scale_to_unit_height(phylogeny: Phylogeny) -> Phylogeny:
    """The same tree with branch lengths divided by the largest root-to-tip distance."""
    top = float(phylogeny.height[phylogeny.tip_node].max())
    if not top > 0:
        msg = "the tree has no positive branch length: every species sits at the root"
        raise UserError(msg)
    return Phylogeny(phylogeny.parent, phylogeny.length / top, phylogeny.tip_node,
                     phylogeny.species)


def ancestry_term(
    name: str, mu: Any, sigma: Any, spec_priors: dict[str, Any], shared_ancestry: str,
    phylogeny: Phylogeny, observed: np.ndarray, model: pm.Model,
) -> Any:
    """Add λ and the observed variable ``name`` with tree-correlated residuals to ``model``.

    Call inside the model context. ``shared_ancestry`` ``full`` fixes λ at 1; ``signal``
    gives it the prior ``spec_priors["ancestry_signal"]`` (beta, or ``fixed``).
    """
    import pymc as pm
    import pytensor.tensor as pt

    prior = spec_priors["ancestry_signal"]
    if shared_ancestry == "full":
        lam = pt.as_tensor_variable(1.0)
    elif "fixed" in prior:
        lam = pt.as_tensor_variable(float(prior["fixed"]))
    else:
        lam = pm.Beta(SIGNAL, alpha=float(prior["alpha"]), beta=float(prior["beta"]))

    rv = _tree_normal(name, mu, sigma, lam, phylogeny, observed=observed)
    setattr(model, _ATTRIBUTE, AncestryTerm(mu, sigma, lam, phylogeny,
                                            np.asarray(observed, float)))
    return rv


def size_tree_population(log_size: np.ndarray, population: dict[str, float],
                         phylogeny: Phylogeny, *, whiten: bool, near: Any = None) -> Any:
    """Latent true log sizes that evolve by Brownian motion along the tree; returns them.

    ``true_log_size ~ N(size_tree_mean, size_tree_sd² C)`` with ``C`` the tree covariance of
    the unit-height tree: plain Brownian motion (λ = 1 for the sizes, whatever the residuals'
    λ) from the root's value ``size_tree_mean`` (prior normal(``population["mean"]``,
    ``population["sd"]``)), ``size_tree_sd`` the SD of a species' size around the root at
    the full height of the tree (half-normal(``population["sd_scale"]``)). The density comes
    from :func:`allolaw.phylogeny.size_log_density` (messages from the tips up, no n × n
    matrix).

    With ``whiten`` the free variable is ``size_shift``, each true size minus its measured
    value (flat; with ``near``, estimated error SDs, ``size_error_u`` of
    :func:`~allolaw.model.error_sd.true_near_measured`), and the density of the true sizes is
    the potential ``size_ancestry_density``: the sampler starts at the measured sizes and
    works on the scale of the measurement error. ``whiten=False`` (prior draws) writes
    ``true_log_size`` as one variable along the tree, drawn by Brownian motion down it.

    References
    ----------
    Felsenstein, J. (1985). Phylogenies and the comparative method. Am. Nat. 125, 1–15.
    """
    import pymc as pm
    import pytensor.tensor as pt

    from allolaw.model.error_sd import true_near_measured

    mean = pm.Normal(SIZE_TREE_MEAN, float(population["mean"]), float(population["sd"]))
    sd = pm.HalfNormal(SIZE_TREE_SD, float(population["sd_scale"]))
    if not whiten:
        centre = mean * pt.ones(phylogeny.n_species)
        return _tree_normal("true_log_size", centre, sd, pt.as_tensor_variable(1.0), phylogeny)
    if near is None:
        shift = pm.Flat("size_shift", dims="species")
        true = pm.Deterministic("true_log_size", log_size + shift, dims="species")
    else:
        true = true_near_measured(log_size, near)
    pm.Potential("size_ancestry_density", size_log_density(true, mean, sd, phylogeny))
    return true


def _tree_normal(name: str, mu: Any, sigma: Any, lam: Any, phylogeny: Phylogeny, *,
                 observed: Any = None) -> Any:
    # one variable N(mu, σ²(λC + (1 − λ)D)) over the species: density by messages up the
    # tree, draws by Brownian motion down it (no n × n matrix either way)
    import pymc as pm
    import pytensor.tensor as pt

    def logp(value: Any, mu_: Any, sigma_: Any, lam_: Any) -> Any:
        return log_density(value - mu_, sigma_, lam_, phylogeny)

    def dist(mu_: Any, sigma_: Any, lam_: Any, size: Any) -> Any:
        # Brownian motion from 0 at the root down the λ-scaled tree, a depth at a time (a
        # PyTensor graph, so the predictive draws compile for every backend)
        t = lam_ * phylogeny.length + (1.0 - lam_) * phylogeny.tip_height
        step = pm.Normal.dist(0.0, 1.0, size=phylogeny.n_nodes) * pt.sqrt(t)
        value = pt.zeros(phylogeny.n_nodes)
        for nodes in phylogeny.depth_groups[1:]:
            value = pt.set_subtensor(value[nodes],
                                     value[phylogeny.parent[nodes]] + step[nodes])
        return mu_ + sigma_ * value[phylogeny.tip_node]

    return pm.CustomDist(name, mu, sigma, lam, logp=logp, dist=dist, ndim_supp=1,
                         signature="(n),(),()->(n)", observed=observed, dims="species")


def simulate_residuals(sigma: float, lam: float, phylogeny: Phylogeny, *,
                       rng: np.random.Generator | None = None) -> np.ndarray:
    """One draw of the residuals: Brownian motion from 0 at the root down the λ-scaled tree."""
    rng = rng if rng is not None else np.random.default_rng()
    t = phylogeny.scaled_lengths(float(lam))
    value = np.zeros(phylogeny.n_nodes)
    for nodes in phylogeny.depth_groups[1:]:
        value[nodes] = value[phylogeny.parent[nodes]] + rng.normal(size=len(nodes)) * np.sqrt(
            t[nodes])
    return float(sigma) * value[phylogeny.tip_node]


def has_ancestry(model: pm.Model) -> bool:
    """True when ``model`` has a trait with tree-correlated residuals."""
    return getattr(model, _ATTRIBUTE, None) is not None


def tree_species(model: pm.Model) -> int:
    """Number of species on the tree of a model with shared ancestry (0 without)."""
    term = getattr(model, _ATTRIBUTE, None)
    return 0 if term is None else int(term.phylogeny.n_species)


def add_ancestry_log_likelihood(idata: az.InferenceData, model: pm.Model, name: str) -> None:
    """Write ``log p(y_i | y_−i, θ)`` per chain, draw and species as ``log_likelihood[name]``.

    μ, σ and λ are recomputed for each posterior draw from the model's free variables; the
    conditional densities come from :func:`allolaw.phylogeny.loo_log_density`.

    References
    ----------
    Bürkner, Gabry & Vehtari (2020), the normal case (see the module docstring).
    """
    import arviz as az
    import pytensor

    term: AncestryTerm = getattr(model, _ATTRIBUTE)
    free = list(model.free_RVs)
    fn = pytensor.function(free, [term.mu, term.sigma, term.lam], on_unused_input="ignore")
    post = idata.posterior
    n_chain, n_draw = post.sizes["chain"], post.sizes["draw"]
    values = [post[v.name].values.reshape(n_chain * n_draw, *post[v.name].shape[2:])
              for v in free]
    n = term.phylogeny.n_species
    resid = np.empty((n_chain * n_draw, n))
    sig = np.empty(n_chain * n_draw)
    lam = np.empty(n_chain * n_draw)
    for k in range(n_chain * n_draw):
        mu_k, sig[k], lam[k] = fn(*(v[k] for v in values))
        resid[k] = term.observed - np.broadcast_to(mu_k, (n,))
    pointwise = loo_log_density(resid, sig, lam, term.phylogeny)
    coords = {"chain": post["chain"].values, "draw": post["draw"].values,
              "species": list(term.phylogeny.species)}
    dataset = az.dict_to_dataset(
        {name: pointwise.reshape(n_chain, n_draw, n)}, coords=coords,
        dims={name: ["species"]},
    )
    if "log_likelihood" in idata.groups():
        del idata.log_likelihood
    idata.add_groups({"log_likelihood": dataset})
