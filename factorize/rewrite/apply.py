"""Apply a plan to a model (swap in factored layers) and merge factored layers back (see
:mod:`factorize.rewrite.layers` for the two forms and how the original classes come back)."""

from __future__ import annotations

import copy
from collections.abc import Mapping
from dataclasses import dataclass, field

import torch
from torch import nn

from factorize.errors import FactorizeError
from factorize.model.sites import (
    Site,
    WalkResult,
    get_module,
    matrix_of,
    set_module,
    walk,
)
from factorize.plan.ranks import (
    PLAN_FORMAT,
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


def validate_plan(model: nn.Module, plan: Mapping) -> dict[str, Site]:
    """Check that ``plan`` fits ``model``: every factored site exists with the same kind and shape.

    Returns the model's sites by name. Raises one :class:`FactorizeError` listing every mismatch.
    """
    if not isinstance(plan, Mapping) or plan.get("format") != PLAN_FORMAT or not isinstance(plan.get("sites"), Mapping):
        raise FactorizeError(
            "not a factorize plan", fix=f"pass the .plan of a compress() result (format {PLAN_FORMAT!r})"
        )
    sites = walk(model).by_name()
    problems = []
    for name, e in plan["sites"].items():
        if e.get("action") != "factor":
            continue
        site = sites.get(name)
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
        if spec is None or spec.computed_rank < r:
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

