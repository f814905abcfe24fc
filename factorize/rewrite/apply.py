"""Apply a plan to a model (swap in factored layers) and merge factored layers back (see
:mod:`factorize.rewrite.layers` for the two forms and how the original classes come back)."""

from __future__ import annotations

import copy
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import torch
from torch import nn

from factorize.errors import FactorizeError
from factorize.model.sites import (
    KINDS,
    Site,
    WalkResult,
    get_module,
    matrix_of,
    set_module,
    walk,
)
from factorize.plan.ranks import (
    PLAN_FORMAT,
    PLAN_VERSION,
    plan_summary,
)
from factorize.rewrite.layers import (
    Factored,
    build_factored,
    factor_module,
    factored_layers,
    to_dense,
)
from factorize.spectra.decompose import Spectrum, decompose


@dataclass
class CompressResult:
    """What :func:`compress` returns."""

    model: nn.Module  # the compressed model (a copy unless inplace=True)
    plan: dict  # JSON-serialisable plan: site -> rank or dense, with reasons
    sites: WalkResult  # what the walker found
    spectra: dict[str, Spectrum] = field(default_factory=dict, repr=False)  # name -> spectrum (reusable)
    params_before: int = 0  # whole-model parameters, shared tensors counted once
    params_after: int = 0
    timings: list[dict] = field(default_factory=list)  # per-layer dense vs factored timings (speed_check=True)

    @property
    def kept_fraction(self) -> float:
        return self.params_after / self.params_before if self.params_before else 1.0

    def summary(self) -> dict:
        return {
            "params_before": self.params_before,
            "params_after": self.params_after,
            "kept_fraction": self.kept_fraction,
            **{f"sites_{k}": v for k, v in plan_summary(self.plan).items()},
        }


KINDS_IN_PLANS = KINDS


def check_plan(plan: Any, where: str = "") -> None:
    """Check the plan's own structure, before any model is involved: the format, an integer version this library
    reads, ``sites`` a mapping of name -> object, and each factored entry with a known kind, a [m, n] shape of
    positive integers and an integer rank (not a bool). Raises one :class:`FactorizeError` listing every problem
    (names shown without control characters); plans from files and from users go through here."""
    prefix = f"{where}: " if where else ""
    if not isinstance(plan, Mapping) or plan.get("format") != PLAN_FORMAT or not isinstance(plan.get("sites"), Mapping):
        raise FactorizeError(f"{prefix}not a factorize plan",
                             fix=f"pass the .plan of a compress() result (format {PLAN_FORMAT!r})")
    problems = []
    version = plan.get("version", PLAN_VERSION)
    if isinstance(version, bool) or not isinstance(version, int) or not 1 <= version <= PLAN_VERSION:
        problems.append(f"version {_shown(version)}: this factorize reads plan versions 1..{PLAN_VERSION}")
    for name, e in plan["sites"].items():
        problems += _entry_problems(_shown(name), e)
    if problems:
        named = list(dict.fromkeys(p.split(": ", 1)[0] for p in problems))  # the layers (or 'version') at fault
        shown = ", ".join(named[:3]) + (f" and {len(named) - 3} more" if len(named) > 3 else "")
        raise FactorizeError(f"{prefix}the plan is malformed ({len(problems)} problem(s), in {shown})", problems[:50],
                             fix="re-create the plan with compress(), or correct the listed entries")


def _entry_problems(name: str, e: Any) -> list[str]:
    if not isinstance(e, Mapping):
        return [f"{name}: the entry is a {type(e).__name__}, not an object"]
    if e.get("action") not in ("factor", "dense"):
        return [f"{name}: action {_shown(e.get('action'))} is not 'factor' or 'dense'"]
    if e["action"] != "factor":
        return []
    found = []
    if e.get("kind") not in KINDS_IN_PLANS:
        found.append(f"{name}: kind {_shown(e.get('kind'))} is not one of {', '.join(KINDS_IN_PLANS)}")
    shape = e.get("shape")
    if not isinstance(shape, (list, tuple)) or len(shape) != 2 or not all(_positive_int(v) for v in shape):
        found.append(f"{name}: shape {_shown(shape)} is not [m, n] of positive integers")
    if not _positive_int(e.get("rank")):
        found.append(f"{name}: rank {_shown(e.get('rank'))} is not a positive integer")
    return found


