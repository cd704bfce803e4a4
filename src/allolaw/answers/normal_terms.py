"""Pieces of the normal full conditionals of the law's slopes, read from a fit.

With normal, independent residuals the full conditional of any coefficient that enters the
mean law linearly (the exponent of a taxon, the slope above a break) is normal, and the
answers Rao–Blackwellise over it (:mod:`allolaw.answers.node_tree` for named exponents,
:mod:`allolaw.answers.evidence` for the break). Both need the same pieces per posterior draw:
the observed log traits, the (true) log sizes, each species' intercept/exponent/curvature
terms, the covariate part of the mean and the residual variance. They are read here once, with
one set of guards: when the fit is not of that kind (Student-t residuals, residuals correlated
along a tree, a within/between split, no observed data kept) :func:`law_pieces` returns
``None`` and the callers fall back to a density fitted to the draws. Every caller also checks
its conditional against the draws (:func:`self_check`), so a model feature these pieces do
not know is caught there. Correlated size and trait errors (``error_correlation`` in the
posterior) also give ``None``.

Written by hand because no library reads conditionals out of a PyMC trace.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import arviz as az
import numpy as np

from allolaw.answers.draws import flat, flat_matrix, scalar
from allolaw.model.law import smooth_hinge

__all__ = ["LawPieces", "innermost_level", "law_pieces", "self_check"]

# Self-check of a conditional: conditional means average to the posterior mean within 0.2
# posterior SD, and total variance within a factor 1.4 (common practice, no source).
SELF_CHECK_MEAN = 0.2
SELF_CHECK_VAR = 1.4


@dataclass
class LawPieces:
    """What a normal full conditional of the law needs, per draw (rows) and species (columns).

    Arrays have a first axis of posterior draws or of length 1 when the piece is fixed.
    """

    post: Any
    const: Any
    y: np.ndarray  # (n,) observed log traits
    x: np.ndarray  # (S | 1, n) true (latent) or observed log sizes
    ref: float  # log reference size
    inner: str | None  # innermost taxon level, if any
    var: np.ndarray  # (S | 1, n) residual variance + known trait error variance

    @property
    def dx(self) -> np.ndarray:
        return self.x - self.ref

    @property
    def n_species(self) -> int:
        return int(self.y.size)

    def per_species(self, term: str, taxon_index: np.ndarray | None = None
                    ) -> np.ndarray | None:
        """Each species' ``term`` (intercept, exponent, curvature): its innermost taxon's value
        when the term varies by taxon, else the population value, else zeros.

        ``taxon_index`` maps species to innermost taxa; by default the fit's own index.
        ``None`` when the term varies by taxon but no index is known.
        """
        name = f"taxon_{term}__{self.inner}" if self.inner else ""
        if name and name in self.post:
            if taxon_index is None:
                key = f"taxon_index__{self.inner}"
                if key not in self.const:
                    return None
                taxon_index = np.asarray(self.const[key].values, dtype=int)
            return flat_matrix(self.post[name], str(self.inner))[:, taxon_index]
        if term in self.post:
            return flat(self.post[term])[:, None]
        return np.zeros((1, 1))

    def covariate_part(self) -> np.ndarray | None:
        """Sum of coefficient × covariate over the fit's covariates (``None``: data missing)."""
        part = np.zeros((1, 1))
        for name in self.post.data_vars:
            name = str(name)
            if not name.startswith("coef__"):
                continue
            column = f"covariate__{name.removeprefix('coef__')}"
            if column not in self.const:
                return None
            z = np.asarray(self.const[column].values, dtype=float)[None, :]
            part = part + flat(self.post[name])[:, None] * z
        return part

    def hinge(self) -> np.ndarray | None:
        """The break model's hinge, zero at the reference size (``None``: not a break fit)."""
        if "break_log_size" not in self.post or "hinge_width" not in self.const:
            return None
        width = scalar(self.const["hinge_width"])
        brk = flat(self.post["break_log_size"])[:, None]
        return smooth_hinge(self.x - brk, width) - smooth_hinge(self.ref - brk, width)


