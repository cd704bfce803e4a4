"""Module and function sizes of the package: what exceeds ~400 lines a module, ~80 a function.

Usage: ``python benchmarks/code_sizes.py [src/allolaw]``. A function's size is counted twice:
all its lines, and its lines without the docstring (the code a reader follows). Prints the
modules and functions over the limits; exits 0 (a list to read, not a verdict).
"""

from __future__ import annotations

import ast
import sys
from pathlib import Path

MODULE_MAX = 400
FUNCTION_MAX = 80


def main(root: str = "src/allolaw") -> None:
    """Print the modules over :data:`MODULE_MAX` lines and functions over :data:`FUNCTION_MAX`."""
    for path in sorted(Path(root).rglob("*.py")):
        text = path.read_text(encoding="utf-8")
        n_lines = len(text.splitlines())
        if n_lines > MODULE_MAX:
            print(f"module {path}: {n_lines} lines")
        for node in ast.walk(ast.parse(text)):
            if not isinstance(node, ast.FunctionDef | ast.AsyncFunctionDef):
                continue
            total = node.end_lineno - node.lineno + 1
            doc = 0
            first = node.body[0]
            if isinstance(first, ast.Expr) and isinstance(first.value, ast.Constant) \
                    and isinstance(first.value.value, str):
                doc = first.end_lineno - first.lineno + 1
            if total > FUNCTION_MAX:
                print(f"function {path}:{node.lineno} {node.name}: {total} lines, "
                      f"{total - doc} without the docstring")


if __name__ == "__main__":
    main(*sys.argv[1:])
