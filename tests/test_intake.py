"""The prepare stage: malformed input, the ledger, species aggregation, the demo datasets."""

import json
import math
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml
from hypothesis import given, settings
from hypothesis import strategies as st

from allolaw.cli import main
from allolaw.config import load_config, validate_config
from allolaw.errors import UserError
from allolaw.intake import (
    LEDGER_COLUMNS,
    aggregate_species,
    prepare_dataset,
    read_clean,
    read_prepared,
    robust_z,
)
from allolaw.paths import ledger_path

ROOT = Path(__file__).resolve().parents[1]

GOOD = """species,family,mass,rate
Sorex alpha,Soricidae,10,0.1
Sorex alpha,Soricidae,20,0.2
Sorex beta,Soricidae,5,0.05
Mus gamma,Muridae,30,0.3
Mus delta,Muridae,40,0.35
"""

def _source(path: Path, **extra) -> dict:
    source = {
        "file": str(path),
        "columns": {"species": "species", "size": "mass", "trait": "rate", "levels": ["family"]},
        "units": {"size": "g", "trait": "W"},
    }
    source.update(extra)
    return source


def _config(tmp_path: Path, sources: list[dict], **dataset) -> dict:
    ds = {
        "sources": sources,
        "size": {"quantity": "mass", "unit": "g"},
        "trait": {"quantity": "power", "unit": "W"},
        "models": ["pooled"],
    }
    ds.update(dataset)
    return validate_config({"results_dir": str(tmp_path / "results"), "datasets": {"d": ds}})


def _write(tmp_path: Path, text: str | bytes, name: str = "t.csv") -> Path:
    path = tmp_path / name
    if isinstance(text, bytes):
        path.write_bytes(text)
    else:
        path.write_text(text, encoding="utf-8")
    return path


def _prepare(tmp_path: Path, text: str | bytes, name: str = "t.csv", source: dict | None = None,
             **dataset) -> tuple[pd.DataFrame, pd.DataFrame, dict]:
    path = _write(tmp_path, text, name)
    config = _config(tmp_path, [_source(path, **(source or {}))], **dataset)
    prepare_dataset(config, "d")
    results = tmp_path / "results"
    ledger = pd.read_csv(ledger_path(results, "d"), keep_default_na=False)
    return read_clean(results, "d"), ledger, read_prepared(results, "d")


def _error(tmp_path: Path, text: str | bytes, name: str = "t.csv", source: dict | None = None,
           **dataset) -> str:
    with pytest.raises(UserError) as info:
        _prepare(tmp_path, text, name, source, **dataset)
    return str(info.value)


def _assert_ledger_adds_up(ledger: pd.DataFrame, prepared: dict, n_input: int) -> None:
    counts = ledger["fate"].value_counts()
    assert len(ledger) == n_input
    assert counts.sum() == counts.get("kept", 0) + counts.get("merged", 0) + counts.get(
        "dropped", 0
    )
    assert prepared["counts"]["input"] == n_input
    assert (
        prepared["counts"]["kept"] + prepared["counts"]["merged"] + prepared["counts"]["dropped"]
        == n_input
    )


def _dropped(ledger: pd.DataFrame) -> dict[int, str]:
    sub = ledger[ledger["fate"] == "dropped"]
    return dict(zip(sub["line"], sub["reason"], strict=True))


# ----------------------------------------------------------------------------------------------
# malformed input: structural problems stop with a message naming file, line, column, value


def test_empty_file_is_a_user_error_naming_the_file(tmp_path):
    message = _error(tmp_path, "")
    assert "t.csv" in message
    assert "empty" in message


def test_header_only_is_a_user_error(tmp_path):
    message = _error(tmp_path, "species,family,mass,rate\n\n")
    assert "t.csv" in message
    assert "no data rows" in message
    assert "line 1" in message


def test_semicolon_file_read_as_comma_says_which_delimiter(tmp_path):
    message = _error(tmp_path, GOOD.replace(",", ";"))
    assert "t.csv, line 1" in message
    assert "'mass'" in message
    assert "semicolon-separated" in message
    assert 'delimiter: ";"' in message


def test_tab_separated_csv_says_tab(tmp_path):
    message = _error(tmp_path, GOOD.replace(",", "\t"))
    assert "tab-separated" in message


def test_configured_delimiter_reads_a_semicolon_file(tmp_path):
    clean, _, prepared = _prepare(tmp_path, GOOD.replace(",", ";"), source={"delimiter": ";"})
    assert len(clean) == 4
    assert prepared["sources"][0]["delimiter"] == ";"


def test_tsv_extension_reads_tabs(tmp_path):
    clean, _, _ = _prepare(tmp_path, GOOD.replace(",", "\t"), name="t.tsv")
    assert set(clean["species"]) == {"Sorex alpha", "Sorex beta", "Mus gamma", "Mus delta"}


def test_byte_order_mark_does_not_hide_the_first_column(tmp_path):
    clean, ledger, prepared = _prepare(tmp_path, b"\xef\xbb\xbf" + GOOD.encode())
    assert "Sorex alpha" in set(clean["species"])
    _assert_ledger_adds_up(ledger, prepared, 5)


