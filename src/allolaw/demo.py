"""The invented demo data: four seeded datasets with known truth and a few blemishes.

Nothing here is real: taxon and species names are made up, and so are the numbers. The files
match the ``datasets:`` block of ``config/config.yaml`` (names, columns, units); the generating
parameters go to ``truth.json`` in canonical units, natural-log scale, so recovery tests can
compare a fit with the truth.

- ``island_metabolism``: resting metabolic rate (W) against body mass (g) of 172 species in 10
  families of 3 orders, measured by two field teams with different unit habits; exponent 0.75
  at 100 g, family exponent deviations (SD 0.05), order and family intercept shifts, error in
  mass, a mild body-temperature effect; 30 species measured by both teams; residuals that
  evolve along an invented tree of the species (``island_metabolism_tree.nwk``, from
  ``demo_tree.py``).
- ``tree_biomass``: above-ground mass (kg) against trunk diameter (cm) of individual trees
  (a tree id column), 36 species in 6 genera; between-species exponent 8/3 at 20 cm,
  within-species exponent 2 (:mod:`allolaw.demo_individuals`).
- ``cell_scaling``: uptake rate per cell against cell volume, 66 strains in 3 groups, exponent
  1 below a break at 100 µm³ and 2/3 above it.
- ``running_speed``: maximum running speed (file in km/h, canonical m/s) against body mass of
  48 invented mammal species in 6 families, exponent 1/6 at 10 kg
  (:mod:`allolaw.demo_individuals`).

Each file carries a few realistic blemishes (a missing value, a non-positive value, an exact
duplicate line, a decimal slip, a missing taxon); ``truth.json`` lists them under
``blemishes`` with file, line and the fate the prepare stage should give them.
"""

from __future__ import annotations

import csv
import json
import math
from pathlib import Path
from typing import Any

import numpy as np

from allolaw.demo_individuals import running_speed, tree_individuals
from allolaw.demo_text import blemish, centred, fmt
from allolaw.demo_tree import island_tree
from allolaw.intake.units import DEFAULT_ENERGY_PER_ML_O2_JOULE
from allolaw.io import atomic_path, write_text

__all__ = ["DEFAULT_SEED", "write_demo_data"]

DEFAULT_SEED = 20261202

_EPITHETS = [
    "minor", "major", "brevis", "longus", "rufus", "niger", "albus", "griseus", "pallidus",
    "montanus", "litoralis", "insularis", "silvaticus", "nocturnus", "agilis", "robustus",
    "gracilis", "tenuis", "obscurus", "flavus", "cinereus", "fuscus", "velox", "tardus",
    "borealis", "australis", "orientalis", "occidentalis", "magnus", "parvus",
]


def write_demo_data(out: str | Path, *, seed: int | None = None) -> list[Path]:
    """Write the four invented demo datasets and ``truth.json`` into ``out``.

    Parameters
    ----------
    out
        Output folder (created if needed).
    seed
        Base seed; ``None`` uses :data:`DEFAULT_SEED`. Each dataset draws from its own child
        stream of the seed, so the same seed always gives byte-identical files.

    Returns
    -------
    list of Path
        The files written, ``truth.json`` last.
    """
    out = Path(out)
    seed = DEFAULT_SEED if seed is None else int(seed)
    # child k of a SeedSequence does not depend on how many are spawned: a fourth dataset
    # leaves the first three streams as they were
    streams = [np.random.default_rng(s) for s in np.random.SeedSequence(seed).spawn(4)]
    paths: list[Path] = []
    truth: dict[str, Any] = {
        "generator": {
            "module": "allolaw.demo",
            "seed": seed,
            "note": "invented data; parameters in canonical units, natural-log scale",
        }
    }
    for name, make, rng in (
        ("island_metabolism", _island_metabolism, streams[0]),
        ("tree_biomass", tree_individuals, streams[1]),
        ("cell_scaling", _cell_scaling, streams[2]),
        ("running_speed", running_speed, streams[3]),
    ):
        files, params = make(rng)
        for filename, content in files.items():
            path = out / filename
            if isinstance(content, str):  # the island survey's tree (Newick text)
                write_text(path, content)
            else:
                _write_table(path, *content)
            paths.append(path)
        truth[name] = params
    truth_path = out / "truth.json"
    write_text(truth_path, json.dumps(truth, indent=2, sort_keys=True) + "\n")
    paths.append(truth_path)
    return paths


# ----------------------------------------------------------------------------------------------
# (a) island metabolism


