"""Malformed and tricky input tables: one expected outcome per case, no traceback ever.

Each case is a small table (invented) run through the command line, ``allolaw prepare``. A
case either stops (exit 2, a message naming the file and the location) or succeeds (exit 0)
with stated lines dropped for stated reasons. Every successful case also checks that the
ledger accounts for every physical line, against a count made here independently (Python's
universal-newline reader and a regular expression for blank lines).
"""

from __future__ import annotations

import gzip
import io
import json
import re
import unicodedata
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
import yaml

from allolaw.cli import main
from allolaw.paths import clean_path, ledger_path, prepared_path

HEAD = "species,family,mass,rate\n"
ROWS = [
    "Sorex alpha,Soricidae,10,0.1",
    "Sorex alpha,Soricidae,20,0.2",
    "Sorex beta,Soricidae,5,0.05",
    "Mus gamma,Muridae,30,0.3",
    "Mus delta,Muridae,40,0.35",
    "Mus eps,Muridae,45,0.4",
]
GOOD = HEAD + "\n".join(ROWS) + "\n"


def _long(n: int = 20) -> str:
    return HEAD + "".join(f"Sp {i},F{i % 3},{10 + i},{0.1 + i / 100:.2f}\n" for i in range(n))


def _swap(text: str, line: int, new: str) -> str:
    lines = text.split("\n")
    lines[line - 1] = new
    return "\n".join(lines)


@dataclass
class Case:
    """One input and its expected outcome (``code`` 2: ``message`` parts; 0: ``dropped``)."""

    id: str
    text: str | bytes
    code: int
    message: list[str] = field(default_factory=list)
    dropped: dict[int, str] = field(default_factory=dict)
    source: dict[str, Any] = field(default_factory=dict)
    dataset: dict[str, Any] = field(default_factory=dict)
    name: str = "t.csv"
    extra_sources: list[tuple[str, str | bytes, dict[str, Any]]] = field(default_factory=list)
    same_file_twice: bool = False
    raw_yaml: str | None = None  # a whole config file, with {file} and {results} filled in
    warning: str = ""
    species: int | None = None  # expected species count
    prepared_text: list[str] = field(default_factory=list)  # substrings of clean.csv


NFC = unicodedata.normalize("NFC", "Mus ćeli")
NFD = unicodedata.normalize("NFD", "Mus ćeli")
DECIMAL_COMMA_FILE = "species;family;mass;rate\n" + "".join(
    f"Sp {i};F;{10 + i},5;{i + 1}\n" if i else f"Sp {i};F;10;1\n" for i in range(18)
)