def test_duplicate_header_names_are_a_user_error(tmp_path):
    message = _error(tmp_path, "species,family,mass,mass,rate\nA b,F,1,2,3\n")
    assert "t.csv, line 1" in message
    assert "duplicate column name 'mass'" in message
    assert "fields 3 and 4" in message


def test_missing_mapped_column_names_it_and_the_header(tmp_path):
    message = _error(tmp_path, GOOD.replace("rate", "rmr"))
    assert "t.csv, line 1" in message
    assert "'rate'" in message
    assert "'rmr'" in message  # the columns that were read


def test_unknown_unit_in_config_names_file_column_and_unit(tmp_path):
    message = _error(tmp_path, GOOD, source={"units": {"size": "gramm", "trait": "W"}})
    assert "t.csv" in message
    assert "'mass'" in message
    assert "'gramm'" in message


def test_unit_column_typo_names_file_line_column_and_value(tmp_path):
    text = (
        "species,family,mass,mass_unit,rate\n"
        "A a,F,1,g,0.1\n"
        "A b,F,2,kgg,0.2\n"
    )
    message = _error(tmp_path, text, source={"unit_columns": {"size": "mass_unit"},
                                             "units": {"trait": "W"}})
    assert "t.csv, line 3, column 'mass_unit', value 'kgg'" in message
    assert "unknown unit 'kgg'" in message


def test_mass_in_a_column_declared_as_length_is_a_user_error(tmp_path):
    message = _error(
        tmp_path,
        GOOD,
        source={"units": {"size": "g", "trait": "W"}},
        size={"quantity": "length", "unit": "cm"},
    )
    assert "t.csv" in message
    assert "'g'" in message
    assert "declared as length" in message


def test_per_row_mass_unit_in_a_length_column_names_the_line(tmp_path):
    text = "species,family,d,d_unit,rate\nA a,F,1,cm,0.1\nA b,F,2,kg,0.2\n"
    source = {
        "columns": {"species": "species", "size": "d", "trait": "rate", "levels": ["family"]},
        "unit_columns": {"size": "d_unit"},
        "units": {"trait": "W"},
    }
    message = _error(tmp_path, text, source=source, size={"quantity": "length", "unit": "cm"})
    assert "line 3, column 'd_unit', value 'kg'" in message
    assert "declared as length" in message


def test_size_without_a_unit_is_a_user_error(tmp_path):
    message = _error(tmp_path, GOOD, source={"units": {"trait": "W"}})
    assert "'mass' (size) has no unit" in message


def test_canonical_unit_of_wrong_kind_is_a_config_error(tmp_path):
    message = _error(tmp_path, GOOD, trait={"quantity": "power", "unit": "kg"})
    assert "datasets.d.trait.unit" in message


def test_missing_file_is_a_user_error(tmp_path):
    config = _config(tmp_path, [_source(tmp_path / "nope.csv")])
    with pytest.raises(UserError, match=r"nope\.csv: source file not found"):
        prepare_dataset(config, "d")


def test_non_utf8_file_names_the_line(tmp_path):
    raw = GOOD.encode().replace(b"Mus gamma", b"Mus g\xe9mma")
    message = _error(tmp_path, raw)
    assert "t.csv, line 5" in message
    assert "UTF-8" in message


def test_decimal_commas_in_every_row_are_a_user_error(tmp_path):
    text = 'species,family,mass,rate\nA a,F,"1,5",0.1\nA b,F,"2,5",0.2\n'
    message = _error(tmp_path, text)
    assert "t.csv, line 2, column 'mass', value '1,5'" in message
    assert "decimal commas" in message


def test_species_in_two_taxa_lists_every_row_involved(tmp_path):
    text = GOOD + "Sorex alpha,Muridae,12,0.11\nMus delta,Soricidae,41,0.36\n"
    message = _error(tmp_path, text)
    assert "2 species placed in more than one taxon" in message
    for line in (2, 3, 7):  # every row of Sorex alpha
        assert f"t.csv, line {line}: " in message
    for line in (6, 8):  # every row of Mus delta
        assert f"t.csv, line {line}: " in message
    assert "Sorex alpha" in message
    assert "Mus delta" in message


def test_family_in_two_orders_lists_the_rows(tmp_path):
    text = "species,order,family,mass,rate\nA a,O1,F,1,0.1\nA b,O2,F,2,0.2\n"
    source = {"columns": {"species": "species", "size": "mass", "trait": "rate",
                          "levels": ["order", "family"]}}
    message = _error(tmp_path, text, source=source)
    assert "family placed in more than one order: family 'F'" in message
    assert "t.csv, line 2: O1" in message
    assert "t.csv, line 3: O2" in message


def test_no_usable_row_is_a_user_error(tmp_path):
    message = _error(tmp_path, "species,family,mass,rate\nA a,F,0,0.1\nA b,F,NA,0.2\n")
    assert "none of the 2 input rows is usable" in message
    assert "line 2" in message


# ----------------------------------------------------------------------------------------------
# malformed input: row-level problems drop the row with a reason in the ledger


