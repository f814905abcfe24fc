"""TODO docstring."""

from __future__ import annotations

import statistics
import time
from collections.abc import Callable
from typing import Any

import torch
from torch import nn

from factorize.model.feed import feed


def median_latency(a: nn.Module, b: nn.Module, batch: Any, *, repeats: int = 7) -> tuple[float, float]:
    """Median wall time in milliseconds of one forward pass of each model on ``batch``.

    The two models are timed alternately (a, b, a, b, ...) after warm-up passes, so a slow spell of a shared
    machine hits both alike. Fewer multiply-accumulates do not always mean lower latency (common practice),
    which is why this is measured rather than derived.
    """
    flags = (a.training, b.training)
    a.eval(), b.eval()
    try:
        return paired_ms(lambda: (feed(a, batch), _sync(a)), lambda: (feed(b, batch), _sync(b)), repeats=repeats)
    finally:
        a.train(flags[0]), b.train(flags[1])


def paired_ms(a: Callable[[], Any], b: Callable[[], Any], *, repeats: int = 20, warmup: int = 3) -> tuple[float, float]:
    """Median times in milliseconds of ``a()`` and ``b()``, measured interleaved after ``warmup`` calls of each
    (the first calls pay for lazy initialisation and cold caches, and would otherwise count)."""
    times: tuple[list[float], list[float]] = ([], [])
    with torch.inference_mode():
        for _ in range(warmup):
            a(), b()
        for _ in range(repeats):
            for fn, acc in ((a, times[0]), (b, times[1])):
                start = time.perf_counter()
                fn()
                acc.append(1000.0 * (time.perf_counter() - start))
    return statistics.median(times[0]), statistics.median(times[1])


def _sync(model: nn.Module) -> None:
    p = next(model.parameters(), None)
    if p is not None and p.device.type == "cuda":
        torch.cuda.synchronize(p.device)

