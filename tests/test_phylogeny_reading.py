"""Tests of allolaw.phylogeny.reading: Newick input, tip matching, pruning, clear errors."""

from __future__ import annotations

import hashlib
import unicodedata

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from allolaw.errors import UserError
from allolaw.phylogeny.reading import match_tree, normalise_name, parse_newick, read_tree
from allolaw.phylogeny.simulate import random_tree, write_newick
from allolaw.phylogeny.tree import tree_covariance

BAD_TREES = [
    ("unclosed parenthesis", "((A:1,B:2):1,C:3;", "line 1, column 1 is never closed"),
    ("extra closing parenthesis", "(A:1,B:2)):1;", "unmatched ')' at line 1, column 10"),
    ("duplicate tips", "(A:1,(B:1,A:2):1);", "duplicate tip 'A'"),
    ("duplicate after normalising", "(Homo_sapiens:1,'Homo sapiens':2);", "duplicate tip"),
    ("negative length", "(A:1,B:-2);", "branch length -2.0 above tip 'B'"),
    ("missing tip length", "(A:1,B);", "missing branch length above tip 'B'"),
    ("missing internal length", "((A:1,B:1),C:1);",
     "missing branch length above the internal node over tips 'A', 'B'"),
    ("length not a number", "(A:1,B:x);", "branch length 'x' at line 1, column 8"),
    ("infinite length", "(A:1,B:inf);", "branch length inf above tip 'B'"),
    ("unnamed tip", "(A:1,:2);", "a tip has no name"),
    ("empty file", "", "the tree file is empty"),
    ("blank file", "  \n\n", "the tree file is empty"),
    ("plain text", "hello world", "not a Newick tree"),
    ("FASTA", ">seq1\nACGT\n", "not a Newick tree"),
    ("two trees", "(A:1,B:2);\n(A:1,B:2);", "holds 2 trees"),
    ("zero tip branch", "(A:0,B:2);", "tip branch(es) of length 0 ('A')"),
]


@pytest.mark.parametrize(("text", "expected"), [(t, e) for _, t, e in BAD_TREES],
                         ids=[name for name, _, _ in BAD_TREES])
def test_bad_tree_file_raises_user_error_naming_file_and_place(tmp_path, text, expected):
    path = tmp_path / "bad.nwk"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(UserError) as info:
        read_tree(path, ["A", "B", "C"])
    assert str(path) in str(info.value)
    assert expected in str(info.value)


def test_file_that_is_not_text_raises_user_error(tmp_path):
    path = tmp_path / "tree.nwk"
    path.write_bytes(b"(A:1,\xff:2);")
    with pytest.raises(UserError, match="not a text file"):
        read_tree(path, ["A"])


def test_missing_species_are_listed_or_stop_the_run(tmp_path):
    path = tmp_path / "tree.nwk"
    path.write_text("((A:1,B:1):1,(C:1.5,D:0.5):0.5);")
    match = read_tree(path, ["D", "Zed", "A", "C"])
    assert match.missing_species == ["Zed"]
    assert match.dropped() == [("Zed", f"not a tip of the tree {path}")]
    assert match.pruned_tips == ["B"]
    assert match.phylogeny.species == ("D", "A", "C")
    assert match.rows.tolist() == [0, 2, 3]
    with pytest.raises(UserError, match="1 species not in the tree: 'Zed'"):
        read_tree(path, ["D", "Zed", "A", "C"], missing="stop")


def test_pruned_tree_keeps_the_covariance_of_the_full_tree(tmp_path):
    full = random_tree(60, seed=31, polytomy_share=0.3, zero_share=0.1)
    path = tmp_path / "tree.nwk"
    path.write_text(write_newick(full))
    wanted = [f"sp{i}" for i in (5, 17, 3, 44, 0, 59, 23)]
    match = read_tree(path, wanted)
    idx = [int(s[2:]) for s in wanted]
    # covariance = shared branch length from the root (Felsenstein 1985): the submatrix
    want = tree_covariance(full)[np.ix_(idx, idx)]
    np.testing.assert_allclose(tree_covariance(match.phylogeny), want, atol=1e-12)
    assert len(match.pruned_tips) == 53


def test_sha256_is_that_of_the_file_bytes(tmp_path):
    path = tmp_path / "tree.nwk"
    path.write_bytes(b"(A:1,B:2);\n")
    assert read_tree(path, ["A", "B"]).sha256 == hashlib.sha256(b"(A:1,B:2);\n").hexdigest()


def test_zero_tip_length_option_replaces_zero_tip_branches(tmp_path):
    path = tmp_path / "tree.nwk"
    path.write_text("((A:0,B:1):1,C:2);")
    phylo = read_tree(path, ["A", "B", "C"], zero_tip_length=1e-3).phylogeny
    np.testing.assert_allclose(np.diag(tree_covariance(phylo)), [1.001, 2.0, 2.0])


def test_normalise_name_unifies_spacing_underscores_and_invisible_characters():
    decomposed = unicodedata.normalize("NFD", "Anodonta cygnéa")
    assert normalise_name(decomposed) == "Anodonta cygnéa"
    assert normalise_name(" Homo_sapiens\u200b ") == "Homo sapiens"
    assert normalise_name("Homo  \t sapiens") == "Homo sapiens"
    assert normalise_name("homo sapiens") != normalise_name("Homo sapiens")  # case is kept


# Random small trees as nested lists (tips: None), written as Newick and read back.
_SHAPES = st.recursive(st.none(), lambda kids: st.lists(kids, min_size=2, max_size=4),
                       max_leaves=12)
_NAME = st.text(alphabet="abcXYZ019-.", min_size=1, max_size=6)


@settings(max_examples=60, deadline=None)
@given(shape=_SHAPES.filter(lambda s: isinstance(s, list)), data=st.data())
def test_newick_round_trip_keeps_tips_lengths_and_covariance(shape, data):
    tips: list[tuple[str, float]] = []
    paths: list[dict[int, float]] = []  # per tip: {internal node id: branch length} on its path

    def write(node, path):
        if node is None:
            name = data.draw(_NAME.filter(lambda s: s not in {t[0] for t in tips}))
            length = data.draw(st.floats(1e-6, 1e3))
            tips.append((name, length))
            paths.append(path)
            return f"{name}:{length!r}"
        length = data.draw(st.floats(0.0, 1e3))
        here = {**path, len(seen): length}
        seen.append(length)
        return "(" + ",".join(write(kid, here) for kid in node) + f"):{length!r}"

    seen: list[float] = []
    text = "(" + ",".join(write(kid, {}) for kid in shape) + ");"
    parent, length, names = parse_newick(text)
    assert {names[i]: length[i] for i in names} == dict(tips)  # exact: repr round trip
    phylo = match_tree(parent, length, names, [t[0] for t in tips], source="x")["phylogeny"]
    # covariance = shared branch length from the root (Felsenstein 1985), from the drawn paths
    n = len(tips)
    want = np.array([[sum(v for k, v in paths[i].items() if k in paths[j])
                      + (tips[i][1] if i == j else 0.0) for j in range(n)] for i in range(n)])
    np.testing.assert_allclose(tree_covariance(phylo), want, rtol=1e-12, atol=0)
