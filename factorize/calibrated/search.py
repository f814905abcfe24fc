"""Compression measured on sample inputs: the calibrated pipeline, and the search for a drift target.

:func:`compress_calibrated` is what ``factorize.compress(..., calibration=batches)`` runs:

    walk -> collect_stats -> (output weights) -> activation-aware spectra -> (sensitivity probes)
         -> choose ranks -> apply (per layer with bias correction, or sequentially so later layers absorb
            earlier errors)

:class:`Calibration` holds everything computed once (statistics, output weights, spectra, probe weights), so
that many budgets cost one rank allocation and one factor build each (``factorize sweep`` and the drift search
use it that way).

:func:`search_drift` answers "the smallest model whose drift stays under my limit": the smallest budget (fraction
of the sites' parameters, or multiply-accumulates) whose measured output drift on held-out batches is at most
``max_drift``. Spectra (and sensitivity weights) are computed once; each candidate budget only re-allocates
ranks, rebuilds the factors from the stored spectra and runs the held-out batches.

Drift, the default metric (``metric="relative_l2"``): ||y - y'||_F / ||y||_F over all held-out outputs (padded
tokens left out; the output is ``output_fn(output, batch)`` when given, else the primary output), the same
number ``--max-drift`` checks on the command line. ``metric="cosine"``: 1 - mean
cosine similarity per sample (see :func:`factorize.measure.drift.output_drift`).

Search: bisection on the budget between ``budgets[0]`` and ``budgets[1]`` down to ``tolerance``, assuming drift
does not grow with the budget (true of the predicted drift; measured drift can wiggle, so the answer is the
smallest budget *measured* to meet the limit among those walked, never an interpolation). If even the largest
budget misses the limit, :class:`DriftTargetUnreachable` (a :class:`~factorize.errors.DriftLimitExceeded`, exit
code 1 on the command line) reports the closest budget and its drift.

Drift measured on sample inputs is no guarantee of behaviour on other inputs; use in safety-relevant settings
needs re-validation under the rules that govern them.
"""

from __future__ import annotations

import copy
from collections.abc import Callable, Iterable, Mapping
from dataclasses import asdict, dataclass, field
from typing import Any

import torch
from torch import nn

from factorize.calibrated.aware import (
    AWARE_METHODS,
    REFIT_RIDGE,
    apply_bias_shifts,
    aware_spectra,
    compress_sequential,
)
from factorize.calibrated.gradients import collect_output_grams
from factorize.calibrated.sensitivity import (
    Sensitivity,
    measure_sensitivity,
    run_outputs,
)
from factorize.calibrated.stats import as_batch_list, collect_stats
from factorize.choices import SENSITIVITY_MODES
from factorize.errors import DriftLimitExceeded, FactorizeError
from factorize.measure.drift import output_drift
from factorize.model.count import count_parameters
from factorize.model.feed import token_mask
from factorize.model.sites import get_module, set_module, walk
from factorize.plan.ranks import Override, Policy, choose_ranks
from factorize.rewrite.apply import CompressResult, apply_plan

DRIFT_METRICS = ("relative_l2", "cosine")
DEFAULT_BUDGETS = (0.05, 0.95)  # search range: fractions of the sites' parameters (or MACs)
DEFAULT_TOLERANCE = 0.01  # stop bisecting when the bracket is this narrow


@dataclass
class DriftPoint:
    """One budget the search tried."""

    budget: float
    drift: float | None  # None: the budget could not even hold rank 1 everywhere
    kept_fraction: float | None  # the sites' parameters kept (from the plan)
    note: str = ""


@dataclass
class DriftSearch:
    """The walk of a drift search: every point tried and the answer."""

    max_drift: float
    metric: str
    heldout: bool  # False when the drift was measured on the calibration batches
    points: list[DriftPoint] = field(default_factory=list)
    budget: float | None = None  # smallest budget measured to meet the limit (None: unreachable)
    drift: float | None = None  # its drift

    def closest(self) -> DriftPoint | None:
        """The point with the smallest measured drift (the best the search saw)."""
        measured = [p for p in self.points if p.drift is not None]
        return min(measured, key=lambda p: (p.drift, p.budget)) if measured else None

    def to_dict(self) -> dict:
        return {"max_drift": self.max_drift, "metric": self.metric, "heldout": self.heldout, "budget": self.budget,
                "drift": self.drift, "curve": [asdict(p) for p in sorted(self.points, key=lambda p: p.budget)]}


