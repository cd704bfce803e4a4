"""Two invented demo datasets for :mod:`allolaw.demo`: individual trees, and running speed.

Nothing here is real: names and numbers are made up.

- ``tree_biomass``: one row per tree (a tree id column), 5 to 8 trees of each of 36 species in
  6 genera. Between species the species-mean log mass follows log trunk diameter with exponent
  8/3 at 20 cm; within a species, mass follows diameter with exponent 2 (the static law of
  trees of one species differs from the law across species means); the genera occupy
  different diameter ranges.
- ``running_speed``: maximum running speed against body mass of 48 invented mammal species in
  6 families, one to three trials per species, speed written in km/h (canonical m/s), exponent
  1/6 at 10 kg; a trait outside the mass, power, length, volume and rate kinds.

Each generator returns ``(files, truth)`` like the generators in :mod:`allolaw.demo`: files
maps a file name to ``(header, rows, delimiter)``, truth holds the generating parameters in
canonical units on the natural-log scale, with the blemishes written into the file.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from allolaw.demo_text import blemish, centred, fmt

__all__ = ["running_speed", "tree_individuals"]

_EPITHETS = [
    "minor", "major", "brevis", "longus", "rufus", "niger", "albus", "griseus", "pallidus",
    "montanus", "litoralis", "insularis", "silvaticus", "nocturnus", "agilis", "robustus",
    "gracilis", "tenuis", "obscurus", "flavus", "cinereus", "fuscus", "velox", "tardus",
    "borealis", "australis", "orientalis", "occidentalis", "magnus", "parvus",
]
#: km/h per m/s (SI Brochure, 9th ed., 2019, Table 8: 1 km/h = (1000/3600) m/s).
KMH_PER_MS = 3.6


def tree_individuals(rng: np.random.Generator) -> tuple[dict[str, Any], dict[str, Any]]:
    """Individual trees: within-species exponent 2, between-species exponent 8/3.

    A straight sequence of simulation steps (genera, species, trees, blemishes, ids), kept
    whole so the order of the random draws that makes the committed file stays in one place.
    """
    genera = ["Arboria", "Brachyxylon", "Cortexia", "Dendrella", "Escalonix", "Fagopsis"]
    between = 8.0 / 3.0
    within = 2.0
    reference = 20.0  # cm
    log_ref = math.log(reference)
    intercept = math.log(250.0)  # kg, species-mean law at 20 cm
    species_sd = 0.08  # species deviation from the between-species law (ln kg)
    sigma = 0.10  # tree deviation from its species' within-species law (ln kg)
    within_spread = 0.30  # SD of ln diameter of trees around their species' centre
    centres = np.linspace(math.log(5.0), math.log(70.0), len(genera))
    genus_shift = centred(rng.normal(0.0, 0.15, len(genera)))
    rows: list[list[str]] = []
    species_truth: dict[str, dict[str, float]] = {}
    for k, genus in enumerate(genera):
        epithets = list(rng.permutation(_EPITHETS))
        for _ in range(6):
            name = f"{genus} {epithets.pop()}"
            centre = float(centres[k] + rng.normal(0.0, 0.25))
            level = float(intercept + genus_shift[k] + between * (centre - log_ref)
                          + rng.normal(0.0, species_sd))
            species_truth[name] = {"centre_log_size": centre, "log_trait_at_centre": level}
            for _ in range(int(rng.integers(5, 9))):
                d = rng.normal(0.0, within_spread)
                log_mass = level + within * d + rng.normal(0.0, sigma)
                rows.append([name, genus, fmt(math.exp(centre + d), 3),
                             fmt(math.exp(log_mass))])
    file = "tree_biomass.csv"
    blemishes = []
    rows.insert(30, [rows[29][0], rows[29][1], rows[29][2], "n/a"])
    blemishes.append(blemish(file, 30 + 2, "mass_kg", "mass written as 'n/a'", "dropped"))
    rows.insert(90, [rows[89][0], rows[89][1], "-" + rows[89][2], rows[89][3]])
    blemishes.append(blemish(file, 90 + 2, "diameter_cm", "negative diameter", "dropped"))
    rows = [[f"T{i + 1:04d}", *row] for i, row in enumerate(rows)]
    params = {
        "canonical_units": {"size": "cm", "trait": "kg"},
        "rows_are": "individuals",
        "reference_size": reference,
        "log_reference_size": log_ref,
        "exponent": between,
        "within_exponent": within,
        "intercept": intercept,
        "curvature": 0.0,
        "break_log_size": None,
        "exponent_above": None,
        "species_sd": species_sd,
        "sigma": sigma,
        "within_spread": within_spread,
        "levels": ["genus", "species"],
        "taxon_intercept": {"genus": {g: intercept + float(genus_shift[k])
                                      for k, g in enumerate(genera)}},
        "species": species_truth,
        "n_species": len(species_truth),
        "n_individuals": len(rows) - len(blemishes),
        "rows": {file: len(rows)},
        "blemishes": blemishes,
        "notes": (
            "Per species s: centre c_s = genus centre + N(0, 0.25) (ln cm) and level L_s = "
            "intercept + genus shift + exponent·(c_s − ln 20) + N(0, species_sd); per tree: "
            "d ~ N(0, within_spread), ln cm = c_s + d, ln kg = L_s + within_exponent·d + "
            "N(0, sigma). `exponent` is the between-species exponent (slope of species means), "
            "`within_exponent` the slope within a species."
        ),
    }
    header = ["tree_id", "species", "genus", "diameter_cm", "mass_kg"]
    return {file: (header, rows, ",")}, params


def running_speed(rng: np.random.Generator) -> tuple[dict[str, Any], dict[str, Any]]:
    """Maximum running speed (file: km/h; canonical: m/s) against body mass (kg)."""
    families = ["Cursoridae", "Saltatidae", "Velocidae", "Tardigradidae", "Pedestridae",
                "Fugacidae"]
    exponent = 1.0 / 6.0
    reference = 10.0  # kg
    log_ref = math.log(reference)
    intercept = math.log(12.0)  # m/s at 10 kg
    sigma = 0.12
    trait_error_sd = 0.06
    family_shift = centred(rng.normal(0.0, 0.15, len(families)))
    rows: list[list[str]] = []
    for k, family in enumerate(families):
        stem = family.removesuffix("idae")
        epithets = list(rng.permutation(_EPITHETS))
        for _ in range(8):
            name = f"{stem}us {epithets.pop()}"
            log_mass = float(rng.uniform(math.log(0.05), math.log(800.0)))
            mu = intercept + family_shift[k] + exponent * (log_mass - log_ref) + rng.normal(
                0.0, sigma)
            for _ in range(int(rng.integers(1, 4))):
                speed_ms = math.exp(mu + rng.normal(0.0, trait_error_sd))
                rows.append([name, family, fmt(math.exp(log_mass)),
                             fmt(speed_ms * KMH_PER_MS)])
    file = "running_speed.csv"
    blemishes = []
    rows.insert(15, [rows[14][0], rows[14][1], rows[14][2], "NA"])
    blemishes.append(blemish(file, 15 + 2, "speed_kmh", "speed written as 'NA'", "dropped"))
    rows.insert(60, [rows[59][0], rows[59][1], "0", rows[59][3]])
    blemishes.append(blemish(file, 60 + 2, "mass_kg", "body mass 0", "dropped"))
    params = {
        "canonical_units": {"size": "kg", "trait": "m/s"},
        "reference_size": reference,
        "log_reference_size": log_ref,
        "exponent": exponent,
        "intercept": intercept,
        "curvature": 0.0,
        "break_log_size": None,
        "exponent_above": None,
        "sigma": sigma,
        "trait_error_sd": trait_error_sd,
        "levels": ["family"],
        "taxon_intercept": {"family": {f: intercept + float(family_shift[k])
                                       for k, f in enumerate(families)}},
        "km_per_h_per_m_per_s": KMH_PER_MS,
        "n_species": 8 * len(families),
        "rows": {file: len(rows)},
        "blemishes": blemishes,
        "notes": (
            "ln m/s = intercept + family shift + exponent·(ln kg − ln 10) + N(0, sigma) per "
            "species; each trial adds N(0, trait_error_sd) to ln speed. The file holds km/h = "
            "m/s · 3.6."
        ),
    }
    header = ["species", "family", "mass_kg", "speed_kmh"]
    return {file: (header, rows, ",")}, params
