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
cosine similarity per sample (see :func:`factorize.measure.drift.output_drift`). The tail, so that no held-out
sample is left far behind: ``"relative_l2_p95"``, the 95th percentile of the per-sample relative L2 error, and
``"cosine_p5"``, 1 - the 5th percentile of the per-sample cosine.

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
import dataclasses
from collections.abc import Callable, Iterable
from dataclasses import asdict, dataclass, field
from typing import Any, NamedTuple

import torch
from torch import nn

from factorize.calibrated.aware import (
    REFIT_RIDGE,
    apply_bias_shifts,
    aware_spectra,
)
from factorize.calibrated.gradients import collect_output_grams
from factorize.calibrated.memory import MEMORY_SHARE, available_memory
from factorize.calibrated.options import (  # noqa: F401 - DRIFT_METRICS and the defaults are re-exported
    DEFAULT_BUDGETS,
    DEFAULT_TOLERANCE,
    DRIFT_METRICS,
    SENSITIVITY_MODES,
    CalibrationOptions,
    calibrated_setup,
    sensitivity_mode,
)
from factorize.calibrated.precision import (
    calibrated_bytes_plan,
    calibrated_latency_plan,
    hessians,
)
from factorize.calibrated.sensitivity import (
    Sensitivity,
    measure_sensitivity,
    run_outputs,
)
from factorize.calibrated.sequential import compress_sequential, refit_memory
from factorize.calibrated.stats import as_batch_list, collect_stats
from factorize.errors import DriftLimitExceeded, FactorizeError
from factorize.measure.drift import output_drift
from factorize.measure.evaluate import with_macs
from factorize.model.count import count_parameters
from factorize.model.feed import token_mask
from factorize.model.sites import WalkResult, get_module, set_module, walk
from factorize.plan.defaults import excluding, held_by_default, with_held_rows
from factorize.plan.entries import factored_names, plan_entries, rewritten_names
from factorize.plan.policy import Policy
from factorize.plan.ranks import choose_ranks, plan_summary
from factorize.rewrite.apply import CompressResult, apply_plan
from factorize.storage import human_bytes


class Fitted(NamedTuple):
    """A compressed copy as :meth:`Calibration.fitted` built it."""

    model: nn.Module
    sequential: bool  # built by the sequential refit
    note: str | None = None  # why not, where ``sequential="auto"`` allowed it
    failed: bool = False  # the refit was tried and failed (``note`` says why)


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
    calibration: Calibration | None = field(default=None, repr=False)  # statistics and spectra, for more budgets


# ---------------------------------------------------------------------------------------------------------------
# drift


def measure_drift(
    reference: list[torch.Tensor], model: nn.Module, batches: list, *, metric: str = "relative_l2",
    output_fn: Callable | None = None,
) -> float:
    """Drift of ``model`` from precomputed ``reference`` outputs on ``batches`` (see the module docstring)."""
    cand = run_outputs(model, batches, output_fn)
    d = output_drift(reference, cand, kind="features", masks=[token_mask(b) for b in batches])
    return {"relative_l2": d["relative_l2"], "cosine": 1.0 - d["cosine_mean"], "relative_l2_p95": d["sample_l2_p95"],
            "cosine_p5": 1.0 - d["cosine_p5"]}[metric]


