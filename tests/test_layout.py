"""The package's shape: stages on floors, imports only downward, no import circle.

Floors (docs/architecture.md): cli -> api -> run -> calib/sim/plots -> io/measure/series -> base modules.
A module may import modules of its own subpackage and of any lower floor, nothing on its own floor
elsewhere and nothing above.  Imports inside functions count too: a lazy import is still a dependency.
"""

from __future__ import annotations

import ast
import os

import pytest

import lineshift

PKG_DIR = os.path.dirname(lineshift.__file__)

#: Unit (subpackage or base module) -> floor.  Higher floors may import lower ones.
FLOORS = {
    "_version": 0, "_offline": 0, "model": 0, "errors": 0, "linefit": 0,
    "__init__": 1, "io": 1, "measure": 1, "series": 1,
    "calib": 2, "sim": 2, "plots": 2,
    "run": 3, "report": 3,
    "api": 4,
    "cli": 5,
    "__main__": 6,
}


def _modules() -> dict[str, str]:
    """Dotted module name -> file path, for every module of the package."""
    out = {}
    for dirpath, _dirs, files in os.walk(PKG_DIR):
        for f in files:
            if not f.endswith(".py"):
                continue
            rel = os.path.relpath(os.path.join(dirpath, f), PKG_DIR)[:-3].split(os.sep)
            if rel[-1] == "__init__":
                rel = rel[:-1]
            out[".".join(["lineshift", *rel])] = os.path.join(dirpath, f)
    return out


def _imports(name: str, path: str, known: set[str]) -> set[str]:
    """Package modules imported anywhere in the file (relative imports resolved)."""
    with open(path, encoding="utf-8") as fh:
        tree = ast.parse(fh.read(), path)
    is_pkg = path.endswith("__init__.py")
    base = name.split(".") if is_pkg else name.split(".")[:-1]
    found = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            cands = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                mod = ".".join(base[: len(base) - node.level + 1] + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            # "from pkg import sub" depends on the submodule; "from pkg import name" on pkg itself
            cands = [f"{mod}.{a.name}" if f"{mod}.{a.name}" in known else mod for a in node.names]
        else:
            continue
        for c in cands:
            if c in known:
                found.add(c)
    found.discard(name)
    return found


def _unit(module: str) -> str:
    parts = module.split(".")
    return "__init__" if len(parts) == 1 else parts[1]


def _graph():
    mods = _modules()
    return {m: _imports(m, p, set(mods)) for m, p in mods.items()}


def test_every_unit_has_a_floor():
    units = {_unit(m) for m in _modules()}
    assert units <= set(FLOORS), f"modules on no floor: {sorted(units - set(FLOORS))}"


def test_imports_only_go_down():
    bad = []
    for mod, deps in _graph().items():
        u = _unit(mod)
        for d in deps:
            v = _unit(d)
            if d == "lineshift":  # the package itself: only its version/offline setup, floor 0
                continue
            if v != u and FLOORS[v] >= FLOORS[u]:
                bad.append(f"{mod} -> {d}")
    assert not bad, "imports that go up or sideways:\n" + "\n".join(sorted(bad))


def test_no_import_circle():
    graph = _graph()
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(m):
        state[m] = 1
        stack.append(m)
        for d in graph.get(m, ()):
            if state.get(d) == 1:
                pytest.fail("import circle: " + " -> ".join([*stack[stack.index(d):], d]))
            if d not in state:
                visit(d)
        stack.pop()
        state[m] = 2

    for m in graph:
        if m not in state:
            visit(m)


def test_each_subpackage_says_what_it_holds_and_may_import():
    for unit in FLOORS:
        init = os.path.join(PKG_DIR, unit, "__init__.py")
        if not os.path.isfile(init):
            continue
        with open(init, encoding="utf-8") as fh:
            doc = ast.get_docstring(ast.parse(fh.read())) or ""
        assert doc and "import" in doc, f"lineshift.{unit} has no docstring saying what it may import"


def test_checker_sees_an_upward_import(tmp_path):
    """The walker itself: a relative import written in a file is resolved and found (not a test that cannot fail)."""
    f = tmp_path / "mod.py"
    f.write_text("def g():\n    from ..run import pipeline\n")
    deps = _imports("lineshift.measure.mod", str(f), {"lineshift.run", "lineshift.run.pipeline"})
    assert deps == {"lineshift.run.pipeline"}
