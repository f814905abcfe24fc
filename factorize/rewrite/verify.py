"""Check that a compressed model still runs, and find the factored layers that stop it.

A factored layer answers what parents read of the layer it replaced (:mod:`factorize.rewrite.layers`), but code
outside torch can still read something we did not foresee. The only proof that a model runs is to run it, so:

* :func:`check_runs` runs one forward pass and returns the exception it raised, or None;
* :func:`find_breaking_layers` searches, with one forward pass per step, for the factored layers whose
  presence makes that pass fail, restoring the original dense layer in their place;
* :func:`keep_working` does both and returns a model that runs with a plan that says which layers were kept
  dense and why (or raises with the list, ``on_break="raise"``).

The search assumes a pass fails when (and only when) the set of factored layers contains at least one breaking
layer; under that assumption a binary search over the layers in module order finds each breaking layer with
about log2(N) + 1 passes (the idea of adaptive group testing; Hwang, "A method for detecting all defective
members in a population by group testing", JASA 1972). When the assumption fails (two layers that only break
together), the search still ends with a model that runs: it keeps dense the layer whose addition broke the pass.

A pass that runs proves only that this batch's shapes flow; outputs may still drift (see :mod:`factorize.measure`).
"""

from __future__ import annotations

import copy
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import torch
from torch import nn

from factorize.errors import FactorizeError
from factorize.model.feed import feed
from factorize.model.sites import get_module, set_module
from factorize.plan.entries import factored_names
from factorize.rewrite.layers import factored_layers


@dataclass(frozen=True)
class Breakage:
    """A factored layer that stops the model's forward pass, with the error seen when it was factored."""

    name: str
    reason: str

    def to_dict(self) -> dict:
        return {"name": self.name, "reason": self.reason}


@dataclass
class Verified:
    """What :func:`keep_working` returns: a model that ran on the batch, its plan, and the layers kept dense."""

    model: nn.Module
    plan: dict
    broken: list[Breakage]


def _describe(error: BaseException) -> str:
    first = str(error).strip().splitlines()[0] if str(error).strip() else ""
    return f"{type(error).__name__}: {first}"[:300]


def check_runs(model: nn.Module, batch: Any) -> Exception | None:
    """Run ``model`` once on ``batch`` (fed by the batch contract: tensor, tuple/list or dict) without gradients.

    Returns None when the pass finishes, else the exception it raised (not re-raised). The model's train/eval
    mode is left as it is.
    """
    try:
        with torch.no_grad():
            feed(model, batch)
    except Exception as err:  # noqa: BLE001 - any failure of the user's forward is the answer
        return err
    return None


def _arrange(model: nn.Module, names: list[str], factored_on: set[str], fact_of: dict, dense_of: dict) -> None:
    for name in names:
        set_module(model, name, fact_of[name] if name in factored_on else dense_of[name])


def find_breaking_layers(
    original: nn.Module,
    compressed: nn.Module,
    plan: Mapping | None,
    batch: Any,
) -> list[Breakage]:
    """The factored layers of ``compressed`` whose presence makes one forward pass on ``batch`` fail.

    Args:
        original: the model before compression (its layers are the dense ones restored while searching).
        compressed: the compressed model; only read (the search runs on a copy).
        plan: its plan; when given, only layers the plan factors are searched (None: every factored layer).
        batch: one sample batch (tensor, tuple/list or dict).

    Returns:
        ``[]`` when the compressed model runs, else the breaking layers in module order, each with the error seen
        when it was factored. Raises :class:`FactorizeError` when the original model fails on ``batch`` itself
        (the batch, not the compression, is wrong).
    """
    error = check_runs(compressed, batch)
    if error is None:
        return []
    first = check_runs(original, batch)
    if first is not None:
        raise FactorizeError(
            "the original model fails on the sample batch too, so the batch cannot test the compressed one",
            [_describe(first)], fix="pass a batch the original model accepts (model(batch), model(*batch) or "
            "model(**batch))",
        )
    trial = copy.deepcopy(compressed)
    fact_of = factored_layers(trial)
    if plan is not None:
        wanted = set(factored_names(plan))
        fact_of = {n: m for n, m in fact_of.items() if n in wanted}
    names = list(fact_of)
    dense_of = {name: copy.deepcopy(get_module(original, name)) for name in names}
    broken: list[Breakage] = []
    good: set[str] = set()  # layers known to run together
    rest = list(names)
    while rest:
        _arrange(trial, names, good | set(rest), fact_of, dense_of)
        error = check_runs(trial, batch)
        if error is None:
            break
        lo, hi, seen = 0, len(rest), error  # smallest prefix of rest that fails is rest[:hi]
        while hi - lo > 1:
            mid = (lo + hi) // 2
            _arrange(trial, names, good | set(rest[:mid]), fact_of, dense_of)
            err = check_runs(trial, batch)
            if err is None:
                lo = mid
            else:
                hi, seen = mid, err
        culprit = rest[hi - 1]
        broken.append(Breakage(culprit, _describe(seen)))
        good.update(rest[: hi - 1])
        rest = rest[hi:]
    return broken


def restore_dense(original: nn.Module, compressed: nn.Module, names, *, inplace: bool = False) -> nn.Module:
    """``compressed`` with the layers ``names`` put back as they were in ``original`` (copies of them)."""
    target = compressed if inplace else copy.deepcopy(compressed)
    for name in names:
        set_module(target, name, copy.deepcopy(get_module(original, name)))
    return target


def keep_working(
    original: nn.Module,
    compressed: nn.Module,
    plan: Mapping,
    batch: Any,
    *,
    on_break: str = "dense",
) -> Verified:
    """Run ``compressed`` once on ``batch``; if it fails, keep dense the factored layers that break it.

    Args:
        original, compressed, plan, batch: as for :func:`find_breaking_layers`.
        on_break: ``"dense"`` returns a model with the breaking layers restored from ``original`` and a copy of
            ``plan`` marking them dense with the reason; ``"raise"`` raises :class:`FactorizeError` listing them.

    Returns:
        :class:`Verified`. ``compressed`` and ``plan`` are not modified; when nothing breaks, the same objects
        come back.
    """
    if on_break not in ("dense", "raise"):
        raise FactorizeError(f"unknown on_break {on_break!r}", fix='use "dense" or "raise"')
    broken = find_breaking_layers(original, compressed, plan, batch)
    if not broken:
        return Verified(compressed, dict(plan), [])
    if on_break == "raise":
        raise FactorizeError(
            "the compressed model fails its forward pass on the sample batch",
            [f"{b.name}: {b.reason}" for b in broken],
            fix="keep these layers dense (exclude=[...] or on_break='dense'), or report the model's class",
        )
    model = restore_dense(original, compressed, [b.name for b in broken])
    new_plan = copy.deepcopy(dict(plan))
    for b in broken:
        entry = new_plan["sites"][b.name]
        entry.update(action="dense", rank=None, params_after=entry.get("params", entry.get("params_after")),
                     reason=f"kept dense: the model failed to run with it factored ({b.reason})")
        entry.pop("predicted_error", None)
        entry.pop("energy_kept", None)
    return Verified(model, new_plan, broken)
