"""Budgets in measured time: the planner on injected timings (no test times anything: speed lives in benchmarks)."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn

from factorize.errors import FactorizeError
from factorize.measure.latency import Probes, affine_times, latency_plan
from factorize.model.sites import walk
from factorize.plan.policy import Policy
from factorize.spectra.sites import decompose_sites


def _model():
    torch.manual_seed(0)
    g = torch.Generator().manual_seed(1)
    m = nn.Sequential(nn.Linear(64, 96), nn.ReLU(), nn.Linear(96, 96), nn.ReLU(), nn.Linear(96, 32)).eval()
    with torch.no_grad():  # low rank plus noise, so factoring has something to keep
        for layer in (m[0], m[2], m[4]):
            o, i = layer.weight.shape
            layer.weight.copy_(torch.randn(o, 6, generator=g) @ torch.randn(6, i, generator=g) / 6
                               + 0.01 * torch.randn(o, i, generator=g))
    return m


def _fake_timer(slow: str | None = None):
    """dense: 1 ms per 1000 weights; factored: 0.05 + r (m + n) / 1000 ms; the layer named ``slow`` is never
    faster factored."""
    def timer(module, kind, shape, ranks):
        m, n = module.weight.shape
        dense = m * n / 1000
        extra = dense if module is slow else 0.0
        return dense, {r: 0.05 + r * (m + n) / 1000 + extra for r in ranks}
    return timer


def _setup():
    model = _model()
    sites = walk(model).sites
    return model, sites, decompose_sites(model, sites, method="gram"), torch.randn(4, 64)


def test_affine_fit_matches_numpy_least_squares():
    # numpy.polyfit is the reference least-squares line through the probes
    probes = {4: 1.0, 20: 2.1, 40: 3.9}
    b, a = np.polyfit([4, 20, 40], [1.0, 2.1, 3.9], 1)
    fitted = affine_times(probes, [4, 10, 40])
    assert fitted[10] == pytest.approx(a + b * 10)
    assert affine_times({8: 2.0, 16: 1.0}, [8, 16]) == {8: 1.5, 16: 1.5}  # a falling fit is clipped flat


def test_plan_fits_the_budget_and_never_picks_a_slower_form():
    model, sites, spectra, x = _setup()
    timer = _fake_timer(slow=model[2])
    plan = latency_plan(model, sites, spectra, Policy(budget=0.6, cost="latency"), x, method="gram",
                        probes=Probes(timer, None))
    dense_total = sum(e["shape"][0] * e["shape"][1] / 1000 for e in plan["sites"].values())
    assert sum(e["latency_ms"] for e in plan["sites"].values()) <= 0.6 * dense_total + 1e-9
    assert plan["sites"]["2"]["action"] == "dense"  # its factored form is never faster
    assert plan["sites"]["0"]["action"] == "factor" or plan["sites"]["4"]["action"] == "factor"
    assert plan["selection"]["measured_ratio"] is None


def test_measured_ratio_corrects_the_layers_share():
    # the whole model runs 1.5x slower than the layers' sum says: the share is scaled down until it fits
    model, sites, spectra, x = _setup()
    dense_total = sum(s.shape[0] * s.shape[1] / 1000 for s in sites)
    seen = []

    def measure(plan):
        ratio = 1.5 * sum(e["latency_ms"] for e in plan["sites"].values()) / dense_total
        seen.append(ratio)
        return ratio

    plan = latency_plan(model, sites, spectra, Policy(budget=0.7, cost="latency"), x, method="gram",
                        probes=Probes(_fake_timer(), measure))
    assert seen[0] > 0.7 and len(seen) >= 2
    assert plan["selection"]["measured_ratio"] <= 0.7


def test_latency_needs_an_example():
    model, sites, spectra, _ = _setup()
    with pytest.raises(FactorizeError, match="sample input"):
        latency_plan(model, sites, spectra, Policy(budget=0.5, cost="latency"), None, method="gram")


def test_compress_takes_cost_latency():
    model, _, _, x = _setup()
    import factorize

    result = factorize.compress(model, budget=0.9, cost="latency", example=x)
    assert result.plan["policy"]["cost"] == "latency"
    assert all("latency_ms" in e for e in result.plan["sites"].values())
    assert torch.isfinite(result.model(x)).all()
