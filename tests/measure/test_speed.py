"""Speed checks: the mechanics of timing and of keeping slow layers dense (no timed assertions: machines are
shared and noisy, so targets live in benchmarks/)."""

from __future__ import annotations

import pytest
import torch
from torch import nn

import factorize
from factorize.measure.speed import LayerTiming, keep_fast, record_input_shapes, slower_layers


def test_slower_layers_named_with_reason():
    timings = [LayerTiming("a", 1, 1.0, 0.5), LayerTiming("a", 32, 2.0, 1.0), LayerTiming("b", 32, 1.0, 1.5)]
    slow = slower_layers(timings)
    assert list(slow) == ["b"] and "batch 32" in slow["b"] and "kept dense" in slow["b"]


def test_keep_fast_times_every_factored_layer(cnn):
    result = factorize.compress(cnn, keep=0.5)
    x = torch.randn(2, 3, 16, 16)
    shapes = record_input_shapes(cnn, ["c1", "c3"], x)
    assert shapes["c1"] == (2, 3, 16, 16) and len(shapes["c3"]) == 3
    slow, timings = keep_fast(cnn, result.model, example=x, batches=(1, 4), repeats=3)
    factored = set(factorize.factored_layers(result.model))
    assert {t.name for t in timings} == factored and {t.batch for t in timings} == {1, 4}
    assert set(slow) <= factored


def test_speed_check_keeps_slow_layers_dense_and_reallocates(monkeypatch):
    # Force a verdict so the plan logic is tested without depending on this machine's timings.
    monkeypatch.setattr("factorize.measure.speed.keep_fast", lambda *a, **k: ({"1": "measured slower factored than dense"}, []))
    torch.manual_seed(0)
    model = nn.Sequential(*[nn.Linear(64, 64) for _ in range(4)])
    plain = factorize.compress(model, budget=0.5)
    checked = factorize.compress(model, budget=0.5, speed_check=True)
    entry = checked.plan["sites"]["1"]
    assert entry["action"] == "dense" and entry["reason"] == "measured slower factored than dense"
    assert not isinstance(checked.model[1], factorize.Factored)
    summary = factorize.plan_summary(checked.plan)
    assert summary["params_after"] <= 0.5 * summary["params_before"]  # budget still honoured
    assert checked.plan["sites"]["0"]["rank"] < plain.plan["sites"]["0"]["rank"]  # the others paid for it
    monkeypatch.setattr("factorize.measure.speed.keep_fast", lambda *a, **k: ({"0": "slow", "1": "slow", "2": "slow"}, []))
    with pytest.raises(factorize.FactorizeError, match="speed check kept layers dense"):
        factorize.compress(model, budget=0.5, speed_check=True)
