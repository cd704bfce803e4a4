"""Is there a break in the law? Savage–Dickey evidence and a two-sided verdict.

A breakpoint model holds the model without a break as the point hypothesis
``difference = exponent_above − exponent = 0``. Its Bayes factor against the break model is
the Savage–Dickey density ratio (Dickey 1971; Wagenmakers et al. 2010)::

    BF_01 = p(difference = 0 | y) / p(difference = 0),     BF_10 = 1 / BF_01.

The prior of the difference is exact: ``exponent ~ N(m_b, s_b²)`` and ``exponent_above ~
N(m_a, s_a²)`` are independent, so the difference is ``N(m_a − m_b, s_a² + s_b²)``.

The posterior density at 0 is Rao–Blackwellised (Gelfand & Smith 1990), as
:mod:`allolaw.answers.hypotheses` does for named exponents: the law is linear in ``exponent_above``
(regressor: the hinge) and its prior is normal, so with normal residuals its full conditional
given everything else is normal; given the exponent below the break the difference is that
conditional shifted. The average over draws of that normal density at 0 is the estimate. With
Student-t residuals, or when the conditional fails its self-check, a parametric density
(:func:`allolaw.answers.density.fit_parametric`) fitted to the draws of the difference is used.

:func:`judge_break` says "supported" only when this evidence and the LOO comparison with a
matched model without the break (same taxon terms) both favour the break.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Any

import arviz as az
import numpy as np
from scipy import special, stats

from allolaw.answers.density import fit_parametric
from allolaw.checks.convergence import pareto_k_threshold

__all__ = ["BreakEvidence", "BreakVerdict", "LooDifference", "break_evidence",
           "judge_break", "loo_difference"]

_RB_METHOD = "Savage–Dickey, Rao–Blackwellised normal full conditional of exponent_above"
_PARAM_METHOD = "Savage–Dickey, parametric density fitted to draws of the difference"
# Self-check of the conditional (same bands as allolaw.answers.hypotheses; common practice,
# no source).
_SELF_CHECK_MEAN = 0.2
_SELF_CHECK_VAR = 1.4


@dataclass(frozen=True)
class BreakEvidence:
    """Savage–Dickey evidence for a change of exponent at the break.

    ``bf_break`` is BF_10 (break against no break); every posterior probability stands
    beside its prior probability.
    """

    bf_break: float
    log_bf_break: float
    posterior_density_at_zero: float
    prior_density_at_zero: float
    prior_prob_break: float
    posterior_prob_break: float
    delta: float
    prior_p_abs_difference_above_delta: float
    p_abs_difference_above_delta: float
    difference_mean: float
    difference_q05: float
    difference_q95: float
    method: str


@dataclass(frozen=True)
class LooDifference:
    """elpd_loo(with break) − elpd_loo(without), its SE, and the high Pareto k counts.

    High: above :func:`allolaw.checks.convergence.pareto_k_threshold` of the fit's draw count.
    """

    elpd_diff: float
    se: float
    n_bad_k_with: int
    n_bad_k_without: int


@dataclass(frozen=True)
class BreakVerdict:
    """``supported``, ``not supported`` or ``unclear``, with the sentence that says why."""

    verdict: str
    bayes_says: str
    loo_says: str
    sentence: str


def break_evidence(
    idata: az.InferenceData,
    spec: Any,
    *,
    prior_prob_break: float = 0.5,
    delta: float = 0.03,
    density: str = "auto",
) -> BreakEvidence:
    """Savage–Dickey Bayes factor of a change of exponent at the break.

    Parameters
    ----------
    idata
        A breakpoint fit (``exponent``, ``exponent_above``, ``break_log_size``,
        ``observed_data.trait``, ``constant_data`` ``log_size_obs``, ``log_size_ref``,
        ``hinge_width``).
    spec
        The model spec or its dict: ``priors.exponent``, ``priors.exponent_above``,
        ``residuals``.
    prior_prob_break
        Prior probability of a break (prior odds of the break model against the straight
        law).
    delta
        For the side-by-side P(|difference| > δ), prior and posterior.
    density
        ``auto`` (conditional where it applies and passes its self-check, else parametric),
        ``conditional`` (raise when it does not apply) or ``parametric``.

    Returns
    -------
    BreakEvidence

    References
    ----------
    Dickey, J. M. (1971). The weighted likelihood ratio, linear hypotheses on normal location
    parameters. Annals of Mathematical Statistics 42:204–223.

    Wagenmakers, E.-J., Lodewyckx, T., Kuriyal, H., Grasman, R. (2010). Bayesian hypothesis
    testing for psychologists: a tutorial on the Savage–Dickey method. Cognitive Psychology
    60:158–189.

    Gelfand, A. E., Smith, A. F. M. (1990). Sampling-based approaches to calculating marginal
    densities. JASA 85:398–409.
    """
    spec_d = spec.to_dict() if hasattr(spec, "to_dict") else dict(spec)
    post = idata.posterior
    if "exponent_above" not in post or "break_log_size" not in post:
        msg = "break_evidence needs a breakpoint fit (exponent_above, break_log_size)"
        raise ValueError(msg)
    pri = spec_d["priors"]
    m_b, s_b = float(pri["exponent"]["mean"]), float(pri["exponent"]["sd"])
    m_a, s_a = float(pri["exponent_above"]["mean"]), float(pri["exponent_above"]["sd"])
    below = _flat(post["exponent"])
    diff = _flat(post["exponent_above"]) - below
    prior_mean, prior_sd = m_a - m_b, math.hypot(s_a, s_b)

    log_post, method = _log_density_at_zero(idata, spec_d, below, diff, (m_a, s_a), density)
    log_prior = float(stats.norm.logpdf(0.0, prior_mean, prior_sd))
    log_bf10 = log_prior - log_post
    log_odds = math.log(prior_prob_break) - math.log1p(-prior_prob_break) + log_bf10
    prior_inside = (stats.norm.cdf(delta, prior_mean, prior_sd)
                    - stats.norm.cdf(-delta, prior_mean, prior_sd))
    q05, q95 = np.quantile(diff, [0.05, 0.95])
    return BreakEvidence(
        bf_break=math.exp(min(log_bf10, 700.0)),
        log_bf_break=log_bf10,
        posterior_density_at_zero=math.exp(log_post),
        prior_density_at_zero=math.exp(log_prior),
        prior_prob_break=float(prior_prob_break),
        posterior_prob_break=float(special.expit(log_odds)),
        delta=float(delta),
        prior_p_abs_difference_above_delta=float(1.0 - prior_inside),
        p_abs_difference_above_delta=float(np.mean(np.abs(diff) > delta)),
        difference_mean=float(diff.mean()),
        difference_q05=float(q05),
        difference_q95=float(q95),
        method=method,
    )


def loo_difference(with_break: az.InferenceData, without_break: az.InferenceData
                   ) -> LooDifference:
    """PSIS-LOO difference of the break model against a matched model without the break.

    The two fits must have the same species and the same taxon terms, so that the only
    difference is the break (the caller's duty). The SE is that of the sum of pointwise
    differences (Vehtari et al. 2017, eq. 24).

    References
    ----------
    Vehtari, A., Gelman, A., Gabry, J. (2017). Practical Bayesian model evaluation using
    leave-one-out cross-validation and WAIC. Statistics and Computing 27:1413–1432.
    """
    loos = [_loo(with_break), _loo(without_break)]
    pointwise = [np.asarray(lo.loo_i.values, dtype=float) for lo in loos]
    if pointwise[0].shape != pointwise[1].shape:
        msg = "loo_difference: the two fits have different numbers of species"
        raise ValueError(msg)
    d = pointwise[0] - pointwise[1]
    fits = (with_break, without_break)
    bad = [int(np.sum(~(np.asarray(lo.pareto_k.values)
                        <= pareto_k_threshold(fit.posterior.sizes["chain"]
                                              * fit.posterior.sizes["draw"]))))
           for lo, fit in zip(loos, fits, strict=True)]
    return LooDifference(elpd_diff=float(d.sum()), se=float(math.sqrt(d.size * d.var())),
                         n_bad_k_with=bad[0], n_bad_k_without=bad[1])


def judge_break(
    evidence: BreakEvidence,
    loo: LooDifference,
    *,
    bf_min: float = 10.0,
    se_factor: float = 2.0,
    elpd_min: float = 4.0,
) -> BreakVerdict:
    """Supported only when the Bayes factor and the LOO comparison both favour the break.

    Parameters
    ----------
    evidence, loo
        From :func:`break_evidence` and :func:`loo_difference`.
    bf_min
        BF_10 at or above which the Bayes factor favours the break, and at or below whose
        inverse it favours the straight law: 10, "strong" evidence on Jeffreys' scale
        (Jeffreys 1961, Appendix B).
    se_factor, elpd_min
        LOO favours the break when its elpd gain exceeds both ``se_factor`` standard errors
        (common practice, no source) and ``elpd_min`` (differences below 4 are small:
        Sivula et al. 2022). It favours the straight law when the break loses more than
        ``se_factor`` SE, or gains less than ``elpd_min`` (the simpler model is kept).

    References
    ----------
    Jeffreys, H. (1961). Theory of Probability, 3rd ed. Oxford University Press.

    Sivula, T., Magnusson, M., Matamoros, A. A., Vehtari, A. (2022). Uncertainty in Bayesian
    leave-one-out cross-validation based model comparison. arXiv:2008.10296.
    """
    bf = evidence.bf_break
    if bf >= bf_min:
        bayes = "break"
    elif bf <= 1.0 / bf_min:
        bayes = "no break"
    else:
        bayes = "undecided"
    gain, se = loo.elpd_diff, loo.se
    if gain > se_factor * se and gain > elpd_min:
        loo_says = "break"
    elif gain < -se_factor * se or gain < elpd_min:
        loo_says = "no break"
    else:
        loo_says = "undecided"
    if bayes == loo_says == "break":
        verdict = "supported"
    elif bayes != "break" and loo_says != "break":
        verdict = "not supported"
    else:
        verdict = "unclear"
    numbers = (f"Bayes factor {bf:.3g} for a change of exponent at the break (posterior "
               f"probability {evidence.posterior_prob_break:.2f} from a prior "
               f"{evidence.prior_prob_break:.2f}); LOO gain of the break model {gain:.1f} ± "
               f"{se:.1f} elpd")
    heads = {
        "supported": "The break is supported: the Bayes factor and LOO both favour it",
        "not supported": "The break is not supported: neither the Bayes factor nor LOO "
                         "favours it",
        "unclear": "The evidence for a break is unclear: the Bayes factor and LOO disagree",
    }
    bad = loo.n_bad_k_with + loo.n_bad_k_without
    caution = (f" LOO is unreliable for {bad} species (high Pareto k)." if bad else "")
    return BreakVerdict(verdict=verdict, bayes_says=bayes, loo_says=loo_says,
                        sentence=f"{heads[verdict]}. {numbers}.{caution}")


# --- the conditional of exponent_above ----------------------------------------------------


def _log_density_at_zero(
    idata: az.InferenceData,
    spec: dict[str, Any],
    below: np.ndarray,
    diff: np.ndarray,
    above_prior: tuple[float, float],
    density: str,
) -> tuple[float, str]:
    """Log posterior density of the difference at 0, and the method used."""
    if density != "parametric":
        cond = _above_conditional(idata, spec, *above_prior)
        problem = "not normal residuals or missing data" if cond is None else ""
        if cond is not None:
            mean_d, sd_d = cond[0] - below, cond[1]
            problem = _self_check(diff, mean_d, sd_d)
        if not problem:
            log_post = float(special.logsumexp(stats.norm.logpdf(0.0, mean_d, sd_d))
                             - math.log(diff.size))
            return log_post, _RB_METHOD
        if density == "conditional":
            msg = f"no usable normal conditional of exponent_above: {problem}"
            raise ValueError(msg)
    fitted = fit_parametric(diff, np.full(diff.size, 1.0 / diff.size))
    return float(fitted.logpdf(0.0)), _PARAM_METHOD


def _above_conditional(idata: az.InferenceData, spec: dict[str, Any], m_a: float, s_a: float
                       ) -> tuple[np.ndarray, np.ndarray] | None:
    """Mean and SD per draw of the normal full conditional of ``exponent_above``."""
    if spec.get("residuals", "normal") != "normal":
        return None
    post = idata.posterior
    const = getattr(idata, "constant_data", None)
    obs = getattr(idata, "observed_data", None)
    if const is None or obs is None or "trait" not in obs or "sigma" not in post:
        return None
    if "hinge_width" not in const or "log_size_ref" not in const:
        return None
    y = np.asarray(obs["trait"].values, dtype=float).reshape(1, -1)
    if "true_log_size" in post:
        x = _flat_matrix(post["true_log_size"], "species")
    else:
        x = np.asarray(const["log_size_obs"].values, dtype=float).reshape(1, -1)
    ref = _scalar(const["log_size_ref"])
    width = _scalar(const["hinge_width"])
    brk = _flat(post["break_log_size"])[:, None]
    hinge = width * (np.logaddexp(0.0, (x - brk) / width)
                     - np.logaddexp(0.0, (ref - brk) / width))
    dx = x - ref
    inner = _innermost(const)

    def per_species(term: str) -> np.ndarray:
        name = f"taxon_{term}__{inner}" if inner else ""
        if inner and name in post:
            idx = np.asarray(const[f"taxon_index__{inner}"].values, dtype=int)
            return _flat_matrix(post[name], inner)[:, idx]
        if term in post:
            return _flat(post[term])[:, None]
        return np.zeros((1, 1))

    b_pop = _flat(post["exponent"])[:, None]
    fixed = per_species("intercept") + per_species("exponent") * dx
    fixed = fixed + per_species("curvature") * dx**2 - b_pop * hinge
    for name in post.data_vars:
        if str(name).startswith("coef__"):
            cov = f"covariate__{str(name).removeprefix('coef__')}"
            if cov not in const:
                return None
            z = np.asarray(const[cov].values, dtype=float).reshape(1, -1)
            fixed = fixed + _flat(post[name])[:, None] * z
    var = _flat(post["sigma"])[:, None] ** 2
    if "trait_error_sd_mean" in post:  # trait error SDs estimated (model/error_sd.py)
        var = var + _flat_matrix(post["trait_error_sd_mean"], "species") ** 2
    elif "sd_log_trait" in const:
        var = var + np.asarray(const["sd_log_trait"].values, dtype=float).reshape(1, -1) ** 2
    hinge, var = np.broadcast_arrays(hinge, var, np.empty((1, y.size)))[:2]
    prec = s_a**-2 + np.sum(hinge**2 / var, axis=1)
    lin = m_a * s_a**-2 + np.sum(hinge * (y - fixed) / var, axis=1)
    return lin / prec, prec**-0.5


def _innermost(const: Any) -> str:
    levels = [str(n).removeprefix("taxon_index__") for n in const.data_vars
              if str(n).startswith("taxon_index__")]
    if not levels:
        return ""
    return max(levels, key=lambda lvl: np.unique(const[f"taxon_index__{lvl}"].values).size)


def _self_check(draws: np.ndarray, mean: np.ndarray, sd: np.ndarray) -> str:
    post_var = float(draws.var())
    if post_var <= 0:
        return "the draws do not vary"
    if abs(float(mean.mean()) - float(draws.mean())) > _SELF_CHECK_MEAN * math.sqrt(post_var):
        return "conditional means do not average to the posterior mean"
    ratio = float(np.mean(sd**2) + mean.var()) / post_var
    if not 1 / _SELF_CHECK_VAR <= ratio <= _SELF_CHECK_VAR:
        return f"variance ratio {ratio:.2f}"
    return ""


def _loo(idata: az.InferenceData) -> Any:
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        # high Pareto k is counted and reported by the caller
        warnings.simplefilter("ignore", UserWarning)
        return az.loo(idata, pointwise=True, var_name="trait")


def _flat(da: Any) -> np.ndarray:
    return np.asarray(da.values, dtype=float).reshape(-1)


def _flat_matrix(da: Any, dim: str) -> np.ndarray:
    arr = np.asarray(da.transpose("chain", "draw", dim).values, dtype=float)
    return arr.reshape(-1, arr.shape[-1])


def _scalar(da: Any) -> float:
    return float(np.asarray(da.values, dtype=float).reshape(-1)[0])