@pytest.mark.parametrize("missing", ["NA", "—", "", "nan", "N/A", "n/a", "NULL", "-"])
def test_missing_value_strings_drop_the_row_with_a_reason(tmp_path, missing):
    text = GOOD + f"Mus delta,Muridae,41,{missing}\n"
    clean, ledger, prepared = _prepare(tmp_path, text)
    dropped = _dropped(ledger)
    assert dropped == {7: f"missing value in column 'rate' (cell {missing!r})"}
    _assert_ledger_adds_up(ledger, prepared, 6)
    assert clean.set_index("species").loc["Mus delta", "n_rows"] == 1


def test_text_in_a_numeric_column_drops_that_row(tmp_path):
    text = GOOD + "Mus delta,Muridae,about 40,0.35\n"
    _, ledger, prepared = _prepare(tmp_path, text)
    assert _dropped(ledger) == {7: "not a number in column 'mass': 'about 40'"}
    _assert_ledger_adds_up(ledger, prepared, 6)


@pytest.mark.parametrize(("value", "reason"), [
    ("0", "non-positive value in column 'mass': '0' (log undefined)"),
    ("-3", "non-positive value in column 'mass': '-3' (log undefined)"),
    ("inf", "non-finite value in column 'mass': 'inf'"),
])
def test_non_positive_or_infinite_size_drops_the_row(tmp_path, value, reason):
    _, ledger, prepared = _prepare(tmp_path, GOOD + f"Mus delta,Muridae,{value},0.35\n")
    assert _dropped(ledger) == {7: reason}
    _assert_ledger_adds_up(ledger, prepared, 6)


def test_missing_species_and_taxon_drop_the_row(tmp_path):
    text = GOOD + ",Muridae,41,0.36\nMus delta,NA,41,0.36\n"
    _, ledger, prepared = _prepare(tmp_path, text)
    assert _dropped(ledger) == {
        7: "missing species in column 'species'",
        8: "missing taxon in column 'family' (family)",
    }
    _assert_ledger_adds_up(ledger, prepared, 7)


def test_row_with_a_stray_delimiter_is_dropped(tmp_path):
    text = GOOD + "Mus delta,Muridae,41,0,36\n"
    _, ledger, prepared = _prepare(tmp_path, text)
    assert "has 5 fields, the header has 4" in _dropped(ledger)[7]
    _assert_ledger_adds_up(ledger, prepared, 6)


def test_exact_duplicate_line_is_dropped_and_points_to_the_first(tmp_path):
    text = GOOD + "Mus delta,Muridae,40,0.35\n"
    clean, ledger, prepared = _prepare(tmp_path, text)
    assert _dropped(ledger) == {7: "exact duplicate of line 6 (every cell identical)"}
    assert clean.set_index("species").loc["Mus delta", "n_rows"] == 1
    _assert_ledger_adds_up(ledger, prepared, 6)


def test_blank_lines_are_not_rows_and_line_numbers_stay_physical(tmp_path):
    text = GOOD.replace("Mus gamma", "\nMus gamma") + "Mus delta,Muridae,0,0.35\n"
    _, ledger, prepared = _prepare(tmp_path, text)
    assert _dropped(ledger) == {8: "non-positive value in column 'mass': '0' (log undefined)"}
    assert prepared["sources"][0]["blank_lines_ignored"] == 1
    _assert_ledger_adds_up(ledger, prepared, 6)


def test_per_row_units_convert_each_row(tmp_path):
    text = (
        "species,family,mass,mass_unit,rate,rate_unit\n"
        "A a,F,2,kg,500,mW\n"
        "A a,F,2000,g,0.5,W\n"
        "B b,F,3,g,0.01,W\n"
    )
    clean, _, prepared = _prepare(tmp_path, text, source={
        "unit_columns": {"size": "mass_unit", "trait": "rate_unit"}, "units": {}})
    row = clean.set_index("species").loc["A a"]
    # 2 kg = 2000 g and 500 mW = 0.5 W: both rows are the same measurement.
    assert row["log_size"] == pytest.approx(math.log(2000.0))
    assert row["log_trait"] == pytest.approx(math.log(0.5))
    assert row["within_sd_log_size"] == pytest.approx(0.0, abs=1e-12)
    factors = {(c["column"], c["from"]): (c["factor"], c["rows"]) for c in prepared["conversions"]}
    assert factors[("mass", "kg")] == (pytest.approx(1000.0), 1)
    assert factors[("rate", "mW")] == (pytest.approx(0.001), 1)
    assert factors[("mass", "g")] == (pytest.approx(1.0), 2)


def test_missing_unit_cell_drops_the_row(tmp_path):
    text = "species,family,mass,mass_unit,rate\nA a,F,2,kg,0.5\nA b,F,3,,0.1\n"
    _, ledger, prepared = _prepare(tmp_path, text, source={
        "unit_columns": {"size": "mass_unit"}, "units": {"trait": "W"}})
    assert _dropped(ledger) == {3: "missing unit in column 'mass_unit' for 'mass'"}
    _assert_ledger_adds_up(ledger, prepared, 2)


