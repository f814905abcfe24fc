"""The plain alternatives at a plan's size, built and measured on the user's own inputs.

:func:`compare_alternatives` takes the original model, a compressed result (or a compressed model and its plan) and
sample inputs, and measures beside the plan (see :mod:`factorize.measure.alternatives`):

* every layer the plan selected rounded to int8 and not factored (error-feedback rounding, GPTQ, Frantar et al.
  2023, on the calibration inputs' second moments when the result was calibrated; round to nearest otherwise);
* rank alone at the weights' own precision at the plan's stored bytes: for a ``cost="bytes"`` plan,
  ``budget=<its kept bytes fraction>, cost="params"`` (a rank-only plan stores its factors in the weights' own
  precision, so its bytes fraction is its parameter fraction); for a rank-only plan, the plan itself;
* rank and precision together at the same bytes, for a rank-only plan: ``budget=<its bytes fraction>,
  cost="bytes"``.

Each alternative's drift is measured with :func:`factorize.measure.evaluate.evaluate` on the same batches (the
original's outputs computed once through ``memo``). Drift on sample inputs is no guarantee on other inputs.
"""

from __future__ import annotations

import dataclasses
import warnings
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

from torch import nn

from factorize.calibrated.precision import hessians
from factorize.errors import FactorizeError, UnverifiedModelWarning
from factorize.measure.alternatives import Alternative
from factorize.measure.evaluate import evaluate
from factorize.model.sites import get_module, matrix_of
from factorize.pipeline import compress
from factorize.plan.entries import FACTOR, plan_entries
from factorize.plan.forms import dense_shape, factor_bytes, native_precision
from factorize.plan.policy import Override, Policy
from factorize.plan.ranks import PLAN_FORMAT, PRECISION_PLAN_VERSION
from factorize.rewrite.apply import CompressResult, apply_plan, validate_plan
from factorize.rounding import fits, stored_bytes


@dataclass(frozen=True)
class Measuring:
    """How the alternatives are built and measured: ``calibration`` (a :class:`factorize.Calibration` to build
    them with), and ``memo`` / ``pooling`` / ``kind`` as for :func:`factorize.measure.evaluate.evaluate` (share
    ``memo`` with the call that measured the plan, so the original runs once)."""

    calibration: Any = None
    memo: dict = field(default_factory=dict, compare=False)
    pooling: str | None = None
    kind: str | None = None

    @classmethod
    def from_keywords(cls, given: Measuring | None = None, **keywords: Any) -> Measuring:
        if given is not None and keywords:
            raise FactorizeError("a Measuring object and its keywords were both given", list(keywords),
                                 fix="pass one or the other")
        if given is not None:
            return given
        unknown = [k for k in keywords if k not in ("calibration", "memo", "pooling", "kind")]
        if unknown:
            raise FactorizeError(f"unknown keyword(s): {', '.join(unknown)}",
                                 fix="use calibration, memo, pooling, kind")
        if keywords.get("memo") is None:
            keywords.pop("memo", None)
        return cls(**keywords)


def compare_alternatives(
    model: nn.Module,
    result: CompressResult | nn.Module,
    batches: Iterable[Any],
    measuring: Measuring | None = None,
    *,
    plan: Mapping | None = None,
    drift: Mapping | None = None,
    **keywords: Any,
) -> list[Alternative]:
    """The plan and its plain alternatives at the same stored size, each with its drift on ``batches``.

    Args:
        model: the original model (not modified).
        result: what :func:`factorize.compress` returned, or a compressed model (then ``plan=`` is its plan).
        batches: the sample inputs the report measures on (batch contract).
        measuring: a :class:`Measuring`, or its keywords: ``calibration`` (a :class:`factorize.Calibration` to
            build the alternatives with; default: the one a calibrated ``result`` carries; without one they are
            built without calibration inputs, and say so), ``memo`` / ``pooling`` / ``kind``.
        plan: the plan of ``result`` when ``result`` is a model.
        drift: the plan's own drift on ``batches`` when already measured (else it is measured here).

    Returns:
        Three :class:`~factorize.measure.alternatives.Alternative` records: int8, rank alone, rank and precision
        together, one of them ``this_plan``; an alternative that cannot be built has ``drift=None`` and a note.
    """
    how = Measuring.from_keywords(measuring, **keywords)
    calibration = how.calibration
    if isinstance(result, CompressResult):
        compressed, plan, spectra = result.model, result.plan, result.spectra
        calibration = calibration if calibration is not None else getattr(result, "calibration", None)
    else:
        if plan is None:
            raise FactorizeError("compare_alternatives needs the compressed model's plan",
                                 fix="pass the result of factorize.compress, or plan=factorize.read_plan(path)")
        compressed, spectra = result, {}
    batches = list(batches)
    if not batches:
        raise FactorizeError("no sample inputs to compare the alternatives on", fix="give at least one batch")
    memo, pooling, kind = how.memo, how.pooling, how.kind  # memo: the original's outputs, computed once for all
    own = this_plan(model, compressed, plan, batches, drift=drift, memo=memo, pooling=pooling, kind=kind)
    measure = {"memo": memo, "pooling": pooling, "kind": kind, "calibration": calibration}
    other = "rank" if own.name == "joint" else "joint"
    out = [int8_alternative(model, plan, batches, **measure),
           same_size_alternative(model, plan, batches, other, own.fraction, Measuring(**measure), spectra=spectra),
           own]
    return sorted(out, key=lambda a: ("int8", "rank", "joint").index(a.name))


