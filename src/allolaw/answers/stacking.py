"""Stacking of predictive distributions, and the exponent averaged over models.

Stacking chooses the weights of the mixture of the models' predictive distributions that
predicts left-out species best (Yao et al. 2018, eq. 4 with the PSIS-LOO densities)::

    max_w  Σ_i log Σ_k w_k p(y_i | y_−i, M_k),     w on the simplex.

The averaged exponent is the same mixture of the models' posteriors: its draws are a draw
from model k with probability w_k. Stacking weights are weights of the best predictive mixture,
not posterior probabilities of the models; the exponent averaged with them answers "which
exponent do the models that predict well agree on?", and :func:`judge_agreement` says when
the headline model's exponent disagrees with it.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping
from dataclasses import dataclass

import arviz as az
import numpy as np
from scipy import optimize, special

__all__ = ["Agreement", "AveragedExponent", "Stacking", "average_exponent",
           "average_probabilities", "judge_agreement", "stack_fits", "stacking_weights"]


@dataclass(frozen=True)
class Stacking:
    """Stacking weights by model, with the maximised log score."""

    models: tuple[str, ...]
    weights: np.ndarray
    log_score: float

    def as_dict(self) -> dict[str, float]:
        """Model name → weight."""
        return {m: float(w) for m, w in zip(self.models, self.weights, strict=True)}


@dataclass(frozen=True)
class AveragedExponent:
    """Draws of the exponent from the stacking mixture of the models' posteriors."""

    draws: np.ndarray
    model_of_draw: np.ndarray  # index into ``models`` per draw
    models: tuple[str, ...]
    counts: np.ndarray
    weights: np.ndarray
    mean: float
    weighted_mean: float  # Σ_k w_k E[exponent | M_k], exact
    q05: float
    q95: float


@dataclass(frozen=True)
class Agreement:
    """Whether the primary model's exponent disagrees with the averaged one, and why."""

    disagree: bool
    reasons: tuple[str, ...]
    sentence: str


def stacking_weights(pointwise: Mapping[str, np.ndarray]) -> Stacking:
    """Stacking weights from pointwise log LOO predictive densities.

    Parameters
    ----------
    pointwise
        Model name → ``elpd_loo`` per observation (the same observations, same order).

    Returns
    -------
    Stacking

    Notes
    -----
    The log score is concave in w; it is maximised over the softmax parametrisation
    ``w = softmax(z)`` (``z_1 = 0``) with L-BFGS, then polished by a multiplicative fixed-point
    step ``w_k ← w_k · mean_i(p_ik / Σ_j w_j p_ij)``, whose fixed points on the simplex are
    the optimum (the EM update of mixture weights; Dempster, Laird & Rubin 1977).

    References
    ----------
    Yao, Y., Vehtari, A., Simpson, D., Gelman, A. (2018). Using stacking to average Bayesian
    predictive distributions. Bayesian Analysis 13:917–1007.
    """
    models = tuple(pointwise)
    lpd = np.column_stack([np.asarray(pointwise[m], dtype=float).reshape(-1) for m in models])
    if lpd.shape[1] == 1:
        return Stacking(models, np.ones(1), float(lpd.sum()))
    shift = lpd.max(axis=1, keepdims=True)
    dens = np.exp(lpd - shift)  # row-scaled: the same optimum
    k = dens.shape[1]

    def negative(z: np.ndarray) -> tuple[float, np.ndarray]:
        full = np.concatenate([[0.0], z])
        w = special.softmax(full)
        mix = dens @ w
        grad_w = -np.sum(dens / mix[:, None], axis=0)
        grad_full = w * (grad_w - np.dot(w, grad_w))
        return -float(np.sum(np.log(mix))), grad_full[1:]

    res = optimize.minimize(negative, np.zeros(k - 1), jac=True, method="L-BFGS-B",
                            options={"gtol": 1e-12, "ftol": 1e-15, "maxiter": 2000})
    w = special.softmax(np.concatenate([[0.0], res.x]))
    for _ in range(5000):
        new = w * np.mean(dens / (dens @ w)[:, None], axis=0)
        new /= new.sum()
        if np.max(np.abs(new - w)) < 1e-12:
            w = new
            break
        w = new
    score = float(np.sum(np.log(dens @ w)) + shift.sum())
    return Stacking(models, w, score)


def stack_fits(fits: Mapping[str, az.InferenceData]) -> Stacking:
    """Stacking weights of fits from their PSIS-LOO pointwise densities (``trait``)."""
    pointwise = {}
    for name, idata in fits.items():
        with warnings.catch_warnings(), np.errstate(all="ignore"):
            # high Pareto k is reported by the comparison table, not here
            warnings.simplefilter("ignore", UserWarning)
            loo = az.loo(idata, pointwise=True, var_name="trait")
        pointwise[name] = np.asarray(loo.loo_i.values, dtype=float)
    return stacking_weights(pointwise)


