"""The one-call Python API: ``compress``, the only place that combines spectra, plan and rewrite.

``compress`` runs walk -> decompose -> choose ranks -> apply; each step is also usable on its own
(:func:`factorize.model.sites.walk`, :func:`decompose_sites`, :func:`factorize.plan.ranks.choose_ranks`,
:func:`apply_plan`). With calibration inputs it runs :func:`factorize.calibrated.search.compress_calibrated`.

Its keywords are parsed in one place, :func:`parse_options`, into a :class:`~factorize.plan.policy.Policy`
(what to compress and how far), :class:`RunOptions` (how the plain path runs) and, on the calibrated path,
:class:`~factorize.calibrated.options.CalibrationOptions`.
"""

from __future__ import annotations

import copy
import dataclasses
import warnings
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

from torch import nn

from factorize.calibrated.options import (
    CalibrationOptions,
    calibrated_setup,
    refuse_with_calibration,
)
from factorize.calibrated.search import CalibratedResult, compress_calibrated  # noqa: F401 - re-exported
from factorize.errors import FactorizeError, UnverifiedModelWarning, caller_stacklevel
from factorize.execution import Execution, resolve_execution
from factorize.measure.evaluate import with_macs
from factorize.measure.latency import latency_plan
from factorize.model.count import count_parameters
from factorize.model.sites import WalkResult, walk
from factorize.plan.defaults import excluding, held_by_default, with_held_rows
from factorize.plan.entries import factored_ranks
from factorize.plan.forms import bytes_plan
from factorize.plan.policy import (
    AWARE_METHODS,
    POLICY_KEYWORDS,
    Override,
    Policy,
    rank_needed,
    resolve_policy,
    values_first,  # the rule lives in the plan layer (the weights-only shrink calls it too)
)
from factorize.plan.ranks import choose_ranks
from factorize.rewrite.apply import CompressResult, apply_plan
from factorize.rewrite.verify import check_runs, keep_working
from factorize.spectra.decompose import Spectrum
from factorize.spectra.sites import decompose_sites, leading_sites, values_sites


@dataclass(frozen=True)
class RunOptions:
    """What :func:`compress` does besides the Policy (see its Args); ``execution`` is how it runs (precision,
    workers, the Policy's seed, progress), passed whole to the spectra and the calibrated path."""

    execution: Execution = Execution()
    spectra: Mapping[str, Spectrum] | None = None
    cache: Any = None
    speed_check: bool = False
    speed_example: Any = None
    example: Any = None
    on_break: str = "dense"  # a factored layer that breaks the forward pass: "dense" (keep it dense) or "raise"


# compress's own run keywords: the RunOptions fields, and the Execution fields it takes loose (the seed comes from
# the Policy, progress is compress's own argument)
RUN_KEYWORDS = ("precision", "workers", *(f.name for f in dataclasses.fields(RunOptions) if f.name != "execution"))
# the calibrated-path keywords compress accepts (precision, workers and progress come from the run options, the
# solver from the Policy's method)
CALIBRATION_KEYWORDS = tuple(f.name for f in dataclasses.fields(CalibrationOptions)
                             if f.name not in ("solver", "precision", "workers", "progress", "example"))
ALIASES = {"calibrate": "calibration"}


