"""Size limits of the source (issue #14): no function over 80 lines, no module over 600.

    python tests/benchmarks/code_sizes.py [--functions 80] [--modules 600] [SRC]

Counts physical lines, docstrings and comments included, as a reader scrolls them: a
function from its ``def`` (decorators included) to its last line, a module from its first line
to its last. Prints every item over a limit and exits 1 if there is any; ``tests/test_code_sizes.py``
runs it in the suite.
"""

from __future__ import annotations

import argparse
import ast
import sys
from dataclasses import dataclass
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
MAX_FUNCTION_LINES = 80
MAX_MODULE_LINES = 600


@dataclass(frozen=True)
class Oversize:
    path: str
    name: str  # "" for the module itself
    lines: int
    limit: int

    def __str__(self) -> str:
        what = f"{self.path}: {self.name}()" if self.name else f"{self.path} (module)"
        return f"{what} has {self.lines} lines (limit {self.limit})"


def _functions(tree: ast.AST, prefix: str = ""):
    for node in ast.iter_child_nodes(tree):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
            start = min([node.lineno] + [d.lineno for d in node.decorator_list])
            yield f"{prefix}{node.name}", node.end_lineno - start + 1
            yield from _functions(node, f"{prefix}{node.name}.")
        elif isinstance(node, ast.ClassDef):
            yield from _functions(node, f"{prefix}{node.name}.")


def oversize(src: Path, *, max_function_lines: int = MAX_FUNCTION_LINES,
             max_module_lines: int = MAX_MODULE_LINES) -> list[Oversize]:
    """Every module and function under ``src`` longer than its limit."""
    out = []
    for path in sorted(src.rglob("*.py")):
        text = path.read_text(encoding="utf-8")
        rel = str(path.relative_to(src.parent if src.name != "src" else src))
        n_lines = len(text.splitlines())
        if n_lines > max_module_lines:
            out.append(Oversize(rel, "", n_lines, max_module_lines))
        for name, lines in _functions(ast.parse(text, filename=str(path))):
            if lines > max_function_lines:
                out.append(Oversize(rel, name, lines, max_function_lines))
    return out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("src", nargs="?", type=Path, default=ROOT / "src")
    parser.add_argument("--functions", type=int, default=MAX_FUNCTION_LINES)
    parser.add_argument("--modules", type=int, default=MAX_MODULE_LINES)
    args = parser.parse_args(argv)
    found = oversize(args.src, max_function_lines=args.functions, max_module_lines=args.modules)
    for item in found:
        print(item)
    print(f"{len(found)} over the limits" if found else "all functions and modules within the limits")
    return 1 if found else 0


if __name__ == "__main__":
    sys.exit(main())
