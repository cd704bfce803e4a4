"""Simulated tables for one design, each from its own seed.

Table ``j`` of a plan takes its random numbers from ``numpy.random.default_rng([seed, j])``
whatever the design and whatever the chunk it is computed in, so a plan split into chunks
gives the same numbers as one run, and every design sees the same truth draw for table ``j``
(common random numbers: differences between designs are less noisy than the designs
themselves).

The simulated truth, for species i in taxon t (x the true natural log of size, centred at the
middle of the size range, which is also the reference size)::

    x_i ~ N(0, (range/4)²)                 (the middle 95 % of species span `size_range`)
    log trait_i = a_t + b_t·x_i + c·x_i² + e_i,   e_i ~ N(0, scatter²)
    a_t ~ N(0, intercept_sd²),  b_t ~ N(exponent, exponent_sd²)

Each species is measured ``replicates`` times; its table value is the mean of the logs, so the
size error SD of a species is ``size_error_sd / sqrt(replicates)`` (and likewise the trait
error). Species are spread over the taxa in turn (as even as the counts allow).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from allolaw.planning.design import Design, Truth

__all__ = ["DesignPrior", "SimulatedTables", "simulate_tables", "table_rng", "taxon_index"]


@dataclass(frozen=True)
class DesignPrior:
    """Draws of the truth: one row per draw (a point mass has one row).

    Arrays ``exponent``, ``intercept_sd``, ``exponent_sd``, ``scatter_sd``, ``curvature`` of
    equal length; ``source`` says where they came from.
    """

    exponent: np.ndarray
    intercept_sd: np.ndarray
    exponent_sd: np.ndarray
    scatter_sd: np.ndarray
    curvature: np.ndarray
    source: str = "explicit values"

    @classmethod
    def point(cls, truth: Truth) -> DesignPrior:
        """The point mass at the explicit values of ``truth``."""
        def one(v: float) -> np.ndarray:
            return np.array([float(v)])
        return cls(one(truth.exponent), one(truth.intercept_sd), one(truth.exponent_sd),
                   one(truth.scatter_sd), one(truth.curvature))

    @property
    def size(self) -> int:
        """Number of draws."""
        return int(self.exponent.size)


@dataclass
class SimulatedTables:
    """R simulated tables of one design (arrays with tables along the first axis)."""

    log_size: np.ndarray  # (R, n) measured species mean log size
    log_trait: np.ndarray  # (R, n) measured species mean log trait
    true_log_size: np.ndarray  # (R, n)
    taxon: np.ndarray  # (n,) taxon index of each species
    truth: dict[str, np.ndarray]  # per table: exponent, intercept_sd, exponent_sd, ...
    size_error_sd: float  # per species (after averaging replicates)
    trait_error_sd: float
    table_ids: np.ndarray  # (R,) plan-wide table numbers


def table_rng(seed: int, table: int) -> np.random.Generator:
    """The random number generator of table ``table`` of a plan with seed ``seed``."""
    return np.random.default_rng([int(seed), int(table)])


def taxon_index(design: Design) -> np.ndarray:
    """Taxon of each species: species 0, 1, 2, … go to taxa 0, 1, …, T−1, 0, 1, …"""
    return np.arange(design.species) % design.taxa


def simulate_tables(design: Design, prior: DesignPrior, tables: np.ndarray, *, seed: int,
                    trait_error_sd: float = 0.0) -> SimulatedTables:
    """Simulate the tables numbered ``tables`` for ``design``.

    Parameters
    ----------
    design
        The candidate design.
    prior
        Truth draws; table j uses the draw its own generator picks (a point mass: the one).
    tables
        Plan-wide table numbers (the seed of each is ``[seed, number]``).
    seed
        The plan seed.
    trait_error_sd
        SD of one measurement of log trait (averaged over the replicates like size).
    """
    tables = np.asarray(tables, dtype=int)
    n, n_taxa = design.species, design.taxa
    taxon = taxon_index(design)
    size_sd = design.size_range / 4.0
    e_size = design.species_error_sd
    e_trait = trait_error_sd / np.sqrt(design.replicates)
    rows: dict[str, list[Any]] = {k: [] for k in ("x", "w", "y", "draw")}
    for j in tables:
        rng = table_rng(seed, int(j))
        # one uniform per table whatever the number of draws (a point mass too), so the
        # rest of the table's random numbers do not depend on the prior's size
        draw = min(int(rng.random() * prior.size), prior.size - 1)
        x = rng.normal(0.0, size_sd, n)
        a_t = prior.intercept_sd[draw] * rng.standard_normal(n_taxa)
        b_t = prior.exponent[draw] + prior.exponent_sd[draw] * rng.standard_normal(n_taxa)
        mean = a_t[taxon] + b_t[taxon] * x + prior.curvature[draw] * x**2
        y_true = mean + prior.scatter_sd[draw] * rng.standard_normal(n)
        w = x + e_size * rng.standard_normal(n)
        y = y_true + e_trait * rng.standard_normal(n)
        rows["x"].append(x)
        rows["w"].append(w)
        rows["y"].append(y)
        rows["draw"].append(draw)
    draws = np.asarray(rows["draw"], dtype=int)
    truth = {k: getattr(prior, k)[draws] for k in
             ("exponent", "intercept_sd", "exponent_sd", "scatter_sd", "curvature")}
    truth["draw"] = draws
    return SimulatedTables(
        log_size=np.asarray(rows["w"]).reshape(len(tables), n),
        log_trait=np.asarray(rows["y"]).reshape(len(tables), n),
        true_log_size=np.asarray(rows["x"]).reshape(len(tables), n),
        taxon=taxon, truth=truth, size_error_sd=float(e_size),
        trait_error_sd=float(e_trait), table_ids=tables,
    )