def compress(
    model: nn.Module,
    policy: Policy | None = None,
    *,
    calibration: Iterable | None = None,
    heldout: Iterable | None = None,
    inplace: bool = False,
    progress: bool = False,
    **options: Any,
) -> CompressResult:
    """Factor the dense layers of ``model`` at ranks chosen from their singular spectra.

    Args:
        model: a trained ``nn.Module``; not modified unless ``inplace=True``.
        policy: a :class:`~factorize.plan.policy.Policy`; or, instead, its keywords:
            ``budget`` / ``rank`` / ``energy`` / ``keep`` (the rank rule, exactly one, see
            :mod:`factorize.plan.ranks`); ``include`` / ``exclude`` (glob patterns on qualified module names);
            ``method``: ``"auto"`` (default: randomized SVD where the rank needed is small and an a-posteriori
            estimate puts it within 1% of optimal, else the Gram eigensolve), ``"exact"`` (LAPACK SVD), ``"gram"``
            or ``"randomized"`` (Halko, Martinsson & Tropp 2011), see :mod:`factorize.spectra.decompose`; with
            ``budget`` and ``"auto"`` the singular values come first and only the kept vectors are computed (see
            :func:`values_first`);
            ``"whiten"`` / ``"scale"`` ask for activation-aware factors (need calibration); ``multiple`` (round
            ranks to this multiple; 8 or 16 suit fast kernels); ``overrides`` (per-pattern exceptions:
            ``Override`` or mappings with pattern and rank/energy/keep/dense); ``cost``: what ``budget`` counts,
            ``"params"`` or ``"macs"`` (multiply-accumulates per sample, measured on ``example`` or the first
            calibration batch); ``seed`` (for randomized decompositions).
        calibration: sample-input batches (``calibrate=`` is an alias): activation-aware factors that keep each
            layer's outputs on these inputs (see :mod:`factorize.calibrated.aware` and
            :func:`factorize.calibrated.search.compress_calibrated`).
        heldout: batches the ``max_drift`` search measures drift on.
        inplace: rewrite ``model`` itself instead of a deep copy.
        progress: show progress bars on stderr.
        options: run options --
            ``precision``: ``"float32"`` or ``"float64"`` compute dtype for the SVD;
            ``spectra``: spectra from an earlier call (``result.spectra``) to reuse instead of decomposing again;
            ``workers``: decompose this many layers concurrently (threads); results equal a serial run's;
            ``cache``: a directory (or :class:`factorize.spectra.cache.SpectrumCache`) of spectra keyed by weight
            content, so a second run on the same weights skips the decomposition (not with calibration: its
            spectra depend on the inputs too);
            ``speed_check``: time each factored layer against its dense form on this machine (batch 1 and 32) and
            keep dense those that are slower; under ``budget=`` the freed budget is re-allocated to the others;
            ``speed_example``: one sample batch to learn layer input shapes for the timing (needed for convs);
            ``example``: one sample batch to count multiply-accumulates on for ``cost="macs"``, and to run the
            result on;
            ``on_break``: what to do when the compressed model fails its check run (see Returns): ``"dense"``
            (default) keeps the layers that break it dense and says why in the plan; ``"raise"`` raises.
            With calibration, also -- ``aware_method``: ``"whiten"`` (default) or ``"scale"``;
            ``sequential``: ``"auto"`` (default) factors layers in forward order so later layers absorb earlier
            errors, for rank-only plans of whitened factors (per-layer factors otherwise, with the reason in
            ``plan["calibration"]``); True insists, False gives per-layer factors (about half the build time);
            ``sensitivity``: allocate ranks by measured final-output sensitivity: True or ``"both"`` (gradients,
            then probes), ``"gradients"`` or ``"probes"`` alone; ``max_drift``: the smallest budget whose drift on
            ``heldout`` stays under this (``drift_metric`` ``"relative_l2"``, ``"cosine"``, or the tail:
            ``"relative_l2_p95"``, ``"cosine_p5"``), raising ``DriftLimitExceeded`` when unreachable;
            ``output_fn``: ``output_fn(output, batch) -> tensor``
            compared for sensitivity and drift (default: the primary output); and the other fields of
            :class:`~factorize.calibrated.options.CalibrationOptions` (alpha, center, ridge, fractions, ...).

    Returns:
        :class:`CompressResult` with ``.model`` and ``.plan`` (a ``CalibratedResult`` with calibration). The
        model has been run once on a sample batch (``example``, else the first calibration or held-out batch);
        a factored layer that broke that run was kept dense, named in the plan with the reason. With no sample
        batch at hand nothing is run, and an :class:`~factorize.errors.UnverifiedModelWarning` says so.

    Raises:
        FactorizeError: bad input, e.g. an unknown keyword (the message lists the accepted ones), a Policy
            together with policy keywords, or no factorizable layer.
    """
    policy, run, calibrated, batches = parse_options(policy, calibration, options, progress=progress)
    batches = None if batches is None else list(batches)  # iterated again for the check run
    heldout = None if heldout is None else list(heldout)
    sample = next((b[0] for b in (batches, heldout) if b), None) if run.example is None else run.example
    if calibrated is not None:
        result = compress_calibrated(model, batches, policy, calibrated, heldout=heldout, inplace=inplace)
    else:
        result = _compress_plain(model, policy, run, inplace)
    return _checked(model, result, sample, run.on_break, inplace)