def test_oxygen_and_celsius_columns_land_in_watt_and_kelvin(tmp_path):
    text = "species,family,mass,o2,temp\nA a,F,100,36,37\nB b,F,10,3.6,36\n"
    source = {
        "columns": {"species": "species", "size": "mass", "trait": "o2", "levels": ["family"],
                    "covariates": ["temp"]},
        "units": {"size": "g", "trait": "mL O2/h", "temp": "degC"},
    }
    clean, _, prepared = _prepare(tmp_path, text, source=source, covariates={"temp": "K"})
    row = clean.set_index("species").loc["A a"]
    # 36 mL O2/h × 20.1 J/mL ÷ 3600 s/h = 0.201 W (hand arithmetic); 37 °C = 310.15 K.
    assert math.exp(row["log_trait"]) == pytest.approx(0.201, rel=1e-12)
    assert row["cov_temp"] == pytest.approx(310.15)
    conv = next(c for c in prepared["conversions"] if c["column"] == "o2")
    assert conv["energy_per_ml_o2_joule"] == 20.1


# ----------------------------------------------------------------------------------------------
# aggregation


def test_species_mean_of_logs_and_within_sd_match_hand_computation(tmp_path):
    # Masses 10, 20, 40 g: logs ln 20 − ln 2, ln 20, ln 20 + ln 2 → mean ln 20, SD ln 2 (ddof 1).
    # Masses 5 and 5·e^0.2 g: two logs 0.2 apart → SD 0.2/√2.
    text = (
        "species,family,mass,rate\n"
        "S a,F,10,1\nS a,F,20,1\nS a,F,40,1\n"
        f"S b,F,5,2\nS b,F,{5 * math.exp(0.2)!r},2\n"
        "S c,G,7,3\n"
    )
    clean, ledger, prepared = _prepare(tmp_path, text)
    c = clean.set_index("species")
    assert c.loc["S a", "log_size"] == pytest.approx(math.log(20.0), rel=1e-12)
    assert c.loc["S a", "within_sd_log_size"] == pytest.approx(math.log(2.0), rel=1e-12)
    assert c.loc["S a", "sd_log_size"] == pytest.approx(math.log(2.0) / math.sqrt(3), rel=1e-12)
    assert c.loc["S a", "sd_source_size"] == "replicates"
    assert c.loc["S b", "within_sd_log_size"] == pytest.approx(0.2 / math.sqrt(2), rel=1e-9)
    assert c.loc["S a", "n_rows"] == 3
    # replicate variance of the logs (ddof 1) and count: (ln 2)² and 3; 0.2²/2 and 2
    assert c.loc["S a", "replicate_var_log_size"] == pytest.approx(math.log(2.0) ** 2, rel=1e-12)
    assert c.loc["S a", "replicate_n_size"] == 3
    assert c.loc["S b", "replicate_var_log_size"] == pytest.approx(0.02, rel=1e-9)
    assert c.loc["S b", "replicate_var_log_trait"] == 0.0
    assert c.loc["S b", "replicate_n_trait"] == 2
    assert math.isnan(c.loc["S c", "replicate_var_log_size"])
    assert c.loc["S c", "replicate_n_size"] == 1
    # Pooled within-species SD: sqrt(Σ (n−1) s² / Σ (n−1)) (pooled variance; e.g. Snedecor &
    # Cochran 1989, Statistical Methods, 8th ed., §6.9 — from memory).
    pooled = math.sqrt((2 * math.log(2.0) ** 2 + 1 * (0.2 / math.sqrt(2)) ** 2) / 3)
    assert c.loc["S c", "sd_source_size"] == "pooled"
    assert math.isnan(c.loc["S c", "within_sd_log_size"])
    assert c.loc["S c", "sd_log_size"] == pytest.approx(pooled, rel=1e-9)
    assert prepared["pooled_within_sd"]["size"]["sd"] == pytest.approx(pooled, rel=1e-9)
    assert prepared["pooled_within_sd"]["size"]["dof"] == 3
    # Ledger: first row of a species kept, the others merged into it.
    fates = ledger.set_index("line")["fate"].to_dict()
    assert fates == {2: "kept", 3: "merged", 4: "merged", 5: "kept", 6: "merged", 7: "kept"}
    assert set(ledger.loc[ledger["fate"] == "merged", "merged_into"]) == {"S a", "S b"}


def test_given_sd_column_wins_over_replicates(tmp_path):
    # SD 1 g at 10 g and 2 g at 20 g: each is 0.1 on the log scale (delta method, SD/x);
    # the SE of the mean of two is sqrt(0.1² + 0.1²)/2.
    text = "species,family,mass,mass_sd,rate\nS a,F,10,1,1\nS a,F,20,2,1\nS b,F,5,,1\nS b,F,6,,1\n"
    source = {"columns": {"species": "species", "size": "mass", "trait": "rate",
                          "levels": ["family"], "size_sd": "mass_sd"}}
    clean, _, _ = _prepare(tmp_path, text, source=source)
    c = clean.set_index("species")
    assert c.loc["S a", "sd_source_size"] == "given"
    assert c.loc["S a", "sd_log_size"] == pytest.approx(math.sqrt(0.02) / 2, rel=1e-12)
    assert c.loc["S b", "sd_source_size"] == "replicates"


