"""Random small tables through ``allolaw prepare`` (Hypothesis): no crash, every line counted.

Tables are invented by Hypothesis: random delimiters, quoting, line ends, encodings, blank
lines and junk cells (stray quotes and delimiters, line breaks, decimal commas, words, zero,
negative and overflowing numbers). For every table the stage must exit 0 or 2 (never raise),
and when it succeeds the ledger must hold one row per physical data line and every kept
species value must be the mean log of the written values after unit conversion.
"""

from __future__ import annotations

import io
import math
import re
import tempfile
from pathlib import Path

import pandas as pd
import pytest
import yaml
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from allolaw.cli import main
from allolaw.intake import read_clean
from allolaw.paths import ledger_path

SPECIES = ["Sorex alpha", "Mus beta", "Mus gamma", "Talpa delta", "=Talpa eps", "Mus é"]
JUNK = ['"', "x", "", "NA", "-1", "0", "1e999", "3,5", "1.5.2", "a\nb", "5;5", "7\t7",
        '"9"9', "nan", "—"]
SIZE_UNITS = {"g": 1.0, "kg": 1000.0, "mg": 1e-3}
TRAIT_UNITS = {"W": 1.0, "mW": 1e-3}


@st.composite
def tables(draw: st.DrawFn) -> dict:
    delimiter = draw(st.sampled_from([",", ";", "\t"]))
    newline = draw(st.sampled_from(["\n", "\r\n"]))
    encoding = draw(st.sampled_from(["utf-8", "utf-8-sig", "latin-1"]))
    n = draw(st.integers(1, 8))
    rows = []  # (line, species, mass or None, rate or None)
    lines = ["species", "family", "mass", "rate"]
    text = delimiter.join(lines) + newline
    line = 2
    for _ in range(n):
        if draw(st.booleans()) and draw(st.booleans()):
            blank = draw(st.sampled_from(["", delimiter * 3, '""']))
            text += blank + newline
            line += 1
        species = draw(st.sampled_from(SPECIES))
        family = "Soricidae" if species.startswith("Sorex") else "Muridae"
        cells = [species, family]
        values = []
        for _ in range(2):
            if draw(st.integers(0, 4)) == 0:
                cell, value = draw(st.sampled_from(JUNK)), None
            else:
                value = draw(st.floats(1e-3, 1e4, allow_nan=False))
                cell = repr(value)
            cells.append(cell)
            values.append(value)
        written = []
        for cell in cells:
            if draw(st.booleans()):
                cell = '"' + cell.replace('"', '""') + '"'
            written.append(cell)
        row = delimiter.join(written)
        rows.append((line, species, *values))
        text += row + newline
        line += 1 + row.count("\n")
    return {"text": text, "encoding": encoding, "delimiter": delimiter, "rows": rows,
            "size_unit": draw(st.sampled_from(sorted(SIZE_UNITS))),
            "trait_unit": draw(st.sampled_from(sorted(TRAIT_UNITS)))}


def _physical_data_lines(raw: bytes) -> int:
    lines = io.StringIO(raw.decode("utf-8-sig"), newline=None).readlines()
    blank = [x for x in lines if re.fullmatch(r"[\s,;]*", x.replace('""', ""))]
    return len(lines) - len(blank) - 1


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(table=tables())
def test_random_tables_exit_0_or_2_and_keep_written_values(table):
    with tempfile.TemporaryDirectory() as folder:
        tmp = Path(folder)
        try:
            raw = table["text"].encode(table["encoding"])
        except UnicodeEncodeError:
            raw = table["text"].encode("utf-8")
        (tmp / "t.csv").write_bytes(raw)
        source = {"file": str(tmp / "t.csv"), "delimiter": table["delimiter"],
                  "columns": {"species": "species", "size": "mass", "trait": "rate",
                              "levels": ["family"]},
                  "units": {"size": table["size_unit"], "trait": table["trait_unit"]}}
        config = {"results_dir": str(tmp / "results"), "datasets": {"d": {
            "sources": [source], "size": {"quantity": "mass", "unit": "g"},
            "trait": {"quantity": "power", "unit": "W"}, "models": ["pooled"]}}}
        (tmp / "c.yaml").write_text(yaml.safe_dump(config), encoding="utf-8")
        code = main(["prepare", "--config", str(tmp / "c.yaml"), "--dataset", "d"])
        assert code in (0, 2)
        event(f"exit {code}")
        if code == 2:
            return
        ledger = pd.read_csv(ledger_path(tmp / "results", "d"), keep_default_na=False)
        assert len(ledger) == _physical_data_lines(raw)
        _check_kept_values(table, ledger, read_clean(tmp / "results", "d"))


def _check_kept_values(table: dict, ledger: pd.DataFrame, clean: pd.DataFrame) -> None:
    by_line = {line: (mass, rate) for line, _, mass, rate in table["rows"]}
    size_factor = SIZE_UNITS[table["size_unit"]]
    trait_factor = TRAIT_UNITS[table["trait_unit"]]
    used = ledger[ledger["fate"].isin(["kept", "merged"])]
    expected: dict[str, list[tuple[float, float]]] = {}
    for line, species in zip(used["line"], used["species"], strict=True):
        mass, rate = by_line[line]  # a used line is always one the table wrote as a row
        assert mass is not None, f"junk accepted on line {line}"
        assert rate is not None, f"junk accepted on line {line}"
        expected.setdefault(species, []).append(
            (math.log(mass * size_factor), math.log(rate * trait_factor)))
    assert set(expected) == set(clean["species"])
    for _, row in clean.iterrows():
        logs = expected[row["species"]]
        assert row["n_rows"] == len(logs)
        assert row["log_size"] == pytest.approx(sum(x for x, _ in logs) / len(logs), rel=1e-9)
        assert row["log_trait"] == pytest.approx(sum(y for _, y in logs) / len(logs),
                                                 rel=1e-9, abs=1e-12)
