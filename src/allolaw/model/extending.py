"""Longer chains before a fit is called failed: one extension from the adapted sampler state.

When the worst rank-normalised R-hat or the smallest bulk or tail ESS of a fit falls short,
:func:`extend_if_short` runs every chain on once, from its last draw, with the step size and
mass matrix the warm-up adapted (no new warm-up), and appends the new draws. The record it
returns says whether that happened, how many draws were added and the numbers before and
after; the fit stage keeps it in the ``chain_extension`` attribute and the check stage copies
it into the check JSON.

Backends. nutpie (what ``auto`` runs): its adapted step size and the diagonal of its inverse
mass matrix are read from the sampler statistics of the last draw (``store_mass_matrix``);
nutpie 0.16 cannot start a run from a given mass matrix and position, so the extra draws come
from PyMC's NUTS given a fixed mass matrix and the chain's last position. Which mass matrix
(:mod:`allolaw.model.mass_matrix`; the record's ``mass_matrix``):

- ``adapted diagonal``: nutpie's adapted diagonal and step size, used as they are, when no
  chain used a low-rank part.
- ``draws' covariance (dense)`` or ``draws' variances (diagonal)``: when nutpie's low-rank
  part is in use (nutpie keeps only the diagonal scale and the eigenvalues of that part, not
  its directions, and the diagonal alone with the adapted step size diverged on every draw of
  a demo model), the regularised covariance of the fit's draws in the unconstrained space,
  pooled over chains (dense up to ``DENSE_MAX`` values); the step size is tuned again for
  ``STEP_TUNING_STEPS`` steps from each chain's last draw with that matrix fixed, and those
  tuning draws are thrown away. Measured on the demo's island_metabolism/taxa_errors (4
  chains × 300 warm-up + 300 draws, seed 20261202): 572 unconstrained values, dense matrix,
  no divergences, worst R-hat 1.018 → 1.010, smallest bulk ESS 217 → 686; the extension (PyMC's
  NUTS, chains one after another) took about 6.6 min where nutpie's fit took 48 s.

``pymc`` and ``numpyro`` (through ``pm.sample``) do not hand their adapted state back, so their
chains are not extended: the record says so and the check reports the fit as it is.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from allolaw.model.compiling import per_draw_compile
from allolaw.model.mass_matrix import MASS_ADAPTED, ChainMetric, mass_matrix_from_draws

if TYPE_CHECKING:
    import arviz as az
    import pymc as pm

__all__ = ["ESS_MIN", "RHAT_MAX", "AdaptedState", "adapted_metric", "adapted_state_from_draws",
           "adapted_state_from_nutpie", "convergence_numbers", "extend_chains",
           "extend_if_short"]

#: Largest acceptable rank-normalised R-hat (Vehtari et al. 2021); as in the check stage.
RHAT_MAX = 1.01
#: Smallest acceptable bulk and tail ESS (Vehtari et al. 2021: 100 per chain, 400 for four).
ESS_MIN = 400.0

# nutpie sampler statistics that hold the mass matrix (dropped once read: n_dim per draw)
_MASS_STATS = ("mass_matrix_inv", "mass_matrix_stds", "mass_matrix_eigvals",
               "num_eigenvalues")
# PyMC's names of the NUTS statistics nutpie also writes, as nutpie names them
_PYMC_TO_NUTPIE = {"tree_depth": "depth", "reached_max_treedepth": "maxdepth_reached",
                   "lp": "logp", "mean_tree_accept": "mean_tree_accept",
                   "acceptance_rate": "mean_tree_accept"}


@dataclass(frozen=True)
class AdaptedState:
    """The sampler state warm-up left in each chain (unconstrained space)."""

    value_vars: tuple[str, ...]  # the sampler's order of the unconstrained variables
    # (chains, n): diagonal of the inverse mass matrix; None when the backend does not hand
    # it back (numpyro through PyMC), so an extension takes one from the draws
    inverse_mass: np.ndarray | None
    step_size: np.ndarray  # (chains,)
    low_rank_left_out: np.ndarray  # (chains,): low-rank directions the diagonal leaves out


def adapted_state_from_nutpie(idata: az.InferenceData, value_vars: list[str]
                              ) -> AdaptedState:
    """Read nutpie's adapted step size and mass-matrix diagonal; drop those statistics.

    Parameters
    ----------
    idata
        A nutpie fit sampled with ``store_mass_matrix=True`` (changed in place: the mass-matrix
        statistics are removed from ``sample_stats`` and ``warmup_sample_stats``).
    value_vars
        nutpie's order of the unconstrained variables (that of ``model.free_RVs``).
    """
    stats = idata.sample_stats
    last = stats.isel(draw=-1)
    if "mass_matrix_inv" in stats:
        inverse = np.asarray(last["mass_matrix_inv"].values, dtype=float)
        left_out = np.zeros(inverse.shape[0], dtype=int)
    else:  # low-rank: M⁻¹ = D (I + U (Λ − I) Uᵀ) D with D = diag(stds); U is not stored
        inverse = np.asarray(last["mass_matrix_stds"].values, dtype=float) ** 2
        left_out = np.asarray(last["num_eigenvalues"].values, dtype=int)
    state = AdaptedState(value_vars=tuple(value_vars), inverse_mass=inverse,
                         step_size=np.asarray(last["step_size"].values, dtype=float),
                         low_rank_left_out=left_out)
    for group in ("sample_stats", "warmup_sample_stats"):
        if group in idata.groups():
            ds = getattr(idata, group)
            setattr(idata, group, ds.drop_vars([n for n in _MASS_STATS if n in ds]))
    return state


def adapted_state_from_draws(idata: az.InferenceData, value_vars: list[str]
                             ) -> AdaptedState:
    """The last step size of each chain, for a backend that hands back nothing else.

    numpyro through PyMC keeps its adapted inverse mass matrix to itself; with the fit's
    unconstrained draws kept (``keep_untransformed``), :func:`extend_if_short` builds the
    extension's mass matrix from the draws (:func:`mass_matrix_from_draws`).
    """
    step = np.asarray(idata.sample_stats["step_size"].isel(draw=-1).values, dtype=float)
    return AdaptedState(value_vars=tuple(value_vars), inverse_mass=None,
                        step_size=np.ravel(step),
                        low_rank_left_out=np.zeros(np.size(step), dtype=int))


def adapted_metric(state: AdaptedState) -> ChainMetric:
    """nutpie's adapted diagonal and step size, used as they are (no step-size tuning)."""
    return ChainMetric(kind=MASS_ADAPTED, inverse_mass=state.inverse_mass,
                       step_size=state.step_size, tuning_steps=0)