def test_log_scale_sd_column_is_used_as_is(tmp_path):
    text = "species,family,mass,mass_sd,rate\nS a,F,10,0.3,1\nS b,F,5,0.1,1\n"
    source = {"columns": {"species": "species", "size": "mass", "trait": "rate",
                          "levels": ["family"], "size_sd": "mass_sd"}, "sd_scale": "log"}
    clean, _, _ = _prepare(tmp_path, text, source=source)
    assert clean.set_index("species").loc["S a", "sd_log_size"] == pytest.approx(0.3)


def test_no_replicates_anywhere_gives_sd_source_none(tmp_path):
    clean, _, prepared = _prepare(tmp_path, "species,family,mass,rate\nA a,F,1,1\nB b,F,2,2\n")
    assert set(clean["sd_source_size"]) == {"none"}
    assert clean["sd_log_size"].isna().all()
    assert prepared["pooled_within_sd"]["size"]["sd"] is None


def test_aggregate_species_directly_on_a_frame():
    rows = pd.DataFrame({
        "species": ["a", "a", "b"],
        "family": ["F", "F", "G"],
        "source": ["x", "y", "x"],
        "log_size": [1.0, 3.0, 2.0],
        "log_trait": [0.0, 0.0, 1.0],
        "sd_log_size_row": [np.nan] * 3,
        "sd_log_trait_row": [np.nan] * 3,
    })
    clean, pooled = aggregate_species(rows, levels=["family"])
    a = clean.set_index("species").loc["a"]
    assert a["log_size"] == 2.0
    assert a["within_sd_log_size"] == pytest.approx(math.sqrt(2.0))  # SD of (1, 3), ddof 1
    assert a["source"] == "x;y"
    assert pooled["size"]["sd"] == pytest.approx(math.sqrt(2.0))


def test_replicate_covariance_of_log_size_and_trait_matches_numpy_cov(tmp_path):
    # rows paired by line; numpy.cov(x, y, ddof=1)[0, 1] is the reference (general-purpose
    # library); one row gives NaN
    text = (
        "species,family,mass,rate\n"
        "S a,F,10,1\nS a,F,20,3\nS a,F,40,2\n"
        "S b,F,5,2\nS b,F,6,1\n"
        "S c,G,7,3\n"
    )
    clean, _, _ = _prepare(tmp_path, text)
    c = clean.set_index("species")["replicate_cov_log_size_trait"]
    for name, mass, rate in (("S a", [10, 20, 40], [1, 3, 2]), ("S b", [5, 6], [2, 1])):
        reference = np.cov(np.log(mass), np.log(rate), ddof=1)[0, 1]
        assert c[name] == pytest.approx(reference, rel=1e-12)
    assert math.isnan(c["S c"])
    assert list(clean.columns).index("replicate_cov_log_size_trait") == list(
        clean.columns).index("replicate_n_trait") + 1


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.sampled_from("abcd"),
                          st.floats(-5, 5, allow_nan=False), st.floats(-5, 5, allow_nan=False)),
                min_size=1, max_size=12))
def test_replicate_covariance_of_any_frame_matches_numpy_cov(values):
    # random species frames (Hypothesis): each species' covariance equals numpy.cov of its
    # rows (ddof 1), NaN for one row
    rows = pd.DataFrame({
        "species": [v[0] for v in values], "source": "x",
        "log_size": [v[1] for v in values], "log_trait": [v[2] for v in values],
        "sd_log_size_row": np.nan, "sd_log_trait_row": np.nan,
    })
    clean, _ = aggregate_species(rows, levels=[])
    got = clean.set_index("species")["replicate_cov_log_size_trait"]
    for name, sub in rows.groupby("species"):
        if len(sub) == 1:
            assert math.isnan(got[name])
        else:
            reference = np.cov(sub["log_size"], sub["log_trait"], ddof=1)[0, 1]
            assert got[name] == pytest.approx(reference, rel=1e-9, abs=1e-9)


def test_singleton_taxon_is_kept_and_flagged(tmp_path):
    clean, _, prepared = _prepare(tmp_path, GOOD + "Talpa eps,Talpidae,70,0.5\n")
    c = clean.set_index("species")
    assert bool(c.loc["Talpa eps", "flag_singleton_taxon"])
    assert not c.loc["Mus gamma", "flag_singleton_taxon"]
    assert prepared["singleton_taxa"] == {"family": ["Talpidae"]}


def _outlier_table() -> str:
    lines = ["species,family,mass,rate"]
    rng = np.random.default_rng(3)
    for i in range(30):
        mass = math.exp(i / 5)
        rate = 0.02 * mass**0.75 * math.exp(rng.normal(0, 0.1))
        lines.append(f"S {i},F{i % 3},{mass:.6g},{rate:.6g}")
    lines.append(f"S 5,F2,{math.exp(1):.6g},{0.02 * math.exp(0.75) * 50:.6g}")  # ×50 slip
    return "\n".join(lines) + "\n"


def test_outlier_is_flagged_and_kept_by_default(tmp_path):
    clean, ledger, prepared = _prepare(tmp_path, _outlier_table())
    assert prepared["outliers"]["species"] == ["S 5"]
    [row] = prepared["outliers"]["rows"]
    assert row["line"] == 32
    assert "robust z of log trait residual" in row["note"]
    assert bool(clean.set_index("species").loc["S 5", "flag_outlier"])
    assert ledger.set_index("line").loc[32, "fate"] == "merged"
    assert ledger.set_index("line").loc[32, "reason"].endswith("beyond ±5")
    assert clean["flag_outlier"].sum() == 1


