"""Recipes: a compression policy written down in a TOML file, so it can be reviewed, versioned and reused.

Keys (all optional except ``[policy]``; unknown keys are errors, so a typo never passes silently)::

    recipe = 1                      # recipe format version
    description = "..."             # free text, shown in reports
    calibration = "..."             # the calibration inputs the recipe needs for good results (a warning without)
    include = ["glob", ...]         # only layers whose qualified name matches one of these are considered
    exclude = ["glob", ...]         # layers matching any of these are never factored
    method = "exact"                # "auto", "exact" (LAPACK SVD), "gram" or "randomized" (Halko et al. 2011);
                                    # left out: the library default (compress's "auto")
    multiple = 1                    # round ranks to a multiple of this (8 or 16 suit fast kernels)
    cost = "params"                 # what budget counts: "params" or "macs"

    [policy]                        # exactly one of:
    budget = 0.5                    #   the selected layers together keep this fraction of their parameters
    # rank = 64                     #   the same rank everywhere
    # energy = 0.95                 #   per layer, the smallest rank keeping this fraction of sum(s^2)
    # keep = 0.5                    #   every layer keeps this fraction of its own parameters

    [[layer]]                       # per-pattern exceptions, first match wins
    match = "glob"                  #   qualified module name pattern (fnmatch rules: * also crosses dots)
    dense = true                    #   or rank = N / energy = t / keep = f

Command-line options given next to ``--recipe`` win over the recipe's values. TOML is read with ``tomllib``
(Python 3.11+) or ``tomli`` (3.10).
"""

from __future__ import annotations

import os
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from factorize.errors import FactorizeError
from factorize.plan.policy import POLICY_KEYS, Override, Policy
from factorize.spectra.decompose import METHODS

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib

RECIPE_VERSION = 1
TOP_KEYS = ("recipe", "description", "calibration", "include", "exclude", "method", "multiple", "cost", "policy",
            "layer")
LAYER_KEYS = ("match", "rank", "energy", "keep", "dense")
# shipped as package data (recipes/ at the top of a checkout links here)
RECIPES_DIR = Path(__file__).resolve().parents[1] / "recipes"


@dataclass
class Recipe:
    """A parsed recipe: everything :func:`factorize.compress` needs besides the model."""

    source: str  # file name, for messages
    description: str = ""
    calibration: str = ""  # what calibration inputs the recipe needs to give good results ("" when none)
    include: list[str] | None = None
    exclude: list[str] | None = None
    method: str | None = None  # None: the library default (see factorize.compress)
    multiple: int = 1
    cost: str = "params"
    policy: dict[str, float | int] = field(default_factory=dict)  # exactly one of rank, energy, keep, budget
    overrides: list[Override] = field(default_factory=list)

    def compress_kwargs(self) -> dict[str, Any]:
        """Keyword arguments for :func:`factorize.compress` (no ``method`` when the recipe names none, so the
        library's default applies)."""
        kwargs = {
            **self.policy,
            "include": self.include,
            "exclude": self.exclude,
            "multiple": self.multiple,
            "cost": self.cost,
            "overrides": list(self.overrides),
        }
        if self.method is not None:
            kwargs["method"] = self.method
        return kwargs


def load_recipe(path: str | os.PathLike) -> Recipe:
    """Read and validate a recipe file; every problem is listed in one :class:`FactorizeError`."""
    p = Path(path)
    if not p.exists() and p.parent == Path(".") and (RECIPES_DIR / p.name).is_file():
        p = RECIPES_DIR / p.name  # a bare name like "bert-encoder.toml" finds the shipped recipe
    if not p.is_file():
        raise FactorizeError(f"{p}: no such recipe file", fix="check the --recipe path, or name a shipped recipe: "
                             + ", ".join(r.name for r in shipped_recipes()))
    try:
        data = tomllib.loads(p.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError) as err:
        raise FactorizeError(f"{p}: cannot read the recipe ({err})", fix="check the file and its permissions") from None
    except tomllib.TOMLDecodeError as err:
        raise FactorizeError(f"{p}: not valid TOML ({err})", fix="fix the syntax at the position given") from None
    return parse_recipe(data, source=str(p))


