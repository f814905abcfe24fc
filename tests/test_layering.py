"""The package's layering: data flows one way through the steps, and no import cycle hides anywhere.

Every module of ``factorize`` is parsed (imports inside functions included, since a cycle hidden in a function
still ties the modules together). A module may import modules of its own layer or of a lower one; the graph
of imports must have no cycle. The order is the data flow of DEVELOPERS.md.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "factorize"

# lowest first; a module's layer is the first entry its dotted name starts with
LAYERS = (
    ("factorize.errors", "factorize._version", "factorize.storage", "factorize.threads", "factorize.default",
     "factorize.choices", "factorize.cluster", "factorize.execution"),
    ("factorize.model",),
    ("factorize.spectra", "factorize.rounding"),
    ("factorize.plan",),
    ("factorize.rewrite",),
    ("factorize.checkpoints",),  # file formats only: the out-of-core shrinks live in factorize.outofcore
    ("factorize.measure",),
    ("factorize.calibrated",),
    ("factorize.pipeline", "factorize.outofcore", "factorize.alternatives"),
    ("factorize.training",),
    ("factorize.cli", "factorize.__main__"),
)
TOP = len(LAYERS)  # the package root re-exports everything and sits above all


def _modules() -> dict[str, Path]:
    out = {}
    for path in PACKAGE.rglob("*.py"):
        parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out[".".join(parts)] = path
    return out


MODULES = _modules()


def _layer(module: str) -> int:
    if module == "factorize":
        return TOP
    for i, prefixes in enumerate(LAYERS):
        if any(module == p or module.startswith(p + ".") for p in prefixes):
            return i
    raise AssertionError(f"{module}: not in any layer; add it to LAYERS in tests/test_layering.py")


def _resolve(name: str) -> str | None:
    """The factorize module an imported dotted name lives in (the longest known prefix)."""
    while name:
        if name in MODULES:
            return name
        name = name.rpartition(".")[0]
    return None


def _imports(module: str) -> set[str]:
    tree = ast.parse(MODULES[module].read_text())
    package = module if MODULES[module].name == "__init__.py" else module.rpartition(".")[0]
    found = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:  # relative import
                anchor = package.split(".")[: len(package.split(".")) - node.level + 1]
                base = ".".join(anchor + ([base] if base else []))
            # "from factorize.x import y" may import the submodule factorize.x.y
            names = [f"{base}.{a.name}" if _resolve(f"{base}.{a.name}") == f"{base}.{a.name}" else base
                     for a in node.names]
        else:
            continue
        for name in names:
            target = _resolve(name) if name.startswith("factorize") else None
            if target is not None and target != module:
                found.add(target)
    return found


GRAPH = {m: _imports(m) for m in MODULES}


def test_every_module_has_a_layer():
    for m in MODULES:
        _layer(m)


@pytest.mark.parametrize("module", sorted(MODULES))
def test_no_import_from_a_higher_layer(module):
    # a package __init__ importing its own modules is how a step exposes its names: same layer, allowed
    upward = sorted(t for t in GRAPH[module] if _layer(t) > _layer(module))
    assert not upward, f"{module} (layer {_layer(module)}) imports higher layers: {upward}"


def test_no_import_cycle():
    # depth-first search for a back edge (Tarjan-style colouring), reporting the cycle found
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(m: str) -> list[str] | None:
        state[m] = 1
        stack.append(m)
        for t in sorted(GRAPH[m]):
            if state.get(t) == 1:
                return [*stack[stack.index(t):], t]
            if t not in state:
                cycle = visit(t)
                if cycle:
                    return cycle
        stack.pop()
        state[m] = 2
        return None

    for m in sorted(MODULES):
        if m not in state:
            cycle = visit(m)
            assert cycle is None, "import cycle: " + " -> ".join(cycle)


def test_the_checker_sees_imports_inside_functions(tmp_path):
    # the detector itself: an import placed inside a function is found (a check that could not fail is no check)
    src = "def f():\n    from factorize.cli import main\n    return main\n"
    tree = ast.parse(src)
    inner = [n for n in ast.walk(tree) if isinstance(n, ast.ImportFrom)]
    assert [n.module for n in inner] == ["factorize.cli"]
    assert _layer(_resolve("factorize.cli.main") or "") > _layer("factorize.model.sites")


def _private_imports(module: str) -> list[str]:
    """``from factorize.x import _name`` lines of ``module`` naming another module's private (underscore) name.

    A module (``factorize._version``) may be imported by its own underscore name; a name inside it may not."""
    found = []
    for node in ast.walk(ast.parse(MODULES[module].read_text())):
        if not isinstance(node, ast.ImportFrom) or node.level or not (node.module or "").startswith("factorize"):
            continue
        for alias in node.names:
            target = f"{node.module}.{alias.name}"
            if alias.name.startswith("_") and not alias.name.startswith("__") and _resolve(target) != target:
                found.append(f"line {node.lineno}: from {node.module} import {alias.name}")
    return found


@pytest.mark.parametrize("module", sorted(MODULES))
def test_no_import_of_another_modules_private_name(module):
    # a private name is its module's own business: a name two modules share gets a public name where it belongs
    found = _private_imports(module)
    assert not found, f"{module} imports private names of other modules: {found}"


def test_the_private_import_check_can_fail(tmp_path, monkeypatch):
    path = tmp_path / "probe.py"
    path.write_text("from factorize.storage import _hidden\nfrom factorize import _version\n")
    monkeypatch.setitem(MODULES, "factorize.probe", path)
    assert _private_imports("factorize.probe") == ["line 1: from factorize.storage import _hidden"]
