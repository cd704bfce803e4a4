"""Mixtures of normals, one per simulated table: the approximate posterior of the exponent."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special, stats

__all__ = ["NormalMixture"]

_BISECTIONS = 60


@dataclass
class NormalMixture:
    """Row r is the density ``Σ_k weights[r, k] · N(means[r, k], sds[r, k]²)``."""

    weights: np.ndarray  # (R, K), rows sum to 1
    means: np.ndarray
    sds: np.ndarray

    def logpdf(self, value: float | np.ndarray) -> np.ndarray:
        """Log density at ``value`` (a number, or one per table)."""
        v = np.asarray(value, dtype=float).reshape(-1, 1)
        logs = stats.norm.logpdf(v, self.means, self.sds)
        return special.logsumexp(logs, b=self.weights, axis=1)

    def cdf(self, value: float | np.ndarray) -> np.ndarray:
        """P(exponent < value) per table."""
        v = np.asarray(value, dtype=float).reshape(-1, 1)
        return np.sum(self.weights * stats.norm.cdf(v, self.means, self.sds), axis=1)

    def mean(self) -> np.ndarray:
        """Posterior mean per table."""
        return np.sum(self.weights * self.means, axis=1)

    def quantile(self, p: float) -> np.ndarray:
        """The p-quantile per table, by bisection on the mixture distribution function."""
        lo = np.min(self.means - 12 * self.sds, axis=1)
        hi = np.max(self.means + 12 * self.sds, axis=1)
        for _ in range(_BISECTIONS):
            mid = 0.5 * (lo + hi)
            below = self.cdf(mid) < p
            lo = np.where(below, mid, lo)
            hi = np.where(below, hi, mid)
        return 0.5 * (lo + hi)