def average_exponent(
    draws_by_model: Mapping[str, np.ndarray],
    weights: Mapping[str, float],
    *,
    n_draws: int = 4000,
    seed: int = 0,
) -> AveragedExponent:
    """Draws of the exponent from the stacking mixture ``Σ_k w_k p(b | y, M_k)``.

    The number of draws from each model is multinomial(``n_draws``, w); within a model the
    draws are taken at random (without replacement when it has enough).
    """
    models = tuple(draws_by_model)
    w = np.array([float(weights.get(m, 0.0)) for m in models])
    if not np.all(w >= 0) or w.sum() <= 0:
        msg = f"average_exponent: weights must be ≥ 0 and not all 0, got {w}"
        raise ValueError(msg)
    w = w / w.sum()
    rng = np.random.default_rng(seed)
    counts = rng.multinomial(n_draws, w)
    parts, owner = [], []
    for k, m in enumerate(models):
        pool = np.asarray(draws_by_model[m], dtype=float).reshape(-1)
        if counts[k]:
            pick = rng.choice(pool.size, size=counts[k], replace=counts[k] > pool.size)
            parts.append(pool[pick])
            owner.append(np.full(counts[k], k))
    draws = np.concatenate(parts)
    order = rng.permutation(draws.size)
    means = np.array([np.mean(draws_by_model[m]) for m in models])
    q05, q95 = np.quantile(draws, [0.05, 0.95])
    return AveragedExponent(draws=draws[order], model_of_draw=np.concatenate(owner)[order],
                            models=models, counts=counts, weights=w, mean=float(draws.mean()),
                            weighted_mean=float(np.dot(w, means)), q05=float(q05),
                            q95=float(q95))


def average_probabilities(
    probs_by_model: Mapping[str, Mapping[str, float]], weights: Mapping[str, float]
) -> dict[str, float]:
    """Stacking-weighted average of each model's probabilities of the named values.

    A summary of the mixture, not a posterior probability over models.
    """
    total = sum(float(weights.get(m, 0.0)) for m in probs_by_model)
    names: list[str] = []
    for probs in probs_by_model.values():
        names += [n for n in probs if n not in names]
    return {n: sum(float(weights.get(m, 0.0)) * float(p.get(n, 0.0))
                   for m, p in probs_by_model.items()) / total for n in names}


def judge_agreement(
    averaged: AveragedExponent,
    primary_draws: np.ndarray,
    *,
    primary: str,
    primary_probs: Mapping[str, float] | None = None,
    averaged_probs: Mapping[str, float] | None = None,
) -> Agreement:
    """Does the primary model's exponent disagree with the model-averaged one?

    It disagrees when its posterior mean lies outside the averaged 90% interval, or when the
    most probable named value differs between the two (when both probability tables are
    given). Both rules are our own reading aids (common practice, no source).
    """
    mean = float(np.mean(primary_draws))
    reasons = []
    if not averaged.q05 <= mean <= averaged.q95:
        reasons.append(f"the exponent of '{primary}' ({mean:.3f}) lies outside the 90% "
                       f"interval of the averaged exponent ({averaged.q05:.3f} to "
                       f"{averaged.q95:.3f})")
    if primary_probs and averaged_probs:
        top_p = max(primary_probs, key=lambda n: primary_probs[n])
        top_a = max(averaged_probs, key=lambda n: averaged_probs[n])
        if top_p != top_a:
            reasons.append(f"the most probable value is {top_p} for '{primary}' "
                           f"(probability {primary_probs[top_p]:.2f}) but {top_a} for the "
                           f"models averaged ({averaged_probs[top_a]:.2f})")
    shares = ", ".join(f"'{m}' {w:.2f}" for m, w in zip(averaged.models, averaged.weights,
                                                          strict=True) if w >= 0.005)
    if reasons:
        sentence = ("The headline model and the average over models disagree: "
                    + "; ".join(reasons) + f" (stacking weights {shares}).")
    else:
        sentence = (f"The headline model agrees with the average over models: posterior mean "
                    f"{mean:.3f} against {averaged.mean:.3f} averaged (90% interval "
                    f"{averaged.q05:.3f} to {averaged.q95:.3f}; stacking weights {shares}).")
    if not math.isfinite(mean):
        reasons.append("the primary draws are not finite")
    return Agreement(disagree=bool(reasons), reasons=tuple(reasons), sentence=sentence)
