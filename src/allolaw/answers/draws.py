"""Small helpers that read posterior draws as flat NumPy arrays and summarise them.
"""

from __future__ import annotations

from typing import Any

import numpy as np


def scalar(da: Any) -> float:
    """The first value of a variable (a scalar), as a float."""
    return float(np.asarray(da.values, dtype=float).reshape(-1)[0])


def flat(da: Any) -> np.ndarray:
    """All draws of a variable as one flat float array."""
    return np.asarray(da.values, dtype=float).reshape(-1)


def flat_matrix(da: Any, dim: str) -> np.ndarray:
    """Draws × ``dim`` matrix of a variable with dims (chain, draw, dim)."""
    arr = da.transpose("chain", "draw", dim).values
    return np.asarray(arr, dtype=float).reshape(-1, arr.shape[-1])


def summary(da: Any) -> dict[str, float]:
    """Mean, SD, median and 5 % / 95 % quantiles of a variable's draws."""
    return summary_array(flat(da))


def summary_array(x: np.ndarray) -> dict[str, float]:
    """Mean, SD, median and 5 % / 95 % quantiles of draws."""
    q = np.quantile(x, [0.05, 0.5, 0.95])
    return {"mean": float(x.mean()), "sd": float(x.std()), "median": float(q[1]),
            "q05": float(q[0]), "q95": float(q[2])}