def _island_metabolism(rng: np.random.Generator) -> tuple[dict[str, Any], dict[str, Any]]:
    """The island survey's two team files and truth.

    A straight sequence of simulation steps (taxa, truth, species, replicates, the two teams'
    unit systems and blemishes), kept whole on purpose: split, the order of the random draws
    that makes the committed demo files would be hidden across helpers.
    """
    orders = {
        "Calderiformes": ["Ashidae", "Cinderidae", "Pumicidae", "Geyseridae"],
        "Lavaformes": ["Scoriidae", "Obsidiidae", "Tuffidae"],
        "Basaltiformes": ["Magmidae", "Fumarolidae", "Calderidae"],
    }
    per_family = {f: 19 for fams in orders.values() for f in fams}
    per_family["Geyseridae"] = 1  # a taxon with one species: kept, flagged
    exponent = 0.75
    reference = 100.0  # g
    log_ref = math.log(reference)
    intercept = math.log(0.6)  # W at 100 g
    sigma = 0.12
    size_error_sd = 0.10
    trait_error_sd = 0.08
    temp_coef = 0.02  # per K, on the natural-log scale
    temp_centre_k = 310.65  # 37.5 °C
    energy = DEFAULT_ENERGY_PER_ML_O2_JOULE

    file_a = "island_metabolism_team_a.csv"
    file_b = "island_metabolism_team_b.tsv"
    file_tree = "island_metabolism_tree.nwk"
    families = [f for fams in orders.values() for f in fams]
    order_of = {f: o for o, fams in orders.items() for f in fams}
    order_shift = centred(rng.normal(0.0, 0.25, len(orders)))
    order_shift_of = dict(zip(orders, order_shift, strict=True))
    fam_slope = centred(rng.normal(0.0, 0.05, len(families)))
    fam_shift = centred(rng.normal(0.0, 0.10, len(families)))
    fam_centre = rng.uniform(math.log(8.0), math.log(4000.0), len(families))

    species: list[dict[str, Any]] = []
    for k, fam in enumerate(families):
        stem = fam.removesuffix("idae")
        genera = [f"{stem}omys", f"{stem}olestes"]
        epithets = {g: list(rng.permutation(_EPITHETS)) for g in genera}
        for j in range(per_family[fam]):
            genus = genera[j % 2]
            name = f"{genus} {epithets[genus].pop()}"
            log_mass = float(np.clip(fam_centre[k] + rng.normal(0.0, 1.1), math.log(2.0),
                                     math.log(40000.0)))
            temp = float(rng.normal(37.5, 1.0))
            mu = (
                intercept
                + order_shift_of[order_of[fam]]
                + fam_shift[k]
                + (exponent + fam_slope[k]) * (log_mass - log_ref)
                + rng.normal(0.0, sigma)
            )
            species.append(
                {"species": name, "order": order_of[fam], "family": fam,
                 "log_mass": log_mass, "mu": float(mu), "temp": temp}
            )

    # Shared ancestry (demo_tree.py): residuals along an invented tree, from a child stream.
    ancestry = island_tree(species, rng=rng.spawn(1)[0], sd=0.15, independent_sd=sigma,
                           file=file_tree)
    for sp in species:
        sp["mu"] += ancestry.residual[sp["species"]]

    # Team assignment: shuffle, first 110 to team A, from the 81st on to team B: 30 by both.
    picks = rng.permutation(len(species))
    team_a = set(picks[:110].tolist())
    team_b = set(picks[80:].tolist())
    rows_a: list[list[str]] = []
    rows_b: list[list[str]] = []
    for i, sp in enumerate(species):
        both = i in team_a and i in team_b
        n_rep = int(rng.choice([1, 2, 3, 4], p=[0.3, 0.3, 0.25, 0.15]))
        if both:
            n_rep = max(n_rep, 2)
        for r in range(n_rep):
            log_mass = sp["log_mass"] + rng.normal(0.0, size_error_sd)
            temp_c = sp["temp"] + rng.normal(0.0, 0.3)
            log_rate = (
                sp["mu"]
                + temp_coef * (temp_c + 273.15 - temp_centre_k)
                + rng.normal(0.0, trait_error_sd)
            )
            mass_g = math.exp(log_mass)
            watts = math.exp(log_rate)
            to_a = (i in team_a) if not both else (r % 2 == 0)
            if to_a:
                rows_a.append([sp["species"], sp["order"], sp["family"], fmt(mass_g),
                               fmt(watts * 3600.0 / energy), fmt(temp_c, 3)])
            else:
                mass_unit = "kg" if mass_g > 500 and rng.random() < 0.7 else "g"
                mass = mass_g / 1000.0 if mass_unit == "kg" else mass_g
                rate_unit = "mW" if watts < 1.0 and rng.random() < 0.7 else "W"
                rate = watts * 1000.0 if rate_unit == "mW" else watts
                rows_b.append([sp["species"], sp["order"], sp["family"], fmt(mass), mass_unit,
                               fmt(rate), rate_unit, fmt(temp_c, 3)])

    blemishes: list[dict[str, Any]] = []
    # Team A: a missing rate, a zero mass, an exact duplicate line, a decimal slip (×100).
    rows_a.insert(12, [*rows_a[11][:4], "NA", rows_a[11][5]])
    blemishes.append(blemish(file_a, 12 + 2, "rmr_ml_o2_h", "rate written as 'NA'", "dropped"))
    rows_a.insert(40, [*rows_a[39][:3], "0", *rows_a[39][4:]])
    blemishes.append(blemish(file_a, 40 + 2, "body_mass_g", "body mass 0", "dropped"))
    rows_a.insert(71, list(rows_a[70]))
    blemishes.append(blemish(file_a, 71 + 2, None, "exact duplicate of the line above",
                              "dropped"))
    slip = 95
    rows_a[slip][4] = fmt(float(rows_a[slip][4]) * 100.0)
    blemishes.append(blemish(file_a, slip + 2, "rmr_ml_o2_h",
                              "decimal point slipped two places: rate 100 times too large",
                              "used, flagged as outlier (outliers.remove is false)"))
    # Team B: a dash for a missing mass, a missing family.
    rows_b.insert(20, [*rows_b[19][:3], "—", *rows_b[19][4:]])
    blemishes.append(blemish(file_b, 20 + 2, "mass", "mass written as '—'", "dropped"))
    rows_b.insert(55, [rows_b[54][0], rows_b[54][1], "", *rows_b[54][3:]])
    blemishes.append(blemish(file_b, 55 + 2, "family", "family left empty", "dropped"))

    header_a = ["species", "order", "family", "body_mass_g", "rmr_ml_o2_h", "body_temp_c"]
    header_b = ["species", "order", "family", "mass", "mass_unit", "rate", "rate_unit",
                "body_temp_c"]
    names = sorted({sp["species"] for sp in species})
    if len(names) != len(species):  # pragma: no cover - the epithet draws are without replacement
        msg = "demo species names are not unique"
        raise RuntimeError(msg)
    params = {
        "canonical_units": {"size": "g", "trait": "W", "covariates": {"body_temp_c": "K"}},
        "reference_size": reference,
        "log_reference_size": log_ref,
        "exponent": exponent,
        "intercept": intercept,
        "curvature": 0.0,
        "break_log_size": None,
        "exponent_above": None,
        "sigma": sigma,
        "size_error_sd": size_error_sd,
        "trait_error_sd": trait_error_sd,
        "coef": {"body_temp_c": temp_coef},
        "covariate_centre": {"body_temp_c": temp_centre_k},
        "energy_per_ml_o2_joule": energy,
        "levels": ["order", "family"],
        "taxon_exponent": {
            "order": dict.fromkeys(orders, exponent),
            "family": {f: exponent + float(fam_slope[k]) for k, f in enumerate(families)},
        },
        "taxon_intercept": {
            "order": {o: intercept + float(order_shift_of[o]) for o in orders},
            "family": {
                f: intercept + float(order_shift_of[order_of[f]]) + float(fam_shift[k])
                for k, f in enumerate(families)
            },
        },
        "exponent_sd": {"order": 0.0, "family": 0.05},
        "n_species": len(species),
        "n_species_both_teams": len(team_a & team_b),
        "rows": {file_a: len(rows_a), file_b: len(rows_b)},
        "blemishes": blemishes,
        "shared_ancestry": ancestry.truth,
        "notes": (
            "log W = intercept + order shift + family shift + family exponent·(ln g − ln 100) "
            "+ coef·(T_K − 310.65) + N(0, sigma) + tree residual (shared_ancestry) per "
            "species; each row adds N(0, size_error_sd) to ln mass and N(0, trait_error_sd) "
            "to ln rate. Deviations are centred to sum to "
            "zero over the taxa drawn. Team A wrote mL O2/h = W·3600/20.1."
        ),
    }
    files = {
        file_a: (header_a, rows_a, ","),
        file_b: (header_b, rows_b, "\t"),
        file_tree: ancestry.newick,
    }
    return files, params


