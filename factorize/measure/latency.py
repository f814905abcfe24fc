"""Budgets in measured time (``cost="latency"``): every candidate form of a layer priced in milliseconds measured on
this machine, at the user's batch shape.

Fewer multiply-accumulates do not always mean lower latency (common practice): two thin products pay two passes
over the activations and small shapes run far from peak. So each layer's forms are timed where they will run:

1. The layers' input shapes are recorded on the user's sample batch (the batch size is the user's).
2. Every selected layer is timed dense (``t_dense``), interleaved with its
   factored form at three probe ranks (the smallest, middle and largest candidate rank) so a slow spell of a
   shared machine hits both alike (:func:`factorize.measure.timing.paired_ms`).
3. A factored layer's time is modelled as affine in its rank, t(r) = a + b r (its two products are linear in r),
   fitted by least squares to the three probes; a form whose time is not below ``t_dense`` is never offered, so
   the planner never picks a form measured slower than the dense layer.
4. The budget is a fraction of the whole model's measured time. The joint planner (:mod:`factorize.plan.joint`)
   picks the forms with the least predicted error within ``budget`` of the layers' summed dense time; then the
   whole rewritten model is timed against the original (interleaved), and while the measured ratio misses the
   budget (or undershoots it by more than 10%) the layers' share is scaled by budget / ratio and planned again (a
   layer timed alone runs faster or slower than inside the model: caches, the work around it); the plan with the
   largest share measured within budget is kept.

Stored precisions are not timed here: a rounded weight is decoded on every forward pass, which costs time on the
CPU, so under a time budget every form keeps its weight's own precision. The result is measured afterwards (the
report's latency), and that measurement, not this model, is the number to trust.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
from torch import nn

from factorize.errors import FactorizeError
from factorize.measure.speed import probe_input, record_input_shapes
from factorize.measure.timing import latency_spread, paired_samples
from factorize.model.sites import Site, get_module, matrix_of
from factorize.plan.forms import (
    LayerMetric,
    Priced,
    candidate_ranks,
    joint_plan,
    native_precision,
)
from factorize.plan.joint import Candidate
from factorize.rewrite.layers import build_factored
from factorize.spectra.decompose import Spectrum

PROBES = 3  # factored ranks timed per layer (the time model is affine in the rank)
ROUNDS = 4  # plans measured on the whole model at most
MARGIN = 0.9  # plans aim at 0.9 x budget: the check a user repeats (median of interleaved passes) is noisier
TOLERANCE = 0.8  # a measured ratio within [0.8, 0.9] x budget is taken as it is (else the share is corrected)
REPEATS = 21  # interleaved timed calls per pair


def _factored_at(module: nn.Module, kind: str, rank: int) -> nn.Module:
    layer = build_factored(module, kind, rank)
    with torch.no_grad():
        for p in (*layer.first.parameters(), *layer.second.parameters()):
            p.normal_(0, 0.02)  # real values: uninitialised memory may hold denormals that time differently
    return layer.eval()


def time_forms(module: nn.Module, kind: str, shape: tuple[int, ...], ranks: Sequence[int], *,
               repeats: int = REPEATS,
               clock: Callable[[], float] = time.perf_counter) -> tuple[float, dict[int, float]]:
    """(dense ms, rank -> factored ms) of one layer on an input of ``shape``, each pair interleaved; the fastest
    call of each, the least disturbed estimate on a shared machine (common practice in benchmarking)."""
    x = probe_input(module, shape, shape[0], module.weight)
    if not ranks:
        d, _ = paired_samples(lambda: module(x), lambda: module(x), repeats=repeats, clock=clock)
        return float(min(d)), {}
    dense_ms, out = [], {}
    for r in ranks:
        fac = _factored_at(module, kind, r)
        d, f = paired_samples(lambda: module(x), lambda fac=fac: fac(x), repeats=repeats, clock=clock)
        dense_ms.append(min(d))
        out[r] = float(min(f))
    return float(min(dense_ms)), out


def affine_times(probes: Mapping[int, float], ranks: Sequence[int]) -> dict[int, float]:
    """t(r) = a + b r fitted by least squares to the probe times (b clipped at 0), at every rank."""
    r = np.array(sorted(probes), dtype=float)
    t = np.array([probes[int(k)] for k in r])
    if len(r) == 1:
        a, b = float(t[0]), 0.0
    else:
        b, a = np.polyfit(r, t, 1)
        b = max(float(b), 0.0)
        a = float(np.mean(t - b * r))
    return {int(k): max(a + b * k, 1e-6) for k in ranks}


@dataclass(frozen=True)
class Probes:
    """How :func:`latency_plan` measures: ``timer(module, kind, shape, ranks) -> (dense ms, rank -> ms)`` for one
    layer, and ``measure`` (plan -> the rewritten model's time over the original's; ``"whole model"`` builds
    :func:`measured_ratio`, None skips the whole-model check). Tests inject both."""

    timer: Callable[..., tuple[float, dict[int, float]]] = time_forms
    measure: Callable[[dict], float] | str | None = "whole model"


def measured_ratio(model: nn.Module, spectra: Mapping[str, Spectrum], example: Any, *,
                   repeats: int = REPEATS) -> Callable[[dict], float]:
    """A function plan -> measured time of the model rewritten by ``plan`` over the original's: the fastest of
    interleaved whole-model passes on ``example`` each (:func:`factorize.measure.timing.latency_spread`), the
    least disturbed estimate on a shared machine; the report measures the result again, with its spread."""
    from factorize.rewrite.apply import apply_plan

    def ratio(plan: dict) -> float:
        compressed = apply_plan(model, plan, spectra=spectra)
        before, after = latency_spread(model, compressed, example, repeats=repeats)
        return after.low / before.low if before.low > 0 else 1.0

    return ratio


def latency_plan(
    model: nn.Module,
    sites: Sequence[Site],
    spectra: Mapping[str, Spectrum],
    policy,
    example: Any,
    *,
    method: str,
    metrics: Mapping[str, LayerMetric] | None = None,
    probes: Probes | None = None,
) -> dict:
    """The plan of ``policy`` (``cost="latency"``, ``budget`` a fraction of the model's measured time on
    ``example``).

    Candidates are priced by ``probes.timer`` (default :func:`time_forms`; injectable for tests), errors as in
    :func:`factorize.plan.forms.candidates_for` at the weight's own precision; sites tied to others stay dense.
    A layer timed alone runs faster or slower than inside the model (caches, the work around it), so the layers'
    share is then corrected by measurement: the plan for ``budget`` of the layers' summed dense time is built and
    the whole model measured (``probes.measure``: plan -> measured ratio, default :func:`measured_ratio`; None
    skips it). Plans aim at :data:`MARGIN` x budget, room for the noisier check a user repeats; while the ratio
    misses that aim, or undershoots the budget by more than 20%, the layers' share is scaled by aim / ratio (at
    most :data:`ROUNDS` plans); a plan measured within the aim is measured again and counts at the slower of the
    two; the plan with the largest share within the aim is kept (else the fastest measured).
    ``plan["selection"]["measured_ratio"]`` records what was measured.
    """
    probes = probes or Probes()
    timer, measure = probes.timer, probes.measure
    if example is None:
        raise FactorizeError("cost='latency' times the layers at your batch shape and needs a sample input",
                             fix="pass example=batch (or calibration=batches), or use cost='params' / 'bytes'")
    todo = [s for s in sites if not s.tied_with]
    shapes = record_input_shapes(model, [s.name for s in todo], example)
    missing = [s.name for s in todo if s.name not in shapes]
    if missing:
        raise FactorizeError("the example input never reached some layers, so their time is unknown", missing,
                             fix="give an example that runs through these layers, or exclude them")
    natives, cands, scales, dense_total = {}, {}, {}, 0.0
    for s in sites:
        natives[s.name] = native_precision(matrix_of(get_module(model, s.name), s.kind).dtype)
    for s in todo:
        module, spec = get_module(model, s.name), spectra[s.name]
        metric = (metrics or {}).get(s.name) or LayerMetric(None, None, 1.0 / max(spec.total_energy, 1e-300))
        scales[s.name] = metric.scale
        cands[s.name], t_dense = _layer_candidates(s, module, spec, metric, shapes[s.name], natives[s.name],
                                                   policy.multiple, timer)
        dense_total += t_dense
    if measure == "whole model":
        measure = measured_ratio(model, spectra, example)
    floor = sum(min(c.cost for c in cs) for cs in cands.values())
    aim = MARGIN * policy.budget
    share, best, tried = aim, None, []
    for _ in range(ROUNDS if measure is not None else 1):
        plan = joint_plan(sites, Priced(cands, natives, scales), spectra, max(share * dense_total, floor),
                          policy=policy.to_dict(), method=method, cost="latency")
        ratio = measure(plan) if measure is not None else None
        if ratio is not None and ratio <= aim:
            ratio = max(ratio, measure(plan))  # confirmed by a second measurement: the lowest of noisy rounds
            # would otherwise be kept for its luck
        tried.append((share, ratio, plan))
        if ratio is None:
            break
        if ratio <= aim and (best is None or share > best[0]):
            best = tried[-1]
        at_floor = share * dense_total <= floor
        if TOLERANCE * policy.budget <= ratio <= aim or (ratio > aim and at_floor):
            break
        share = min(share * aim / max(ratio, 1e-9), 1.0)  # the layers' share, corrected by measurement
    share, ratio, plan = best if best is not None else min(tried, key=lambda t: (t[1] or 0.0))
    plan["selection"]["measured_ratio"] = ratio
    plan["selection"]["measured_rounds"] = len(tried)
    if ratio is not None and ratio > policy.budget:
        plan["selection"]["missed"] = (
            f"measured {ratio:.3g}x the original's time, above the budget {policy.budget:g}: "
            + ("no factored form of these layers is faster than the dense one at this batch shape"
               if all(len(cs) == 1 for cs in cands.values()) else "even the fastest forms offered do not reach it"))
    plan["selection"]["layers_dense_ms"] = dense_total
    return plan


def _layer_candidates(site, module, spec, metric, shape, native, multiple, timer) -> tuple[list[Candidate], float]:
    ranks = candidate_ranks(site, spec, multiple)
    if not ranks:
        t_dense, _ = timer(module, site.kind, shape, [])
        return [Candidate("dense", native, None, float(t_dense), 0.0)], float(t_dense)
    probes = sorted({ranks[0], ranks[len(ranks) // 2], ranks[-1]})[:PROBES]
    t_dense, measured = timer(module, site.kind, shape, probes)
    times = affine_times(measured, ranks)
    errors = spec.errors() ** 2
    out = [Candidate("dense", native, None, float(t_dense), 0.0)]
    for r in ranks:
        if times[r] < t_dense and math.isfinite(times[r]):  # never a form measured (modelled) slower than dense
            out.append(Candidate("factor", native, r, float(times[r]),
                                 metric.scale * float(errors[min(r, len(errors) - 1)])))
    return out, float(t_dense)