# ---------------------------------------------------------------------------------------------------------------
# the calibrated pipeline


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
        policy: the :class:`~factorize.plan.policy.Policy` whose ``include`` / ``exclude`` select the sites, whose
            ``multiple`` bounds partial decompositions, whose ``seed`` seeds randomized solvers and whose ``method``
            may name the activation-aware method or the solver. Its rank rule is not used here: :meth:`plan`
            takes a policy per call. Without a policy, ``include`` / ``exclude`` / ``multiple`` / ``seed`` may be
            given as keywords.
        options: :class:`~factorize.calibrated.options.CalibrationOptions`, or its fields as keywords:
            aware_method (``"whiten"``/``"scale"``; ``method=`` is accepted for it here), solver / alpha / center /
            ridge / precision (of :func:`factorize.calibrated.aware.aware_spectra`); sensitivity: False,
            ``"probes"`` (per-layer weights from truncation probes, :mod:`factorize.calibrated.sensitivity`),
            ``"gradients"`` (output directions weighted by the final output's Gauss-Newton matrix,
            :func:`factorize.calibrated.gradients.collect_output_grams`), ``"both"`` or True (gradients, then
            probes); sensitivity_batches (probe inputs, default: the calibration batches); fractions (probe ranks
            as fractions of each layer's parameters, ``"auto"``: 0.5 and 0.25); projections (random projections
            per batch for the output weights); output_fn (``output_fn(output, batch) -> tensor``: the output that
            matters); per_site (collect statistics one layer at a time); example (a batch to count MACs on for
            ``cost="macs"``, default: the first calibration batch); workers (layers decomposed at once, threads);
            progress (bars on stderr).
    """

    def __init__(self, model: nn.Module, calibration: Iterable[Any], policy: Policy | None = None,
                 options: CalibrationOptions | None = None, **keywords: Any) -> None:
        selection = {k: keywords.pop(k) for k in ("include", "exclude", "multiple", "seed") if k in keywords}
        if "method" in keywords:  # Calibration's own name for the activation-aware method
            keywords["aware_method"] = keywords.pop("method")
        if policy is not None and selection:
            raise FactorizeError("a Policy and include/exclude/multiple/seed keywords were both given",
                                 [f"{k}=" for k in selection], fix="put them into the Policy, or drop the Policy")
        if options is not None and keywords:
            raise FactorizeError("CalibrationOptions and option keywords were both given", [f"{k}=" for k in keywords],
                                 fix="put them into the options, or pass keywords only")
        options = options if options is not None else CalibrationOptions.from_keywords(**keywords)
        method, solver = options.methods(policy)
        mode = sensitivity_mode(options.sensitivity, method)
        if mode in ("gradients", "both") and method != "whiten":
            raise FactorizeError("gradient sensitivity weights output directions of the whitened problem",
                                 fix="use method='whiten', or sensitivity='probes'")
        if policy is not None:
            selection = {"include": policy.include, "exclude": policy.exclude, "multiple": policy.multiple,
                         "seed": policy.seed}
        include, exclude = selection.get("include"), selection.get("exclude")
        multiple = selection.get("multiple") or 1
        self.model, self.method, self.output_fn, self.mode = model, method, options.output_fn, mode
        self.fit = options.fit(method, solver)  # how each layer is fitted, and how the work runs: passed whole
        self.execution = options.execution(selection.get("seed") or 0)
        self.progress = self.execution.progress
        self.options = options
        # a transformers model's input embedding stays out under a budget (a Calibration serves budgets unless
        # its policy has a per-layer rule)
        rule = policy if policy is not None else Policy(budget=1.0, include=include)
        self.held = held_by_default(model, rule)
        exclude = excluding(dataclasses.replace(rule, exclude=exclude), self.held)
        self.found = walk(model, include=include, exclude=exclude).require_sites(bool(include or exclude))
        self.batches = as_batch_list(calibration)
        self.todo = [s for s in self.found.sites if not s.tied_with]
        # statistics on each layer's narrow side; stored precisions round best with the n x n input moment (error
        # feedback), so plans that may store them (and a Calibration without a policy, which may serve any plan)
        # keep the input side wherever it is not too wide
        prefer_input = policy is None or policy.cost in ("bytes", "latency")
        self.stats = collect_stats(model, self.todo, self.batches, progress=self.progress, per_site=options.per_site,
                                   side="narrow", prefer_input=prefer_input)
        self.output_grams = None
        if mode in ("gradients", "both"):
            self.output_grams = collect_output_grams(model, self.todo, self.batches, projections=options.projections,
                                                     output_fn=self.output_fn, progress=self.progress)
        ranks = None
        if solver in ("auto", "randomized"):  # past break-even a layer stays dense: no more triplets needed
            ranks = {s.name: max(1, min(s.max_rank, s.break_even + multiple)) for s in self.todo}
        self.spectra = aware_spectra(model, self.todo, self.stats, self.fit, ranks=ranks,
                                     output_grams=self.output_grams, execution=self.execution)
        self.sensitivity: Sensitivity | None = None
        probes = options.sensitivity_batches
        self.probe_batches = as_batch_list(probes) if probes is not None else self.batches
        self.fractions = (0.5, 0.25) if options.fractions == "auto" else tuple(options.fractions)
        self.wants_probes = mode in ("probes", "both")  # measured at the first budget plan (only budgets use them)
        self._priced: dict = {}  # candidate forms of cost="bytes" plans, priced once (calibrated.precision)

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
        if policy.cost == "macs" and not all(s.macs_per_sample for s in self.found.sites):
            example = self.options.example if self.options.example is not None else self.batches[0]
            self.found = WalkResult(with_macs(self.model, self.found.sites, example), self.found.skipped)
        if policy.cost == "bytes":
            plan = calibrated_bytes_plan(self, policy, self._priced)
        elif policy.cost == "latency":
            example = self.options.example if self.options.example is not None else self.batches[0]
            plan = calibrated_latency_plan(self, policy, example)
        else:
            plan = choose_ranks(self.found.sites, self.spectra, policy, method=self.method,
                                error_scale=self.error_scale)
        return with_held_rows(plan, self.model, self.held)

    def sequential_for(self, plan: dict, sequential: bool | str = "auto") -> tuple[bool, str | None]:
        """Whether ``plan`` is built sequentially, and why not when ``"auto"`` declines.

        ``"auto"`` refits sequentially every rank-only plan of whitened factors: on every model family of
        ``benchmarks/bench_builtin_calibration.py`` and BENCHMARKS.md's sequential rows it drifted less than per-layer
        factors (the encoder's worst held-out sentence most of all), for about twice the build time. Plans that
        store precisions (a budget in bytes), ``"scale"`` factors, a plan factoring one layer (whose inputs no
        other factored layer changes: the refit gives back its per-layer factors, measured on the wide CNN of
        ``benchmarks/bench_cnn.py``, for twice the time), an explicitly asked solver (``"exact"``,
        ``"randomized"``) and a refit that would need more than half the memory available
        (:func:`~factorize.calibrated.sequential.refit_memory`) stay per layer."""
        if sequential != "auto":
            return bool(sequential), None
        if any(e.precision is not None for e in plan_entries(plan)):
            return False, "per-layer factors: the plan stores precisions, which the sequential refit does not fit"
        if self.method != "whiten":
            return False, f"per-layer factors: the sequential refit needs whitened factors, not {self.method!r}"
        if self.fit.solver not in ("auto", "gram"):
            return False, (f"per-layer factors: the {self.fit.solver} solver asked for (the sequential refit has its "
                           "own)")
        factored = set(factored_names(plan))
        if len(factored) < 2:  # its inputs are the original's: the refit would give the same factors
            return False, "per-layer factors: one factored layer, nothing upstream for the sequential refit to absorb"
        need = refit_memory(self.model, [s for s in self.todo if s.name in factored])
        if need > MEMORY_SHARE * available_memory():
            return False, (f"per-layer factors: the sequential refit would need about {human_bytes(need)} (a copy of "
                           "the model and its widest layer's statistics), more than half the memory available")
        return True, None

    def fitted(self, plan: dict, *, sequential: bool | str = "auto", refit: bool = True,
               refit_ridge: float = REFIT_RIDGE, per_layer: nn.Module | None = None) -> Fitted:
        """:meth:`build` with ``sequential`` resolved by :meth:`sequential_for`. Under ``"auto"`` a model the refit
        cannot run on (its layers see different positions in the two models, ...) gets per-layer factors, with the
        reason (``failed``); ``sequential=True`` raises instead. ``per_layer``: the per-layer model of ``plan``,
        when already built (returned instead of building it again)."""
        def fallback() -> nn.Module:
            return per_layer if per_layer is not None else self.build(plan)

        use, note = self.sequential_for(plan, sequential)
        if not use:
            return Fitted(fallback(), False, note)
        try:
            return Fitted(self.build(plan, sequential=True, refit=refit, refit_ridge=refit_ridge), True)
        except FactorizeError as err:
            if sequential is True:
                raise
            return Fitted(fallback(), False, f"per-layer factors: the sequential refit failed ({err.message})",
                          failed=True)

    def build(self, plan: dict, *, sequential: bool = False, refit: bool = True,
              refit_ridge: float = REFIT_RIDGE) -> nn.Module:
        """A compressed copy of the model for ``plan``: per-layer factors with bias correction, or sequential."""
        stored = any(e.precision is not None for e in plan_entries(plan))
        if sequential and stored:
            raise FactorizeError("sequential refits rank-only factors layer by layer; this plan also stores "
                                 "precisions (a budget in bytes)", fix="drop sequential=True, or use cost='params'")
        if sequential:
            model, seq_spectra = compress_sequential(
                self.model, plan, self.batches, dataclasses.replace(self.fit, refit_ridge=refit_ridge), refit=refit,
                output_grams=self.output_grams, execution=self.execution)
            for name, spec in seq_spectra.items():  # predicted errors of the factors actually built
                e = plan["sites"][name]
                e["predicted_error"] = spec.relative_error(e["rank"])
                e["energy_kept"] = spec.energy_fraction(e["rank"])
            return model
        model = apply_plan(self.model, plan, spectra=self.spectra, hessians=hessians(self) if stored else None)
        apply_bias_shifts(model, plan, self.spectra)
        return model

    def drift_of(self, plan: dict) -> float:
        """Relative L2 drift on the calibration batches of the model ``plan`` builds (its factors as :meth:`build`
        makes them); the original's outputs are computed once."""
        if getattr(self, "_reference", None) is None:
            self._reference = run_outputs(self.model, self.batches, self.output_fn)
        return measure_drift(self._reference, self.build(plan), self.batches, output_fn=self.output_fn)

    def annotate(self, plan: dict, *, sequential: bool, note: str | None = None, failed: bool = False) -> None:
        """Record how the plan was calibrated (JSON-serialisable, carried into saved files); ``note``: why the
        factors are per layer although the sequential refit was allowed (``failed``: it was tried and failed,
        which reports show)."""
        plan["calibration"] = {
            "method": self.method,
            "sequential": bool(sequential),
            **({"sequential_note": note} if note else {}),
            **({"sequential_failed": True} if failed else {}),
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
    policy: Policy | None = None,
    options: CalibrationOptions | None = None,
    *,
    heldout: Iterable[Any] | None = None,
    inplace: bool = False,
    **keywords: Any,
) -> CalibratedResult:
    """Activation-aware compression from calibration batches (see the module docstring).

    Args:
        model: the trained model; not modified unless ``inplace=True``.
        calibration: sample-input batches (batch contract). Their inputs set each layer's statistics; keep
            them disjoint from the inputs you evaluate on.
        policy: the :class:`~factorize.plan.policy.Policy` (rank rule, include/exclude, overrides, multiple, cost,
            method, seed); or its keywords (``budget=0.5``, ...), see :meth:`Policy.from_keywords`.
        options: :class:`~factorize.calibrated.options.CalibrationOptions`, or its fields as keywords:
            sequential (``"auto"``, the default: factor layers in forward order from the partly compressed
            model's inputs, wherever :meth:`Calibration.sequential_for` allows it; False: per-layer factors), refit /
            refit_ridge (sequential only, see :func:`factorize.calibrated.sequential.compress_sequential`), fractions
            (probe ranks for ``sensitivity``; ``"auto"``: the budget and half of it, see :func:`auto_fractions`),
            max_drift (search for the smallest budget whose drift on ``heldout`` is at most this, see
            :func:`search_drift`; replaces the rank rule), drift_metric (or ``metric=``) / budgets / tolerance
            (of the drift search), and those of :class:`Calibration`.
        heldout: batches the drift search measures on.
        inplace: rewrite ``model`` itself.
    """
    policy, options = calibrated_setup(policy, options, keywords)
    if options.max_drift is not None:
        return search_drift(model, options.max_drift, calibration, heldout, policy, options, inplace=inplace)
    if options.fractions == "auto":
        options = dataclasses.replace(options, fractions=auto_fractions(
            policy.budget if policy.budget is not None else policy.keep))
    calib = Calibration(model, calibration, policy, options)
    return compress_from(calib, policy, sequential=options.sequential, refit=options.refit,
                         refit_ridge=options.refit_ridge, fractions=options.fractions, inplace=inplace)


def compress_from(calib: Calibration, policy: Policy, *, sequential: bool | str = "auto", refit: bool = True,
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
    built = calib.fitted(plan, sequential=sequential, refit=refit, refit_ridge=refit_ridge)
    compressed = built.model
    calib.annotate(plan, sequential=built.sequential, note=built.note, failed=built.failed)
    return _result(calib.model, compressed, plan, calib, inplace)


def _result(model: nn.Module, compressed: nn.Module, plan: dict, calib: Calibration, inplace: bool,
            search: DriftSearch | None = None) -> CalibratedResult:
    params_before = count_parameters(model)
    if inplace:  # swap the factored layers into the caller's model object (all built first, so nothing half-done)
        for name in rewritten_names(plan):
            set_module(model, name, get_module(compressed, name))
        compressed = model
    return CalibratedResult(
        model=compressed, plan=plan, sites=calib.found, spectra=dict(calib.spectra), params_before=params_before,
        params_after=count_parameters(compressed), stats={k: v.to_dict() for k, v in calib.stats.items()},
        sensitivity=calib.sensitivity, search=search, calibration=calib,
    )


# ---------------------------------------------------------------------------------------------------------------
# the search


def search_drift(
    model: nn.Module,
    max_drift: float,
    calibration: Iterable[Any],
    heldout: Iterable[Any] | None = None,
    policy: Policy | None = None,
    options: CalibrationOptions | None = None,
    *,
    inplace: bool = False,
    **keywords: Any,
) -> CalibratedResult:
    """The smallest budget whose measured drift on ``heldout`` stays at most ``max_drift``.

    Args:
        model: the trained model; not modified unless ``inplace=True``.
        max_drift: the limit, in ``drift_metric`` units (relative L2 by default; 1 - mean cosine for ``"cosine"``;
            the tail for ``"relative_l2_p95"`` and ``"cosine_p5"``, see the module docstring).
        calibration: batches for the statistics (and the sensitivity probes).
        heldout: batches to measure drift on; None measures on the calibration batches (optimistic: the
            result's ``search.heldout`` is then False).
        policy: a :class:`~factorize.plan.policy.Policy` with ``budget=`` (each budget tried replaces it), or
            its keywords without a rank rule (include, exclude, overrides, multiple, cost, method, seed).
        options: :class:`~factorize.calibrated.options.CalibrationOptions` or its fields as keywords:
            drift_metric (or ``metric=``: ``"relative_l2"``, ``"cosine"``, ``"relative_l2_p95"``,
            ``"cosine_p5"``); budgets (the (smallest, largest) budget searched); tolerance (bisection stops at
            this bracket width); sequential (``"auto"``/True: build the final model sequentially too -- the search
            itself uses per-layer factors -- and keep it only if its re-measured drift is lower; False: never);
            refit / refit_ridge; and those of
            :class:`Calibration` (method, sensitivity, output_fn, ...); ``output_fn`` also defines the output the
            drift is measured on.
        inplace: rewrite ``model`` itself.

    Returns:
        :class:`CalibratedResult` at the chosen budget; ``.search`` holds every budget walked and its drift.

    Raises:
        DriftTargetUnreachable: even ``budgets[1]`` drifts more than ``max_drift`` (carries the closest point).
    """
    policy, options = calibrated_setup(policy, options, keywords, search=True)
    metric, sequential = options.drift_metric, options.sequential
    lo, hi = _check_search(max_drift, options.budgets, options.tolerance)
    eval_batches = as_batch_list(heldout) if heldout is not None else as_batch_list(calibration)
    if options.fractions == "auto":
        options = dataclasses.replace(options, fractions=(0.5, 0.25))
    calib = Calibration(model, calibration, policy, options)
    output_fn = options.output_fn
    reference = run_outputs(model, eval_batches, output_fn)
    search = DriftSearch(max_drift=max_drift, metric=metric, heldout=heldout is not None)
    plans: dict[float, dict] = {}

    def drift_at(b: float) -> float | None:
        try:
            plan = calib.plan(policy.with_budget(b))
        except FactorizeError as err:  # too small to hold rank 1 everywhere
            search.points.append(DriftPoint(b, None, None, note=str(err).splitlines()[0]))
            return None
        d = measure_drift(reference, calib.build(plan), eval_batches, metric=metric, output_fn=output_fn)
        search.points.append(DriftPoint(b, d, plan_summary(plan)["kept_fraction"]))
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
        while hi - lo > options.tolerance:
            mid = round((lo + hi) / 2, 6)
            d = drift_at(mid)
            if d is not None and d <= max_drift:
                hi = good = mid
            else:
                lo = mid
    plan = plans[good]
    search.budget, search.drift = good, next(p.drift for p in search.points if p.budget == good)
    compressed = calib.build(plan)  # rebuilt: only plans are kept during the walk, never many model copies
    seq_plan = copy.deepcopy(plan)  # the sequential build writes its own predicted errors into the plan
    built = calib.fitted(seq_plan, sequential=sequential, refit=options.refit, refit_ridge=options.refit_ridge,
                         per_layer=compressed)
    used, note = built.sequential, built.note
    if used:
        d_seq = measure_drift(reference, built.model, eval_batches, metric=metric, output_fn=output_fn)
        search.points.append(DriftPoint(good, d_seq, plan_summary(seq_plan)["kept_fraction"], note="sequential"))
        if d_seq <= search.drift:
            compressed, plan, search.drift = built.model, seq_plan, d_seq
        else:  # keep the per-layer model, which was measured to meet the limit
            used, note = False, f"per-layer factors: they drifted less here than the sequential refit ({d_seq:.4g})"
    calib.annotate(plan, sequential=used, note=note, failed=built.failed)
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


# ---------------------------------------------------------------------------------------------------------------
# the entry from factorize.compress