def _checked(model: nn.Module, result: CompressResult, sample: Any, on_break: str, inplace: bool) -> CompressResult:
    """Run the result once on ``sample``; keep dense (or raise for) the factored layers that break it."""
    if sample is None:
        warnings.warn("compress() had no sample input, so the compressed model was not run; pass example=batch "
                      "(or calibration=) to check that it still runs", UnverifiedModelWarning,
                      stacklevel=caller_stacklevel())
        return result
    if inplace:  # the original layers are gone: the run can only be checked, not repaired layer by layer
        error = check_runs(result.model, sample)
        if error is not None:
            raise FactorizeError(f"the compressed model fails its forward pass on the sample batch: {error}",
                                 fix="compress a copy (inplace=False) so that breaking layers can be kept dense")
        return result
    verified = keep_working(model, result.model, result.plan, sample, on_break=on_break)
    if verified.broken:
        result.model, result.plan = verified.model, verified.plan
        result.params_after = count_parameters(verified.model)
    return result


def _compress_plain(model: nn.Module, policy: Policy, run: RunOptions, inplace: bool):
    if not isinstance(model, nn.Module):
        raise FactorizeError(f"expected a torch.nn.Module, got {type(model).__name__}", fix="pass the model object")
    held = held_by_default(model, policy)  # a transformers model's input embedding, under a budget
    found = walk(model, include=policy.include, exclude=excluding(policy, held)).require_sites(policy.filtered)
    if policy.cost == "macs":
        found = WalkResult(with_macs(model, found.sites, run.example), found.skipped)
    todo = [s for s in found.sites if not s.tied_with]
    have = dict(run.spectra or {})
    need = [s for s in todo if s.name not in have]
    if policy.cost in ("bytes", "latency"):  # candidate forms priced per layer: they need every vector pair
        if run.speed_check:
            raise FactorizeError(f"speed_check times factored layers against dense ones; a budget in {policy.cost} "
                                 "already prices every form", fix="drop speed_check, or use cost='params'")
        have.update(decompose_sites(model, need, method="gram" if policy.method == "auto" else policy.method,
                                    execution=run.execution, cache=run.cache))
        if policy.cost == "latency":
            plan = latency_plan(model, found.sites, have, policy, run.example, method=policy.method)
        else:
            plan = bytes_plan(model, found.sites, have, policy, method=policy.method)
    elif values_first(policy):  # ranks unknown until every spectrum is in: values, allocation, then kept vectors
        have.update(values_sites(model, need, keep_gram=True, execution=run.execution, cache=run.cache))
        plan = choose_ranks(found.sites, have, policy, method=policy.method)
        have = _with_vectors(model, found, plan, have, run)
    else:
        ranks = {s.name: rank_needed(s, policy) for s in need} if policy.method in ("auto", "randomized") else None
        have.update(decompose_sites(model, need, method=policy.method, ranks=ranks, execution=run.execution,
                                    cache=run.cache))
        plan = choose_ranks(found.sites, have, policy, method=policy.method)
    params_before = count_parameters(model)
    target = copy.deepcopy(model) if (run.speed_check or not inplace) else model
    apply_plan(target, plan, spectra=have, inplace=True)
    timings = []
    if run.speed_check:
        plan, target, timings = _keep_fast(model, target, found, have, plan, policy, run, inplace)
    plan = with_held_rows(plan, model, held)
    return CompressResult(
        model=target,
        plan=plan,
        sites=found,
        spectra=have,
        params_before=params_before,
        params_after=count_parameters(target),
        timings=[t.to_dict() for t in timings],
    )


