"""Seeded invented individuals within species, with known within- and between-species exponents.

Invented data for tests and benchmarks only. Species mean log sizes ``m_s`` are normal;
individuals deviate from their species mean by ``d``; the log trait is
``a + between · m_s + within · d + u_s + e`` with a species intercept deviation ``u_s`` and a
residual ``e``. So the between-species exponent is the slope along species means and the
within-species exponent the slope of deviations from them (van de Pol & Wright 2009).

References
----------
van de Pol, M. & Wright, J. (2009). A simple method for distinguishing within- versus
between-subject effects using mixed models. Animal Behaviour 77, 753-758.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

__all__ = ["simulate_individuals", "write_individuals_csv"]


def simulate_individuals(*, n_species: int, per_species: int, between: float = 0.75,
                         within: float = 1.0, intercept: float = 0.0, species_sd: float = 0.1,
                         sigma: float = 0.1, spread: float = 1.5, within_spread: float = 0.3,
                         n_genera: int = 4, within_sd: float = 0.0,
                         size_error_sd: float = 0.0, seed: int = 0) -> pd.DataFrame:
    """Return one row per individual: ``genus``, ``species``, ``log_size``, ``log_trait``.

    With ``within_sd`` > 0 each species has its own within exponent, normal around ``within``
    with that SD (the truth is in the column ``true_within_exponent``). With
    ``size_error_sd`` > 0 each individual's log size is measured with that normal error:
    ``log_size`` is the measured value, ``true_log_size`` the true one.

    Balanced: every species has ``per_species`` individuals; species ``k`` is in genus
    ``k % n_genera``. Sizes are natural logs around 0 (the reference size is 1).
    """
    rng = np.random.default_rng(seed)
    mean_size = rng.normal(0.0, spread, n_species)
    offset = rng.normal(0.0, species_sd, n_species)
    sp = np.repeat(np.arange(n_species), per_species)
    dev = rng.normal(0.0, within_spread, sp.size)
    slopes = within + (rng.normal(0.0, within_sd, n_species) if within_sd > 0 else 0.0)
    slopes = np.broadcast_to(slopes, (n_species,))
    log_size = mean_size[sp] + dev
    log_trait = (intercept + between * mean_size[sp] + slopes[sp] * dev + offset[sp]
                 + rng.normal(0.0, sigma, sp.size))
    width = len(str(n_species - 1))
    table = pd.DataFrame({
        "genus": [f"G{k % n_genera}" for k in sp],
        "species": [f"G{k % n_genera} s{k:0{width}d}" for k in sp],
        "log_size": log_size,
        "log_trait": log_trait,
        "true_within_exponent": slopes[sp],
    })
    if size_error_sd > 0:  # drawn last, so the other columns equal those without error
        table["true_log_size"] = log_size
        table["log_size"] = log_size + rng.normal(0.0, size_error_sd, sp.size)
    return table


def write_individuals_csv(path: Path, *, n_rows: int, per_species: int = 20,
                          seed: int = 0) -> Path:
    """Write ``n_rows`` invented individuals (``id,genus,species,mass_g,rate_w``) to ``path``.

    Each line has its own ``id``, so the exact-duplicate rule of the intake never drops one.
    """
    n_species = -(-n_rows // per_species)
    table = simulate_individuals(n_species=n_species, per_species=per_species, seed=seed)
    table = table.iloc[:n_rows]
    out = pd.DataFrame({
        "id": np.arange(1, len(table) + 1),
        "genus": table["genus"],
        "species": table["species"],
        "mass_g": np.exp(table["log_size"] + np.log(100.0)),
        "rate_w": np.exp(table["log_trait"]),
    })
    out.to_csv(path, index=False, float_format="%.6g")
    return path