def convergence_numbers(posterior: Any) -> dict[str, float]:
    """Worst R-hat and smallest bulk and tail ESS over the varying posterior elements.

    The sampler's own unconstrained copies (names ending in ``__``) and values fixed in every
    draw are left out, as in :func:`allolaw.checks.convergence.check_fit`.
    """
    import arviz as az

    varying = {}
    for n in posterior.data_vars:  # elements fixed in every draw have no R-hat or ESS
        draws = np.asarray(posterior[n].values)
        mask = ~np.all(draws == draws[:1, :1], axis=(0, 1)).ravel()
        if not str(n).endswith("__") and mask.any():
            varying[n] = mask
    names = list(varying)
    subset = posterior[names]
    out = {}
    with np.errstate(invalid="ignore", divide="ignore"):  # fixed elements: NaN, left out
        results = (("rhat", az.rhat(subset, method="rank"), np.max),
                   ("ess_bulk", az.ess(subset, method="bulk"), np.min),
                   ("ess_tail", az.ess(subset, method="tail"), np.min))
    for key, ds, worst in results:
        values = np.concatenate([np.ravel(ds[n].values)[varying[n]] for n in names]
                                or [np.array([])])
        if values.size == 0 or np.isnan(values).any():
            out[key] = math.nan
        else:
            out[key] = round(float(worst(values)), 4)
    return out