class DriftTargetUnreachable(DriftLimitExceeded):
    """No budget in the searched range keeps the drift under the limit; carries the search and the closest point."""

    def __init__(self, search: DriftSearch) -> None:
        self.search = search
        best = search.closest()
        self.closest_budget = best.budget if best else None
        self.closest_drift = best.drift if best else None
        where = "held-out" if search.heldout else "calibration"
        msg = f"no budget up to {max(p.budget for p in search.points):g} keeps the {search.metric} drift under " \
              f"{search.max_drift:g} on the {where} inputs"
        if best is not None:
            msg += f"; closest: budget {best.budget:g} with drift {best.drift:.4g}"
        super().__init__(msg + "; raise the limit, exclude sensitive layers, or heal the model after compressing")


@dataclass
class CalibratedResult(CompressResult):
    """:class:`~factorize.rewrite.apply.CompressResult` plus what calibration measured."""

    stats: dict = field(default_factory=dict, repr=False)  # name -> InputStats summary (samples, width)
    sensitivity: Sensitivity | None = None
    search: DriftSearch | None = None


# ---------------------------------------------------------------------------------------------------------------
# drift


def measure_drift(
    reference: list[torch.Tensor], model: nn.Module, batches: list, *, metric: str = "relative_l2",
    output_fn: Callable | None = None,
) -> float:
    """Drift of ``model`` from precomputed ``reference`` outputs on ``batches`` (see the module docstring)."""
    cand = run_outputs(model, batches, output_fn)
    d = output_drift(reference, cand, kind="features", masks=[token_mask(b) for b in batches])
    return d["relative_l2"] if metric == "relative_l2" else 1.0 - d["cosine_mean"]


# ---------------------------------------------------------------------------------------------------------------
# the calibrated pipeline


def _sensitivity_mode(sensitivity: bool | str) -> str | None:
    if sensitivity is True:
        return "both"
    if sensitivity is False or sensitivity is None:
        return None
    if sensitivity not in SENSITIVITY_MODES:
        raise FactorizeError(f"unknown sensitivity mode {sensitivity!r}",
                             fix="use True (= 'both'), 'probes', 'gradients', 'both' or False")
    return sensitivity


def auto_fractions(budget: float | None) -> tuple[float, float]:
    """Probe ranks near the operating point: the budget and half of it (0.5 and 0.25 without a budget)."""
    if budget is None:
        return (0.5, 0.25)
    b = min(max(float(budget), 0.02), 0.9)
    return (b, b / 2)


