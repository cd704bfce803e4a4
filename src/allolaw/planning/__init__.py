"""Planning before the data: how large a study must be to tell named exponents apart.

A plan (``plans:`` section of a config) states the assumed truth, candidate designs and the
question; :func:`run_chunk` simulates and analyses tables with a fast approximation of the
``taxa_errors`` model (:mod:`allolaw.planning.approx`), :func:`summarise_tables` gives the
assurance, the confident-wrong rate and the interval width per design with Monte Carlo SEs.
"""

from allolaw.planning.approx import analyse_tables
from allolaw.planning.decide import named_probabilities, outcomes, true_hypothesis
from allolaw.planning.design import AXES, Analysis, Design, Plan, Question, Truth, read_plan
from allolaw.planning.mixture import NormalMixture
from allolaw.planning.prior import read_design_prior
from allolaw.planning.run import (
    chunk_pairs,
    combine_chunks,
    run_chunk,
    simulate_design,
    smallest_designs,
    summarise_tables,
)
from allolaw.planning.simulate import DesignPrior, SimulatedTables, simulate_tables, table_rng

__all__ = [
    "AXES", "Analysis", "Design", "DesignPrior", "NormalMixture", "Plan", "Question",
    "SimulatedTables", "Truth", "analyse_tables", "chunk_pairs", "combine_chunks",
    "named_probabilities", "outcomes", "read_design_prior", "read_plan", "run_chunk",
    "simulate_design", "simulate_tables", "smallest_designs", "summarise_tables",
    "table_rng", "true_hypothesis",
]
