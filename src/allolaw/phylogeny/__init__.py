"""Shared ancestry: a Newick tree matched to the species, and linear-time Gaussian terms on it.

* :func:`read_tree` reads one Newick file and matches its tips to a table's species
  (:func:`normalise_name`); returns a :class:`TreeMatch` (the pruned :class:`Phylogeny`,
  the rows kept, species missing from the tree, tips pruned, the file's sha256).
* :func:`log_density` (PyTensor) / :func:`log_density_numpy`: residuals
  ``r ~ N(0, σ²(λC + (1 − λ)D))`` (Pagel's λ) by Felsenstein's pruning, no n × n matrix.
  In a graph the messages are one operation (:mod:`allolaw.phylogeny.tree_op`: a numba loop
  over the nodes with a hand-written gradient; JAX's level form through ``jax.grad``).
* :func:`size_log_density` (PyTensor) / :func:`size_log_density_numpy`: latent sizes by
  Brownian motion from a population mean at the root.
* :func:`loo_log_density`: ``log p(r_i | r_−i)`` per species and draw, for PSIS-LOO with
  correlated residuals; :func:`loo_conditionals` its means and variances.
* :func:`precision_times`, :func:`gls_estimate`: ``(λC + (1 − λ)D)⁻¹ v`` and phylogenetic GLS.
* :func:`random_tree`, :func:`write_newick`: seeded invented trees for tests and benchmarks;
  :func:`tree_covariance`: the dense ``C`` (small trees and tests only).
"""

from allolaw.phylogeny.density import (
    log_density,
    log_density_numpy,
    size_log_density,
    size_log_density_numpy,
)
from allolaw.phylogeny.gls import gls_estimate, precision_times
from allolaw.phylogeny.loo import loo_conditionals, loo_log_density
from allolaw.phylogeny.reading import TreeMatch, normalise_name, read_tree
from allolaw.phylogeny.simulate import random_tree, write_newick
from allolaw.phylogeny.tree import Phylogeny, tree_covariance

__all__ = [
    "Phylogeny",
    "TreeMatch",
    "gls_estimate",
    "log_density",
    "log_density_numpy",
    "loo_conditionals",
    "loo_log_density",
    "normalise_name",
    "precision_times",
    "random_tree",
    "read_tree",
    "size_log_density",
    "size_log_density_numpy",
    "tree_covariance",
    "write_newick",
]