class Calibration:
    """Everything computed once per model and calibration set -- sites, input statistics, output weights,
    activation-aware spectra, measured sensitivity -- so that many budgets can be tried cheaply.

    Args:
        model: the original model (only read).
        calibration: sample-input batches (batch contract).
        include / exclude: glob patterns for the sites.
        method / alpha / center / ridge / solver / precision: of :func:`factorize.calibrated.aware.aware_spectra`.
        sensitivity: False; ``"probes"`` (per-layer weights from truncation probes, :mod:`factorize.sensitivity`);
            ``"gradients"`` (output directions weighted by the final output's Gauss-Newton matrix,
            :func:`factorize.calibrated.gradients.collect_output_grams`); ``"both"`` or True (gradients, then probes).
        sensitivity_batches: probe inputs (default: the calibration batches).
        fractions: probe ranks as fractions of each layer's parameters.
        projections: random projections per batch for the output weights.
        output_fn: ``output_fn(output, batch) -> tensor``: the output that matters (default: the primary one).
        per_site: collect input statistics one layer at a time.
        progress: progress bars on stderr.
    """

    def __init__(self, model: nn.Module, calibration: Iterable[Any], *, include=None, exclude=None,
                 method: str = "whiten", alpha: float = 0.5, center: bool | str = "auto", ridge: float | None = None,
                 solver: str = "gram", precision: str | None = None, sensitivity: bool | str = False,
                 sensitivity_batches: Iterable[Any] | None = None, fractions: tuple[float, ...] = (0.5, 0.25),
                 projections: int = 2, output_fn: Callable | None = None, multiple: int = 1,
                 per_site: bool = False, progress: bool = False) -> None:
        if method not in AWARE_METHODS:
            raise FactorizeError(f"unknown activation-aware method {method!r}",
                                 fix=f"use one of {', '.join(AWARE_METHODS)}")
        mode = _sensitivity_mode(sensitivity)
        if mode in ("gradients", "both") and method != "whiten":
            raise FactorizeError("gradient sensitivity weights output directions of the whitened problem",
                                 fix="use method='whiten', or sensitivity='probes'")
        self.model, self.method, self.center, self.ridge, self.precision = model, method, center, ridge, precision
        self.output_fn, self.progress, self.mode = output_fn, progress, mode
        self.found = walk(model, include=include, exclude=exclude)
        if not self.found.sites:
            raise FactorizeError("no factorizable layer found" + (" matching the include/exclude patterns"
                                 if include or exclude else ""), [f"{s.name}: {s.reason}" for s in self.found.skipped],
                                 fix="check the include/exclude globs against model.named_modules()")
        self.batches = as_batch_list(calibration)
        self.todo = [s for s in self.found.sites if not s.tied_with]
        self.stats = collect_stats(model, self.todo, self.batches, progress=progress, per_site=per_site)
        self.output_grams = None
        if mode in ("gradients", "both"):
            self.output_grams = collect_output_grams(model, self.todo, self.batches, projections=projections,
                                                     output_fn=output_fn, progress=progress)
        ranks = None
        if solver in ("auto", "randomized"):  # past break-even a layer stays dense: no more triplets needed
            ranks = {s.name: max(1, min(s.max_rank, s.break_even + multiple)) for s in self.todo}
        self.spectra = aware_spectra(model, self.todo, self.stats, method=method, alpha=alpha, center=center,
                                     ridge=ridge, solver=solver, ranks=ranks, output_grams=self.output_grams,
                                     precision=precision, progress=progress)
        self.sensitivity: Sensitivity | None = None
        self.probe_batches = as_batch_list(sensitivity_batches) if sensitivity_batches is not None else self.batches
        self.fractions = tuple(fractions)
        self.wants_probes = mode in ("probes", "both")  # measured at the first budget plan (only budgets use them)

    def measure(self, fractions: tuple[float, ...]) -> Sensitivity:
        """(Re)measure the probes at these rank fractions; later plans use the new weights."""
        self.fractions = tuple(fractions)
        self.sensitivity = measure_sensitivity(self.model, self.todo, self.spectra, self.probe_batches,
                                               fractions=self.fractions, output_fn=self.output_fn,
                                               progress=self.progress)
        return self.sensitivity

    @property
    def error_scale(self) -> dict[str, float] | None:
        """Weights for the budget allocator: measured (probes), 1 per layer (output-weighted spectra are already in
        final-output units), or None (each layer's own relative error)."""
        if self.sensitivity is not None:
            return self.sensitivity.error_scale()
        if self.output_grams is not None:
            return {s.name: 1.0 for s in self.todo}
        return None

    def plan(self, policy: Policy) -> dict:
        """Ranks for ``policy`` from the stored spectra (and sensitivity). Probe weights only shape a ``budget``
        allocation, so they are measured (once) on the first budget plan that needs them."""
        if policy.budget is not None and self.wants_probes and self.sensitivity is None:
            self.measure(self.fractions)
        return choose_ranks(self.found.sites, self.spectra, policy, method=self.method, error_scale=self.error_scale)

    def build(self, plan: dict, *, sequential: bool = False, refit: bool = True,
              refit_ridge: float = REFIT_RIDGE) -> nn.Module:
        """A compressed copy of the model for ``plan``: per-layer factors with bias correction, or sequential."""
        if sequential:
            model, seq_spectra = compress_sequential(
                self.model, plan, self.batches, method=self.method, center=self.center, ridge=self.ridge,
                refit=refit, refit_ridge=refit_ridge, output_grams=self.output_grams, precision=self.precision,
                progress=self.progress)
            for name, spec in seq_spectra.items():  # predicted errors of the factors actually built
                e = plan["sites"][name]
                e["predicted_error"] = spec.relative_error(e["rank"])
                e["energy_kept"] = spec.energy_fraction(e["rank"])
            return model
        model = apply_plan(self.model, plan, spectra=self.spectra)
        apply_bias_shifts(model, plan, self.spectra)
        return model

    def annotate(self, plan: dict, *, sequential: bool) -> None:
        """Record how the plan was calibrated (JSON-serialisable, carried into saved files)."""
        plan["calibration"] = {
            "method": self.method,
            "sequential": bool(sequential),
            "sensitivity": self.mode,
            "batches": len(self.batches),
            "samples": {name: st.count for name, st in self.stats.items()},
            "probes": None if self.sensitivity is None else {
                "metric": self.sensitivity.metric, "forward_passes": self.sensitivity.forward_passes,
                "fractions": list(self.fractions), "weights": self.sensitivity.error_scale()},
            "predicted_error": "final-output units" if self.output_grams is not None else "layer output",
        }


