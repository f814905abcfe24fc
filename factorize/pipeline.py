"""The one-call Python API and the apply step.

``compress`` runs walk -> decompose -> choose ranks -> apply; each step is also usable on its own
(:func:`factorize.model.sites.walk`, :func:`decompose_sites`, :func:`factorize.plan.ranks.choose_ranks`, :func:`apply_plan`).
"""

from __future__ import annotations

import copy
import dataclasses
from collections.abc import Iterable, Mapping

from torch import nn

from factorize.calibrated.aware import AWARE_METHODS
from factorize.calibrated.search import CalibratedResult, compress_calibrated
from factorize.choices import calibrated_methods
from factorize.errors import FactorizeError
from factorize.model.count import count_parameters
from factorize.model.sites import (
    walk,
)
from factorize.plan.ranks import (
    Override,
    Policy,
    _rank_needed,
    choose_ranks,
)
from factorize.rewrite.apply import CompressResult, apply_plan
from factorize.spectra.decompose import METHODS, Spectrum
from factorize.spectra.sites import decompose_sites


def _policy_from(rank, energy, keep, budget, multiple, overrides, cost) -> Policy:
    ov = tuple(o if isinstance(o, Override) else Override(**o) for o in (overrides or ()))
    return Policy(rank=rank, energy=energy, keep=keep, budget=budget, multiple=multiple, overrides=ov, cost=cost)


def compress(
    model: nn.Module,
    *,
    budget: float | None = None,
    rank: int | None = None,
    energy: float | None = None,
    keep: float | None = None,
    include: str | Iterable[str] | None = None,
    exclude: str | Iterable[str] | None = None,
    method: str = "auto",
    multiple: int = 1,
    overrides: Iterable[Override | Mapping] | None = None,
    cost: str = "params",
    inplace: bool = False,
    seed: int = 0,
    precision: str | None = None,
    progress: bool = False,
    spectra: Mapping[str, Spectrum] | None = None,
    workers: int = 1,
    cache=None,
    speed_check: bool = False,
    speed_example=None,
    calibration: Iterable | None = None,
    calibrate: Iterable | None = None,
    aware_method: str | None = None,
    sequential: bool = False,
    sensitivity: bool | str = False,
    max_drift: float | None = None,
    heldout: Iterable | None = None,
    drift_metric: str = "relative_l2",
    output_fn=None,
) -> CompressResult:
    """Factor the dense layers of ``model`` at ranks chosen from their singular spectra.

    Args:
        model: a trained ``nn.Module``; not modified unless ``inplace=True``.
        budget / rank / energy / keep: the rank policy (exactly one); see :mod:`factorize.ranks`.
        include / exclude: glob patterns on qualified module names.
        method: ``"auto"`` (default: randomized SVD where the rank needed is small and an a-posteriori estimate
            puts it within 1% of optimal, else the Gram eigensolve), ``"exact"`` (LAPACK SVD), ``"gram"`` or ``"randomized"`` (Halko,
            Martinsson & Tropp 2011); see :mod:`factorize.decompose`.
        multiple: round ranks to this multiple (8 or 16 suit fast kernels).
        overrides: per-pattern exceptions (``Override`` or dicts with pattern and rank/energy/keep/dense).
        cost: what ``budget`` counts, ``"params"`` or ``"macs"``.
        inplace: rewrite ``model`` itself instead of a deep copy.
        seed: seed for randomized decompositions.
        precision: ``"float32"`` or ``"float64"`` compute dtype for the SVD.
        progress: show a progress bar on stderr.
        spectra: spectra from an earlier call (``result.spectra``) to reuse instead of decomposing again.
        workers: decompose this many layers concurrently (threads); results equal a serial run's.
        cache: a directory (or :class:`factorize.spectra.cache.SpectrumCache`) of spectra keyed by weight content, so a
            second run on the same weights skips the decomposition.
        speed_check: time each factored layer against its dense form on this machine (batch 1 and 32) and keep
            dense those that are slower; under ``budget=`` the freed budget is re-allocated to the others.
        speed_example: one sample batch to learn layer input shapes for the timing (needed for convolutions).
        calibration: sample-input batches (``calibrate=`` is an alias): activation-aware factors that keep each
            layer's outputs on these inputs (see :mod:`factorize.aware` and :func:`factorize.calibrated.search.compress_calibrated`).
        aware_method: ``"whiten"`` (default with calibration) or ``"scale"``; ``method="whiten"``/``"scale"`` too.
        sequential: with calibration, factor layers in forward order so later layers absorb earlier errors.
        sensitivity: with calibration, allocate ranks by measured final-output sensitivity: True or ``"both"``
            (gradients, then probes), ``"gradients"`` or ``"probes"`` alone.
        max_drift: with calibration, the smallest budget whose drift on ``heldout`` stays under this
            (``drift_metric`` ``"relative_l2"`` or ``"cosine"``); raises ``DriftLimitExceeded`` when unreachable.
        output_fn: ``output_fn(output, batch) -> tensor`` compared for sensitivity and drift (default: the
            primary output).

    Returns:
        :class:`CompressResult` with ``.model`` and ``.plan`` (a ``CalibratedResult`` with calibration).
    """
    if (calibration is not None or calibrate is not None or aware_method is not None or method in ("whiten", "scale")
            or sequential or sensitivity or max_drift is not None):
        from factorize.pipeline import (
            compress_from_api,  # the calibrated path lives in factorize.search
        )

        return compress_from_api(
            model, calibration=calibration, calibrate=calibrate, aware_method=aware_method, method=method,
            sequential=sequential, sensitivity=sensitivity, max_drift=max_drift, heldout=heldout,
            drift_metric=drift_metric, output_fn=output_fn, budget=budget, rank=rank, energy=energy, keep=keep,
            include=include, exclude=exclude, multiple=multiple, overrides=overrides, cost=cost, inplace=inplace,
            precision=precision, progress=progress, spectra=spectra, speed_check=speed_check,
        )
    if not isinstance(model, nn.Module):
        raise FactorizeError(f"expected a torch.nn.Module, got {type(model).__name__}", fix="pass the model object")
    if method not in METHODS:
        raise FactorizeError(f"unknown method {method!r}", fix=f"use one of {', '.join(METHODS)}")
    policy = _policy_from(rank, energy, keep, budget, multiple, overrides, cost)
    found = walk(model, include=include, exclude=exclude)
    if not found.sites:
        raise FactorizeError(
            "no factorizable layer found" + (" matching the include/exclude patterns" if include or exclude else ""),
            [f"{s.name}: {s.reason}" for s in found.skipped],
            fix="factorize handles nn.Linear, nn.Conv1d/2d (groups=1), nn.Embedding and transposed projections; "
            "check the include/exclude globs against model.named_modules()",
        )
    todo = [s for s in found.sites if not s.tied_with]
    have = dict(spectra or {})
    need = [s for s in todo if s.name not in have]
    ranks = {s.name: _rank_needed(s, policy) for s in need} if method in ("auto", "randomized") else None
    have.update(
        decompose_sites(
            model, need, method=method, ranks=ranks, seed=seed, precision=precision, progress=progress,
            workers=workers, cache=cache,
        )
    )
    plan = choose_ranks(found.sites, have, policy, method=method)
    params_before = count_parameters(model)
    target = copy.deepcopy(model) if (speed_check or not inplace) else model
    apply_plan(target, plan, spectra=have, inplace=True)
    timings = []
    if speed_check:
        from factorize.measure.speed import (
            keep_fast,  # speed imports evaluate, which needs this module loaded first
        )

        slow, timings = keep_fast(model, target, example=speed_example)
        if slow:
            policy = dataclasses.replace(policy, overrides=policy.overrides + tuple(Override(n, dense=True) for n in slow))
            try:
                plan = choose_ranks(found.sites, have, policy, method=method)
            except FactorizeError as err:
                raise FactorizeError(
                    "the speed check kept layers dense that the budget cannot afford",
                    [*slow.values(), str(err).splitlines()[0]],
                    fix="raise the budget, or compress without the speed check and accept the measured slow-down",
                ) from None
            for name, reason in slow.items():
                plan["sites"][name]["reason"] = reason
        target = model if inplace else copy.deepcopy(model)
        apply_plan(target, plan, spectra=have, inplace=True)
    return CompressResult(
        model=target,
        plan=plan,
        sites=found,
        spectra=have,
        params_before=params_before,
        params_after=count_parameters(target),
        timings=[t.to_dict() for t in timings],
    )


