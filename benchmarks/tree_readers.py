"""Newick readers on one random 30,000-tip tree: parse + post-order traversal time, peak memory.

Each library runs in its own fresh Python process (so imports and caches do not mix): the
time is the best of three parses of the file plus one post-order walk collecting every node's
name and branch length; the memory is the peak of Python allocations (tracemalloc) during one
parse + walk, and the import time is measured once. The tree is invented (allolaw's seeded
random tree generator, polytomies and zero-length branches included).

Run: PYTHONPATH=src python benchmarks/tree_readers.py [n_tips]
"""

from __future__ import annotations

import json
import subprocess
import sys
import tempfile
from pathlib import Path

from allolaw.phylogeny.simulate import random_tree, write_newick

READERS = {
    "dendropy": (
        "import dendropy",
        "t = dendropy.Tree.get(path=PATH, schema='newick', preserve_underscores=True)\n"
        "out = [(n.taxon.label if n.taxon else n.label, n.edge.length) "
        "for n in t.postorder_node_iter()]",
    ),
    "ete3": (
        "from ete3 import Tree",
        "t = Tree(PATH, format=1)\n"
        "out = [(n.name, n.dist) for n in t.traverse('postorder')]",
    ),
    "Bio.Phylo": (
        "from Bio import Phylo",
        "t = Phylo.read(PATH, 'newick')\n"
        "out = [(c.name, c.branch_length) for c in t.find_clades(order='postorder')]",
    ),
    "treeswift": (
        "import treeswift",
        "t = treeswift.read_tree_newick(PATH)\n"
        "out = [(n.label, n.edge_length) for n in t.traverse_postorder()]",
    ),
    "newick": (
        "import newick",
        "t = newick.read(PATH)[0]\n"
        "out = [(n.name, n.length) for n in t.walk(mode='postorder')]",
    ),
}

CHILD = """
import json, sys, time, tracemalloc, importlib.metadata as md
PATH = sys.argv[1]
t0 = time.perf_counter()
{imp}
t_import = time.perf_counter() - t0
times = []
for _ in range(3):
    t0 = time.perf_counter()
{body}
    times.append(time.perf_counter() - t0)
n_nodes = len(out)
del t, out
tracemalloc.start()
{body0}
peak = tracemalloc.get_traced_memory()[1]
print(json.dumps({{"import": t_import, "best": min(times), "peak": peak, "nodes": n_nodes}}))
"""

DIST = {"Bio.Phylo": "biopython", "ete3": "ete3", "dendropy": "dendropy",
        "treeswift": "treeswift", "newick": "newick"}


def main() -> None:
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 30_000
    text = write_newick(random_tree(n, seed=2026), digits=10)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "tree.nwk"
        path.write_text(text)
        print(f"tree: {n} tips, {path.stat().st_size / 1e6:.2f} MB of Newick")
        print(f"{'reader':<11}{'version':>10}{'import s':>10}{'parse+walk s':>14}"
              f"{'peak MB':>9}{'nodes':>8}")
        for name, (imp, body) in READERS.items():
            indent = "\n".join("    " + line for line in body.splitlines())
            code = CHILD.format(imp=imp, body=indent, body0=body)
            run = subprocess.run([sys.executable, "-c", code, str(path)], capture_output=True,
                                 text=True, check=False)
            version = subprocess.run(
                [sys.executable, "-c",
                 f"import importlib.metadata as m; print(m.version({DIST[name]!r}))"],
                capture_output=True, text=True, check=False).stdout.strip()
            if run.returncode:
                print(f"{name:<11}{version:>10}  failed: {run.stderr.strip().splitlines()[-1]}")
                continue
            r = json.loads(run.stdout.strip().splitlines()[-1])
            print(f"{name:<11}{version:>10}{r['import']:>10.2f}{r['best']:>14.3f}"
                  f"{r['peak'] / 1e6:>9.1f}{r['nodes']:>8}")


if __name__ == "__main__":
    main()