def compress_calibrated(
    model: nn.Module,
    calibration: Iterable[Any],
    *,
    budget: float | None = None,
    rank: int | None = None,
    energy: float | None = None,
    keep: float | None = None,
    include: str | Iterable[str] | None = None,
    exclude: str | Iterable[str] | None = None,
    sequential: bool = False,
    refit: bool = True,
    refit_ridge: float = REFIT_RIDGE,
    fractions: tuple[float, ...] | str = "auto",
    max_drift: float | None = None,
    heldout: Iterable[Any] | None = None,
    metric: str = "relative_l2",
    budgets: tuple[float, float] = DEFAULT_BUDGETS,
    tolerance: float = DEFAULT_TOLERANCE,
    multiple: int = 1,
    overrides: Iterable[Override | Mapping] | None = None,
    cost: str = "params",
    inplace: bool = False,
    **options: Any,
) -> CalibratedResult:
    """Activation-aware compression from calibration batches (see the module docstring).

    Args:
        model: the trained model; not modified unless ``inplace=True``.
        calibration: sample-input batches (batch contract). Their inputs set each layer's statistics; keep
            them disjoint from the inputs you evaluate on.
        budget / rank / energy / keep: the rank policy (exactly one, unless ``max_drift`` is given).
        sequential: factor layers in forward order from the partly compressed model's inputs.
        refit / refit_ridge: sequential only (see :func:`factorize.calibrated.aware.compress_sequential`).
        fractions: probe ranks for ``sensitivity`` (``"auto"``: the budget and half of it, see
            :func:`auto_fractions`).
        max_drift: search for the smallest budget whose drift on ``heldout`` is at most this (see
            :func:`search_drift`); replaces the rank policy.
        heldout / metric / budgets / tolerance: of the drift search.
        multiple / overrides / cost / inplace: as for :func:`factorize.compress`.
        options: for :class:`Calibration` -- method (``"whiten"``/``"scale"``), alpha, center, ridge, solver,
            precision, sensitivity (False, True, ``"probes"``, ``"gradients"``, ``"both"``),
            sensitivity_batches, projections, output_fn, per_site, progress.
    """
    if metric not in DRIFT_METRICS:
        raise FactorizeError(f"unknown drift metric {metric!r}", fix=f"use one of {', '.join(DRIFT_METRICS)}")
    if max_drift is not None:
        if any(v is not None for v in (budget, rank, energy, keep)):
            raise FactorizeError("max_drift= chooses the budget itself; it cannot be combined with a rank policy",
                                 fix="drop budget=/rank=/energy=/keep=, or drop max_drift=")
        return search_drift(model, max_drift, calibration, heldout, include=include, exclude=exclude,
                            sequential=sequential, refit=refit, refit_ridge=refit_ridge,
                            fractions=(0.5, 0.25) if fractions == "auto" else fractions, metric=metric,
                            budgets=budgets, tolerance=tolerance, multiple=multiple, overrides=overrides, cost=cost,
                            inplace=inplace, **options)
    ov = tuple(o if isinstance(o, Override) else Override(**o) for o in (overrides or ()))
    policy = Policy(rank=rank, energy=energy, keep=keep, budget=budget, multiple=multiple, overrides=ov, cost=cost)
    fr = auto_fractions(budget if budget is not None else keep) if fractions == "auto" else fractions
    calib = Calibration(model, calibration, include=include, exclude=exclude, fractions=fr, multiple=multiple,
                        **options)
    return compress_from(calib, policy, sequential=sequential, refit=refit, refit_ridge=refit_ridge, fractions=fr,
                         inplace=inplace)


