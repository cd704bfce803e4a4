"""Individuals: a table whose rows are individuals, with the species as the innermost level.

With ``rows_are: individuals`` every usable row stays a row of ``clean.csv``; nothing is
merged and no replicate SD is computed. The species of each row becomes the innermost taxon
level (named after the species column, or ``<name>_level`` when a ``clean.csv`` column takes
that name), and the ``species`` column of the outputs holds a label of the individual:
``<species> #<k>``, k counting the species' usable rows in input order (files in config
order, then lines). The later stages then see the species as a grouping level like a genus,
with one intercept (and, where the model spec varies it, one exponent) per species.
"""

from __future__ import annotations

from collections import Counter
from typing import Any

from allolaw.intake.rows import Rows

__all__ = ["ROWS_ARE", "label_individuals", "species_level_name"]

ROWS_ARE = ("species_values", "individuals")


def species_level_name(ds: dict[str, Any], levels: list[str], reserved: frozenset[str]) -> str:
    """The output name of the species level: the species column's name, made unique."""
    name = str(ds["sources"][0]["columns"]["species"])
    while name in reserved or name in levels or name.startswith(("cov_", "flag_")):
        name = f"{name}_level"
    return name


def label_individuals(rows: Rows, usable: list[int], level: str) -> None:
    """Move each usable row's species into ``level`` and label the row as an individual.

    Parameters
    ----------
    rows
        The parsed rows; changed in place: ``values[i]["levels"][level]`` gets the species and
        ``species[i]`` the label ``<species> #<k>``.
    usable
        Indices of the usable rows, in input order.
    level
        Output name of the species level.
    """
    seen: Counter[str] = Counter()
    for i in usable:
        species = rows.species[i]
        seen[species] += 1
        rows.values[i]["levels"][level] = species
        rows.species[i] = f"{species} #{seen[species]}"