def test_outlier_is_dropped_when_the_config_says_so(tmp_path):
    clean, ledger, prepared = _prepare(tmp_path, _outlier_table(),
                                       outliers={"robust_z": 5, "remove": True})
    assert _dropped(ledger)[32].startswith("outlier removed (robust z of log trait residual")
    assert not clean["flag_outlier"].any()
    assert clean.set_index("species").loc["S 5", "n_rows"] == 1
    _assert_ledger_adds_up(ledger, prepared, 31)


def test_robust_z_uses_median_and_scaled_mad():
    # 1.4826 = 1/Φ⁻¹(3/4) makes the MAD consistent for the normal SD (Rousseeuw & Croux 1993).
    x = np.array([1.0, 2.0, 3.0, 4.0, 100.0])
    mad = np.median(np.abs(x - 3.0))
    from scipy.stats import median_abs_deviation, norm

    assert 1 / norm.ppf(0.75) == pytest.approx(1.482602218505602)
    np.testing.assert_allclose(robust_z(x), (x - 3.0) / (1.482602218505602 * mad))
    np.testing.assert_allclose(robust_z(x), (x - 3.0) / median_abs_deviation(x, scale="normal"))


def test_two_sources_merge_species_and_join_source_labels(tmp_path):
    a = _write(tmp_path, GOOD, "a.csv")
    b = _write(tmp_path, "species\tfamily\tmass\trate\nMus gamma\tMuridae\t32\t0.31\n", "b.tsv")
    config = _config(tmp_path, [_source(a, label="team A"), _source(b, label="team B")])
    prepare_dataset(config, "d")
    clean = read_clean(tmp_path / "results", "d").set_index("species")
    assert clean.loc["Mus gamma", "source"] == "team A;team B"
    assert clean.loc["Mus gamma", "n_rows"] == 2
    ledger = pd.read_csv(ledger_path(tmp_path / "results", "d"), keep_default_na=False)
    assert list(ledger.columns) == LEDGER_COLUMNS
    row = ledger[(ledger["file"] == str(b)) & (ledger["line"] == 2)].iloc[0]
    assert row["fate"] == "merged"
    assert row["merged_into"] == "Mus gamma"


def test_read_clean_before_prepare_says_what_to_run(tmp_path):
    with pytest.raises(UserError, match="run `allolaw prepare --dataset d` first"):
        read_clean(tmp_path, "d")


# ----------------------------------------------------------------------------------------------
# the command line


def test_cli_user_error_returns_2_and_prints_no_traceback(tmp_path, capsys):
    path = _write(tmp_path, GOOD.replace("rate", "rmr"))
    config = {"results_dir": str(tmp_path / "results"), "datasets": {"d": {
        "sources": [_source(path)],
        "size": {"quantity": "mass", "unit": "g"},
        "trait": {"quantity": "power", "unit": "W"},
        "models": ["pooled"],
    }}}
    config_file = tmp_path / "c.yaml"
    config_file.write_text(yaml.safe_dump(config))
    code = main(["prepare", "--config", str(config_file), "--dataset", "d"])
    err = capsys.readouterr().err
    assert code == 2
    assert "Traceback" not in err
    assert "allolaw prepare: error:" in err
    assert f"{path}, line 1" in err
    assert "'rate'" in err


def test_cli_prepare_prints_the_summary(tmp_path, capsys):
    path = _write(tmp_path, GOOD)
    config = {"results_dir": str(tmp_path / "results"), "datasets": {"d": {
        "sources": [_source(path)],
        "size": {"quantity": "mass", "unit": "g"},
        "trait": {"quantity": "power", "unit": "W"},
        "models": ["pooled"],
    }}}
    config_file = tmp_path / "c.yaml"
    config_file.write_text(yaml.safe_dump(config))
    assert main(["prepare", "--config", str(config_file), "--dataset", "d"]) == 0
    out = capsys.readouterr().out
    assert "d: 5 input rows → 4 species (4 kept, 1 merged, 0 dropped)" in out


# ----------------------------------------------------------------------------------------------
# the demo datasets


@pytest.fixture(scope="module")
def demo_results(tmp_path_factory):
    """Prepare the three demo datasets from the committed files (cwd-independent)."""
    work = tmp_path_factory.mktemp("demo")
    shutil.copytree(ROOT / "data" / "demo", work / "data" / "demo")
    config = load_config(ROOT / "config" / "config.yaml",
                         [f"results_dir={work / 'results'}"])
    for ds in config["datasets"].values():
        for source in ds["sources"]:
            source["file"] = str(work / source["file"])
    truth = json.loads((ROOT / "data" / "demo" / "truth.json").read_text())
    summaries = {name: prepare_dataset(config, name) for name in config["datasets"]}
    return work, config, truth, summaries


@pytest.mark.parametrize("dataset", ["island_metabolism", "tree_biomass", "cell_scaling",
                                     "running_speed"])