def compress_from(calib: Calibration, policy: Policy, *, sequential: bool = False, refit: bool = True,
                  refit_ridge: float = REFIT_RIDGE, fractions: tuple[float, ...] | str = "auto",
                  inplace: bool = False) -> CalibratedResult:
    """The result :func:`compress_calibrated` gives for ``policy``, from statistics already in ``calib``.

    A sweep over many policies builds one :class:`Calibration` and calls this per policy: each result equals
    ``compress(model, calibration=..., <policy>)`` (probes, when asked for, are re-measured at the policy's own
    ``fractions``, as a single call would measure them), while statistics and spectra are computed once.
    """
    fr = auto_fractions(policy.budget if policy.budget is not None else policy.keep) if fractions == "auto" \
        else tuple(fractions)
    if calib.wants_probes and policy.budget is not None and (calib.sensitivity is None or calib.fractions != fr):
        calib.measure(fr)
    plan = calib.plan(policy)
    compressed = calib.build(plan, sequential=sequential, refit=refit, refit_ridge=refit_ridge)
    calib.annotate(plan, sequential=sequential)
    return _result(calib.model, compressed, plan, calib, inplace)


def _result(model: nn.Module, compressed: nn.Module, plan: dict, calib: Calibration, inplace: bool,
            search: DriftSearch | None = None) -> CalibratedResult:
    params_before = count_parameters(model)
    if inplace:  # swap the factored layers into the caller's model object (all built first, so nothing half-done)
        for name, e in plan["sites"].items():
            if e.get("action") == "factor":
                set_module(model, name, get_module(compressed, name))
        compressed = model
    return CalibratedResult(
        model=compressed, plan=plan, sites=calib.found, spectra=dict(calib.spectra), params_before=params_before,
        params_after=count_parameters(compressed), stats={k: v.to_dict() for k, v in calib.stats.items()},
        sensitivity=calib.sensitivity, search=search,
    )


# ---------------------------------------------------------------------------------------------------------------
# the search