# ----------------------------------------------------------------------------------------------
# (b) tree biomass: individual trees, in allolaw.demo_individuals


# ----------------------------------------------------------------------------------------------
# (c) cell scaling


def _cell_scaling(rng: np.random.Generator) -> tuple[dict[str, Any], dict[str, Any]]:
    groups = {"Asterina": "AST", "Borealia": "BOR", "Coralina": "COR"}
    exponent = 1.0
    exponent_above = 2.0 / 3.0
    break_volume = 100.0  # µm³
    log_break = math.log(break_volume)
    trait_at_break = math.log(3.0)  # fmol/h
    sigma = 0.10
    size_error_sd = 0.08
    trait_error_sd = 0.08
    group_shift = centred(rng.normal(0.0, 0.10, len(groups)))
    # amol/min per fmol/h: 1 fmol/h = 1000 amol / 60 min.
    amol_min_per_fmol_h = 1000.0 / 60.0
    rows: list[list[str]] = []
    true_logs = []
    for k, (group, code) in enumerate(groups.items()):
        for j in range(22):
            x = rng.uniform(math.log(0.5), math.log(20000.0))
            true_logs.append(x)
            slope = exponent if x < log_break else exponent_above
            mu = trait_at_break + group_shift[k] + slope * (x - log_break) + rng.normal(0, sigma)
            for _ in range(int(rng.integers(2, 4))):
                obs_x = x + rng.normal(0.0, size_error_sd)
                log_rate = mu + rng.normal(0.0, trait_error_sd)
                rows.append([f"{code}-{j + 1:03d}", group, fmt(math.exp(obs_x)),
                             fmt(math.exp(log_rate) * amol_min_per_fmol_h)])
    file = "cell_scaling.csv"
    blemishes = []
    rows.insert(25, [rows[24][0], rows[24][1], rows[24][2], "nan"])
    blemishes.append(blemish(file, 25 + 2, "uptake_amol_min", "rate written as 'nan'",
                              "dropped"))
    rows.insert(100, [rows[99][0], rows[99][1], "0", rows[99][3]])
    blemishes.append(blemish(file, 100 + 2, "volume_um3", "cell volume 0", "dropped"))
    params = {
        "canonical_units": {"size": "um**3", "trait": "fmol/h"},
        "reference_size": break_volume,
        "log_reference_size": log_break,
        "reference_size_note": (
            "the config leaves reference_size unset (prepare then uses the geometric mean of "
            "the species volumes); intercept here is the log trait at the break"
        ),
        "exponent": exponent,
        "exponent_above": exponent_above,
        "break_log_size": log_break,
        "break_size": break_volume,
        "intercept": trait_at_break,
        "curvature": 0.0,
        "sigma": sigma,
        "size_error_sd": size_error_sd,
        "trait_error_sd": trait_error_sd,
        "levels": ["group"],
        "taxon_exponent": {"group": dict.fromkeys(groups, exponent)},
        "taxon_intercept": {"group": {g: trait_at_break + float(group_shift[k])
                                      for k, g in enumerate(groups)}},
        "exponent_sd": {"group": 0.0},
        "n_species": 22 * len(groups),
        "geometric_mean_true_size": math.exp(float(np.mean(true_logs))),
        "rows": {file: len(rows)},
        "blemishes": blemishes,
        "notes": (
            "ln fmol/h = intercept + group shift + exponent·(x − x_b) below the break x_b = "
            "ln 100 µm³ and exponent_above·(x − x_b) above it, + N(0, sigma) per strain; rows "
            "add N(0, size_error_sd) to ln volume and N(0, trait_error_sd) to ln rate. The file "
            "holds amol/min = fmol/h · 1000/60."
        ),
    }
    header = ["strain", "group", "volume_um3", "uptake_amol_min"]
    return {file: (header, rows, ",")}, params


# ----------------------------------------------------------------------------------------------
# helpers


def _write_table(path: Path, header: list[str], rows: list[list[str]], delimiter: str) -> None:
    with atomic_path(path) as tmp, tmp.open("w", encoding="utf-8", newline="") as handle:
        writer = csv.writer(handle, delimiter=delimiter, lineterminator="\n")
        writer.writerow(header)
        writer.writerows(rows)