def compress_from_api(
    model: nn.Module,
    *,
    calibration,
    calibrate,
    aware_method: str | None,
    method: str,
    sequential: bool,
    sensitivity: bool | str,
    max_drift: float | None,
    heldout,
    drift_metric: str,
    output_fn,
    spectra,
    speed_check: bool,
    **options,
) -> CalibratedResult:
    """Validate the calibration options of :func:`factorize.compress` and run :func:`compress_calibrated`."""
    if calibration is not None and calibrate is not None:
        raise FactorizeError("calibration= and calibrate= are the same option, given twice",
                             fix="pass the sample batches once, as calibration=")
    batches = calibration if calibration is not None else calibrate
    asked = [name for name, on in (("method=" + repr(method), method in AWARE_METHODS),
                                    ("aware_method=", aware_method is not None), ("sequential=", sequential),
                                    ("sensitivity=", sensitivity), ("max_drift=", max_drift is not None)) if on]
    if batches is None:
        raise FactorizeError(f"{', '.join(asked)} needs calibration sample inputs",
                             fix="pass calibration=batches (tensors, tuples or dicts the model accepts)")
    if aware_method is not None and method in AWARE_METHODS and aware_method != method:
        raise FactorizeError(f"method={method!r} and aware_method={aware_method!r} disagree",
                             fix="give the activation-aware method once")
    aware, solver = calibrated_methods(method, aware_method)  # shared with the command line's calibrated sweep
    unsupported = [f"{k}=" for k, v in (("spectra", spectra), ("speed_check", speed_check)) if v]
    if unsupported:
        raise FactorizeError(f"{', '.join(unsupported)} cannot be combined with calibration yet",
                             fix="compress without calibration to use them, or drop them")
    return compress_calibrated(model, batches, method=aware, sequential=sequential, sensitivity=sensitivity,
                               max_drift=max_drift, heldout=heldout, metric=drift_metric, output_fn=output_fn,
                               solver=solver, **options)

