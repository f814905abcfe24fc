"""The top level: ``__all__`` is what the guides (README, docs, examples) teach, and the lazy table and the
type-checking imports agree.

``factorize/__init__.py`` loads its names on first use (PEP 562) from ``_EXPORTS`` (name -> module) and, for type
checkers, imports the same names eagerly under ``if TYPE_CHECKING:``. Nothing checks the second against the first
at run time, so this test does.
"""

from __future__ import annotations

import ast
import importlib
import re
from pathlib import Path

import pytest

import factorize

ROOT = Path(__file__).resolve().parents[1]
INIT = ROOT / "factorize" / "__init__.py"
GUIDES = [ROOT / "README.md", *sorted((ROOT / "docs").glob("*.md")), *sorted((ROOT / "examples").glob("*.py"))]


def _type_checking_imports() -> dict[str, str]:
    """name -> module of every import inside ``if TYPE_CHECKING:`` in factorize/__init__.py."""
    tree = ast.parse(INIT.read_text())
    blocks = [n for n in tree.body if isinstance(n, ast.If) and getattr(n.test, "id", None) == "TYPE_CHECKING"]
    assert len(blocks) == 1, "expected one `if TYPE_CHECKING:` block"
    found: dict[str, str] = {}
    for node in ast.walk(blocks[0]):
        if isinstance(node, ast.ImportFrom):
            for alias in node.names:
                assert alias.asname in (None, alias.name), f"{alias.name} imported as {alias.asname}"
                assert alias.name not in found, f"{alias.name} imported twice"
                found[alias.name] = node.module
    return found


def _taught() -> set[str]:
    """Names the guides use as ``factorize.<name>`` (sub-package paths such as factorize.model.x excluded)."""
    names = set()
    for path in GUIDES:
        names |= set(re.findall(r"\bfactorize\.([A-Za-z_]\w*)\b(?!\.\w)", path.read_text()))
    return names


@pytest.mark.parametrize("name", sorted(factorize.__all__))
def test_every_name_in_all_resolves(name):
    assert getattr(factorize, name) is not None
    assert name == "__version__" or name in factorize._EXPORTS


@pytest.mark.parametrize("name", sorted(factorize._EXPORTS))
def test_every_lazy_name_comes_from_the_module_it_names(name):
    module = factorize._EXPORTS[name]
    value = getattr(importlib.import_module(module), name)
    assert getattr(factorize, name) is value
    assert getattr(value, "__module__", module) == module, f"{name} is defined in {value.__module__}, not {module}"


def test_type_checking_imports_match_the_lazy_table():
    assert _type_checking_imports() == factorize._EXPORTS


def test_all_is_what_the_guides_teach():
    taught = _taught() & set(factorize._EXPORTS)
    assert taught, "the guides name no top-level function: the pattern no longer matches them"
    missing = taught - set(factorize.__all__)
    assert not missing, f"README/docs/examples teach factorize.<name> for {sorted(missing)}; add them to __all__"
    text = "\n".join(p.read_text() for p in GUIDES)
    untaught = [n for n in factorize.__all__ if n != "__version__" and not re.search(rf"\b{n}\b", text)]
    assert not untaught, f"__all__ lists {untaught}, which README.md, docs/*.md and examples/ never mention"


def test_dir_lists_all():
    assert set(factorize.__all__) <= set(dir(factorize))
