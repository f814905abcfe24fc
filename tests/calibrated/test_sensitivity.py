"""Measured sensitivity: probes, the fitted weights, and the allocation they produce."""

from __future__ import annotations

import copy

import numpy as np
import pytest
import torch
from scipy.spatial.distance import cosine as scipy_cosine_distance
from torch import nn

from factorize.calibrated.aware import apply_bias_shifts, aware_spectra
from factorize.calibrated.sensitivity import measure_sensitivity
from factorize.calibrated.stats import collect_stats
from factorize.errors import FactorizeError
from factorize.measure.drift import output_drift
from factorize.model.sites import walk
from factorize.plan.ranks import Policy, choose_ranks, plan_ranks
from factorize.rewrite.apply import apply_plan
from factorize.spectra.sites import decompose_sites

pytestmark = pytest.mark.filterwarnings("ignore:too few calibration samples")


class TwoBranch(nn.Module):
    """Two branches with equally shaped layers; the final output amplifies one and damps the other."""

    def __init__(self, d: int = 32, gain_a: float = 10.0, gain_b: float = 0.1) -> None:
        super().__init__()
        self.a = nn.Linear(d, d)
        self.b = nn.Linear(d, d)
        self.gain_a, self.gain_b = gain_a, gain_b

    def forward(self, x):
        return self.gain_a * self.a(x) + self.gain_b * self.b(x)


def _batches(d: int = 32, n: int = 4, seed: int = 0):
    g = torch.Generator().manual_seed(seed)
    return [torch.randn(64, d, generator=g) for _ in range(n)]


def test_single_layer_weight_is_inverse_output_energy():
    # For a model that is one bias-free layer, the final output is the layer output, so relative_l2^2 of a
    # rank-r truncation is E(r) / ||W X^T||_F^2 exactly (definition): the fitted weight is 1 / total energy.
    torch.manual_seed(1)
    model = nn.Sequential(nn.Linear(20, 16, bias=False))
    batches = _batches(20)
    sites = walk(model).sites
    spectra = aware_spectra(model, sites, collect_stats(model, sites, batches), ridge=0.0)
    sens = measure_sensitivity(model, sites, spectra, batches, fractions=(0.6, 0.3))
    w = sens.layers["0"].weight
    assert w == pytest.approx(1.0 / spectra["0"].total_energy, rel=1e-4)
    assert sens.forward_passes == len(batches) * (1 + 2)  # reference + two probe ranks


def test_probes_leave_the_model_unchanged():
    torch.manual_seed(2)
    model = TwoBranch().eval()
    before = copy.deepcopy(model.state_dict())
    sites = walk(model).sites
    spectra = decompose_sites(model, sites)
    measure_sensitivity(model, sites, spectra, _batches())
    for k, v in model.state_dict().items():
        assert torch.equal(v, before[k]), k


def test_sensitive_layer_gets_more_rank():
    # Constructed case: both branches have the same kind of weight and input, but the output scales branch a by
    # 10 and branch b by 0.1, so (chain rule) a's error reaches the output 100x stronger. Allocation by each
    # layer's own relative error cannot tell them apart; the measured sensitivity must give a more rank, and the
    # final drift at the same budget must be lower.
    torch.manual_seed(3)
    model = TwoBranch().eval()
    batches = _batches()
    sites = walk(model).sites
    spectra = aware_spectra(model, sites, collect_stats(model, sites, batches))
    sens = measure_sensitivity(model, sites, spectra, batches)
    assert sens.layers["a"].weight > 100 * sens.layers["b"].weight
    policy = Policy(budget=0.4)
    plain = choose_ranks(sites, spectra, policy)
    weighted = choose_ranks(sites, spectra, policy, error_scale=sens.error_scale())
    r_plain, r_weighted = plan_ranks(plain), plan_ranks(weighted)
    assert r_weighted["a"] > r_plain["a"] and r_weighted.get("b", 0) < r_plain["b"]

    def final_drift(plan):
        m = apply_plan(model, plan, spectra=spectra)
        apply_bias_shifts(m, plan, spectra)
        with torch.no_grad():
            ref = [model(x) for x in batches]
            out = [m(x) for x in batches]
        return output_drift(ref, out, kind="features")["relative_l2"]

    assert final_drift(weighted) < final_drift(plain)
    # the additive model's prediction tracks the measured drift (relative_l2^2) to first order
    predicted = sens.predicted_drift(spectra, r_weighted)
    assert predicted == pytest.approx(final_drift(weighted) ** 2, rel=0.2)


def test_cosine_metric_and_bad_input():
    torch.manual_seed(4)
    model = TwoBranch().eval()
    sites = walk(model).sites
    spectra = decompose_sites(model, sites)
    batches = _batches()
    sens = measure_sensitivity(model, sites, spectra, batches, metric="cosine")
    assert sens.metric == "cosine" and set(sens.layers) == {"a", "b"}
    # Each probe against references: E(r) from numpy's SVD of the weight (sum of the discarded s_i^2), d(r) = 1 -
    # mean cosine (scipy.spatial.distance.cosine) of the outputs with that layer alone truncated to rank r, and
    # w the least-squares slope through the origin (numpy.linalg.lstsq).
    X = torch.cat(batches).double().numpy()
    reference = torch.cat([model(x) for x in batches]).detach().double().numpy()
    for name, ls in sens.layers.items():
        layer = getattr(model, name)
        W = layer.weight.detach().double().numpy()
        U, S, Vt = np.linalg.svd(W)
        gain = model.gain_a if name == "a" else model.gain_b
        for r, energy, drift in zip(ls.ranks, ls.layer_energy, ls.drift):
            assert energy == pytest.approx(float((S[r:] ** 2).sum()), rel=1e-5)
            W_r = (U[:, :r] * S[:r]) @ Vt[:r]
            probed = reference + gain * (X @ (W_r - W).T)  # only this branch changes; its bias is kept
            cos = np.array([1 - scipy_cosine_distance(reference[i], probed[i]) for i in range(len(X))])
            assert drift == pytest.approx(1 - cos.mean(), rel=1e-3, abs=1e-9)
        slope = np.linalg.lstsq(np.array(ls.layer_energy)[:, None], np.array(ls.drift), rcond=None)[0][0]
        assert slope > 0 and ls.weight == pytest.approx(slope, rel=1e-6)  # positive, so the clamp at 0 is idle
    assert sens.layers["a"].weight > 100 * sens.layers["b"].weight  # gains 10 vs 0.1: the chain rule, squared
    with pytest.raises(FactorizeError, match="unknown drift metric"):
        measure_sensitivity(model, sites, spectra, _batches(), metric="kl")
    with pytest.raises(FactorizeError, match="probe fractions"):
        measure_sensitivity(model, sites, spectra, _batches(), fractions=(1.5,))
    with pytest.raises(FactorizeError, match="no probe batches"):
        measure_sensitivity(model, sites, spectra, [])