def sweep_spectra(
    model: nn.Module,
    policies: Iterable[Policy],
    *,
    execution: Execution | None = None,
    cache: Any = None,
    **keywords: Any,
) -> dict[str, Spectrum] | None:
    """One decomposition for several budgets: pass the result as ``compress(model, policy, spectra=...)``.

    The singular values of every site are found once; each policy's plan is drawn from them; then each site's
    vectors are computed once, at the largest rank any policy gives it, within 1% of the optimal error at every
    rank a policy gives it (leading vectors of one converged block serve each smaller rank: the guard of
    :func:`factorize.spectra.decompose.leading` checks each). Returns None when the policies do not take the
    values-first route (see :func:`values_first`; also for ``cost="macs"``, which needs a sample batch per run)
    or differ in the layers they select: then reuse ``result.spectra`` of the first run instead.

    ``execution`` (:class:`~factorize.execution.Execution`, or its ``precision`` / ``workers`` / ``progress``
    keywords) says how the spectra are computed; its seed is the policies' own (they must agree).
    """
    execution, rest = resolve_execution(execution, keywords)
    if rest:
        raise FactorizeError(f"sweep_spectra() got unknown keyword{'s' if len(rest) > 1 else ''}: {', '.join(rest)}",
                             fix="accepted: execution, cache, precision, workers, progress")
    policies = list(policies)
    if not policies or not all(values_first(p) and p.cost == "params" for p in policies):
        return None
    first = policies[0]
    if any((p.include, p.exclude, p.seed) != (first.include, first.exclude, first.seed) for p in policies):
        return None
    held = held_by_default(model, first)  # as compress selects them (every policy here has a budget)
    found = walk(model, include=first.include, exclude=excluding(first, held)).require_sites(first.filtered)
    todo = [s for s in found.sites if not s.tied_with]
    execution = execution.replace(seed=first.seed)
    have = values_sites(model, todo, keep_gram=True, execution=execution, cache=cache)
    wanted: dict[str, set[int]] = {}
    for p in policies:
        for name, rank in factored_ranks(choose_ranks(found.sites, have, p, method=p.method)).items():
            wanted.setdefault(name, set()).add(int(rank))
    ranks = {name: max(rs) for name, rs in wanted.items()}
    return leading_sites(model, found.sites, ranks, have, guard_ranks=wanted, execution=execution, cache=cache)


def _with_vectors(model, found, plan, have, run, execution=None):
    """``have`` with vector pairs up to each factored site's planned rank (:func:`leading_sites`)."""
    ranks = factored_ranks(plan)
    return leading_sites(model, found.sites, ranks, have, execution=execution or run.execution, cache=run.cache)


def _keep_fast(model, target, found, have, plan, policy, run, inplace):
    """Time the factored layers and re-plan with the slow ones dense (see ``speed_check``)."""
    from factorize.measure.speed import (
        keep_fast,  # speed imports evaluate, which needs this module loaded first
    )

    slow, timings = keep_fast(model, target, example=run.speed_example)
    if not slow:
        return plan, target, timings
    dense = policy.overrides + tuple(Override(n, dense=True) for n in slow)
    try:
        plan = choose_ranks(found.sites, have, dataclasses.replace(policy, overrides=dense), method=policy.method)
    except FactorizeError:  # the budget cannot be met with them dense: it then covers the layers that pay
        plan = _plan_without(found, have, policy, slow)
        slow = {n: f"{r}; the budget applies to the other layers" for n, r in slow.items()}
    for name, reason in slow.items():
        plan["sites"][name]["reason"] = reason
    quiet = run.execution.replace(progress=False)
    have.update(_with_vectors(model, found, plan, have, run, quiet))  # freed budget may raise some ranks
    target = model if inplace else copy.deepcopy(model)
    apply_plan(target, plan, spectra=have, inplace=True)
    return plan, target, timings


