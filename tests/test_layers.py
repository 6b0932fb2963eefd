"""The import contract: layers one way, no cycles, no hidden or guarded imports of claimkit.

The layers are read from ``[tool.importlinter]`` in pyproject.toml (the same
contract ``lint-imports`` checks in CI), and every import statement of every
module is taken from its syntax tree, imports inside functions included, so
that a lazy import cannot hide a dependency that runs the wrong way.
"""

from __future__ import annotations

import ast
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "claimkit"

tomllib = pytest.importorskip("tomllib") if sys.version_info >= (3, 11) else None


def _modules() -> dict[str, Path]:
    out = {}
    for p in sorted(PACKAGE.rglob("*.py")):
        parts = list(p.relative_to(ROOT).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out[".".join(parts)] = p
    return out


MODULES = _modules()


def _resolve(name: str) -> str | None:
    """The claimkit module an import names (a package's ``__init__`` for a package)."""
    while name and name not in MODULES:
        name = name.rpartition(".")[0]
    return name or None


def _imports(path: Path, module: str) -> list[tuple[str, int, bool]]:
    """(imported claimkit module, line, inside a function) for every import in ``path``."""
    tree = ast.parse(path.read_text(), filename=str(path))
    package = module if path.name == "__init__.py" else module.rpartition(".")[0]
    out: list[tuple[str, int, bool]] = []

    def visit(node: ast.AST, in_function: bool) -> None:
        for child in ast.iter_child_nodes(node):
            nested = in_function or isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef,
                                                       ast.Lambda))
            names: list[str] = []
            if isinstance(child, ast.Import):
                names = [a.name for a in child.names]
            elif isinstance(child, ast.ImportFrom):
                base = child.module or ""
                if child.level:
                    anchor = package.split(".")
                    anchor = anchor[:len(anchor) - child.level + 1]
                    base = ".".join(anchor + ([base] if base else []))
                names = [f"{base}.{a.name}" for a in child.names] or [base]
            for n in names:
                if n == "claimkit" or n.startswith("claimkit."):
                    target = _resolve(n)
                    if target and target != "claimkit" and target != module:
                        out.append((target, child.lineno, in_function))
            visit(child, nested)

    visit(tree, False)
    return out


GRAPH = {m: _imports(p, m) for m, p in MODULES.items()}


def _layers() -> list[tuple[list[str], bool]]:
    data = tomllib.loads((ROOT / "pyproject.toml").read_text())
    contract = next(c for c in data["tool"]["importlinter"]["contracts"] if c["type"] == "layers")
    out = []
    for entry in contract["layers"]:
        independent = "|" in entry
        names = [n.strip().strip("()") for n in entry.replace(":", "|").split("|")]
        out.append((names, independent))
    return out


def _place(module: str, layers) -> tuple[int, str] | None:
    for i, (names, _) in enumerate(layers):
        for n in names:
            if module == n or module.startswith(n + "."):
                return i, n
    return None


def test_every_module_has_a_layer():
    layers = _layers()
    missing = [m for m in MODULES if m != "claimkit" and _place(m, layers) is None]
    assert not missing, f"modules outside the layer contract in pyproject.toml: {missing}"


def test_imports_run_down_the_layers_only():
    layers = _layers()
    bad = []
    for module, imports in GRAPH.items():
        here = _place(module, layers)
        if here is None:
            continue
        for target, line, _ in imports:
            there = _place(target, layers)
            if there is None:
                continue
            if there[0] < here[0]:
                bad.append(f"{module}:{line} imports {target}, a higher layer")
            elif there[0] == here[0] and there[1] != here[1] and layers[here[0]][1]:
                bad.append(f"{module}:{line} imports {target}, an independent sibling")
    assert not bad, "\n".join(bad)


def test_no_import_cycles_between_modules():
    # Tarjan's strongly connected components over every import, those in functions too.
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on: set[str] = set()
    cycles: list[list[str]] = []

    def strong(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on.add(v)
        for w, _, _ in GRAPH.get(v, []):
            if w not in index:
                strong(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                cycles.append(sorted(comp))

    sys.setrecursionlimit(max(sys.getrecursionlimit(), 10000))
    for v in GRAPH:
        if v not in index:
            strong(v)
    assert not cycles, f"import cycles: {cycles}"


def test_nothing_outside_the_command_line_imports_it():
    bad = [f"{m}:{line}" for m, imports in GRAPH.items()
           if not m.startswith(("claimkit.cli", "claimkit.__main__"))
           for target, line, _ in imports if target.startswith("claimkit.cli")]
    assert not bad


def test_no_claimkit_imports_inside_functions_below_the_command_line():
    # The command line may import lazily (start-up time of `claimkit --help`); no one else.
    bad = [f"{m}:{line} imports {t} inside a function" for m, imports in GRAPH.items()
           if not m.startswith("claimkit.cli") for t, line, inside in imports if inside]
    assert not bad, "\n".join(bad)


def test_no_import_error_guard_around_claimkit():
    bad = []
    for module, path in MODULES.items():
        for node in ast.walk(ast.parse(path.read_text())):
            if not isinstance(node, ast.Try):
                continue
            caught = {getattr(h.type, "id", None) for h in node.handlers}
            for h in node.handlers:
                if isinstance(h.type, ast.Tuple):
                    caught |= {getattr(e, "id", None) for e in h.type.elts}
            if not caught & {"ImportError", "ModuleNotFoundError"}:
                continue
            for stmt in ast.walk(ast.Module(body=node.body, type_ignores=[])):
                name = (stmt.module if isinstance(stmt, ast.ImportFrom) else
                        stmt.names[0].name if isinstance(stmt, ast.Import) else None)
                if name and (name == "claimkit" or name.startswith("claimkit.")):
                    bad.append(f"{module}:{stmt.lineno}")
    assert not bad, f"claimkit imports behind an ImportError guard: {bad}"


def test_the_check_sees_a_wrong_way_import(tmp_path):
    # The graph reader itself: an import inside a function is found and placed.
    p = tmp_path / "probe.py"
    p.write_text("def f():\n    from claimkit.cli import main\n")
    got = _imports(p, "claimkit.mark.probe")
    assert got == [("claimkit.cli", 2, True)]
    assert _place("claimkit.cli", _layers())[0] < _place("claimkit.mark.detect", _layers())[0]


def test_every_package_is_installed():
    # setuptools installs only the packages pyproject.toml lists: a new one must be added there.
    listed = set(tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
                 ["packages"])
    found = {".".join(p.parent.relative_to(ROOT).parts) for p in PACKAGE.rglob("__init__.py")}
    assert found <= listed, f"packages missing from pyproject.toml: {sorted(found - listed)}"


def test_the_registry_owns_every_sql_statement():
    bad = []
    for module, path in MODULES.items():
        if module == "claimkit.evidence.registry":
            continue
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.Attribute) and node.attr in ("execute", "executemany",
                                                                 "executescript"):
                bad.append(f"{module}:{node.lineno}")
    assert not bad, f"SQL outside claimkit/evidence/registry.py: {bad}"
