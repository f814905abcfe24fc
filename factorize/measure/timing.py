"""Wall-clock timing of forward passes, two callables interleaved so a slow spell of a shared machine hits both.

The clock is a parameter (default :func:`time.perf_counter`) so tests can drive the interleaving and the median
with a fake clock instead of patching this module.
"""

from __future__ import annotations

import statistics
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import torch
from torch import nn

from factorize.model.feed import feed


def median_latency(
    a: nn.Module, b: nn.Module, batch: Any, *, repeats: int = 7, clock: Callable[[], float] = time.perf_counter
) -> tuple[float, float]:
    """Median wall time in milliseconds of one forward pass of each model on ``batch``.

    The two models are timed alternately (a, b, a, b, ...) after warm-up passes, so a slow spell of a shared
    machine hits both alike. Fewer multiply-accumulates do not always mean lower latency (common practice),
    which is why this is measured rather than derived. ``clock`` returns seconds, as :func:`time.perf_counter`.
    """
    before, after = latency_spread(a, b, batch, repeats=repeats, clock=clock)
    return before.median, after.median


def paired_ms(
    a: Callable[[], Any],
    b: Callable[[], Any],
    *,
    repeats: int = 20,
    warmup: int = 3,
    clock: Callable[[], float] = time.perf_counter,
) -> tuple[float, float]:
    """Median times in milliseconds of ``a()`` and ``b()``, measured interleaved after ``warmup`` calls of each
    (the first calls pay for lazy initialisation and cold caches, and would otherwise count). ``clock`` returns
    seconds (default :func:`time.perf_counter`); it is read just before and just after each timed call."""
    times = paired_samples(a, b, repeats=repeats, warmup=warmup, clock=clock)
    return statistics.median(times[0]), statistics.median(times[1])


def paired_samples(
    a: Callable[[], Any],
    b: Callable[[], Any],
    *,
    repeats: int = 20,
    warmup: int = 3,
    clock: Callable[[], float] = time.perf_counter,
) -> tuple[list[float], list[float]]:
    """Every timed call of :func:`paired_ms`, in milliseconds, in the order taken: (times of a, times of b)."""
    times: tuple[list[float], list[float]] = ([], [])
    with torch.inference_mode():
        for _ in range(warmup):
            a(), b()
        for _ in range(repeats):
            for fn, acc in ((a, times[0]), (b, times[1])):
                start = clock()
                fn()
                acc.append(1000.0 * (clock() - start))
    return times


@dataclass(frozen=True)
class Spread:
    """The distribution of one model's timed passes, in milliseconds: median, quartiles (numpy's default linear
    interpolation, i.e. ``statistics.quantiles(method="inclusive")``), min and max."""

    median: float
    q1: float
    q3: float
    low: float
    high: float

    @classmethod
    def of(cls, times: list[float]) -> Spread:
        q1, _, q3 = statistics.quantiles(times, n=4, method="inclusive") if len(times) > 1 else times * 3
        return cls(statistics.median(times), q1, q3, min(times), max(times))


def latency_spread(
    a: nn.Module, b: nn.Module, batch: Any, *, repeats: int = 7, clock: Callable[[], float] = time.perf_counter
) -> tuple[Spread, Spread]:
    """:func:`median_latency` with the whole spread of each model's passes (a :class:`Spread` each)."""
    flags = (a.training, b.training)
    a.eval(), b.eval()
    try:
        ta, tb = paired_samples(lambda: (feed(a, batch), _sync(a)), lambda: (feed(b, batch), _sync(b)),
                                repeats=repeats, clock=clock)
    finally:
        a.train(flags[0]), b.train(flags[1])
    return Spread.of(ta), Spread.of(tb)


def _sync(model: nn.Module) -> None:
    p = next(model.parameters(), None)
    if p is not None and p.device.type == "cuda":
        torch.cuda.synchronize(p.device)