def _plan_without(found, have, policy, slow: Mapping[str, str]) -> dict:
    """The plan with the ``slow`` layers left out of the allocation (kept dense) and the budget spread over the
    rest; when the rest cannot meet it either, one error naming every slow layer."""
    from factorize.plan.ranks import (
        site_entry,  # one plan row, as choose_ranks writes it
    )

    rest = [s for s in found.sites if s.name not in slow]
    try:
        plan = choose_ranks(rest, have, policy, method=policy.method)
    except FactorizeError as err:
        raise FactorizeError(
            "the speed check found factored layers slower than dense, and the budget cannot be met without them",
            [f"{n}: {r}" for n, r in slow.items()] + [str(err).splitlines()[0]],
            fix="raise the budget, or compress without --speed-check and accept the measured slow-down",
        ) from None
    by_name = found.by_name()
    plan["sites"] = {s.name: plan["sites"].get(s.name) or site_entry(by_name[s.name], None, None, slow[s.name])
                     for s in found.sites if s.name in plan["sites"] or s.name in slow}
    return plan


def parse_options(
    policy: Policy | None, calibration: Iterable | None, options: Mapping[str, Any], *, progress: bool = False,
) -> tuple[Policy, RunOptions, CalibrationOptions | None, Iterable | None]:
    """The keywords of :func:`compress`, parsed in one place: (policy, run options, calibration options or None
    for the plain path, calibration batches). Every problem is a FactorizeError naming the keyword."""
    options = dict(options)
    if "calibrate" in options:
        alias = options.pop("calibrate")
        if calibration is not None and alias is not None:
            raise FactorizeError("calibration= and calibrate= are the same option, given twice",
                                 fix="pass the sample batches once, as calibration=")
        calibration = alias if calibration is None else calibration
    accepted = (*POLICY_KEYWORDS, *RUN_KEYWORDS, *CALIBRATION_KEYWORDS)
    unknown = [k for k in options if k not in accepted]
    if unknown:
        raise FactorizeError(
            f"compress() got unknown keyword{'s' if len(unknown) > 1 else ''}: {', '.join(unknown)}",
            fix="accepted: policy, calibration, calibrate, heldout, inplace, progress, " + ", ".join(accepted))
    policy_kw = {k: v for k, v in options.items() if k in POLICY_KEYWORDS}
    run_kw = {k: v for k, v in options.items() if k in RUN_KEYWORDS}
    loose = {k: run_kw.pop(k) for k in ("precision", "workers") if k in run_kw}
    run = RunOptions(execution=Execution(**loose, progress=progress), **run_kw)
    calib_kw = {k: v for k, v in options.items() if k in CALIBRATION_KEYWORDS}
    method = policy.method if policy is not None else policy_kw.get("method")
    asked = ([f"method={method!r}"] if method in AWARE_METHODS else []) + [
        f"{k}=" for k, v in calib_kw.items() if _differs(v, getattr(CalibrationOptions, k))]
    if calibration is None:
        if asked:
            raise FactorizeError(f"{', '.join(asked)} needs calibration sample inputs",
                                 fix="pass calibration=batches (tensors, tuples or dicts the model accepts)")
        policy = resolve_policy(policy, policy_kw)
        return policy, _seeded(run, policy), None, None
    refuse_with_calibration(spectra=run.spectra is not None, speed_check=run.speed_check,
                            cache=run.cache is not None)
    ex = run.execution
    policy, calibrated = calibrated_setup(policy, None, {
        **policy_kw, **calib_kw, "precision": ex.precision, "workers": ex.workers, "progress": ex.progress,
        "example": run.example})
    return policy, _seeded(run, policy), calibrated, calibration


def _seeded(run: RunOptions, policy: Policy) -> RunOptions:
    """``run`` whose execution carries the Policy's seed (the one seed of randomized decompositions)."""
    return dataclasses.replace(run, execution=run.execution.replace(seed=policy.seed))


def _differs(value: Any, default: Any) -> bool:
    """True when a keyword was given a value other than its default (tensors and callables count as given)."""
    if value is default:
        return False
    if isinstance(value, (bool, int, float, str, tuple, type(None))):
        return value != default
    return True
