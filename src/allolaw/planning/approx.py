"""Fast analysis of many simulated tables at once: the linear-normal hierarchical model.

The model is allolaw's ``taxa_errors`` model with one taxon level (``models/taxa_errors.yaml``,
:func:`allolaw.model.builder.build_model`), for species i in taxon t::

    y_i ~ N(a + α_t + (b + β_t)·x_i, σ² + d²),   α_t ~ N(0, s_a²),  β_t ~ N(0, s_b²)
    w_i ~ N(x_i, e²),  x_i ~ N(μ, τ²)            (measured and true log size)

with the same priors as the specs (a ~ N(median y, 5²), b ~ N(1, 1), half-normal s_a (1),
s_b (0.25), σ (1)). Three steps:

1. **Sizes.** With a normal population of true sizes, x given the measured w is normal:
   ``x | w ~ N(m, v)`` with ``λ = τ²/(τ² + e²)``, ``m = μ + λ(w − μ)``, ``v = λe²`` (the
   reliability ratio of Fuller 1987, sec. 1.1). So ``y | w`` is normal with mean
   ``a + α_t + (b + β_t)·m`` and variance ``σ² + d² + (b + β_t)²·v``: exact given the
   exponent, whose square enters the variance. We use the mean of b² over the first pass's
   posterior there and iterate once (regression calibration with a variance correction,
   Carroll et al. 2006, ch. 4). μ is the mean of w (plugged in); τ is a hyperparameter
   (below), with ``log p(w | μ, τ)`` in its posterior and the model's half-normal prior.
2. **Coefficients exactly.** Given the hyperparameters θ (taxon SDs, σ, τ) the
   model is linear-normal, so the taxon deviations and then (a, b) integrate out in closed
   form (Lindley & Smith 1972). Per taxon only 2×2 sums are needed (Woodbury identity), and
   every table is a row of the same arrays.
3. **Hyperparameters by Laplace and quadrature.** θ holds the log SDs that are free (log
   s_a, log s_b with taxa; log σ unless known; log τ with size error). Its log posterior is
   maximised by
   damped Newton steps (finite-difference derivatives, a fixed number of steps so each table's
   result does not depend on the others), then integrated over a Gauss–Hermite grid in the
   Laplace coordinates, each node weighted by the exact posterior ratio (the grid strategy
   of Rue, Martino & Chopin 2009). The posterior of b is the mixture over the nodes of the
   normal conditionals.

References
----------
Fuller, W. A. (1987). Measurement Error Models. Wiley.

Carroll, R. J., Ruppert, D., Stefanski, L. A., Crainiceanu, C. M. (2006). Measurement Error in
Nonlinear Models, 2nd ed. Chapman & Hall/CRC.

Lindley, D. V., Smith, A. F. M. (1972). Bayes estimates for the linear model. JRSS B 34:1–41.

Rue, H., Martino, S., Chopin, N. (2009). Approximate Bayesian inference for latent Gaussian
models by using integrated nested Laplace approximations. JRSS B 71:319–392.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np
from numpy.polynomial.hermite_e import hermegauss
from scipy import special

from allolaw.planning.design import Analysis
from allolaw.planning.mixture import NormalMixture
from allolaw.planning.simulate import SimulatedTables

__all__ = ["analyse_tables"]

_NEWTON_STEPS = 12
_FD_STEP = 1e-3
_STEP_SIZES = (1.0, 0.5, 0.25, 0.1)
_MIN_CURV = 0.25  # floor on the Laplace precision of a log SD (its SD at most 2)
_LOG2PI = float(np.log(2 * np.pi))


def analyse_tables(tables: SimulatedTables, analysis: Analysis, *,
                   parameter: str = "exponent") -> NormalMixture:
    """Approximate posterior of the population exponent (or curvature) for every table.

    Parameters
    ----------
    tables
        Simulated tables of one design.
    analysis
        Priors; with ``analysis.curvature`` the law has a shared curvature term
        ``c·x²`` (as ``curvature: shared`` in a model spec), whose posterior
        ``parameter="curvature"`` returns.

    Returns
    -------
    NormalMixture
        Weights, means and SDs with one row per table.

    Notes
    -----
    With curvature and size error the regressor of c is ``E[x² | w] = m² + v`` and only the
    exponent's share ``E[b²]·v`` of the extra variance is added: an approximation.
    """
    index = {"exponent": 1, "curvature": 2}[parameter]
    if index == 2 and not analysis.curvature:
        msg = "the curvature posterior needs an analysis with a curvature term"
        raise ValueError(msg)
    w, y = tables.log_size, tables.log_trait
    stats = _Stats.build(w, y, tables.taxon, int(tables.taxon.max()) + 1, analysis,
                         size_error_var=tables.size_error_sd**2)
    base = np.full(w.shape[0], tables.trait_error_sd**2)
    weights, means, sds = _integrate(stats, base, np.zeros(w.shape[0]), analysis)
    if stats.e2 > 0:
        mb, sb = means[..., 1], sds[..., 1]
        second = np.sum(weights * (mb**2 + sb**2), axis=1)
        weights, means, sds = _integrate(stats, base, second, analysis)
    return NormalMixture(weights, means[..., index], sds[..., index])


@dataclass
class _Stats:
    S0: np.ndarray  # (R, T, p, p) per-taxon sums of f f' with f = [1, w] or [1, w, w²]
    u0: np.ndarray  # (R, T, p) sums of f·y
    q0: np.ndarray  # (R, T) sums of y²
    n: int
    taxa: bool
    m0: np.ndarray  # (R, p) prior means of (a, b[, c])
    p0: np.ndarray  # (p,) prior precisions (0: flat)
    sigma0: np.ndarray  # (R,) starting residual SD
    e2: float = 0.0  # size error variance per species
    w_mean: np.ndarray | None = None  # (R,) μ̂, the mean measured log size
    w_ss: np.ndarray | None = None  # (R,) Σ (w − μ̂)²
    w_sd: np.ndarray | None = None  # (R,) SD of measured log size (size_sd prior scale)

    @classmethod
    def build(cls, w: np.ndarray, y: np.ndarray, taxon: np.ndarray, n_taxa: int,
              analysis: Analysis, *, size_error_var: float = 0.0) -> _Stats:
        onehot = np.eye(n_taxa)[taxon]  # (n, T)
        feats = [np.ones_like(w), w] + ([w * w] if analysis.curvature else [])
        f = np.stack(feats, -1)  # (R, n, p)
        S0 = np.einsum("rnp,rnq,nt->rtpq", f, f, onehot)
        u0 = np.einsum("rnp,rn,nt->rtp", f, y, onehot)
        q0 = np.einsum("rn,rn,nt->rt", y, y, onehot)
        m_b, s_b = analysis.exponent_prior
        means = [np.median(y, axis=1), np.full(y.shape[0], m_b)]
        precs = [analysis.intercept_prior_sd**-2, s_b**-2]
        if analysis.curvature:
            means.append(np.full(y.shape[0], analysis.curvature_prior[0]))
            precs.append(analysis.curvature_prior[1] ** -2)
        m0, p0 = np.stack(means, -1), np.array(precs)
        xc = w - w.mean(1, keepdims=True)
        slope = np.sum(xc * y, 1) / np.maximum(np.sum(xc * xc, 1), 1e-12)
        resid = y - y.mean(1, keepdims=True) - slope[:, None] * xc
        sigma0 = np.maximum(resid.std(1), 1e-3)
        out = cls(S0, u0, q0, w.shape[1], n_taxa > 1, m0, p0, sigma0, float(size_error_var))
        if size_error_var > 0:
            out.w_mean = w.mean(1)
            out.w_ss = np.sum(xc * xc, 1)
            out.w_sd = np.maximum(w.std(1, ddof=1), 1e-3)
        return out

    def size_terms(self, tau: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray,
                                                    np.ndarray]:
        """Sums on the scale of m = E[x | w], variance v of x | w and log p(w | μ̂, τ).

        ``[1, m] = [1, w] A`` with ``A = [[1, α], [0, λ]]``, α = μ(1 − λ) (with curvature
        ``[1, m, m² + v] = [1, w, w²] A``, A's third column ``[α² + v, 2αλ, λ²]``), so the
        sums transform as ``A' S A`` and ``A' u``.
        """
        lam = tau**2 / (tau**2 + self.e2)
        p = self.S0.shape[-1]
        alpha = self.w_mean * (1 - lam)
        a = np.zeros((tau.size, 1, p, p))
        a[:, 0, 0, 0] = 1.0
        a[:, 0, 0, 1] = alpha
        a[:, 0, 1, 1] = lam
        if p == 3:
            a[:, 0, 0, 2] = alpha**2 + lam * self.e2
            a[:, 0, 1, 2] = 2 * alpha * lam
            a[:, 0, 2, 2] = lam**2
        at = np.swapaxes(a, -1, -2)
        S = at @ self.S0 @ a
        u = np.einsum("rtji,rtj->rti", a, self.u0)
        total = tau**2 + self.e2
        log_w = -0.5 * self.n * (_LOG2PI + np.log(total)) - 0.5 * self.w_ss / total
        return S, u, lam * self.e2, log_w


def _integrate(stats: _Stats, extra_var: np.ndarray, b2: np.ndarray, analysis: Analysis
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Node weights (R, K) and the conditional means and SDs (R, K, p) of the coefficients.

    ``b2`` is E[b²], for the size-error share of the residual variance.
    """
    free = _free_hyper(stats, analysis)
    r = stats.q0.shape[0]

    def logpost(theta: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        return _logpost(theta, free, stats, extra_var, analysis, b2=b2)

    if not free:
        _, mean, var = logpost(np.zeros((r, 0)))
        return np.ones((r, 1)), mean[:, None], np.sqrt(var)[:, None]
    theta = _start(stats, free)
    for _ in range(_NEWTON_STEPS):
        theta = _newton_step(theta, logpost)
    lp_mode = logpost(theta)[0]
    prec = _floored(-_hessian(theta, logpost))
    chol = np.linalg.cholesky(np.linalg.inv(prec))
    nodes, gh_w = hermegauss(analysis.quadrature_points)
    gh_logw = np.log(gh_w / gh_w.sum())
    logw, means, sds = [], [], []
    for idx in itertools.product(range(nodes.size), repeat=len(free)):
        z = nodes[list(idx)]
        th = theta + np.einsum("rij,j->ri", chol, z)
        lp, mean, var = logpost(th)
        logw.append(gh_logw[list(idx)].sum() + lp - lp_mode + 0.5 * z @ z)
        means.append(mean)
        sds.append(np.sqrt(var))
    logw_arr = np.stack(logw, 1)
    weights = np.exp(logw_arr - special.logsumexp(logw_arr, axis=1, keepdims=True))
    return weights, np.stack(means, 1), np.stack(sds, 1)


def _free_hyper(stats: _Stats, analysis: Analysis) -> list[str]:
    free = ["intercept_sd", "exponent_sd"] if stats.taxa else []
    if analysis.scatter_fixed <= 0:
        free.append("scatter_sd")
    if stats.e2 > 0:
        free.append("size_sd")
    return free


def _start(stats: _Stats, free: list[str]) -> np.ndarray:
    start = {"intercept_sd": np.log(0.3), "exponent_sd": np.log(0.05)}
    if stats.e2 > 0:
        var_w = stats.w_sd**2
        start["size_sd"] = 0.5 * np.log(np.maximum(var_w - stats.e2, 0.01 * var_w))
    start["scatter_sd"] = np.log(stats.sigma0)
    cols = [np.broadcast_to(start[k], stats.sigma0.shape) for k in free]
    return np.stack(cols, 1)


def _logpost(theta: np.ndarray, free: list[str], stats: _Stats, extra_var: np.ndarray,
             analysis: Analysis, *, b2: np.ndarray | None = None
             ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Log posterior of θ (up to a constant), and the conditional mean and variance of b."""
    val = {k: np.exp(theta[:, i]) for i, k in enumerate(free)}
    sigma = val.get("scatter_sd", np.full(theta.shape[0], analysis.scatter_fixed))
    lp = np.zeros(theta.shape[0])
    scales = {"intercept_sd": analysis.intercept_sd_scale,
              "exponent_sd": analysis.exponent_sd_scale, "scatter_sd": analysis.scatter_sd_scale}
    if "size_sd" in free:  # half-normal(2 × SD of measured log size), as in build_model
        scales["size_sd"] = 2.0 * stats.w_sd
    for i, k in enumerate(free):  # half-normal prior in log coordinates (with Jacobian)
        if np.all(scales[k] > 0):
            lp += theta[:, i] - 0.5 * (val[k] / scales[k]) ** 2
    S0, u0, noise = stats.S0, stats.u0, sigma**2 + extra_var
    if "size_sd" in free:
        S0, u0, v, log_w = stats.size_terms(val["size_sd"])
        lp += log_w
        noise = noise + (0.0 if b2 is None else b2) * v
    S = S0 / noise[:, None, None, None]
    u = u0 / noise[:, None, None]
    q = stats.q0 / noise[:, None]
    lp -= 0.5 * stats.n * (_LOG2PI + np.log(noise))
    if stats.taxa:  # taxon deviations in intercept and exponent: the first two features
        d_inv = np.zeros((*S.shape[:1], 1, 2, 2))
        d_inv[:, 0, 0, 0] = val["intercept_sd"] ** -2
        d_inv[:, 0, 1, 1] = val["exponent_sd"] ** -2
        s_xz, u_z = S[..., :, :2], u[..., :2]
        m_inv, logdet_m = _inv2(d_inv + S[..., :2, :2])
        mu = np.einsum("rtij,rtj->rti", m_inv, u_z)
        c = q - np.sum(u_z * mu, -1)
        g = u - np.einsum("rtij,rtj->rti", s_xz, mu)
        a = S - s_xz @ m_inv @ np.swapaxes(s_xz, -1, -2)
        logdet_d = 2 * (theta[:, free.index("intercept_sd")]
                        + theta[:, free.index("exponent_sd")])
        lp -= 0.5 * (S.shape[1] * logdet_d + logdet_m.sum(1))
    else:
        c, g, a = q, u, S
    p0 = np.diag(stats.p0)
    prec = a.sum(1) + p0
    h = g.sum(1) + stats.m0 * stats.p0
    if prec.shape[-1] == 2:
        p_inv, logdet_p = _inv2(prec)
    else:
        p_inv, logdet_p = np.linalg.inv(prec), np.linalg.slogdet(prec)[1]
    mean = np.einsum("rij,rj->ri", p_inv, h)
    quad = c.sum(1) + np.sum(stats.m0**2 * stats.p0, -1) - np.sum(h * mean, -1)
    lp += -0.5 * quad - 0.5 * logdet_p
    return lp, mean, np.diagonal(p_inv, axis1=-2, axis2=-1)


def _inv2(m: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Inverse and log determinant of a stack of symmetric positive definite 2×2 matrices."""
    a, b, d = m[..., 0, 0], m[..., 0, 1], m[..., 1, 1]
    det = a * d - b * b
    inv = np.stack([np.stack([d, -b], -1), np.stack([-b, a], -1)], -2) / det[..., None, None]
    return inv, np.log(det)


def _newton_step(theta: np.ndarray, logpost) -> np.ndarray:
    lp0 = logpost(theta)[0]
    grad = _gradient(theta, logpost)
    prec = _floored(-_hessian(theta, logpost))
    step = np.linalg.solve(prec, grad[..., None])[..., 0]
    step = np.clip(step, -2.0, 2.0)
    best, best_lp = theta, lp0
    for size in _STEP_SIZES:
        trial = theta + size * step
        lp = logpost(trial)[0]
        better = np.isfinite(lp) & (lp > best_lp)
        best = np.where(better[:, None], trial, best)
        best_lp = np.where(better, lp, best_lp)
    return best


def _gradient(theta: np.ndarray, logpost) -> np.ndarray:
    cols = []
    for i in range(theta.shape[1]):
        e = np.zeros(theta.shape[1])
        e[i] = _FD_STEP
        cols.append((logpost(theta + e)[0] - logpost(theta - e)[0]) / (2 * _FD_STEP))
    return np.stack(cols, 1)


def _hessian(theta: np.ndarray, logpost) -> np.ndarray:
    h = theta.shape[1]
    eps = _FD_STEP * 10
    f0 = logpost(theta)[0]
    out = np.zeros((*theta.shape, h))
    unit = np.eye(h) * eps
    for i in range(h):
        fp, fm = logpost(theta + unit[i])[0], logpost(theta - unit[i])[0]
        out[:, i, i] = (fp - 2 * f0 + fm) / eps**2
        for j in range(i):
            fpp = logpost(theta + unit[i] + unit[j])[0]
            fpm = logpost(theta + unit[i] - unit[j])[0]
            fmp = logpost(theta - unit[i] + unit[j])[0]
            fmm = logpost(theta - unit[i] - unit[j])[0]
            out[:, i, j] = out[:, j, i] = (fpp - fpm - fmp + fmm) / (4 * eps**2)
    return out


def _floored(prec: np.ndarray) -> np.ndarray:
    """Make each matrix positive definite by flooring its eigenvalues."""
    vals, vecs = np.linalg.eigh(prec)
    vals = np.maximum(np.nan_to_num(vals, nan=_MIN_CURV), _MIN_CURV)
    return np.einsum("rij,rj,rkj->rik", vecs, vals, vecs)
