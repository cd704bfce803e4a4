"""Tests of allolaw.phylogeny.tree: array layout, message plan, Pagel's λ transform."""

from __future__ import annotations

import numpy as np
import pytest

from allolaw.phylogeny.simulate import random_tree
from allolaw.phylogeny.tree import Phylogeny, prune_tree, tree_covariance


def test_levels_finish_every_child_before_its_parent():
    phylo = random_tree(300, seed=3, polytomy_share=0.3)
    done = np.zeros(phylo.n_nodes, bool)
    done[phylo.tip_node] = True
    for level in phylo.levels:
        assert done[level.children].all()
        np.testing.assert_array_equal(level.parents[level.slot], phylo.parent[level.children])
        done[level.parents] = True
    assert done.all()


def test_lambda_transform_gives_pagel_covariance():
    phylo = random_tree(40, seed=4, zero_share=0.2)
    C = tree_covariance(phylo)
    scaled = Phylogeny(phylo.parent, phylo.scaled_lengths(0.3), phylo.tip_node, phylo.species)
    # λC + (1 − λ)diag(C) (Pagel 1999)
    want = 0.3 * C + 0.7 * np.diag(np.diag(C))
    np.testing.assert_allclose(tree_covariance(scaled), want, atol=1e-12)


def test_pruning_merges_single_child_nodes_and_keeps_the_root():
    # ((A:1,B:1):2,(C:1,D:3):0.5); keep A, C, D: node AB has one child left
    parent = np.array([4, 4, 5, 5, 6, 6, -1])
    length = np.array([1.0, 1.0, 1.0, 3.0, 2.0, 0.5, 0.0])
    keep = np.array([True, False, True, True, False, False, False])
    new_parent, new_length, old = prune_tree(parent, length, keep)
    assert old.tolist() == [0, 2, 3, 5, 6]
    assert new_parent.tolist() == [4, 3, 3, 4, -1]
    assert new_length.tolist() == [3.0, 1.0, 3.0, 0.5, 0.0]


def test_invalid_arrays_are_refused():
    with pytest.raises(ValueError, match="post-order"):
        Phylogeny(np.array([-1, 0, 0]), np.zeros(3), np.array([1, 2]))
    with pytest.raises(ValueError, match="non-negative"):
        Phylogeny(np.array([2, 2, -1]), np.array([1.0, -1.0, 0.0]), np.array([0, 1]))
    with pytest.raises(ValueError, match="exactly one species"):
        Phylogeny(np.array([2, 2, -1]), np.ones(3), np.array([0, 0]))