def search_drift(
    model: nn.Module,
    max_drift: float,
    calibration: Iterable[Any],
    heldout: Iterable[Any] | None = None,
    *,
    metric: str = "relative_l2",
    budgets: tuple[float, float] = DEFAULT_BUDGETS,
    tolerance: float = DEFAULT_TOLERANCE,
    include: str | Iterable[str] | None = None,
    exclude: str | Iterable[str] | None = None,
    sequential: bool = False,
    refit: bool = True,
    refit_ridge: float = REFIT_RIDGE,
    multiple: int = 1,
    overrides: Iterable[Override | Mapping] | None = None,
    cost: str = "params",
    inplace: bool = False,
    **options: Any,
) -> CalibratedResult:
    """The smallest budget whose measured drift on ``heldout`` stays at most ``max_drift``.

    Args:
        model: the trained model; not modified unless ``inplace=True``.
        max_drift: the limit, in ``metric`` units (relative L2 by default; 1 - mean cosine for ``"cosine"``).
        calibration: batches for the statistics (and the sensitivity probes).
        heldout: batches to measure drift on; None measures on the calibration batches (optimistic: the
            result's ``search.heldout`` is then False).
        metric: ``"relative_l2"`` or ``"cosine"``.
        budgets: the (smallest, largest) budget searched; tolerance: bisection stops at this bracket width.
        sequential: build the final model sequentially (the search itself uses per-layer factors; the sequential
            model's drift is re-measured, and it is kept only if it drifts less).
        options: for :class:`Calibration` (method, sensitivity, output_fn, ...); ``output_fn`` also defines the
            output the drift is measured on.

    Returns:
        :class:`CalibratedResult` at the chosen budget; ``.search`` holds every budget walked and its drift.

    Raises:
        DriftTargetUnreachable: even ``budgets[1]`` drifts more than ``max_drift`` (carries the closest point).
    """
    if metric not in DRIFT_METRICS:
        raise FactorizeError(f"unknown drift metric {metric!r}", fix=f"use one of {', '.join(DRIFT_METRICS)}")
    lo, hi = _check_search(max_drift, budgets, tolerance)
    eval_batches = as_batch_list(heldout) if heldout is not None else as_batch_list(calibration)
    options.setdefault("fractions", (0.5, 0.25))
    calib = Calibration(model, calibration, include=include, exclude=exclude, multiple=multiple, **options)
    output_fn = options.get("output_fn")
    reference = run_outputs(model, eval_batches, output_fn)
    ov = tuple(o if isinstance(o, Override) else Override(**o) for o in (overrides or ()))
    search = DriftSearch(max_drift=max_drift, metric=metric, heldout=heldout is not None)
    plans: dict[float, dict] = {}

    def drift_at(b: float) -> float | None:
        try:
            plan = calib.plan(Policy(budget=b, multiple=multiple, overrides=ov, cost=cost))
        except FactorizeError as err:  # too small to hold rank 1 everywhere
            search.points.append(DriftPoint(b, None, None, note=str(err).splitlines()[0]))
            return None
        d = measure_drift(reference, calib.build(plan), eval_batches, metric=metric, output_fn=output_fn)
        search.points.append(DriftPoint(b, d, _kept_fraction(plan)))
        plans[b] = plan
        return d

    d_hi = drift_at(hi)
    if d_hi is None or d_hi > max_drift:
        raise DriftTargetUnreachable(search)
    good = hi
    d_lo = drift_at(lo)
    if d_lo is not None and d_lo <= max_drift:
        good = lo
    else:
        while hi - lo > tolerance:
            mid = round((lo + hi) / 2, 6)
            d = drift_at(mid)
            if d is not None and d <= max_drift:
                hi = good = mid
            else:
                lo = mid
    plan = plans[good]
    search.budget, search.drift = good, next(p.drift for p in search.points if p.budget == good)
    compressed = calib.build(plan)  # rebuilt: only plans are kept during the walk, never many model copies
    if sequential:
        seq_plan = copy.deepcopy(plan)
        seq_model = calib.build(seq_plan, sequential=True, refit=refit, refit_ridge=refit_ridge)
        d_seq = measure_drift(reference, seq_model, eval_batches, metric=metric, output_fn=output_fn)
        search.points.append(DriftPoint(good, d_seq, _kept_fraction(seq_plan), note="sequential"))
        if d_seq <= search.drift:
            compressed, plan, search.drift = seq_model, seq_plan, d_seq
        else:  # keep the per-layer model, which was measured to meet the limit
            sequential = False
    calib.annotate(plan, sequential=sequential)
    plan["search"] = search.to_dict()
    return _result(model, compressed, plan, calib, inplace, search=search)


def _check_search(max_drift, budgets, tolerance) -> tuple[float, float]:
    problems = []
    if isinstance(max_drift, bool) or not isinstance(max_drift, (int, float)) or not max_drift > 0:
        problems.append(f"max_drift must be a positive number, got {max_drift!r}")
    try:
        lo, hi = (float(b) for b in budgets)
    except (TypeError, ValueError):
        lo, hi = -1.0, -1.0
    if not 0 < lo < hi <= 1:
        problems.append(f"budgets must be (smallest, largest) with 0 < smallest < largest <= 1, got {budgets!r}")
    if not isinstance(tolerance, (int, float)) or not tolerance > 0:
        problems.append(f"tolerance must be a positive number, got {tolerance!r}")
    if problems:
        raise FactorizeError("invalid drift search", problems, fix="e.g. max_drift=0.1, budgets=(0.05, 0.95)")
    return lo, hi


def _kept_fraction(plan: Mapping) -> float:
    sites = plan["sites"].values()
    before = sum(e["params"] for e in sites)
    return sum(e["params_after"] for e in sites) / before if before else 1.0


# ---------------------------------------------------------------------------------------------------------------
# the entry from factorize.compress