def _measured(model, candidate, its_plan, batches, memo, pooling, kind) -> dict:
    return dict(evaluate(model, candidate, batches, plan=its_plan, latency_repeats=0, memo=memo, pooling=pooling,
                         kind=kind).drift)


def _note(plan: Mapping, calibration) -> str:
    return "without calibration inputs" if calibration is None and "calibration" in plan else ""


def this_plan(model: nn.Module, compressed: nn.Module, plan: Mapping, batches: list, *, drift: Mapping | None = None,
              memo: dict | None = None, pooling: str | None = None, kind: str | None = None) -> Alternative:
    """The plan itself as an :class:`Alternative` (``"joint"`` for a ``cost="bytes"`` plan, else ``"rank"``), with
    ``drift`` or its drift measured on ``batches``."""
    validate_plan(model, plan)
    by_bytes = (plan.get("policy") or {}).get("cost") == "bytes"
    before, after = plan_bytes(model, plan)
    measured = dict(drift) if drift is not None else _measured(model, compressed, plan, batches,
                                                                 {} if memo is None else memo, pooling, kind)
    return Alternative("joint" if by_bytes else "rank", before, after, drift=measured, this_plan=True,
                       budget=(plan.get("policy") or {}).get("budget"),
                       details={"cost": "bytes" if by_bytes else "params"})


def plan_bytes(model: nn.Module, plan: Mapping) -> tuple[int, int]:
    """(stored bytes of the plan's layers in ``model``, the same layers' stored bytes under the plan): each row's
    ``bytes`` / ``bytes_after`` where it records them, else counted from the weight's own precision (a factored row
    stores B (m x r) and A (r x n) in it)."""
    before = after = 0
    for e in plan_entries(plan):
        row = plan["sites"][e.name]
        native = _native(model, e.name, e.kind)
        b = int(row["bytes"]) if isinstance(row.get("bytes"), int) else stored_bytes(native, tuple(e.shape))
        if isinstance(row.get("bytes_after"), int):
            a = int(row["bytes_after"])
        else:
            a = factor_bytes(native, tuple(e.shape), e.rank) if e.form == FACTOR else b
        before, after = before + b, after + a
    return before, after


def _native(model: nn.Module, name: str, kind: str) -> str:
    return native_precision(matrix_of(get_module(model, name), kind).dtype)


def int8_alternative(model: nn.Module, plan: Mapping, batches: list, *, calibration: Any = None,
                     memo: dict | None = None, pooling: str | None = None, kind: str | None = None) -> Alternative:
    """Every layer ``plan`` selected rounded to int8, kept dense (a weight shared with another layer stays as it
    is), with error-feedback rounding on ``calibration``'s input moments when given; measured on ``batches``."""
    sites = validate_plan(model, plan)
    rows = {}
    for name, row in plan["sites"].items():
        W = matrix_of(get_module(model, name), row["kind"])
        native = native_precision(W.dtype)
        keep = bool(sites[name].tied_with) or fits(W, "int8") is not None
        precision = native if keep else "int8"
        rows[name] = {**{k: v for k, v in row.items() if k in ("kind", "shape", "params", "kernel")},
                      "rank": None, "action": "dense", "reason": "int8 alternative", "params_after": row["params"],
                      "precision": precision, "bytes": stored_bytes(native, tuple(row["shape"])),
                      "bytes_after": stored_bytes(precision, dense_shape(row["kind"], tuple(row["shape"])))}
    int8_plan = {"format": PLAN_FORMAT, "version": PRECISION_PLAN_VERSION, "method": plan.get("method", "exact"),
                 "policy": {"precisions": ["int8"]}, "sites": rows}
    H = hessians(calibration) if calibration is not None else None
    built = apply_plan(model, int8_plan, hessians=H)
    how = "error-feedback rounding" if H else "rounded to nearest"
    before, after = plan_bytes(model, int8_plan)
    drift = _measured(model, built, int8_plan, batches, {} if memo is None else memo, pooling, kind)
    return Alternative("int8", before, after, drift=drift,
                       note=", ".join(x for x in (how, _note(plan, calibration)) if x))


