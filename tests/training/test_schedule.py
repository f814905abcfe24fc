"""The learning-rate schedules of healing (factorize/training/schedule.py)."""

from __future__ import annotations

import itertools

import pytest

from factorize.training.schedule import lr_factor


def test_cosine_schedule_warms_up_then_follows_a_half_cosine_to_zero() -> None:
    # Linear warm-up (Goyal et al. 2017) then lr * (1 + cos(pi * progress)) / 2 (Loshchilov & Hutter, SGDR, 2017);
    # both formulas cited from memory.
    steps = 200
    f = lr_factor("cosine", steps)
    warm = 10  # 5% of 200
    assert [f(i) for i in range(warm)] == pytest.approx([(i + 1) / warm for i in range(warm)])
    assert f(warm) == pytest.approx(1.0)
    assert f(warm + (steps - warm) // 2) == pytest.approx(0.5, abs=1e-9)
    assert 0.0 < f(steps - 1) < 1e-3
    decay = [f(i) for i in range(warm, steps)]
    assert all(a >= b for a, b in itertools.pairwise(decay))
    assert lr_factor("constant", steps)(123) == 1.0
