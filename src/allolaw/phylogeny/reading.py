"""Read a Newick tree file and match its tips to the species of a data table.

The parser is TreeSwift (Moshiri 2020), chosen by ``benchmarks/tree_readers.py`` on a
random 30,000-tip tree (parse plus one post-order walk, best of three; peak of Python
allocations): TreeSwift 0.64 s and 17 MB, Bio.Phylo 1.08 s and 23 MB, ete3 0.93 s and 31 MB
(and 1.7 s to import), DendroPy 3.4 s and 46 MB, newick 4.3 s and 46 MB. TreeSwift is also
strict where Bio.Phylo guesses (it rejects ``(A:1,B:x);`` and plain text, which Bio.Phylo
reads as tip names), has no dependencies of its own and is maintained (release 2026-09).
What TreeSwift does not check is checked here: one tree per file, named tips, unique tip
names, every branch length present, finite and non-negative; its failures are located here
(line and column of an unmatched parenthesis) and every problem is a
:class:`allolaw.errors.UserError` naming the file.

References
----------
Moshiri, N. (2020). TreeSwift: a massively scalable Python tree package. SoftwareX 11,
100436.
"""

from __future__ import annotations

import hashlib
import math
import os
import re
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import treeswift

from allolaw.errors import UserError
from allolaw.phylogeny.tree import Phylogeny, prune_tree

__all__ = ["TreeMatch", "match_tree", "normalise_name", "parse_newick", "read_tree"]



@dataclass(frozen=True)
class TreeMatch:
    """A tree file matched to a data table's species.

    Attributes
    ----------
    phylogeny
        The pruned tree; its species are the table's species found in the tree, in table
        order (names as given in the table).
    rows
        Index into the given species list of each of ``phylogeny.species``.
    missing_species
        Table species not in the tree (dropped; one ledger line each).
    pruned_tips
        Tip names of the tree without data (pruned), as written in the file.
    source
        The file path.
    sha256
        SHA-256 of the file's bytes (provenance).
    """

    phylogeny: Phylogeny
    rows: np.ndarray
    missing_species: list[str]
    pruned_tips: list[str]
    source: str
    sha256: str

    def dropped(self) -> list[tuple[str, str]]:
        """(species, reason) for each table species not in the tree."""
        reason = f"not a tip of the tree {self.source}"
        return [(s, reason) for s in self.missing_species]


def normalise_name(name: str) -> str:
    """The form in which species and tip names are compared.

    The data intake's rule for species names (:func:`allolaw.intake.cells.normalise_name`:
    Unicode NFC, format characters such as zero-width spaces and soft hyphens removed, runs of
    white space one space, none at the ends, case kept) after reading underscores as spaces
    (the Newick convention for unquoted labels).
    """
    # imported here: the intake imports this package to read a dataset's tree
    from allolaw.intake.cells import normalise_name as intake_name

    return intake_name(name.replace("_", " "))


def read_tree(
    path: str | os.PathLike[str],
    species: Sequence[str],
    *,
    missing: str = "drop",
    zero_tip_length: float | None = None,
) -> TreeMatch:
    """Read a Newick file and match its tips to ``species`` (after :func:`normalise_name`).

    Parameters
    ----------
    path
        Newick file holding one tree with branch lengths.
    species
        The data table's species, in table order.
    missing
        ``"drop"``: table species absent from the tree are dropped and listed in
        ``missing_species``; ``"stop"``: they raise :class:`UserError`.
    zero_tip_length
        A species whose tip branch has length 0 makes the covariance singular at λ = 1
        (its value equals its parent's): by default that is a :class:`UserError` naming the
        tips; a positive number here replaces those zero lengths (say so in the report).

    Returns
    -------
    TreeMatch
        Tips without data are pruned (listed in ``pruned_tips``).
    """
    file = str(path)
    try:
        raw = Path(path).read_bytes()
    except OSError as exc:
        message = f"{file}: cannot read the tree file ({exc.strerror})"
        raise UserError(message) from exc
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        message = f"{file}: not a text file (byte {exc.start} is not UTF-8)"
        raise UserError(message) from exc
    parent, length, names = parse_newick(text, source=file)
    match = match_tree(parent, length, names, species, source=file, missing=missing,
                       zero_tip_length=zero_tip_length)
    return TreeMatch(**match, source=file, sha256=hashlib.sha256(raw).hexdigest())