def extend_if_short(
    model: pm.Model,
    idata: az.InferenceData,
    state: AdaptedState | None,
    *,
    extra_draws: int,
    seed: int,
    backend: str,
    target_acceptance: float,
    progress: bool = False,
) -> tuple[az.InferenceData, dict[str, Any]]:
    """Extend every chain once when R-hat or ESS fall short; return the fit and a record.

    Parameters
    ----------
    model
        The model the fit sampled.
    idata
        The fit (posterior and sample statistics).
    state
        The adapted state (:func:`adapted_state_from_nutpie`), or ``None`` when the backend
        did not hand it back.
    extra_draws
        Draws to add per chain (0: never extend).
    seed
        The fit's base seed; chain ``c`` of the extension uses word ``3 + c`` of
        ``SeedSequence(seed).generate_state`` (words 0–2 are the fit's predictive seeds).
    backend
        The backend that ran, for the record.
    target_acceptance
        The acceptance rate the step-size tuning aims at (mass matrix from the draws only;
        nutpie's adapted step size is used as it is with its adapted diagonal).
    progress
        Show PyMC's progress bar.

    Returns
    -------
    (arviz.InferenceData, dict)
        The fit, extended or as it was, and the record: ``status`` (``extended``,
        ``not needed``, ``off``, ``not available`` or ``discarded``: the added draws
        diverged more often than the first run, so they were dropped), ``reason``, ``backend``,
        ``extra_draws_per_chain``, ``draws_per_chain_before``/``_after``, ``before`` and
        ``after`` (worst R-hat, smallest bulk and tail ESS; ``None`` when the extension is
        off, as nothing is decided from them), ``thresholds`` and, when
        extended or discarded, ``mass_matrix`` (``adapted diagonal``, ``draws' covariance
        (dense)`` or ``draws' variances (diagonal)``), ``unconstrained_values``,
        ``step_size_tuning_steps``, ``step_size`` (per chain, of the added draws),
        ``low_rank_directions_left_out``, ``divergences`` and ``mean_acceptance`` of the
        added draws and ``seeds``.
    """
    n_draws = int(idata.posterior.sizes["draw"])
    record: dict[str, Any] = {
        "status": "not needed", "backend": backend, "extra_draws_per_chain": 0,
        "draws_per_chain_before": n_draws, "draws_per_chain_after": n_draws,
        "thresholds": {"rhat_max": RHAT_MAX, "ess_bulk_min": ESS_MIN, "ess_tail_min": ESS_MIN},
    }
    if extra_draws <= 0:
        # nothing to decide, so R-hat and ESS are left to the check stage: over every element
        # they cost about a minute on a 10,000-species fit (ArviZ, measured), paid twice
        record.update({"status": "off", "before": None, "after": None,
                       "reason": "chain extension is off (sampler.extension_draws is 0)"})
        return idata, record
    before = convergence_numbers(idata.posterior)
    record.update({"before": before, "after": before})
    short = _short(before)
    if not short:
        record["reason"] = "R-hat and ESS met their thresholds"
        return idata, record
    record["reason"] = "; ".join(short)
    if state is None:
        record["status"] = "not available"
        record["reason"] += (f"; backend {backend} does not hand back its adapted step size "
                             "and mass matrix, so the chains were not extended")
        return idata, record
    metric = _choose_metric(idata, state)
    if metric is None:
        record["status"] = "not available"
        why = ("its adapted mass matrix" if state.inverse_mass is None else
               f"the low-rank part ({int(state.low_rank_left_out.max())} direction(s)) of "
               "its adapted mass matrix")
        record["reason"] += (f"; backend {backend} does not hand back {why}, and the fit's "
                             "unconstrained draws needed to replace it are not stored, so "
                             "the chains were not extended")
        record["low_rank_directions_left_out"] = [int(k) for k in state.low_rank_left_out]
        return idata, record
    chains = int(idata.posterior.sizes["chain"])
    seeds = [int(s) for s in np.random.SeedSequence(int(seed)).generate_state(3 + chains)[3:]]
    extended, added = extend_chains(model, idata, metric, extra_draws=extra_draws, seeds=seeds,
                                    target_acceptance=target_acceptance, progress=progress)
    after = convergence_numbers(extended.posterior)
    accept = _first(added, ("mean_tree_accept", "acceptance_rate"))
    n_div = int(np.asarray(added["diverging"].values).sum())
    record.update({
        "mass_matrix": metric.kind, "unconstrained_values": metric.size,
        "step_size_tuning_steps": metric.tuning_steps,
        "step_size": [round(float(s), 6) for s in np.asarray(added["step_size"].values)[:, 0]],
        "low_rank_directions_left_out": [int(k) for k in state.low_rank_left_out],
        "divergences": n_div,
        "mean_acceptance": None if accept is None else round(float(accept.mean()), 4),
        "seeds": seeds,
    })
    old_div = _count(idata.sample_stats, "diverging")
    if n_div > old_div:  # the continuation met trouble the first run did not: not kept
        record["status"] = "discarded"
        record["reason"] += (f"; the added draws had {n_div} divergent transitions (the first "
                             f"run {old_div}), so they were discarded and the fit kept as it "
                             f"was (R-hat {after['rhat']}, bulk ESS {after['ess_bulk']} with "
                             "them)")
        return idata, record
    record.update({
        "status": "extended", "extra_draws_per_chain": int(extra_draws),
        "draws_per_chain_after": int(extended.posterior.sizes["draw"]), "after": after,
    })
    return extended, record


