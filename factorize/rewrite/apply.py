"""Apply a plan to a model (swap in factored layers) and merge factored layers back (see
:mod:`factorize.rewrite.layers` for the two forms and how the original classes come back)."""

from __future__ import annotations

import copy
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import torch
from torch import nn

from factorize.errors import FactorizeError, printable
from factorize.model.sites import (
    KINDS,
    Site,
    WalkResult,
    get_module,
    matrix_of,
    set_module,
    walk,
)
from factorize.plan.entries import (
    CORRECTED,
    FACTOR,
    FORMS,
    PlanEntry,
    entry_form,
    factored_entries,
    plan_entries,
)
from factorize.plan.ranks import (
    PLAN_FORMAT,
    PRECISION_PLAN_VERSION,
    plan_summary,
)
from factorize.rewrite.forms import corrected_layer, release_precisions, store_precisions
from factorize.rewrite.layers import (
    Factored,
    build_factored,
    factor_module,
    factored_layers,
    to_dense,
)
from factorize.rounding import PRECISIONS
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
    version = plan.get("version", 1)
    if isinstance(version, bool) or not isinstance(version, int) or not 1 <= version <= PRECISION_PLAN_VERSION:
        problems.append(f"version {_shown(version)}: this factorize reads plan versions 1..{PRECISION_PLAN_VERSION}")
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
    form = entry_form(e)
    if not isinstance(form, str) or form not in FORMS:
        return [f"{name}: action {_shown(form)} is not {' or '.join(repr(f) for f in FORMS)}"]
    found = []
    if "precision" in e and e["precision"] not in PRECISIONS:
        found.append(f"{name}: precision {_shown(e['precision'])} is not one of {', '.join(PRECISIONS)}")
    if form == CORRECTED:
        if e.get("kind") != "linear":
            found.append(f"{name}: the corrected form is built for linear layers, not {_shown(e.get('kind'))}")
        if not _positive_int(e.get("correction_rank")):
            found.append(f"{name}: correction_rank {_shown(e.get('correction_rank'))} is not a positive integer")
    if not FORMS[form].has_rank:
        return found
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
    """A value for a message: a string as it is, anything else as its repr; escaped, long ones cut."""
    return printable(v if isinstance(v, str) else repr(v), limit=80)


def validate_plan(model: nn.Module, plan: Mapping) -> dict[str, Site]:
    """Check that ``plan`` fits ``model``: every factored site exists with the same kind and shape.

    Returns the model's sites by name. Raises one :class:`FactorizeError` listing every mismatch.
    """
    check_plan(plan)
    sites = walk(model).by_name()
    problems = []
    for e in factored_entries(plan):
        site = sites.get(e.name)
        name = _shown(e.name)
        if site is None:
            problems.append(f"{name}: the plan factors it but the model has no such factorizable layer")
        elif site.kind != e.kind or tuple(site.shape) != e.shape:
            problems.append(f"{name}: plan says {e.kind} {list(e.shape)}, model has {site.kind} {list(site.shape)}")
        elif not isinstance(e.rank, int) or not 1 <= e.rank <= site.max_rank:
            problems.append(f"{name}: rank {e.rank!r} is not in 1..{site.max_rank}")
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
    hessians: Mapping[str, torch.Tensor] | None = None,
) -> nn.Module:
    """Rewrite the layers a plan factors (and store each at the precision its entry records).

    All replacements are built first and swapped in last, so a failure leaves the model as it was.

    Args:
        model: the architecture the plan was made for (a fresh instance works).
        plan: a plan from :func:`compress` or :func:`factorize.plan.ranks.choose_ranks`, possibly loaded from JSON.
        spectra: spectra to take the factors from; missing ones are computed from the model's own weights.
        inplace: rewrite ``model`` itself instead of a deep copy.
        weights: False builds the factored structure only (uninitialised factors), e.g. to load a checkpoint.
        hessians: name -> input second moment (n x n) of layers whose stored precision is rounded with error
            feedback (GPTQ); layers without one are rounded to nearest.
    """
    sites = validate_plan(model, plan)
    target = model if inplace else copy.deepcopy(model)
    replacements: dict[str, nn.Module] = {}
    for e in plan_entries(plan):
        if e.rewritten:
            build = FORM_BUILDERS[e.form]
            replacements[e.name] = build(get_module(target, e.name), sites[e.name], e,
                                         _Source(spectra or {}, weights, method, seed, hessians or {}))
    for name, layer in replacements.items():
        set_module(target, name, layer)
    store_precisions(target, plan, hessians=hessians or {}, weights=weights)
    return target


@dataclass(frozen=True)
class _Source:
    """Where :func:`apply_plan`'s builders take weights from."""

    spectra: Mapping[str, Spectrum]  # reusable spectra by site name
    weights: bool  # False: the structure only (uninitialised, e.g. to load a checkpoint)
    method: str
    seed: int
    hessians: Mapping[str, torch.Tensor]  # input second moments for error-feedback rounding


def _build_factored(module: nn.Module, site: Site, e: PlanEntry, src: _Source) -> Factored:
    """The rank-r factored replacement of one "factor" entry."""
    r, kind = e.rank, site.kind
    if not src.weights:
        return build_factored(module, kind, r)
    spec = src.spectra.get(e.name)
    if spec is None or spec.vector_rank < r:
        spec = decompose(matrix_of(module, kind), method=src.method, rank=r, seed=src.seed, name=e.name)
    B, A = spec.factors(r)  # (m, r), (r, n)
    return factor_module(module, kind, B, A)


def _build_corrected(module: nn.Module, site: Site, e: PlanEntry, src: _Source) -> nn.Module:
    """The rounded-plus-correction replacement of one "corrected" entry."""
    return corrected_layer(module, e.precision, e.correction_rank, src.hessians.get(e.name), src.weights)


# form -> builder of the module that replaces a layer of an entry of that form (forms whose Form.rewrites is set);
# a new form of plan entry (factorize.plan.entries.FORMS) adds its builder here
FORM_BUILDERS = {FACTOR: _build_factored, CORRECTED: _build_corrected}


@torch.no_grad()
def merge(model: nn.Module, *, inplace: bool = False) -> nn.Module:
    """Merge every factored layer back into a dense layer computing the same function, of the class and weight
    layout of the layer it replaced (GPT-2's ``Conv1D`` stays ``Conv1D``; subclasses stay themselves), so the
    merged model's state-dict keys are the original model's. Stored (rounded) weights come back as float
    Parameters holding the decoded values, and a rounded-plus-correction layer as one ``nn.Linear``."""
    target = model if inplace else copy.deepcopy(model)
    for name, layer in factored_layers(target).items():
        set_module(target, name, to_dense(layer))
    return release_precisions(target)