CASES = [
    # ---- structure: the stage stops and names the place --------------------------------------
    Case("empty file", "", 2, ["t.csv", "empty"]),
    Case("only spaces and line ends", "  \n\n \n", 2, ["t.csv", "empty"]),
    Case("header without rows", HEAD + "\n", 2, ["t.csv", "line 1", "no data rows"]),
    Case("only empty fields", ",,,,\n,,,,\n", 2, ["t.csv", "no header", "2 lines"]),
    Case("only empty quotes", '""\n"",""\n', 2, ["t.csv", "no header"]),
    Case("semicolons read as commas", GOOD.replace(",", ";"), 2,
         ["t.csv, line 1", "semicolon-separated", 'delimiter: ";"']),
    Case("tabs in a .csv", GOOD.replace(",", "\t"), 2, ["t.csv, line 1", "tab-separated"]),
    Case("duplicate header name", "species,family,mass,mass,rate\nA b,F,1,2,3\n", 2,
         ["t.csv, line 1", "duplicate column name 'mass'", "fields 3 and 4"]),
    Case("mapped column missing", GOOD.replace("rate", "rmr"), 2,
         ["t.csv, line 1", "'rate'", "'rmr'"]),
    Case("header differs in case", GOOD.replace("mass", "Mass"), 2,
         ["t.csv, line 1", "'Mass' for 'mass'", "letter case"]),
    Case("comment line before the header", "# survey 2024\n" + GOOD, 2,
         ["t.csv, line 1", "starts with '#'", "seems to be line 2"]),
    Case("sep= line before the header", "sep=,\n" + GOOD, 2, ["t.csv, line 1", "'sep=' line"]),
    Case("gzip file", gzip.compress(GOOD.encode()), 2, ["t.csv", "gzip-compressed"]),
    Case("zip file", b"PK\x03\x04" + b"\0" * 20, 2, ["t.csv", "zip archive"]),
    Case("not UTF-8", (HEAD + "A a,F,1,1\nB \xe9,F,2,2\n").encode("latin-1"), 2,
         ["t.csv, line 3", "not UTF-8"]),
    Case("unknown unit in config", GOOD, 2, ["t.csv", "'mass'", "'gramm'"],
         source={"units": {"size": "gramm", "trait": "W"}}),
    Case("gr would be grain", GOOD, 2, ["t.csv", "'gr'", "grain", "in full"],
         source={"units": {"size": "gr", "trait": "W"}}),
    Case("Mg unit for a whole column", "species,family,mass,u,rate\nA a,F,1,Mg,1\nB b,F,2,Mg,2\n",
         2, ["t.csv, line 2, column 'u', value 'Mg'", "megagram", "did you mean 'mg'"],
         source={"unit_columns": {"size": "u"}, "units": {"trait": "W"}}),
    Case("unit cells differing in case", "species,family,mass,u,rate\n"
         "A a,F,1,mg,1\nB b,F,2,mg,2\nC c,F,3,MG,3\n", 2,
         ["t.csv, line 4, column 'u', value 'MG'", "letter case", "line 2"],
         source={"unit_columns": {"size": "u"}, "units": {"trait": "W"}}),
    Case("decimal commas except integers", DECIMAL_COMMA_FILE, 2,
         ["t.csv, line 3, column 'mass', value '11,5'", "decimal commas", "17 cells"],
         source={"delimiter": ";"}),
    Case("decimal commas in every row", HEAD + 'A a,F,"1,5",0.1\nA b,F,"2,5",0.2\n', 2,
         ["t.csv, line 2, column 'mass', value '1,5'", "decimal commas"]),
    Case("text in a whole column", HEAD + "A a,F,heavy,1\nB b,F,light,2\n", 2,
         ["t.csv, line 2, column 'mass', value 'heavy'", "no cell of this column is a number"]),
    Case("most rows not a number", HEAD + "A a,F,1,1\nB b,F,x2,2\nC c,F,x3,3\nD d,F,4,4\n"
         "E e,F,x5,5\n", 2, ["t.csv", "3 of 5 data lines", "not a number in column 'mass'",
                              "line 3", "max_dropped_share"]),
    Case("species in two taxa", GOOD + "Mus gamma,Soricidae,31,0.31\n", 2,
         ["species 'Mus gamma'", "line 5", "line 8", "Muridae", "Soricidae"]),
    Case("family under two orders", "species,order,family,mass,rate\nA a,O1,F,1,1\n"
         "B b,O2,F,2,2\n", 2, ["1 family placed in more than one order", "line 2", "line 3"],
         source={"columns": {"species": "species", "size": "mass", "trait": "rate",
                             "levels": ["order", "family"]}}),
    Case("same file listed twice", GOOD, 2, ["sources[1]", "the same file as"],
         same_file_twice=True),
    Case("two byte-identical files", GOOD, 2,
         ["sources[1]", "byte-identical", "allow_identical_content"],
         extra_sources=[("u.csv", GOOD, {})]),
    Case("source file missing", GOOD, 2, ["nope.csv", "not found"],
         extra_sources=[("nope.csv", None, {})]),  # type: ignore[list-item]
    Case("size without a unit", GOOD, 2, ["t.csv", "'mass'", "has no unit"],
         source={"units": {"trait": "W"}}),
    Case("mass unit for a length", GOOD, 2, ["t.csv", "'g'", "declared as length"],
         dataset={"size": {"quantity": "length", "unit": "cm"}}),
    Case("dataset defined twice in YAML", GOOD, 2, ["line 8", "'d' is given twice", "line 2"],
         raw_yaml="datasets:\n  d: {{}}\n  # a second definition below would win silently\n"
         "\n\n\n\n  d:\n    sources: [{{file: '{file}', columns: {{species: species, "
         "size: mass, trait: rate}}, units: {{size: g, trait: W}}}}]\n"),
    Case("units given twice in one source", GOOD, 2, ["line 7", "'units' is given twice"],
         raw_yaml="results_dir: '{results}'\ndatasets:\n  d:\n    sources:\n"
         "      - file: '{file}'\n        units: {{size: kg, trait: W}}\n"
         "        units: {{size: g, trait: W}}\n"
         "        columns: {{species: species, size: mass, trait: rate}}\n"
         "    size: {{quantity: mass, unit: g}}\n    trait: {{quantity: power, unit: W}}\n"
         "    models: [pooled]\n"),
    Case("YAML no and 1e3", GOOD, 2, ["reads unquoted 'no' as false", "reads '1e3' as text"],
         raw_yaml="results_dir: '{results}'\ndatasets:\n  d:\n    title: no\n"
         "    reference_size: 1e3\n    sources:\n"
         "      - {{file: '{file}', units: {{size: g, trait: W}}, columns: {{species: species, "
         "size: mass, trait: rate}}}}\n"
         "    size: {{quantity: mass, unit: g}}\n    trait: {{quantity: power, unit: W}}\n"
         "    models: [pooled]\n"),
    Case("dataset name with a trailing newline", GOOD, 2, ["key 'datasets'", "does not match"],
         raw_yaml="results_dir: '{results}'\ndatasets:\n  \"d\\n\":\n    sources:\n"
         "      - {{file: '{file}', units: {{size: g, trait: W}}, columns: {{species: species, "
         "size: mass, trait: rate}}}}\n"
         "    size: {{quantity: mass, unit: g}}\n    trait: {{quantity: power, unit: W}}\n"
         "    models: [pooled]\n"),
    # ---- rows: dropped with a reason, the rest kept ------------------------------------------
    Case("unclosed quote in the last field", _swap(_long(), 11, 'Sp 9,F0,19,"0.19'), 0,
         dropped={11: "unclosed quote"}),
    Case("unclosed quote in a file over 128 KB",
         _swap(_long(8000), 6001, 'Sp 5999,F2,6009,"60'), 0, dropped={6001: "unclosed quote"}),
    Case("line break inside a quoted cell", _swap(_long(), 6, 'Sp 4,F1,14,"0.14\n"'), 0,
         dropped={6: "line break", 7: "lines 6-7"}),
    Case("text after a closing quote", _swap(GOOD, 5, 'Mus gamma,Muridae,30,"0"3'), 0,
         dropped={5: "malformed quoting"}),
    Case("quote open up to a blank line", _swap(GOOD, 4, 'Sorex beta,Soricidae,5,"0.05\n'), 0,
         dropped={4: "unclosed quote"}),
    Case("stray delimiter", _swap(GOOD, 4, "Sorex beta,Soricidae,5,0.05,x"), 0,
         dropped={4: "has 5 fields"}),
    Case("missing field", _swap(GOOD, 4, "Sorex beta,Soricidae,5"), 0,
         dropped={4: "has 3 fields"}),
    Case("missing value words", _swap(GOOD, 5, "Mus gamma,Muridae,NA,0.3"), 0,
         dropped={5: "missing value in column 'mass'"}),
    Case("zero size", _swap(GOOD, 5, "Mus gamma,Muridae,0,0.3"), 0,
         dropped={5: "non-positive value"}),
    Case("infinite trait", _swap(GOOD, 5, "Mus gamma,Muridae,3,inf"), 0,
         dropped={5: "non-finite value"}),
    Case("underflow after conversion", _swap(GOOD, 5, "Mus gamma,Muridae,1e-320,0.3"), 0,
         dropped={5: "out of range after conversion to g"}, source={"units": {"size": "ug",
                                                                               "trait": "W"}}),
    Case("overflow after conversion", _swap(GOOD, 5, "Mus gamma,Muridae,1e306,0.3"), 0,
         dropped={5: "1e306 t is inf g"}, source={"units": {"size": "t", "trait": "W"}}),
    Case("one decimal comma among points", _swap(GOOD, 5, 'Mus gamma,Muridae,30,"0,3"'), 0,
         dropped={5: "decimal comma"}),
    Case("one decimal comma among integers", _swap(GOOD, 5, 'Mus gamma,Muridae,"3,5",0.3'), 2,
         ["t.csv, line 5, column 'mass', value '3,5'", "decimal commas"]),
    Case("exact duplicate line", GOOD + ROWS[3] + "\n", 0,
         dropped={8: "exact duplicate of line 5"}),
    Case("missing species and taxon", _swap(_swap(GOOD, 4, ",Soricidae,5,0.05"), 5,
                                             "Mus gamma,,30,0.3"), 0,
         dropped={4: "missing species", 5: "missing taxon"}),
    Case("blank and empty-field lines between rows",
         "\n".join([HEAD[:-1], ROWS[0], ",,,", ROWS[1], "", '"",""', *ROWS[2:]]) + "\n\n", 0,
         species=5),
    Case("CRLF line ends", GOOD.replace("\n", "\r\n"), 0, species=5),
    Case("old Mac line ends", GOOD.replace("\n", "\r"), 0, species=5),
    Case("byte-order mark", b"\xef\xbb\xbf" + GOOD.encode(), 0, species=5),
    Case("NFC and NFD spellings", GOOD + f"{NFC},Muridae,50,0.5\n{NFD},Muridae,52,0.5\n", 0,
         species=6, warning="Unicode normalisation"),
    Case("zero-width space in a name", GOOD + "Mus\u200b eps,Muridae,46,0.41\n", 0,
         species=5, warning="Unicode normalisation"),
    Case("formula-like species name", GOOD + "=HYPERLINK(1),Muridae,50,0.5\n", 0, species=6,
         warning="leading apostrophe", prepared_text=["'=HYPERLINK(1)"]),
    Case("level column named species", "name,species,mass,rate\nA a,G1,1,1\nA b,G1,2,2\n"
         "B c,G2,3,3\n", 0, species=3, warning="'species_level'",
         source={"columns": {"species": "name", "size": "mass", "trait": "rate",
                             "levels": ["species"]}}),
    Case("identical files allowed by name", GOOD, 0, species=5,
         extra_sources=[("u.csv", GOOD, {"allow_identical_content": True})]),
]