def _choose_metric(idata: Any, state: AdaptedState) -> ChainMetric | None:
    # nutpie's diagonal when no chain used a low-rank part; else (or with no adapted
    # matrix handed back) one from the draws
    if state.inverse_mass is not None and not np.any(state.low_rank_left_out > 0):
        return adapted_metric(state)
    return mass_matrix_from_draws(idata.posterior, state.value_vars, state.step_size)


def extend_chains(
    model: pm.Model,
    idata: az.InferenceData,
    state: AdaptedState | ChainMetric,
    *,
    extra_draws: int,
    seeds: list[int],
    target_acceptance: float,
    progress: bool = False,
) -> tuple[az.InferenceData, Any]:
    """Run each chain ``extra_draws`` further from its last draw, no warm-up; append them.

    Each chain gets PyMC's NUTS (compiled once) with the fixed mass matrix of ``state`` (an
    :class:`AdaptedState` means :func:`adapted_metric`). With ``tuning_steps`` 0 the chain's
    step size is the initial step of the step-size adaptation, which ``tune=0`` never moves;
    otherwise dual averaging tunes it from there for ``tuning_steps`` steps (the mass matrix
    stays fixed) and those draws are discarded (pymc 5.28, ``step_methods/hmc/base_hmc.py``,
    ``step_sizes.py``, ``sampling/mcmc.py``).

    Returns
    -------
    (arviz.InferenceData, xarray.Dataset)
        A new InferenceData whose ``posterior`` and ``sample_stats`` hold the old draws then
        the new ones (draw index continued; variables both runs have; PyMC statistic names
        mapped to nutpie's), and the added draws' own sample statistics.
    """
    import xarray as xr

    metric = adapted_metric(state) if isinstance(state, AdaptedState) else state
    posts, stats = [], []
    step = _nuts_step(model, metric, target_acceptance)  # compiled once, set per chain
    for c, chain in enumerate(idata.posterior.chain.values):
        post, stat = _run_one_chain(model, idata, metric, c, step, extra_draws=extra_draws,
                                    seed=seeds[c], progress=progress)
        posts.append(post.assign_coords(chain=[chain]))
        stats.append(stat.assign_coords(chain=[chain]))
    added_post = xr.concat(posts, dim="chain")
    added_stats = xr.concat(stats, dim="chain")
    out = idata.copy()
    out.posterior = _append_draws(idata.posterior, added_post)
    out.sample_stats = _append_draws(idata.sample_stats, added_stats)
    return out, added_stats


