"""Speed checks: the mechanics of timing and of keeping slow layers dense. Verdicts are driven by a fake clock or
an injected timer (no timed assertions: machines are shared and noisy, so targets live in benchmarks/)."""

from __future__ import annotations

import functools

import pytest
import torch
from torch import nn

import factorize
from factorize.measure.speed import LayerTiming, keep_fast, record_input_shapes, slower_layers, time_layers
from tests.measure.fakeclock import FakeClock


def _costs(module: nn.Module, clock: FakeClock, who: str, ms: float) -> None:
    module.register_forward_pre_hook(lambda _m, _args: clock.spend(who, ms))


def test_slower_layers_named_with_reason():
    timings = [LayerTiming("a", 1, 1.0, 0.5), LayerTiming("a", 32, 2.0, 1.0), LayerTiming("b", 32, 1.0, 1.5)]
    slow = slower_layers(timings)
    assert list(slow) == ["b"] and "batch 32" in slow["b"] and "kept dense" in slow["b"]


def test_record_input_shapes_of_a_cnn(cnn):
    shapes = record_input_shapes(cnn, ["c1", "c2", "c3", "fc"], torch.randn(2, 3, 16, 16))
    # by hand: c2 reads c1's padded 3x3 output (16x16); c2 (stride 2, padding 2, dilation 2) gives
    # floor((16 + 4 - 4 - 1) / 2) + 1 = 8, so c3 reads 24 channels of length 8 * 8; fc reads the 20-channel mean
    assert shapes == {"c1": (2, 3, 16, 16), "c2": (2, 16, 16, 16), "c3": (2, 24, 64), "fc": (2, 20)}


def test_keep_fast_keeps_exactly_the_layer_the_clock_says_is_slower(cnn):
    result = factorize.compress(cnn, keep=0.5)
    factored = factorize.factored_layers(result.model)
    assert set(factored) == {"c1", "c2", "c3", "fc"}
    clock = FakeClock()
    for name, layer in factored.items():
        _costs(getattr(cnn, name), clock, f"dense {name}", 2.0)
        _costs(layer, clock, f"factored {name}", 3.0 if name == "c3" else 1.0)
    slow, timings = keep_fast(cnn, result.model, example=torch.randn(2, 3, 16, 16), batches=(1, 4), repeats=3,
                              timer=functools.partial(time_layers, clock=clock))
    assert slow == {"c3": "measured slower factored than dense at batch 1 (3.000 ms vs 2.000 ms); kept dense"}
    assert [(t.name, t.batch) for t in timings] == [(n, b) for n in ("c1", "c2", "c3", "fc") for b in (1, 4)]
    for t in timings:
        assert t.dense_ms == pytest.approx(2.0, abs=1e-9)
        assert t.speedup == pytest.approx(2 / 3 if t.name == "c3" else 2.0)


def test_keep_fast_without_example_times_linear_layers_on_single_vectors(cnn):
    result = factorize.compress(cnn, keep=0.5)
    seen = {}

    def timer(model, compressed, shapes, *, batches, repeats):
        seen.update(shapes=dict(shapes), batches=tuple(batches), repeats=repeats, models=(model, compressed))
        return [LayerTiming("fc", 1, 1.0, 0.5), LayerTiming("fc", 8, 1.0, 1.25)]

    slow, timings = keep_fast(cnn, result.model, batches=(1, 8), repeats=5, timer=timer)
    # convolutions need a spatial shape, which only an example gives: only fc is timed, on (batch, 20)
    assert seen == {"shapes": {"fc": (1, 20)}, "batches": (1, 8), "repeats": 5, "models": (cnn, result.model)}
    assert list(slow) == ["fc"] and "batch 8 (1.250 ms vs 1.000 ms)" in slow["fc"]
    assert [t.speedup for t in timings] == [2.0, 0.8]


def test_keep_fast_on_this_machine_names_the_layers_its_timings_call_slower(cnn):
    # the real clock: which layers lose is this machine's business, but the verdict must follow the timings
    result = factorize.compress(cnn, keep=0.5)
    slow, timings = keep_fast(cnn, result.model, example=torch.randn(2, 3, 16, 16), batches=(1, 4), repeats=3)
    assert {(t.name, t.batch) for t in timings} == {(n, b) for n in ("c1", "c2", "c3", "fc") for b in (1, 4)}
    assert all(t.dense_ms > 0 and t.factored_ms > 0 for t in timings)
    assert set(slow) == {t.name for t in timings if t.factored_ms > t.dense_ms}


def test_speed_check_keeps_slow_layers_dense_and_reallocates(monkeypatch):
    # Force a verdict so the plan logic is tested without depending on this machine's timings. compress() has no
    # parameter to inject the timer through yet (factorize/pipeline.py is being reworked), so keep_fast is
    # replaced on its module here; keep_fast itself is tested above with an injected clock and timer.
    verdict = {"1": "measured slower factored than dense"}
    monkeypatch.setattr("factorize.measure.speed.keep_fast", lambda *a, **k: (verdict, []))
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
    # too many slow layers for the budget: they stay dense and the budget covers the layers that pay
    too_many = {"0": "slow", "1": "slow", "2": "slow"}
    monkeypatch.setattr("factorize.measure.speed.keep_fast", lambda *a, **k: (too_many, []))
    spread = factorize.compress(model, budget=0.5, speed_check=True)
    sites = spread.plan["sites"]
    assert all(sites[n]["action"] == "dense" and "the budget applies to the other layers" in sites[n]["reason"]
               for n in too_many)
    assert sites["3"]["action"] == "factor" and isinstance(spread.model[3], factorize.Factored)
    every = {str(i): "slow" for i in range(4)}  # every layer slower factored: nothing is factored
    monkeypatch.setattr("factorize.measure.speed.keep_fast", lambda *a, **k: (every, []))
    none = factorize.compress(model, budget=0.5, speed_check=True)
    assert all(e["action"] == "dense" and e["reason"].startswith("slow") for e in none.plan["sites"].values())
