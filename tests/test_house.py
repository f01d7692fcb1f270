"""The house rules a newcomer relies on, checked on the source itself.

- No function in ``pipeprobe/`` is longer than 80 lines of code (docstrings,
  comments and blank lines not counted): a long algorithm is a short top
  function calling named steps.
- The layer table in DEVELOPERS.md is the real import graph: every module is
  in exactly one layer, and no module imports one from a higher layer.
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
PACKAGE = ROOT / "pipeprobe"
MAX_CODE_LINES = 80


def _modules() -> list[Path]:
    return sorted(PACKAGE.rglob("*.py"))


def _code_lines(node: ast.AST) -> int:
    """Lines holding code in a function, its docstring and comments left out."""
    body = list(node.body)
    if body and isinstance(body[0], ast.Expr) and isinstance(getattr(body[0], "value", None), ast.Constant):
        body = body[1:]
    lines: set[int] = set()
    for stmt in body:
        for sub in ast.walk(stmt):
            if isinstance(sub, ast.Constant) and isinstance(sub.value, str):
                continue
            if hasattr(sub, "lineno"):
                lines.add(sub.lineno)
    return len(lines)


def _long_functions() -> list[str]:
    found = []
    for path in _modules():
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                n = _code_lines(node)
                if n > MAX_CODE_LINES:
                    found.append(f"{path.relative_to(ROOT)}:{node.lineno} {node.name} ({n} lines)")
    return found


def test_no_function_longer_than_80_lines_of_code():
    """A newcomer can read any function at once (house style: short top functions over named steps)."""
    assert [] == _long_functions()


# --- the layer table -------------------------------------------------------------------------

def _layer_table() -> list[tuple[str, list[str]]]:
    """Rows of DEVELOPERS.md's layer table, lowest layer first: (layer, module patterns)."""
    text = (ROOT / "DEVELOPERS.md").read_text()
    section = text.split("## Layout and layers", 1)[1].split("\n## ", 1)[0]
    rows = []
    for line in section.splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if len(cells) != 2 or cells[0] in ("layer", "") or set(cells[0]) <= set("-: "):
            continue
        rows.append((cells[0], re.findall(r"`([\w/]+(?:\.py|/))`", cells[1])))
    return rows


def _module_name(path: Path) -> str:
    rel = path.relative_to(PACKAGE).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(["pipeprobe", *parts])


def _layer_of(path: Path, rows: list[tuple[str, list[str]]]) -> list[int]:
    """Rows naming the module; a file named exactly wins over a folder holding it."""
    rel = path.relative_to(PACKAGE).as_posix()
    exact = [i for i, (_, patterns) in enumerate(rows) if rel in patterns]
    if exact:
        return exact
    return [i for i, (_, patterns) in enumerate(rows)
            if any(pat.endswith("/") and rel.startswith(pat) for pat in patterns)]


def _is_type_checking(test: ast.expr) -> bool:
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING"
    )


def _runtime_imports(path: Path) -> set[str]:
    """Absolute names of pipeprobe modules that ``path`` imports at run time (not under TYPE_CHECKING)."""
    tree = ast.parse(path.read_text())
    skip: set[int] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.If) and _is_type_checking(node.test):
            skip.update(id(sub) for stmt in node.body for sub in ast.walk(stmt))
    package = _module_name(path) if path.name == "__init__.py" else _module_name(path).rsplit(".", 1)[0]
    names: set[str] = set()
    for node in ast.walk(tree):
        if id(node) in skip:
            continue
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - (node.level - 1)]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            if mod.startswith("pipeprobe"):
                names.add(mod)
                names.update(f"{mod}.{a.name}" for a in node.names)
        elif isinstance(node, ast.Import):
            names.update(a.name for a in node.names if a.name.startswith("pipeprobe"))
    return names


def _files_by_module() -> dict[str, Path]:
    return {_module_name(p): p for p in _modules()}


def test_every_module_is_in_exactly_one_layer():
    """DEVELOPERS.md's layer table names every module of the package once (it cannot drift from the files)."""
    rows = _layer_table()
    assert rows, "no layer table found in DEVELOPERS.md"
    misplaced = {
        str(p.relative_to(PACKAGE)): [rows[i][0] for i in _layer_of(p, rows)]
        for p in _modules()
        if len(_layer_of(p, rows)) != 1
    }
    assert {} == misplaced


def test_no_module_imports_a_higher_layer():
    """Dependencies point one way, as DEVELOPERS.md's layer table says (house style: layers you can see)."""
    rows = _layer_table()
    files = _files_by_module()
    upward = []
    for path in _modules():
        mine = _layer_of(path, rows)
        if len(mine) != 1:
            continue
        for name in sorted(_runtime_imports(path)):
            target = files.get(name)
            if target is None or name == "pipeprobe":  # the package root is imported by every submodule anyway
                continue
            theirs = _layer_of(target, rows)
            if len(theirs) == 1 and theirs[0] > mine[0]:
                upward.append(
                    f"{path.relative_to(PACKAGE)} ({rows[mine[0]][0]}) imports "
                    f"{target.relative_to(PACKAGE)} ({rows[theirs[0]][0]})"
                )
    assert [] == upward


@pytest.mark.parametrize("source,expected", [
    ("def f():\n    '''doc\n    more'''\n    a = 1\n    # note\n\n    return a\n", 2),
    ("def f():\n    return (1,\n            2)\n", 2),
])
def test_code_line_count_leaves_out_docstrings_comments_and_blanks(source, expected):
    """The 80-line rule counts code only (common practice for function-length limits)."""
    fn = ast.parse(source).body[0]
    assert expected == _code_lines(fn)
