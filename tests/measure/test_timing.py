"""Timing mechanics with a fake clock: the interleaving order, warm-up left out, the median taken (no timed
assertions: targets live in benchmarks/)."""

from __future__ import annotations

import pytest
import torch

from factorize.measure.timing import median_latency, paired_ms
from tests.measure.fakeclock import Costly, FakeClock


def test_paired_ms_interleaves_after_warmup_and_takes_the_median():
    clock = FakeClock()
    # per call, in milliseconds: two warm-up calls each, then five timed ones
    a_ms = iter([50, 50, 5, 1, 2, 100, 3])  # timed median 3 (mean 22.2; with warm-up counted the median is 5)
    b_ms = iter([70, 70, 1, 1, 1, 1, 40])  # timed median 1
    a_med, b_med = paired_ms(lambda: clock.spend("a", next(a_ms)), lambda: clock.spend("b", next(b_ms)),
                             repeats=5, warmup=2, clock=clock)
    assert a_med == pytest.approx(3.0, abs=1e-9) and b_med == pytest.approx(1.0, abs=1e-9)
    # warm-up untimed (no clock reads), then a, b alternately, each call bracketed by two reads
    assert clock.log == ["a", "b"] * 2 + ["read", "a", "read", "read", "b", "read"] * 5


def test_median_latency_of_a_model_twice_as_slow_is_a_2x_ratio():
    clock = FakeClock()
    slow, fast = Costly(clock, 2.0, "slow").train(), Costly(clock, 1.0, "fast").eval()
    before, after = median_latency(slow, fast, torch.randn(5, 4), repeats=4, clock=clock)
    assert before == pytest.approx(2.0, abs=1e-9) and after == pytest.approx(1.0, abs=1e-9)
    assert before / after == pytest.approx(2.0)
    # three warm-up passes each (the default), then four timed pairs, slow first
    assert clock.log == ["slow", "fast"] * 3 + ["read", "slow", "read", "read", "fast", "read"] * 4
    assert slow.training and not fast.training  # training flags restored