def test_ledger_accounts_for_every_input_row_of_the_demo(demo_results, dataset):
    work, config, truth, _ = demo_results
    ledger = pd.read_csv(ledger_path(work / "results", dataset), keep_default_na=False)
    prepared = read_prepared(work / "results", dataset)
    for source in config["datasets"][dataset]["sources"]:
        text = Path(source["file"]).read_text(encoding="utf-8")
        data_lines = [i for i, ln in enumerate(text.split("\n"), start=1) if ln and i > 1]
        rows = ledger[ledger["file"] == source["file"]]
        assert sorted(rows["line"]) == data_lines
    _assert_ledger_adds_up(ledger, prepared, len(ledger))
    assert prepared["counts"]["kept"] == prepared["counts"]["species"]
    # with rows_are: individuals every usable line is a row (truth: n_individuals)
    assert prepared["counts"]["species"] == truth[dataset].get("n_individuals",
                                                               truth[dataset]["n_species"])
    merged = ledger[ledger["fate"] == "merged"]
    assert (merged["merged_into"] == merged["species"]).all()
    # Every blemish of truth.json got the fate it was made for.
    for blemish in truth[dataset]["blemishes"]:
        file = str(work / "data" / "demo" / blemish["file"])
        row = ledger[(ledger["file"] == file) & (ledger["line"] == blemish["line"])].iloc[0]
        if blemish["expected_fate"] == "dropped":
            assert row["fate"] == "dropped", blemish
        else:
            assert row["fate"] in {"kept", "merged"}
            assert "flagged" in row["reason"]


def test_demo_clean_tables_follow_the_contract(demo_results):
    work, config, _, summaries = demo_results
    for dataset, ds in config["datasets"].items():
        clean = read_clean(work / "results", dataset)
        prepared = read_prepared(work / "results", dataset)
        levels = prepared["levels"]  # with individuals, the species level comes last
        assert levels[:len(ds["sources"][0]["columns"]["levels"])] == ds["sources"][0][
            "columns"]["levels"]
        covariates = [f"cov_{c}" for c in ds["sources"][0]["columns"]["covariates"]]
        assert list(clean.columns) == [
            "species", *levels, "log_size", "log_trait", "n_rows", "within_sd_log_size",
            "within_sd_log_trait", "sd_log_size", "sd_log_trait", "sd_source_size",
            "sd_source_trait", "replicate_var_log_size", "replicate_n_size",
            "replicate_var_log_trait", "replicate_n_trait", "replicate_cov_log_size_trait",
            *covariates, "source",
            "flag_outlier", "flag_singleton_taxon",
        ]
        assert clean["species"].is_unique
        # individuals have no replicates to take an SD from
        allowed = {"none"} if ds["rows_are"] == "individuals" else {"replicates", "pooled"}
        assert set(clean["sd_source_size"]) <= allowed
        finite = ["log_size", "log_trait"] + (["sd_log_size"] if "none" not in allowed else [])
        assert np.isfinite(clean[finite]).all().all()
        assert prepared["canonical_units"]["size"] == ds["size"]["unit"]
        assert len(prepared["sources"][0]["sha256"]) == 64
        assert dataset in summaries[dataset]


def test_demo_island_units_land_in_grams_watts_and_kelvin(demo_results):
    work, _, truth, _ = demo_results
    clean = read_clean(work / "results", "island_metabolism")
    # Body temperatures of about 37.5 °C are about 310.65 K.
    assert clean["cov_body_temp_c"].median() == pytest.approx(310.65, abs=1.0)
    prepared = read_prepared(work / "results", "island_metabolism")
    assert prepared["reference_size"] == 100
    froms = {(c["column"], c["from"]) for c in prepared["conversions"]}
    assert {("mass", "kg"), ("mass", "g"), ("rate", "mW"), ("rate", "W"),
            ("rmr_ml_o2_h", "mL O2/h"), ("body_temp_c", "degC")} <= froms
    # The pooled within-species SD of log mass estimates the replicate scatter that made the
    # data (known truth, 0.10); with ~215 degrees of freedom its SE is about 0.1/√430 ≈ 0.005.
    pooled = prepared["pooled_within_sd"]["size"]["sd"]
    assert pooled == pytest.approx(truth["island_metabolism"]["size_error_sd"], abs=0.02)
    both = clean["source"].str.contains(";")
    assert both.sum() == truth["island_metabolism"]["n_species_both_teams"]
    assert prepared["singleton_taxa"]["family"] == ["Geyseridae"]


def test_demo_cell_rates_are_converted_from_amol_per_minute(demo_results):
    work, config, _, _ = demo_results
    raw = pd.read_csv(config["datasets"]["cell_scaling"]["sources"][0]["file"],
                      keep_default_na=False)
    clean = read_clean(work / "results", "cell_scaling").set_index("species")
    first = raw[raw["strain"] == "AST-001"]
    # 1 amol/min = 0.06 fmol/h (1e-18 mol × 60 per hour); the mean of logs of the replicates.
    expected = np.mean(np.log(first["uptake_amol_min"].astype(float) * 0.06))
    assert clean.loc["AST-001", "log_trait"] == pytest.approx(expected, rel=1e-12)


