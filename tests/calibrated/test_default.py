"""The default calibrated call: output-weighted whitening, checked against reduced-rank regression and against
the simplest strong baseline (whitening with the same share kept in every layer)."""

from __future__ import annotations

import numpy as np
import pytest
import torch

import factorize
from factorize.calibrated.aware import decompose_aware
from factorize.calibrated.options import sensitivity_mode
from factorize.default import load_default, load_digits_split
from factorize.model.sites import Site
from factorize.plan.policy import Policy
from factorize.plan.ranks import choose_ranks
from tests.calibrated.test_aware import _case, _stats_from

pytestmark = pytest.mark.filterwarnings("ignore:too few calibration samples")


def test_the_default_is_gradient_weighting_with_whitening_only():
    assert sensitivity_mode(None, "whiten") == "gradients"
    assert sensitivity_mode(None, "scale") is None  # output weights are defined for the whitened problem only
    assert sensitivity_mode(False) is None and sensitivity_mode("none") is None and sensitivity_mode(True) == "both"


def test_identity_output_weights_reduce_to_plain_whitening():
    # Izenman 1975 (reduced-rank regression): with output weights G = I, minimising ||(W - W')X|| weighted by
    # (G + mu I)^{1/2} = sqrt(1 + mu) I is the unweighted problem scaled; the factors and, for equal weights on
    # every layer, the whole allocation must be those of plain whitening.
    sites, plain, weighted = [], {}, {}
    for i, (m, n) in enumerate(((14, 18), (20, 12), (16, 16))):
        W, X = _case(m, n, 300, seed=40 + i)
        name = f"l{i}"
        stats = _stats_from(X, name)
        plain[name] = decompose_aware(W, stats, ridge=0.0)
        weighted[name] = decompose_aware(W, stats, ridge=0.0, output_gram=torch.eye(m, dtype=torch.float64),
                                         output_ridge=0.1)
        for r in (1, 4, 9):
            B0, A0 = plain[name].factors(r)
            B1, A1 = weighted[name].factors(r)
            np.testing.assert_allclose((B1 @ A1).numpy(), (B0 @ A0).numpy(), rtol=1e-7, atol=1e-9)
            assert weighted[name].error(r) == pytest.approx(np.sqrt(1.1) * plain[name].error(r), rel=1e-9)
        sites.append(Site(name=name, kind="linear", shape=(m, n), params=m * n, has_bias=False, dtype="float64"))
    ones = {s.name: 1.0 for s in sites}
    for budget in (0.3, 0.5, 0.7):
        policy = Policy(budget=budget)
        a = choose_ranks(sites, plain, policy, error_scale=ones)
        b = choose_ranks(sites, weighted, policy, error_scale=ones)
        assert {k: e["rank"] for k, e in a["sites"].items()} == {k: e["rank"] for k, e in b["sites"].items()}


@pytest.mark.parametrize("budget", [0.1, 0.05])
def test_default_calibrated_call_is_no_worse_than_uniform_whitening(budget):
    # the embedded digits classifier; held-out: the 540-sample test split of scikit-learn's digits (Alpaydin &
    # Kaynak, UCI), never seen by calibration. Baseline: whitened factors keeping the same share of every layer.
    model = load_default()
    calib, _ = load_digits_split("calibration")
    test_x, test_y = load_digits_split("test")
    batches = list(calib.split(64))
    default = factorize.compress(model, budget=budget, calibration=batches)
    uniform = factorize.compress(model, keep=budget, calibration=batches, sensitivity="none")
    assert default.plan["calibration"]["sensitivity"] == "gradients"
    with torch.no_grad():
        ref = model(test_x)
        drift = {k: float((r.model(test_x) - ref).norm() / ref.norm()) for k, r in
                 (("default", default), ("uniform", uniform))}
        acc = {k: float((r.model(test_x).argmax(1) == test_y).double().mean()) for k, r in
               (("default", default), ("uniform", uniform))}
    sites_kept = lambda r: sum(e["params_after"] for e in r.plan["sites"].values()) / sum(  # noqa: E731
        e["params"] for e in r.plan["sites"].values())
    assert sites_kept(default) <= sites_kept(uniform) + 0.01  # no more parameters than the baseline
    assert drift["default"] <= drift["uniform"] and acc["default"] >= acc["uniform"]