def _config_text(tmp_path: Path, case: Case) -> str:
    path = tmp_path / case.name
    if case.raw_yaml is not None:
        return case.raw_yaml.format(file=path, results=tmp_path / "results")
    source = {"file": str(path),
              "columns": {"species": "species", "size": "mass", "trait": "rate",
                          "levels": ["family"]},
              "units": {"size": "g", "trait": "W"}}
    source.update(case.source)
    sources = [source]
    if case.same_file_twice:
        sources.append(dict(source))
    for name, _, extra in case.extra_sources:
        sources.append({**source, "file": str(tmp_path / name), **extra})
    ds = {"sources": sources, "size": {"quantity": "mass", "unit": "g"},
          "trait": {"quantity": "power", "unit": "W"}, "models": ["pooled"]}
    ds.update(case.dataset)
    return yaml.safe_dump({"results_dir": str(tmp_path / "results"), "datasets": {"d": ds}})


def _write(path: Path, text: str | bytes) -> None:
    if isinstance(text, bytes):
        path.write_bytes(text)
    else:
        path.write_bytes(text.encode("utf-8"))  # no newline translation


def physical_data_lines(raw: bytes) -> int:
    """Lines that are neither the header nor blank, counted without allolaw's reader."""
    text = raw.decode("utf-8-sig")
    lines = io.StringIO(text, newline=None).readlines()
    blank = [line for line in lines if re.fullmatch(r"[\s,;]*", line.replace('""', ""))]
    return len(lines) - len(blank) - 1


