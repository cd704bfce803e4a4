"""The dataset's tree: species matched to its tips, the others dropped, the pruned tree kept.

A dataset may name a Newick file (``tree:`` in the config, with ``missing_species: drop |
stop``). :func:`apply_tree` matches the usable rows' species to the tips
(:func:`allolaw.phylogeny.read_tree`; names compared after
:func:`allolaw.phylogeny.normalise_name`, which is intake's own name rule plus underscores
read as spaces, the Newick convention), drops the rows of species that are not tips (one
ledger reason each) or stops, and returns the record for ``prepared.json``.
:func:`write_pruned_tree` writes the tree pruned to the kept species as
``results/<dataset>/tree.nwk``, which the fit stage reads; the manifest records its hash and
the input tree file's.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import pandas as pd

from allolaw.errors import UserError
from allolaw.intake.rows import Rows
from allolaw.io import write_text
from allolaw.paths import tree_path
from allolaw.phylogeny import Phylogeny, read_tree, write_newick

__all__ = ["apply_tree", "write_pruned_tree"]

# characters with a meaning in Newick (the reader takes no quoted labels)
_UNSAFE = re.compile(r"[()\[\]':;,]")


def apply_tree(ds: dict[str, Any], dataset: str, rows: Rows, frame: pd.DataFrame,
               ) -> tuple[pd.DataFrame, dict[str, Any] | None]:
    """Drop the usable rows of species that are not tips of the dataset's tree.

    Parameters
    ----------
    ds
        The dataset's config section; ``ds["tree"]`` names the file (absent: nothing to do).
    rows
        Every data line; the dropped lines get the reason ``species not a tip of the tree
        <file>``.
    frame
        The usable rows (column ``row`` indexes ``rows``; column ``species``).

    Returns
    -------
    frame, record
        The rows kept, and for ``prepared.json``: ``file``, ``sha256``, ``missing_species``
        (``drop`` or ``stop``), ``species_not_in_tree``, ``pruned_tips`` (tips without data),
        ``tips_kept`` (``None`` when the dataset has no tree).

    Raises
    ------
    UserError
        If the file cannot be read or parsed, fewer than two species are tips, or a species
        is missing and ``missing_species`` is ``stop``.
    """
    file = ds.get("tree")
    if not file:
        return frame, None
    missing = ds.get("missing_species", "drop")
    species = sorted(set(frame["species"]))
    try:
        match = read_tree(file, species, missing=missing)
    except UserError as err:
        msg = f"config datasets.{dataset}.tree: {err}"
        raise UserError(msg) from None
    absent = set(match.missing_species)
    if absent:
        reason = f"species not a tip of the tree {file}"
        drop = frame["species"].isin(absent)
        for row in frame.loc[drop, "row"]:
            rows.reason[int(row)] = reason
        frame = frame.loc[~drop].reset_index(drop=True)
    record = {
        "file": str(file),
        "sha256": match.sha256,
        "missing_species": missing,
        "species_not_in_tree": sorted(absent),
        "pruned_tips": list(match.pruned_tips),
        "tips_kept": match.phylogeny.n_species,
    }
    return frame, record


def write_pruned_tree(results: str | Path, dataset: str, record: dict[str, Any] | None,
                      species: list[str]) -> None:
    """Write the tree pruned to ``species`` (clean.csv's, in its order) as ``tree.nwk``.

    Without a tree, an old ``tree.nwk`` is removed, so no stale tree is read later.
    """
    out = tree_path(results, dataset)
    if record is None:
        out.unlink(missing_ok=True)
        return
    tree = read_tree(record["file"], species, missing="stop").phylogeny
    # Newick labels hold no spaces: underscores stand for them (read back as spaces)
    labels = tuple(_label(name) for name in tree.species)
    tree = Phylogeny(tree.parent, tree.length, tree.tip_node, labels)
    write_text(out, write_newick(tree) + "\n")


def _label(name: str) -> str:
    if _UNSAFE.search(name):
        msg = (f"species {name!r}: a name with one of ( ) [ ] ' : ; , cannot be written as a "
               "tip of the pruned tree; rename the species in the table and the tree")
        raise UserError(msg)
    return name.replace(" ", "_")
