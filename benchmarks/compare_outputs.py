"""Compare the outputs of two batch runs: ``results/`` and ``reports/`` of two working trees.

Usage::

    python benchmarks/compare_outputs.py BASELINE_DIR NEW_DIR [--rename OLD=NEW ...]
        [--html exact|numbers]

Every CSV and JSON file must be byte for byte the same. Every HTML page must be the same apart
from what a clock writes: the generation time (``YYYY-MM-DD HH:MM UTC``) and the run times the
pages quote (fit wall time, this page's render time, the Snakemake benchmark figures of the
index and of each page's footer); those are masked before the comparison, and the script prints
how many it masked per page. ``posterior.nc`` files are not compared here (their attributes hold
run times; ``tests/workflow_runs.py`` compares their draws).

``--rename OLD=NEW`` (repeatable) renames whole words in the baseline's CSV headers, JSON keys
and string values and HTML text before comparing, for a change that renames columns or keys but
must leave every number as it was. ``--html numbers`` compares only the sequence of numbers in
each page's text (for a change that rewords the pages). Exits 1 when anything differs.
"""

from __future__ import annotations

import argparse
import json
import re
import sys
from pathlib import Path
from typing import Any

_TREES = ("results", "reports")
_KINDS = {".csv", ".json", ".html"}
# What a clock writes into a page (masked before comparing pages).
_CLOCKS = [
    re.compile(r"\d{4}-\d{2}-\d{2} \d{2}:\d{2} UTC"),
    re.compile(r"(fit took )[-\d.,]+( s)"),
    re.compile(r"(this page )[-\d.,]+( s)"),
    re.compile(r"(jobs of this dataset )[-\d.,]+( s)"),
    re.compile(r"(fits )[-\d.,]+( s in total)"),
    re.compile(r"(\d+ jobs, )[-\d.,]+( s of wall time summed over jobs, largest peak memory )"
               r"[-\d.,]+( MB)"),
    re.compile(r'(<table id="table-benchmarks(?:-datasets)?">).*?(</table>)', re.S),
]
_NUMBER = re.compile(r"[-−]?\d+(?:[.,]\d+)*(?:[eE][-+]?\d+)?")


def main(argv: list[str] | None = None) -> int:
    """Compare two trees; print one line per difference and a summary; 0 when all agree."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("baseline", type=Path)
    parser.add_argument("new", type=Path)
    parser.add_argument("--rename", action="append", default=[], metavar="OLD=NEW")
    parser.add_argument("--html", choices=("exact", "numbers"), default="exact")
    args = parser.parse_args(argv)
    renames = [tuple(pair.split("=", 1)) for pair in args.rename]
    files_a, files_b = _files(args.baseline), _files(args.new)
    problems = [f"only in {args.baseline}: {rel}" for rel in sorted(files_a - files_b)]
    problems += [f"only in {args.new}: {rel}" for rel in sorted(files_b - files_a)]
    counts = {kind: 0 for kind in sorted(_KINDS)}
    masked: dict[str, int] = {}
    for rel in sorted(files_a & files_b):
        a = (args.baseline / rel).read_text(encoding="utf-8")
        b = (args.new / rel).read_text(encoding="utf-8")
        counts[rel.suffix] += 1
        if rel.suffix == ".csv":
            same = _rename_csv(a, renames) == b
        elif rel.suffix == ".json":
            same = _rename_json(a, renames) == b
        else:
            a, b = _rename_words(a, renames), b
            (a, n_a), (b, n_b) = _mask(a), _mask(b)
            masked[str(rel)] = n_b
            same = a == b if args.html == "exact" else _numbers(a) == _numbers(b)
            same = same and n_a == n_b
        if not same:
            problems.append(f"differs: {rel}")
    for kind, n in counts.items():
        print(f"{kind}: {n} files compared")
    for rel, n in masked.items():
        print(f"masked clock fields in {rel}: {n}")
    for line in problems:
        print(line)
    print("all outputs agree" if not problems else f"{len(problems)} difference(s)")
    return 1 if problems else 0


def _files(root: Path) -> set[Path]:
    found = set()
    for tree in _TREES:
        for path in (root / tree).rglob("*"):
            if path.is_file() and path.suffix in _KINDS:
                found.add(path.relative_to(root))
    return found


def _rename_words(text: str, renames: list[tuple[str, ...]]) -> str:
    for old, new in renames:
        text = re.sub(rf"\b{re.escape(old)}\b", new, text)
    return text


def _rename_csv(text: str, renames: list[tuple[str, ...]]) -> str:
    header, sep, rest = text.partition("\n")
    return _rename_words(header, renames) + sep + rest


def _rename_json(text: str, renames: list[tuple[str, ...]]) -> str:
    if not renames:
        return text
    table = dict(renames)

    def rename(obj: Any) -> Any:
        if isinstance(obj, dict):
            return {table.get(k, k): rename(v) for k, v in obj.items()}
        if isinstance(obj, list):
            return [rename(v) for v in obj]
        return obj

    # re-serialise the way the pipeline writes JSON (allolaw.io.write_json: indent 2, sorted)
    return json.dumps(rename(json.loads(text)), indent=2, sort_keys=True) + "\n"


def _mask(text: str) -> tuple[str, int]:
    total = 0
    for pattern in _CLOCKS:
        groups = pattern.groups
        repl = "".join(f"\\{i}#" for i in range(1, groups + 1)) if groups else "#"
        text, n = pattern.subn(repl, text)
        total += n
    return text, total


def _numbers(html: str) -> list[str]:
    text = re.sub(r"<[^>]+>", " ", html)
    return _NUMBER.findall(text)


if __name__ == "__main__":
    sys.exit(main())