def _positive_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool) and v >= 1


def _shown(v: Any) -> str:
    """A value for a message: repr, control characters replaced, long ones cut."""
    text = "".join(c if c.isprintable() else "?" for c in (v if isinstance(v, str) else repr(v)))
    return text if len(text) <= 80 else text[:77] + "..."


def validate_plan(model: nn.Module, plan: Mapping) -> dict[str, Site]:
    """Check that ``plan`` fits ``model``: every factored site exists with the same kind and shape.

    Returns the model's sites by name. Raises one :class:`FactorizeError` listing every mismatch.
    """
    check_plan(plan)
    sites = walk(model).by_name()
    problems = []
    for name, e in plan["sites"].items():
        if e.get("action") != "factor":
            continue
        site = sites.get(name)
        name = _shown(name)
        if site is None:
            problems.append(f"{name}: the plan factors it but the model has no such factorizable layer")
        elif site.kind != e.get("kind") or list(site.shape) != list(e.get("shape", [])):
            problems.append(f"{name}: plan says {e.get('kind')} {e.get('shape')}, model has {site.kind} {list(site.shape)}")
        elif not isinstance(e.get("rank"), int) or not 1 <= e["rank"] <= site.max_rank:
            problems.append(f"{name}: rank {e.get('rank')!r} is not in 1..{site.max_rank}")
    if problems:
        raise FactorizeError(
            "the plan does not fit this model", problems,
            fix="apply the plan to the architecture it was made for, or edit the listed entries",
        )
    return sites


def apply_plan(
    model: nn.Module,
    plan: Mapping,
    *,
    spectra: Mapping[str, Spectrum] | None = None,
    inplace: bool = False,
    weights: bool = True,
    method: str = "exact",
    seed: int = 0,
) -> nn.Module:
    """Rewrite the layers a plan factors. All replacements are built first and swapped in last, so a failure
    leaves the model as it was.

    Args:
        model: the architecture the plan was made for (a fresh instance works).
        plan: a plan from :func:`compress` or :func:`factorize.plan.ranks.choose_ranks`, possibly loaded from JSON.
        spectra: spectra to take the factors from; missing ones are computed from the model's own weights.
        inplace: rewrite ``model`` itself instead of a deep copy.
        weights: False builds the factored structure only (uninitialised factors), e.g. to load a checkpoint.
    """
    sites = validate_plan(model, plan)
    target = model if inplace else copy.deepcopy(model)
    replacements: dict[str, Factored] = {}
    for name, e in plan["sites"].items():
        if e.get("action") != "factor":
            continue
        module, r, kind = get_module(target, name), e["rank"], sites[name].kind
        if not weights:
            replacements[name] = build_factored(module, kind, r)
            continue
        spec = (spectra or {}).get(name)
        if spec is None or spec.vector_rank < r:
            spec = decompose(matrix_of(module, kind), method=method, rank=r, seed=seed, name=name)
        B, A = spec.factors(r)  # (m, r), (r, n)
        replacements[name] = factor_module(module, kind, B, A)
    for name, layer in replacements.items():
        set_module(target, name, layer)
    return target


@torch.no_grad()
def merge(model: nn.Module, *, inplace: bool = False) -> nn.Module:
    """Merge every factored layer back into a dense layer computing the same function, of the class and weight
    layout of the layer it replaced (GPT-2's ``Conv1D`` stays ``Conv1D``; subclasses stay themselves), so the
    merged model's state-dict keys are the original model's."""
    target = model if inplace else copy.deepcopy(model)
    for name, layer in factored_layers(target).items():
        set_module(target, name, to_dense(layer))
    return target