def run_case(tmp_path: Path, case: Case, capsys: pytest.CaptureFixture[str]
             ) -> tuple[int, str]:
    _write(tmp_path / case.name, case.text)
    for name, text, _ in case.extra_sources:
        if text is not None:
            _write(tmp_path / name, text)
    config = tmp_path / "c.yaml"
    config.write_text(_config_text(tmp_path, case), encoding="utf-8")
    dataset = "d\n" if "trailing newline" in case.id else "d"
    code = main(["prepare", "--config", str(config), "--dataset", dataset])
    return code, capsys.readouterr().err


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_malformed_input_has_one_stated_outcome(tmp_path, capsys, case):
    code, err = run_case(tmp_path, case, capsys)
    assert "Traceback" not in err
    assert code == case.code, err
    results = tmp_path / "results"
    if code == 2:
        message = err.split("error: ", 1)[1]
        for part in case.message:
            assert part in message, message
        assert len(message) < 3000
        return
    ledger = pd.read_csv(ledger_path(results, "d"), keep_default_na=False)
    prepared = json.loads(prepared_path(results, "d").read_text(),
                          parse_constant=lambda c: pytest.fail(f"invalid JSON constant {c}"))
    dropped = ledger[ledger["fate"] == "dropped"]
    assert sorted(dropped["line"]) == sorted(case.dropped), dropped
    for line, part in case.dropped.items():
        assert part in dropped.set_index("line").loc[line, "reason"]
    files = [case.name, *(n for n, _, _ in case.extra_sources)]
    for name in files:
        raw = (tmp_path / name).read_bytes()
        rows = ledger[ledger["file"] == str(tmp_path / name)]
        assert len(rows) == physical_data_lines(raw), name
    counts = prepared["counts"]
    assert counts["kept"] + counts["merged"] + counts["dropped"] == len(ledger)
    if case.species is not None:
        assert counts["species"] == case.species
    if case.warning:
        assert any(case.warning in w for w in prepared["warnings"]), prepared["warnings"]
    clean_text = clean_path(results, "d").read_text(encoding="utf-8")
    for part in case.prepared_text:
        assert part in clean_text