def parse_recipe(data: dict[str, Any], *, source: str = "recipe") -> Recipe:
    """Validate a recipe already parsed into a dict."""
    problems: list[str] = []
    problems += [f"unknown key {k!r} (known: {', '.join(TOP_KEYS)})" for k in data if k not in TOP_KEYS]
    version = data.get("recipe", RECIPE_VERSION)
    if version != RECIPE_VERSION:
        problems.append(f"recipe = {version!r}: this factorize reads recipe version {RECIPE_VERSION}")
    recipe = Recipe(source=source)
    recipe.description = _typed(data, "description", str, "", problems)
    recipe.calibration = _typed(data, "calibration", str, "", problems)
    recipe.include = _patterns(data, "include", problems)
    recipe.exclude = _patterns(data, "exclude", problems)
    recipe.method = _typed(data, "method", str, None, problems) if "method" in data else None
    if recipe.method is not None and recipe.method not in METHODS:
        problems.append(f"method = {recipe.method!r}: use one of {', '.join(METHODS)}")
    recipe.multiple = _typed(data, "multiple", int, 1, problems)
    recipe.cost = _typed(data, "cost", str, "params", problems)
    recipe.policy = _policy(data.get("policy"), problems)
    layers = _layers(data.get("layer", []), problems)
    if not problems:
        try:  # the core's own validation (fractions in (0, 1], ranks >= 1, one rule per override)
            policy = Policy.from_keywords(**recipe.policy, multiple=recipe.multiple, cost=recipe.cost,
                                          overrides=layers)
            recipe.overrides = list(policy.overrides)
        except FactorizeError as err:
            problems += err.problems or [str(err).splitlines()[0]]
    if problems:
        raise FactorizeError(f"{source}: invalid recipe", problems,
                             fix="see the key list at the top of any shipped recipe (recipes/*.toml)")
    return recipe


def _typed(data: dict, key: str, kind: type, default: Any, problems: list[str]) -> Any:
    value = data.get(key, default)
    if not isinstance(value, kind) or (kind is int and isinstance(value, bool)):
        problems.append(f"{key} must be {'an integer' if kind is int else 'a string'}, got {value!r}")
        return default
    return value


def _patterns(data: dict, key: str, problems: list[str]) -> list[str] | None:
    value = data.get(key)
    if value is None:
        return None
    if isinstance(value, str):
        value = [value]
    if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
        problems.append(f"{key} must be a list of glob strings, got {value!r}")
        return None
    return value


def _policy(value: Any, problems: list[str]) -> dict:
    if not isinstance(value, dict):
        problems.append("[policy] is missing: set exactly one of budget, rank, energy, keep")
        return {}
    unknown = [k for k in value if k not in POLICY_KEYS]
    problems += [f"[policy] unknown key {k!r} (known: {', '.join(POLICY_KEYS)})" for k in unknown]
    given = {k: v for k, v in value.items() if k in POLICY_KEYS}
    if len(given) != 1:
        problems.append(f"[policy] must set exactly one of {', '.join(POLICY_KEYS)}, got {len(given)}")
    return given


def _layers(value: Any, problems: list[str]) -> list[dict]:
    """The [[layer]] tables as override mappings (``match`` becomes ``pattern``) for :meth:`Policy.from_keywords`."""
    if not isinstance(value, list):
        problems.append("[[layer]] entries must be an array of tables")
        return []
    out = []
    for i, entry in enumerate(value):
        where = f"[[layer]] #{i + 1}"
        if not isinstance(entry, dict) or not isinstance(entry.get("match"), str):
            problems.append(f"{where}: needs match = \"glob\"")
            continue
        unknown = [k for k in entry if k not in LAYER_KEYS]
        problems += [f"{where} ({entry['match']!r}): unknown key {k!r} (known: {', '.join(LAYER_KEYS)})"
                     for k in unknown]
        if "dense" in entry and entry["dense"] is not True:
            problems.append(f"{where} ({entry['match']!r}): dense must be true when given")
        out.append({"pattern": entry["match"], "rank": entry.get("rank"), "energy": entry.get("energy"),
                    "keep": entry.get("keep"), "dense": entry.get("dense") is True})
    return out


def shipped_recipes() -> list[Path]:
    """The recipes that ship in ``recipes/`` (in a source checkout)."""
    return sorted(RECIPES_DIR.glob("*.toml"))
