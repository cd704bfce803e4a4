"""Seeded synthetic data with known truth, for tests and recovery studies."""

from allolaw.testing.data import (
    Simulated,
    as_clean_table,
    quick_sample,
    simulate_breakpoint,
    simulate_curvature,
    simulate_law,
    simulate_pooled,
    simulate_size_error,
    simulate_taxa,
)

__all__ = [
    "Simulated",
    "as_clean_table",
    "quick_sample",
    "simulate_breakpoint",
    "simulate_curvature",
    "simulate_law",
    "simulate_pooled",
    "simulate_size_error",
    "simulate_taxa",
]
