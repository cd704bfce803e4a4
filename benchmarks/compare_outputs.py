"""Compare the outputs of two batch runs: ``results/`` and ``reports/`` of two working trees.

Usage::

    python benchmarks/compare_outputs.py BASELINE_DIR NEW_DIR [--rename OLD=NEW ...]
        [--rename-key OLD=NEW ...] [--offset COLUMN=N ...] [--html exact|numbers] [--loose-text]
        [--changed GLOB ...]

Every CSV and JSON file must be byte for byte the same. Every HTML page must be the same apart
from what a clock writes: the generation time (``YYYY-MM-DD HH:MM UTC``) and the run times the
pages quote (fit wall time, this page's render time, the Snakemake benchmark figures of the
index and of each page's footer); those are masked before the comparison, and the script prints
how many it masked per page. ``posterior.nc`` files are not compared here (their attributes hold
run times; ``tests/workflow_runs.py`` compares their draws).

For a change that renames columns or keys but must leave every number as it was:
``--rename OLD=NEW`` (repeatable) renames the baseline's CSV header cells and HTML table columns
(``<th>``, ``data-col``, ``<code>``) before comparing, ``--rename-key OLD=NEW`` its JSON
keys; ``--offset COLUMN=N`` adds N to the baseline's integer column COLUMN (after renaming; CSV
and HTML tables), for a count that now starts at 1; ``--loose-text`` compares JSON strings by
the numbers in them only (reworded sentences); ``--html numbers`` compares only the numbers in
each page's text, and prints each run of numbers that differs with the words around it.
``--changed GLOB`` (repeatable; matched against the path below the tree, e.g.
``results/*/breakpoint.json``) names files whose content changes on purpose (new verdicts, new
fits): they are listed and not compared, and may exist in one tree only; every other file is
compared as above. Exits 1 when anything else differs.
"""

from __future__ import annotations

import argparse
import csv
import difflib
import fnmatch
import io
import json
import re
import sys
from html import unescape
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
_HASH = re.compile(r"\b[0-9a-f]{16,}\b")
_NUMBER = re.compile(r"[-−]?\d+(?:[.,]\d+)*(?:[eE][-+]?\d+)?")


def main(argv: list[str] | None = None) -> int:
    """Compare two trees; print one line per difference and a summary; 0 when all agree."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("baseline", type=Path)
    parser.add_argument("new", type=Path)
    parser.add_argument("--rename", action="append", default=[], metavar="OLD=NEW")
    parser.add_argument("--rename-key", action="append", default=[], metavar="OLD=NEW")
    parser.add_argument("--offset", action="append", default=[], metavar="COLUMN=N")
    parser.add_argument("--html", choices=("exact", "numbers"), default="exact")
    parser.add_argument("--loose-text", action="store_true")
    parser.add_argument("--changed", action="append", default=[], metavar="GLOB")
    args = parser.parse_args(argv)
    renames = [tuple(pair.split("=", 1)) for pair in args.rename]
    key_renames = [tuple(pair.split("=", 1)) for pair in args.rename_key]
    offsets = {k: int(v) for k, v in (pair.split("=", 1) for pair in args.offset)}
    files_a, files_b = _files(args.baseline), _files(args.new)
    changed = {rel for rel in files_a | files_b
               if any(rel.match(pattern) or fnmatch.fnmatch(str(rel), pattern)
                      for pattern in args.changed)}
    for rel in sorted(changed):
        print(f"changed on purpose, not compared: {rel}")
    files_a, files_b = files_a - changed, files_b - changed
    problems = [f"only in {args.baseline}: {rel}" for rel in sorted(files_a - files_b)]
    problems += [f"only in {args.new}: {rel}" for rel in sorted(files_b - files_a)]
    counts = {kind: 0 for kind in sorted(_KINDS)}
    masked: dict[str, int] = {}
    for rel in sorted(files_a & files_b):
        a = (args.baseline / rel).read_text(encoding="utf-8")
        b = (args.new / rel).read_text(encoding="utf-8")
        counts[rel.suffix] += 1
        if rel.suffix == ".csv":
            same = _rename_csv(a, renames, offsets) == b
        elif rel.suffix == ".json":
            a = _rename_json(a, key_renames)
            same = a == b if not args.loose_text else _loose(json.loads(a)) == _loose(json.loads(b))
        else:
            a = _rename_html(a, renames, offsets)
            (a, n_a), (b, n_b) = _mask(a), _mask(b)
            masked[str(rel)] = n_b
            if args.html == "exact":
                same = a == b
            else:
                same = _numbers(a) == _numbers(b)
                if not same:
                    for line in _number_diff(a, b):
                        print(f"{rel}: {line}")
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


def _rename_csv(text: str, renames: list[tuple[str, ...]], offsets: dict[str, int]) -> str:
    if not renames and not offsets:
        return text
    table = dict(renames)
    lines = text.split("\n")
    header = [table.get(cell, cell) for cell in lines[0].split(",")]
    shift = {header.index(col): n for col, n in offsets.items() if col in header}
    out = [",".join(header)]
    for line in lines[1:]:
        cells = next(csv.reader([line])) if line else []
        for i, n in shift.items():
            if i < len(cells) and cells[i].strip():
                cells[i] = str(int(cells[i]) + n)
        buf = io.StringIO()
        csv.writer(buf, lineterminator="").writerow(cells)
        out.append(buf.getvalue() if line else "")
    return "\n".join(out)


def _rename_html(text: str, renames: list[tuple[str, ...]], offsets: dict[str, int]) -> str:
    for old, new in renames:
        for pattern in (r'data-col="{}"', r"<th>{}</th>", r"<code>{}</code>"):
            text = text.replace(pattern.format(old), pattern.format(new))
    for col, n in offsets.items():
        text = re.sub(rf'(data-col="{re.escape(col)}" class="num">)(-?\d+)(<)',
                      lambda m, n=n: f"{m[1]}{int(m[2]) + n}{m[3]}", text)
    return text


def _loose(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {k: _loose(v) for k, v in obj.items()}
    if isinstance(obj, list):
        return [_loose(v) for v in obj]
    if isinstance(obj, str):
        return tuple(_NUMBER.findall(obj))
    return obj


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
    return _NUMBER.findall(_text(html))


def _text(html: str) -> str:
    # the page's words: tags dropped, entities decoded, hashes (hex runs of 16+) left out
    return _HASH.sub(" ", unescape(re.sub(r"<[^>]+>", " ", html)))


def _number_diff(a: str, b: str) -> list[str]:
    # each run of numbers that differs, with the words after it on either side
    ta, tb = _text(a), _text(b)
    ma, mb = list(_NUMBER.finditer(ta)), list(_NUMBER.finditer(tb))
    matcher = difflib.SequenceMatcher(a=[m[0] for m in ma], b=[m[0] for m in mb],
                                      autojunk=False)
    out = []
    for op, i1, i2, j1, j2 in matcher.get_opcodes():
        if op == "equal":
            continue
        ctx_a = [" ".join(ta[m.start():m.end() + 50].split()) for m in ma[i1:i2]]
        ctx_b = [" ".join(tb[m.start():m.end() + 50].split()) for m in mb[j1:j2]]
        out.append(f"{op}: baseline {ctx_a} -> new {ctx_b}")
    return out


if __name__ == "__main__":
    sys.exit(main())
