"""Candidate forms of a layer (bytes, predicted error) and the joint plan, against numpy and brute force."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
import torch
from torch import nn

from factorize.errors import FactorizeError
from factorize.model.sites import walk
from factorize.plan.forms import (
    DEFAULT_PRECISIONS,
    LayerMetric,
    Priced,
    byte_budget,
    candidates_for,
    check_precisions,
    corrected_bytes,
    factor_bytes,
    joint_plan,
)
from factorize.rounding import round_factors, round_matrix, stored_bytes
from factorize.spectra.decompose import decompose


def _low_rank_plus_noise(m, n, r, seed, noise=0.05):
    g = torch.Generator().manual_seed(seed)
    return (torch.randn(m, r, generator=g) @ torch.randn(r, n, generator=g) / math.sqrt(r)
            + noise * torch.randn(m, n, generator=g))


def _site(m, n, name="fc"):
    model = nn.Sequential()
    model.add_module(name, nn.Linear(n, m))
    return model, walk(model).sites[0]


def _candidates(W, site, metric=None, precisions=DEFAULT_PRECISIONS):
    spec = decompose(W, method="exact")
    metric = metric or LayerMetric(None, None, 1.0 / spec.total_energy)
    return spec, candidates_for(site, W, spec, precisions, metric)


def test_unrounded_factor_error_is_the_eckart_young_tail():
    # Eckart-Young-Mirsky: the best rank-r error is the sum of the discarded squared singular values (numpy SVD)
    W = _low_rank_plus_noise(48, 64, 8, seed=0)
    _, site = _site(48, 64)
    _, cands = _candidates(W, site)
    s = np.linalg.svd(W.double().numpy(), compute_uv=False)
    total = float((s ** 2).sum())
    found = [c for c in cands if c.form == "factor" and c.precision == "float32"]
    assert found
    for c in found:
        assert c.error == pytest.approx(float((s[c.rank:] ** 2).sum()) / total, rel=1e-6, abs=1e-12)
        assert c.cost == 4 * c.rank * (48 + 64)


def test_rounded_dense_error_and_bytes():
    # the dense candidate's error is ||W - round(W)||_F^2 / ||W||_F^2 (numpy), its cost the stored bytes
    W = _low_rank_plus_noise(40, 64, 6, seed=1)
    _, site = _site(40, 64)
    _, cands = _candidates(W, site)
    for c in (c for c in cands if c.form == "dense" and c.precision != "float32"):
        Wq = round_matrix(W, c.precision).dequantize(torch.float64).numpy()
        ref = ((W.double().numpy() - Wq) ** 2).sum() / (W.double().numpy() ** 2).sum()
        assert c.error == pytest.approx(ref, rel=1e-6)  # ||W||^2 from the float32 spectrum
        assert c.cost == stored_bytes(c.precision, (40, 64))
    assert {c.precision for c in cands if c.form == "dense"} == set(DEFAULT_PRECISIONS)


def test_corrected_error_is_the_svd_tail_of_the_rounding_error():
    # Eckart-Young on E = W - round(W): the best rank-k correction leaves the discarded part of E's spectrum (numpy)
    W = _low_rank_plus_noise(64, 96, 4, seed=2)
    _, site = _site(64, 96)
    _, cands = _candidates(W, site)
    corrected = [c for c in cands if c.form == "corrected"]
    assert corrected
    for c in corrected:
        E = W.double().numpy() - round_matrix(W, c.precision).dequantize(torch.float64).numpy()
        s = np.linalg.svd(E, compute_uv=False)
        assert c.error == pytest.approx(float((s[c.rank:] ** 2).sum()) / float((W.double() ** 2).sum()), rel=1e-6)
        assert c.cost == corrected_bytes(c.precision, (64, 96), c.rank)
        assert c.cost == stored_bytes(c.precision, (64, 96)) + 2 * c.rank * (64 + 96)


@pytest.mark.parametrize("precision", ["int8", "int4g64", "bfloat16"])
def test_predicted_factor_rounding_error_tracks_the_measured_one(precision):
    # the per-term prediction (module docstring of factorize.plan.forms) against the error of the actual product
    W = _low_rank_plus_noise(96, 128, 12, seed=3)
    _, site = _site(96, 128)
    spec, cands = _candidates(W, site, precisions=("float32", precision))
    scale = 1.0 / spec.total_energy
    for c in (c for c in cands if c.form == "factor" and c.precision == precision and c.rank >= 4):
        B, A = (t.double() for t in spec.factors(c.rank))
        Bq, Aq = round_factors(B, A, precision)
        measured = float(((W.double() - Bq.dequantize(torch.float64) @ Aq.dequantize(torch.float64)) ** 2).sum())
        assert c.error == pytest.approx(measured * scale, rel=0.25)
        assert c.cost == factor_bytes(precision, (96, 128), c.rank)


def test_weighted_metric_matches_the_output_error_on_inputs():
    # trace(dW C dW^T) with C = X^T X equals ||dW X^T||_F^2 (numpy), for the dense rounding candidate
    W = _low_rank_plus_noise(32, 48, 5, seed=4)
    X = torch.randn(500, 48, dtype=torch.float64, generator=torch.Generator().manual_seed(5))
    _, site = _site(32, 48)
    spec = decompose(W, method="exact")
    cands = candidates_for(site, W, spec, ("float32", "int8"), LayerMetric(X.T @ X, None, 1.0))
    c = next(c for c in cands if c.form == "dense" and c.precision == "int8")
    Wq = round_matrix(W, "int8", hessian=X.T @ X).dequantize(torch.float64)
    assert c.error == pytest.approx(float(((W.double() - Wq) @ X.T).pow(2).sum()), rel=1e-9)


def test_bad_precisions_are_named():
    with pytest.raises(FactorizeError, match="int3"):
        check_precisions(["int8", "int3"])
    assert check_precisions("int8, int4g64") == ("int8", "int4g64")
    assert check_precisions(None) == DEFAULT_PRECISIONS


def test_joint_plan_equals_brute_force_on_a_small_model():
    # every combination of the three layers' candidates enumerated (itertools.product), least predicted error
    # within the byte budget; the plan must pick a combination with that error
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(24, 20), nn.ReLU(), nn.Linear(20, 16), nn.ReLU(), nn.Linear(16, 12))
    sites = walk(model).sites
    cands, spectra = {}, {}
    for s in sites:
        W = dict(model.named_modules())[s.name].weight.detach()
        spectra[s.name], found = _candidates(W, s)
        cands[s.name] = found[::3] if len(found) > 12 else found  # keep the enumeration small
    full = byte_budget(sites, {s.name: torch.float32 for s in sites}, 1.0)
    for fraction in (0.5, 0.3, 0.2, 0.12):
        budget = fraction * full
        best = min((sum(c.error for c in combo) for combo in itertools.product(*cands.values())
                    if math.fsum(c.cost for c in combo) <= budget), default=None)
        priced = Priced(cands, {s.name: "float32" for s in sites}, {})
        plan = joint_plan(sites, priced, spectra, budget, policy={"budget": fraction}, method="exact")
        assert plan["selection"]["predicted_error"] == pytest.approx(best, rel=1e-9, abs=1e-15)
        assert plan["selection"]["bytes"] <= budget
        assert sum(e["bytes_after"] for e in plan["sites"].values()) <= budget


def test_byte_budget_refuses_bad_fractions():
    _, site = _site(8, 8)
    with pytest.raises(FactorizeError, match="fraction"):
        byte_budget([site], {"fc": torch.float32}, 1.5)


def test_uniform_rounding_plan_takes_the_most_precise_format_that_fits():
    # the plain alternative "every layer rounded, none factored", from the same priced candidates
    from factorize.plan.forms import price_sites, uniform_rounding_plan
    from factorize.plan.policy import Policy

    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(64, 48), nn.ReLU(), nn.Linear(48, 32))
    sites = walk(model).sites
    spectra = {s.name: decompose(dict(model.named_modules())[s.name].weight.detach(), method="exact") for s in sites}
    policy = Policy(budget=0.3, cost="bytes")
    priced = price_sites(model, sites, spectra, policy)
    int8 = sum(stored_bytes("int8", tuple(s.shape)) for s in sites)
    int4 = sum(stored_bytes("int4g64", tuple(s.shape)) for s in sites)
    plan = uniform_rounding_plan(sites, spectra, priced, int8, policy={}, method="exact")
    assert {e["precision"] for e in plan["sites"].values()} == {"int8"}
    plan = uniform_rounding_plan(sites, spectra, priced, int8 - 1, policy={}, method="exact")
    assert {e["precision"] for e in plan["sites"].values()} == {"int4g64"}
    assert plan["selection"]["bytes"] == int4
    assert uniform_rounding_plan(sites, spectra, priced, int4 - 1, policy={}, method="exact") is None


def test_calibrated_bytes_plan_is_checked_against_rounding_alone_on_the_calibration_inputs():
    # where rounding alone fits the budget too, both are built and measured; the plan records both drifts and
    # the returned plan is the one that drifted less
    from factorize.calibrated.search import Calibration
    from factorize.plan.policy import Policy

    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(32, 64), nn.ReLU(), nn.Linear(64, 64), nn.ReLU(), nn.Linear(64, 8)).eval()
    batches = [torch.randn(64, 32) for _ in range(4)]
    calib = Calibration(model, batches)
    plan = calib.plan(Policy(budget=0.27, cost="bytes"))
    checked = plan["selection"].get("checked")
    assert checked is not None and set(checked) >= {"joint", "rounding"}
    assert calib.drift_of(plan) == pytest.approx(min(checked["joint"], checked["rounding"]))


def test_float16_overflow_is_refused_with_the_reason_in_the_plan():
    """A weight beyond float16's range (largest finite 65504, IEEE 754 binary16) is never stored as float16, nor are
    factors beyond it; the plan row says why."""
    import factorize

    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(32, 32), nn.ReLU(), nn.Linear(32, 8))
    with torch.no_grad():
        model[0].weight[0, 0] = 1e10  # sqrt(1e10) = 1e5: the balanced factors overflow float16 too
    result = factorize.compress(model, budget=0.5, cost="bytes", precisions=("float16",), example=torch.randn(4, 32))
    big, small = result.plan["sites"]["0"], result.plan["sites"]["2"]
    assert big["precision"] == "float32"
    assert any(n.startswith("float16 not offered for the weight") and "the factors" in n and "65504" in n
               for n in big["notes"])
    assert "notes" not in small  # an ordinary layer may use float16: nothing refused there
    out = result.model(torch.randn(4, 32))
    assert bool(torch.isfinite(out).all())


def test_dense_rounding_is_priced_as_the_layer_stores_it_for_transposed_projections():
    # transformers' Conv1D (GPT-2) stores its weight (in, out): rounding it row by row puts the scales on input
    # rows, and the price must be of that stored form (what apply_plan builds), not of the (out, in) view
    from transformers.pytorch_utils import Conv1D

    from factorize.model.sites import matrix_of
    from factorize.plan.ranks import PLAN_FORMAT, PRECISION_PLAN_VERSION
    from factorize.rewrite.apply import apply_plan

    torch.manual_seed(0)
    model = nn.Sequential(Conv1D(24, 40))  # nx=40 inputs, nf=24 outputs
    with torch.no_grad():
        model[0].weight.mul_(torch.logspace(0, 2, 40)[:, None])  # input rows of very different scales
    site = walk(model).sites[0]
    assert site.kind == "transposed"
    W = matrix_of(model[0], site.kind)
    spec = decompose(W, method="exact")
    cand = next(c for c in candidates_for(site, W, spec, ("float32", "int8"), LayerMetric(None, None, 1.0))
                if c.form == "dense" and c.precision == "int8")
    row = {"kind": site.kind, "shape": list(site.shape), "action": "dense", "rank": None, "reason": "",
           "params": site.params, "params_after": site.params, "precision": "int8"}
    built = apply_plan(model, {"format": PLAN_FORMAT, "version": PRECISION_PLAN_VERSION, "sites": {"0": row}})
    measured = float(((W.double() - matrix_of(built[0], site.kind).double()) ** 2).sum())
    assert cand.error == pytest.approx(measured, rel=1e-6)


@pytest.mark.parametrize("diagonal", [False, True])
def test_whitened_error_has_the_singular_values_of_the_symmetric_square_roots(diagonal):
    """The corrected form is priced by Eckart-Young on the whitened rounding error: whatever square-root factors
    LayerMetric uses (Cholesky, found once per layer), the singular values must be those of G^{1/2} E C^{1/2} with
    the symmetric square roots from scipy.linalg.sqrtm (reference), C shifted by 1e-9 x its mean diagonal."""
    scipy_linalg = pytest.importorskip("scipy.linalg")
    g = torch.Generator().manual_seed(3)
    m, n = 12, 20
    X, Y = torch.randn(n, 40, generator=g, dtype=torch.float64), torch.randn(m, 30, generator=g, dtype=torch.float64)
    C = (X * X).sum(1) / 40 if diagonal else X @ X.T / 40
    G = Y @ Y.T / 30 + 0.1 * torch.eye(m, dtype=torch.float64)
    metric = LayerMetric(C, G, 1.0)
    for _ in range(2):  # the second call reuses the factors
        E = torch.randn(m, n, generator=g, dtype=torch.float64)
        Cm = torch.diag(C) if diagonal else C
        Cs = Cm + 1e-9 * float(Cm.diagonal().mean()) * torch.eye(n, dtype=torch.float64)
        want = np.linalg.svd(np.real(scipy_linalg.sqrtm(G.numpy())) @ E.numpy() @ np.real(scipy_linalg.sqrtm(
            Cs.numpy())), compute_uv=False)
        got = torch.linalg.svdvals(metric.whitened(E)).numpy()
        np.testing.assert_allclose(got, want, rtol=1e-9, atol=1e-12)