def parse_newick(text: str, *, source: str = "<text>") -> tuple[np.ndarray, np.ndarray, dict]:
    """Parse one Newick tree into post-order arrays.

    Returns
    -------
    parent, length, names
        Parent index per node (root last, −1), branch length per node (root 0; a root
        length in the text is ignored) and ``{node index: tip label}`` for every leaf.
    """
    stripped = text.strip()
    if not stripped:
        message = f"{source}: the tree file is empty"
        raise UserError(message)
    _check_parentheses(stripped, source)
    n_trees = stripped.count(";")
    if n_trees > 1 or (n_trees == 1 and not stripped.endswith(";")):
        message = (f"{source}: holds {n_trees} trees (or text after the first ';'); "
                   "give one Newick tree per file")
        raise UserError(message)
    if "(" not in stripped or (len(stripped) < 1000 and os.path.isfile(stripped)):
        message = f"{source}: not a Newick tree (no '(' found): starts {stripped[:40]!r}"
        raise UserError(message)
    try:
        tree = treeswift.read_tree_newick(stripped)
    except Exception as exc:  # TreeSwift raises RuntimeError and others; say where
        message = (f"{source}: not a valid Newick tree ({_first_oddity(stripped)}); "
                   "expected e.g. ((A:1.0,B:1.0):0.5,C:1.5);")
        raise UserError(message) from exc
    nodes = list(tree.traverse_postorder())
    index = {id(node): i for i, node in enumerate(nodes)}
    parent = np.array([index[id(nd.parent)] if nd.parent is not None else -1 for nd in nodes])
    names = {}
    length = np.zeros(len(nodes))
    for i, nd in enumerate(nodes[:-1]):
        is_leaf = nd.is_leaf()
        label = nd.label
        where = _describe(nd, is_leaf)
        if is_leaf:
            if label is None or not str(label).strip():
                message = f"{source}: a tip has no name ({where})"
                raise UserError(message)
            names[i] = str(label)
        value = nd.edge_length
        if value is None:
            message = f"{source}: missing branch length above {where}"
            raise UserError(message)
        value = float(value)
        if not math.isfinite(value) or value < 0:
            message = f"{source}: branch length {value!r} above {where} (must be ≥ 0 and finite)"
            raise UserError(message)
        length[i] = value
    return parent, length, names


def match_tree(
    parent: np.ndarray,
    length: np.ndarray,
    names: dict[int, str],
    species: Sequence[str],
    *,
    source: str,
    missing: str = "drop",
    zero_tip_length: float | None = None,
) -> dict:
    """Match tips to ``species``, prune tips without data; the fields of :class:`TreeMatch`."""
    if missing not in ("drop", "stop"):
        message = f"missing must be 'drop' or 'stop', not {missing!r}"
        raise ValueError(message)
    by_key: dict[str, int] = {}
    for node, label in names.items():
        key = normalise_name(label)
        if key in by_key:
            other = names[by_key[key]]
            message = (f"{source}: duplicate tip {label!r} (same name as tip {other!r} after "
                       "normalising case-kept names: underscores as spaces, white space)")
            raise UserError(message)
        by_key[key] = node
    rows, found, absent = [], [], []
    for row, name in enumerate(species):
        node = by_key.get(normalise_name(name))
        if node is None:
            absent.append(name)
        else:
            rows.append(row)
            found.append(node)
    if absent and missing == "stop":
        shown = ", ".join(repr(s) for s in absent[:5])
        message = f"{source}: {len(absent)} species not in the tree: {shown}" + (
            ", ..." if len(absent) > 5 else "")
        raise UserError(message)
    if len(found) < 2:
        message = f"{source}: only {len(found)} of {len(species)} species are tips of the tree"
        raise UserError(message)
    keep = np.zeros(len(parent), bool)
    keep[found] = True
    new_parent, new_length, old = prune_tree(parent, length, keep)
    new_index = np.full(len(parent), -1)
    new_index[old] = np.arange(len(old))
    tips = new_index[np.asarray(found)]
    zero = [names[node] for node, tip in zip(found, tips, strict=True) if new_length[tip] == 0]
    if zero and zero_tip_length is None:
        shown = ", ".join(repr(z) for z in zero[:5]) + (", ..." if len(zero) > 5 else "")
        message = (f"{source}: {len(zero)} tip branch(es) of length 0 ({shown}); the tree "
                   "covariance is singular with them; set a small positive zero_tip_length")
        raise UserError(message)
    if zero:
        new_length[tips[new_length[tips] == 0]] = float(zero_tip_length)
    phylogeny = Phylogeny(new_parent, new_length, tips, tuple(species[r] for r in rows))
    pruned = [names[node] for node in sorted(names) if not keep[node]]
    return {"phylogeny": phylogeny, "rows": np.asarray(rows, np.int64),
            "missing_species": absent, "pruned_tips": pruned}


def _describe(node: treeswift.Node, is_leaf: bool) -> str:
    if is_leaf:
        return f"tip {node.label!r}"
    below = sorted(str(n.label) for n in node.traverse_leaves())
    shown = ", ".join(repr(b) for b in below[:3]) + (", ..." if len(below) > 3 else "")
    return f"the internal node over tips {shown}"


def _line_col(text: str, pos: int) -> str:
    line = text.count("\n", 0, pos) + 1
    col = pos - (text.rfind("\n", 0, pos) + 1) + 1
    return f"line {line}, column {col}"


def _check_parentheses(text: str, source: str) -> None:
    # unmatched parentheses outside quoted labels and [comments], located by line and column
    opened: list[int] = []
    quote = None
    comment = False
    for pos, ch in enumerate(text):
        if quote:
            quote = None if ch == quote else quote
        elif comment:
            comment = ch != "]"
        elif ch in "'\"":
            quote = ch
        elif ch == "[":
            comment = True
        elif ch == "(":
            opened.append(pos)
        elif ch == ")":
            if not opened:
                message = f"{source}: unmatched ')' at {_line_col(text, pos)}"
                raise UserError(message)
            opened.pop()
    if opened:
        message = f"{source}: '(' at {_line_col(text, opened[-1])} is never closed"
        raise UserError(message)


def _first_oddity(text: str) -> str:
    # a branch length that is not a number is the usual cause once parentheses balance
    for found in re.finditer(r":([^,();\[\]]*)", text):
        value = found.group(1).strip()
        try:
            float(value)
        except ValueError:
            return f"branch length {value!r} at {_line_col(text, found.start(1))}"
    return "the parser gave no position"