def test_demo_running_speed_is_converted_from_km_per_h_to_m_per_s(demo_results):
    work, config, _, _ = demo_results
    raw = pd.read_csv(config["datasets"]["running_speed"]["sources"][0]["file"],
                      keep_default_na=False)
    clean = read_clean(work / "results", "running_speed").set_index("species")
    name = raw["species"].iloc[0]
    trials = raw[raw["species"] == name]
    # 1 km/h = 1/3.6 m/s (SI Brochure, 9th ed., 2019, Table 8); the mean of logs of the trials
    expected = np.mean(np.log(trials["speed_kmh"].astype(float) / 3.6))
    assert clean.loc[name, "log_trait"] == pytest.approx(expected, rel=1e-12)
    prepared = read_prepared(work / "results", "running_speed")
    factors = {c["from"]: c["factor"] for c in prepared["conversions"]
               if c["column"] == "speed_kmh"}
    assert factors == {"km/h": pytest.approx(1 / 3.6, rel=1e-12)}


def test_unclosed_quote_is_named_in_the_reason(tmp_path):
    _, ledger, prepared = _prepare(tmp_path, GOOD + '"Mus delta,Muridae,41,0.36\n')
    assert "unclosed quote" in _dropped(ledger)[7]
    _assert_ledger_adds_up(ledger, prepared, 6)


def test_missing_covariate_drops_the_row_and_negative_sd_too(tmp_path):
    text = ("species,family,mass,mass_sd,rate,temp\n"
            "A a,F,1,0.1,1,37\nA b,F,2,-0.1,2,37\nA c,F,3,0.1,3,NA\n")
    source = {
        "columns": {"species": "species", "size": "mass", "trait": "rate", "levels": ["family"],
                    "size_sd": "mass_sd", "covariates": ["temp"]},
        "units": {"size": "g", "trait": "W", "temp": "degC"},
    }
    _, ledger, prepared = _prepare(tmp_path, text, source=source, covariates={"temp": "K"})
    assert _dropped(ledger) == {
        3: "negative SD in column 'mass_sd': '-0.1'",
        4: "missing value in column 'temp' (cell 'NA')",
    }
    _assert_ledger_adds_up(ledger, prepared, 3)


def test_covariate_unit_without_canonical_unit_is_a_user_error(tmp_path):
    text = "species,family,mass,rate,temp\nA a,F,1,1,37\n"
    source = {
        "columns": {"species": "species", "size": "mass", "trait": "rate", "levels": ["family"],
                    "covariates": ["temp"]},
        "units": {"size": "g", "trait": "W", "temp": "degC"},
    }
    message = _error(tmp_path, text, source=source)
    assert "covariate 'temp' has a unit in the source but no canonical unit" in message


def test_flagged_replicate_does_not_feed_the_pooled_sd(tmp_path):
    # Two clean replicate pairs (S 10, S 20) and S 5, whose second row is a ×50 slip (flagged).
    rows = {line.split(",")[0]: line.split(",") for line in _outlier_table().splitlines()}
    extra = "".join(f"{s},{rows[s][1]},{float(rows[s][2]) * f:.6g},{float(rows[s][3]) * f:.6g}\n"
                    for s, f in (("S 10", 1.05), ("S 20", 0.95)))
    clean, _, prepared = _prepare(tmp_path, _outlier_table() + extra)
    c = clean.set_index("species")
    assert prepared["outliers"]["species"] == ["S 5"]
    logs = {}
    text = (_outlier_table() + extra).splitlines()[1:]
    for line in text:
        name, _, mass, rate = line.split(",")
        logs.setdefault(name, []).append((math.log(float(mass)), math.log(float(rate))))
    # Pooled SD over S 10 and S 20 only: one degree of freedom each, so the root mean of the
    # two replicate variances (ddof 1), computed here by hand.
    for k, col in ((0, "size"), (1, "trait")):
        variances = [np.var([x[k] for x in logs[s]], ddof=1) for s in ("S 10", "S 20")]
        pooled = math.sqrt(sum(variances) / 2)
        assert prepared["pooled_within_sd"][col]["sd"] == pytest.approx(pooled, rel=1e-9)
        assert prepared["pooled_within_sd"][col]["species"] == 2
        assert c.loc["S 0", f"sd_log_{col}"] == pytest.approx(pooled, rel=1e-9)
        assert c.loc["S 0", f"sd_source_{col}"] == "pooled"
    # S 5 itself keeps both rows in its own mean and replicate SD.
    assert c.loc["S 5", "n_rows"] == 2
    assert c.loc["S 5", "sd_source_trait"] == "replicates"


def test_taxonomy_conflict_message_lists_a_few_and_counts_the_rest(tmp_path):
    lines = ["species,family,mass,rate"]
    for i in range(3000):
        lines += [f"S {i},F{i % 7},{i + 1},{i + 1}", f"S {i},G{i % 5},{i + 2},{i + 2}"]
    message = _error(tmp_path, "\n".join(lines) + "\n")
    assert message.startswith("3000 species placed in more than one taxon")
    assert "species 'S 0'" in message
    assert "and 2995 more species (first 5 shown)" in message
    assert len(message) < 2000