def same_size_alternative(model: nn.Module, plan: Mapping, batches: list, which: str, fraction: float,
                          measuring: Measuring | None = None, *, spectra: Mapping | None = None,
                          **keywords: Any) -> Alternative:
    """Rank alone (``which="rank"``: ``cost="params"``) or rank and precision together (``"joint"``:
    ``cost="bytes"``) over ``plan``'s layers at ``fraction`` of their stored bytes, built (on ``calibration`` when
    given; ``spectra`` reused for rank alone) and measured on ``batches``. One that cannot be built (a size too
    small for rank 1 everywhere) comes back with ``drift=None`` and the reason in its note. ``measuring``: a
    :class:`Measuring` or its keywords."""
    how = Measuring.from_keywords(measuring, **keywords)
    calibration, memo, pooling, kind = how.calibration, how.memo, how.pooling, how.kind
    sites = validate_plan(model, plan)
    try:
        built, its_plan = _rank_or_joint(model, plan, sites, which, fraction, calibration, spectra or {}, batches[0])
    except FactorizeError as err:
        before, after = plan_bytes(model, plan)
        return Alternative(which, before, after, budget=round(fraction, 6),
                           note="not built: " + str(err).splitlines()[0])
    before, after = plan_bytes(model, its_plan)
    drift = _measured(model, built, its_plan, batches, memo, pooling, kind)
    return Alternative(which, before, after, drift=drift, budget=round(fraction, 6), note=_note(plan, calibration))


def _policy(plan: Mapping, sites, cost: str, fraction: float) -> Policy:
    recorded = plan.get("policy") or {}
    overrides = tuple(Override(**o) for o in recorded.get("overrides") or ())
    return Policy(budget=min(max(fraction, 1e-9), 1.0), cost=cost, multiple=int(recorded.get("multiple", 1)),
                  overrides=overrides, include=tuple(_literal(n) for n in sites))


def _rank_or_joint(model, plan, sites, which: str, fraction: float, calibration, spectra, example):
    """The rank-only (``which="rank"``) or joint plan at ``fraction`` of the stored bytes, built, and its plan."""
    policy = _policy(plan, sites, "params" if which == "rank" else "bytes", fraction)
    if calibration is not None:  # it plans its own layers only; the others (held rows) stay as they are stored
        policy = dataclasses.replace(policy, budget=_calibrated_fraction(model, plan, calibration, fraction))
        its_plan = calibration.plan(policy)
        return calibration.build(its_plan), its_plan
    given = spectra if which == "rank" else {}  # the joint planner prices every rank: full spectra, computed here
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UnverifiedModelWarning)
        done = compress(model, policy, spectra=given or None, example=example)
    return done.model, done.plan


def _calibrated_fraction(model: nn.Module, plan: Mapping, calibration, fraction: float) -> float:
    """The budget for the layers ``calibration`` plans that puts the whole of ``plan``'s layers at ``fraction`` of
    their stored bytes: the rows it does not plan (a transformers model's input embedding, held dense by default)
    keep their bytes, so the planned layers get what is left. Applying ``fraction`` to the planned layers alone
    made the calibrated joint alternative larger than the plan it stood beside (MiniLM: 88% against 76%)."""
    planned = {s.name for s in calibration.found.sites}
    before, _ = plan_bytes(model, plan)
    rest = {"sites": {n: row for n, row in plan["sites"].items() if n not in planned}}
    if not rest["sites"]:
        return fraction
    fixed, _ = plan_bytes(model, rest)
    if before <= fixed:
        return fraction
    share = (fraction * before - fixed) / (before - fixed)
    if share <= 0:
        raise FactorizeError(f"the layers left out of calibration alone take {fixed / before:.1%} of the bytes, more "
                             f"than the {fraction:.1%} to compare at")
    return min(share, 1.0)


def _literal(name: str) -> str:
    """A glob matching exactly ``name`` (fnmatch: ``*``, ``?`` and ``[`` escaped as one-character classes)."""
    return "".join(f"[{c}]" if c in "*?[" else c for c in name)