def law_pieces(idata: az.InferenceData, spec: dict[str, Any]) -> LawPieces | None:
    """Read the pieces, or ``None`` when the residuals are not normal and independent."""
    if spec.get("residuals", "normal") != "normal":
        return None
    if spec.get("shared_ancestry", "none") != "none":
        return None  # residuals correlated along the tree: the conditional is not per species
    post = idata.posterior
    if "error_correlation" in post:
        # size and trait errors correlated (model/error_correlation.py): the trait's mean
        # holds a shift by the size error, which these pieces do not carry
        return None
    const = getattr(idata, "constant_data", None)
    obs = getattr(idata, "observed_data", None)
    if const is None or obs is None or "trait" not in obs or "sigma" not in post:
        return None
    if "within_log_size" in const:
        return None  # a within/between split: the exponent acts on group means, not sizes
    y = np.asarray(obs["trait"].values, dtype=float).reshape(-1)
    if "true_log_size" in post:
        x = flat_matrix(post["true_log_size"], "species")
    elif "log_size_obs" in const:
        x = np.asarray(const["log_size_obs"].values, dtype=float).reshape(1, -1)
    else:
        return None
    if "log_size_ref" in const:
        ref = scalar(const["log_size_ref"])
    else:
        ref = float(idata.attrs.get("log_reference_size", 0.0))
    sd = _residual_sd(post, const)
    if sd is None:
        return None
    var = sd**2
    if "trait_error_sd_mean" in post:  # trait error SDs estimated (model/error_sd.py)
        var = var + flat_matrix(post["trait_error_sd_mean"], "species") ** 2
    elif "sd_log_trait" in const:
        var = var + np.asarray(const["sd_log_trait"].values, dtype=float).reshape(1, -1) ** 2
    return LawPieces(post=post, const=const, y=y, x=x, ref=ref,
                     inner=innermost_level(const), var=var)


def _residual_sd(post: Any, const: Any) -> np.ndarray | None:
    """Residual SD per draw, one column per species with scatter by taxon (model/scatter.py)."""
    levels = [str(n).removeprefix("taxon_sigma__") for n in post.data_vars
              if str(n).startswith("taxon_sigma__")]
    if not levels:
        return flat(post["sigma"])[:, None]
    if len(levels) > 1 or f"taxon_index__{levels[0]}" not in const:
        return None
    index = np.asarray(const[f"taxon_index__{levels[0]}"].values, dtype=int)
    return flat_matrix(post[f"taxon_sigma__{levels[0]}"], levels[0])[:, index]


def innermost_level(const: Any) -> str | None:
    """The taxon level with the most taxa among the fit's ``taxon_index__*`` data."""
    levels = [str(n).removeprefix("taxon_index__") for n in const.data_vars
              if str(n).startswith("taxon_index__")]
    if not levels:
        return None
    sizes = {lvl: int(np.unique(const[f"taxon_index__{lvl}"].values).size) for lvl in levels}
    return max(levels, key=lambda lvl: sizes[lvl])


def self_check(draws: np.ndarray, mean: np.ndarray, sd: np.ndarray) -> str:
    """Why the conditionals (per-draw ``mean``, ``sd``) do not describe ``draws`` ("" if fine).

    Their mixture must match the draws' mean within :data:`SELF_CHECK_MEAN` posterior SD and
    their variance within a factor :data:`SELF_CHECK_VAR`.
    """
    post_mean, post_var = float(draws.mean()), float(draws.var())
    rb_mean = float(mean.mean())
    rb_var = float(np.mean(sd**2) + mean.var())
    if post_var <= 0:
        return "the draws do not vary"
    if abs(rb_mean - post_mean) > SELF_CHECK_MEAN * math.sqrt(post_var):
        return f"conditional means average {rb_mean:.4g}, draws {post_mean:.4g}"
    ratio = rb_var / post_var
    if not 1 / SELF_CHECK_VAR <= ratio <= SELF_CHECK_VAR:
        return f"variance ratio {ratio:.2f}"
    return ""
