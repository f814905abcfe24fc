"""The 95% interval every drift's mean cosine carries, checked against scipy.stats (reference library)."""

from __future__ import annotations

import math

import pytest
import torch

from factorize.measure.drift import output_drift
from factorize.measure.interval import mean_half_width, t_quantile

stats = pytest.importorskip("scipy.stats")


@pytest.mark.parametrize("dof", [1, 2, 5, 15, 63, 500])
@pytest.mark.parametrize("p", [0.9, 0.975, 0.995])
def test_t_quantile_matches_scipy(dof, p) -> None:
    assert t_quantile(p, dof) == pytest.approx(float(stats.t.ppf(p, dof)), rel=1e-6)


def test_half_width_matches_scipys_t_interval() -> None:
    values = torch.rand(23, generator=torch.Generator().manual_seed(3), dtype=torch.float64)
    lo, hi = stats.t.interval(0.95, len(values) - 1, loc=float(values.mean()),
                              scale=float(values.std()) / math.sqrt(len(values)))
    assert mean_half_width(values) == pytest.approx((hi - lo) / 2, rel=1e-6)


def test_no_interval_from_one_sample_or_non_finite_values() -> None:
    assert mean_half_width(torch.tensor([0.9])) is None
    assert mean_half_width(torch.tensor([0.9, float("nan")])) is None
    with pytest.raises(ValueError):
        t_quantile(0.4, 3)


def test_drift_reports_the_interval_of_its_mean_cosine() -> None:
    g = torch.Generator().manual_seed(0)
    a = torch.randn(40, 8, generator=g)
    b = a + 0.3 * torch.randn(40, 8, generator=g)
    d = output_drift(a, b)
    cos = torch.nn.functional.cosine_similarity(a.double(), b.double(), dim=1)
    lo, hi = stats.t.interval(0.95, 39, loc=float(cos.mean()), scale=float(cos.std()) / math.sqrt(40))
    assert d["cosine_mean"] == pytest.approx(float(cos.mean()))
    assert d["cosine_mean_ci95"] == pytest.approx((hi - lo) / 2, rel=1e-6)
    assert "cosine_mean_ci95" not in output_drift(a[:1], b[:1])
