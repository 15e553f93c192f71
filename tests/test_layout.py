"""Rules the package layout keeps, checked by reading the source (ast), not by convention.

- no function in periodscan/ longer than 60 lines (common practice: a function a reader can
  hold in view; the project's own limit);
- no import of another module's private name (``from periodscan.x import _helper``);
- the design kind (``design.kind``, ``["kind"]`` of a design) is read only in periodscan/designs/;
- reading a finished sweep does not import torch.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "periodscan"
MAX_LINES = 60


def _sources():
    for path in sorted(PACKAGE.rglob("*.py")):
        yield path, ast.parse(path.read_text(), filename=str(path))


def long_functions() -> list[str]:
    out = []
    for path, tree in _sources():
        for node in ast.walk(tree):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                lines = node.end_lineno - node.lineno + 1
                if lines > MAX_LINES:
                    out.append(f"{path.relative_to(PACKAGE.parent)}:{node.lineno} "
                               f"{node.name} ({lines} lines)")
    return out


def private_imports() -> list[str]:
    out = []
    for path, tree in _sources():
        for node in ast.walk(tree):
            if isinstance(node, ast.ImportFrom) and (node.module or "").startswith("periodscan"):
                for alias in node.names:
                    if alias.name.startswith("_"):
                        out.append(f"{path.relative_to(PACKAGE.parent)}:{node.lineno} "
                                   f"{node.module}.{alias.name}")
    return out


def _reads_kind(node: ast.AST) -> bool:
    """``x.kind`` / ``x["kind"]`` / ``x.get("kind")`` where x mentions a design."""
    def mentions_design(expr: ast.AST) -> bool:
        return "design" in ast.unparse(expr).lower()

    if isinstance(node, ast.Attribute) and node.attr == "kind":
        return mentions_design(node.value)
    if isinstance(node, ast.Subscript) and isinstance(node.slice, ast.Constant):
        return node.slice.value == "kind" and mentions_design(node.value)
    if (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute)
            and node.func.attr == "get" and node.args
            and isinstance(node.args[0], ast.Constant) and node.args[0].value == "kind"):
        return mentions_design(node.func.value)
    return False


def design_kind_reads() -> list[str]:
    out = []
    for path, tree in _sources():
        if "designs" in path.relative_to(PACKAGE).parts:
            continue
        for node in ast.walk(tree):
            if _reads_kind(node):
                out.append(f"{path.relative_to(PACKAGE.parent)}:{node.lineno} "
                           f"{ast.unparse(node)}")
    return out


def test_no_function_over_60_lines():
    assert long_functions() == []


def test_no_import_of_private_names():
    assert private_imports() == []


def test_design_kind_is_read_only_in_designs():
    assert design_kind_reads() == []


def test_reading_api_does_not_import_torch():
    code = "import sys, periodscan.api; print('torch' in sys.modules, 'hydra' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.split()
    assert out == ["False", "False"]


if __name__ == "__main__":  # a quick scan: python tests/test_layout.py
    for title, found in (("functions over 60 lines", long_functions()),
                         ("private imports", private_imports()),
                         ("design-kind reads outside designs/", design_kind_reads())):
        print(f"{title}: {len(found)}")
        for line in found:
            print("  " + line)