def _nuts_step(model: Any, metric: ChainMetric, target_acceptance: float) -> Any:
    import pymc as pm

    by_name = {v.name: v for v in model.value_vars}
    names = [v.name for v in (model.rvs_to_values[rv] for rv in model.free_RVs)]
    value_vars = [by_name[name] for name in names]
    point = model.initial_point()
    if sum(np.size(point[name]) for name in names) != metric.size:
        msg = (f"the mass matrix has {metric.size} entries a side; the model's unconstrained "
               "values have a different size")
        raise ValueError(msg)
    # the log density + gradient compiled with JAX as for nutpie's fit (one jitted program,
    # persistent cache), not PyTensor's C mode: the whitened tree operation's C-mode path
    # calls its jitted JAX functions from Python at every gradient (model/whitened_op.py)
    return pm.NUTS(vars=value_vars, model=model, target_accept=target_acceptance,
                   potential=metric.potential(0),
                   step_scale=float(metric.step_size[0]) * metric.size ** 0.25,
                   compile_kwargs=per_draw_compile())


def _run_one_chain(model: Any, idata: Any, metric: ChainMetric, c: int, step: Any, *,
                   extra_draws: int, seed: int, progress: bool) -> tuple[Any, Any]:
    # Chain c's mass matrix and step size on the one compiled step. pm.sample resets the
    # step-size adaptation to its initial step; with tune=0 it never adapts, with tune > 0 it
    # tunes the step size alone (the fixed potentials' update does nothing) and keeps only
    # the draws after tuning (pymc 5.28, sampling/mcmc.py _iter_sample, discard_tuned_samples;
    # step_methods/step_sizes.py DualAverageAdaptation).
    import pymc as pm
    from pymc.step_methods.step_sizes import DualAverageAdaptation

    step.potential = metric.potential(c)
    # the integrator keeps the potential it was built with: give it this chain's
    step.integrator = type(step.integrator)(step.potential, step._logp_dlogp_func)
    step.step_adapt = DualAverageAdaptation(float(metric.step_size[c]), step.target_accept,
                                            0.05, 0.75, 10)  # PyMC's defaults
    last = idata.posterior.isel(chain=c, draw=-1)
    start = {rv.name: np.asarray(last[rv.name].values) for rv in model.free_RVs}
    run = pm.sample(draws=extra_draws, tune=metric.tuning_steps, chains=1, cores=1, step=step,
                    initvals=start, random_seed=int(seed), progressbar=progress, model=model,
                    compute_convergence_checks=False)
    stats = run.sample_stats.rename({k: v for k, v in _PYMC_TO_NUTPIE.items()
                                     if k in run.sample_stats and v not in run.sample_stats})
    return run.posterior, stats


def _append_draws(old: Any, new: Any) -> Any:
    import xarray as xr

    keep = [n for n in old.data_vars if n in new.data_vars]
    n_old = int(old.sizes["draw"])
    new = new[keep].assign_coords(draw=np.arange(n_old, n_old + int(new.sizes["draw"])))
    old = old[keep]
    new = new.assign({n: new[n].astype(old[n].dtype) for n in keep})
    joined = xr.concat([old, new], dim="draw", data_vars="all", coords="minimal",
                       compat="override", join="override")
    joined.attrs = dict(old.attrs)
    return joined


def _short(numbers: dict[str, float]) -> list[str]:
    out = []
    if not numbers["rhat"] <= RHAT_MAX:
        out.append(f"largest R-hat {numbers['rhat']:.3f} above {RHAT_MAX}")
    for key in ("ess_bulk", "ess_tail"):
        if not numbers[key] >= ESS_MIN:
            kind = key.removeprefix("ess_")
            out.append(f"smallest {kind} ESS {numbers[key]:.0f} below {ESS_MIN:g}")
    return out


def _count(ds: Any, name: str) -> int:
    return int(np.asarray(ds[name].values).sum()) if name in ds else 0


def _first(ds: Any, names: tuple[str, ...]) -> Any:
    for name in names:
        if name in ds:
            return np.asarray(ds[name].values, dtype=float)
    return None
