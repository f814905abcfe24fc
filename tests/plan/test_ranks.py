"""Rank policies and the plan."""

from __future__ import annotations

import json

import numpy as np
import pytest
import torch

from factorize import FactorizeError, Override, Policy, choose_ranks, decompose, plan_summary, walk
from factorize.model.sites import Site
from factorize.spectra.sites import decompose_sites


def _site(name, m, n):
    return Site(name=name, kind="linear", shape=(m, n), params=m * n, has_bias=False, dtype="float32")


def _spectra_for(model):
    found = walk(model)
    return found.sites, decompose_sites(model, found.sites)


def test_rank_one_parameter_arithmetic():
    # Common practice: an m x n matrix stores mn numbers, its rank-r factors r(m+n); a 10 x 10 rank-one matrix
    # stores 20 numbers instead of 100.
    u, v = torch.randn(10, 1, dtype=torch.float64), torch.randn(1, 10, dtype=torch.float64)
    site = _site("w", 10, 10)
    spec = decompose(u @ v)
    plan = choose_ranks([site], {"w": spec}, Policy(energy=0.999999))
    entry = plan["sites"]["w"]
    assert entry["rank"] == 1 and entry["params"] == 100 and entry["params_after"] == 20
    assert entry["predicted_error"] < 1e-7


def test_rank_policy_caps_and_keeps_dense_when_no_saving(mlp):
    sites, spectra = _spectra_for(mlp)
    plan = choose_ranks(sites, spectra, Policy(rank=9))
    s = plan["sites"]
    assert s["fc1"]["rank"] == 9 and s["fc2"]["rank"] == 9
    assert s["head"]["action"] == "dense"  # 10 x 48: 9 * 58 = 522 >= 480 numbers, so rank 9 does not save
    assert "break-even rank 8" in s["head"]["reason"]
    assert choose_ranks(sites, spectra, Policy(rank=8))["sites"]["head"]["rank"] == 8  # 464 < 480 still saves
    json.dumps(plan)  # plain data


def test_energy_policy_matches_numpy(mlp):
    sites, spectra = _spectra_for(mlp)
    plan = choose_ranks(sites, spectra, Policy(energy=0.5))
    s2 = np.linalg.svd(mlp.fc2.weight.detach().double().numpy(), compute_uv=False) ** 2  # numpy reference
    expected = int(np.searchsorted(np.cumsum(s2) / s2.sum(), 0.5) + 1)
    assert plan["sites"]["fc2"]["rank"] == expected
    assert plan["sites"]["fc2"]["energy_kept"] >= 0.5


def test_keep_policy(mlp):
    sites, spectra = _spectra_for(mlp)
    plan = choose_ranks(sites, spectra, Policy(keep=0.5))
    assert plan["sites"]["fc2"]["rank"] == int(0.5 * 48 * 48 / 96)  # floor(f mn / (m+n)) = 12
    for e in plan["sites"].values():
        assert e["params_after"] <= 0.5 * e["params"] or e["action"] == "dense"


@pytest.mark.parametrize("budget", [0.2, 0.35, 0.5, 0.8])
def test_budget_respected_and_error_monotone(mlp, budget):
    sites, spectra = _spectra_for(mlp)
    plan = choose_ranks(sites, spectra, Policy(budget=budget))
    summary = plan_summary(plan)
    assert summary["params_after"] <= budget * summary["params_before"] + 1e-9
    looser = choose_ranks(sites, spectra, Policy(budget=min(1.0, budget + 0.1)))

    def total_error(p):
        return sum((e["predicted_error"] ** 2) for e in p["sites"].values())

    assert total_error(looser) <= total_error(plan) + 1e-12


def test_budget_prefers_the_layer_with_the_slowest_decay():
    # Two layers of equal size: one nearly rank-2, one with a flat spectrum. The greedy allocation spends the
    # budget where each parameter removes the most relative error.
    gen = torch.Generator().manual_seed(0)
    low = (torch.randn(64, 2, generator=gen) @ torch.randn(2, 64, generator=gen)
           + 1e-3 * torch.randn(64, 64, generator=gen))
    flat = torch.randn(64, 64, generator=gen)
    sites = [_site("low", 64, 64), _site("flat", 64, 64)]
    spectra = {"low": decompose(low), "flat": decompose(flat)}
    plan = choose_ranks(sites, spectra, Policy(budget=0.3))
    assert plan["sites"]["low"]["rank"] <= 4
    assert plan["sites"]["flat"]["rank"] > 10


def test_multiple_rounding(mlp):
    sites, spectra = _spectra_for(mlp)
    plan = choose_ranks(sites, spectra, Policy(energy=0.6, multiple=8))
    assert all(e["rank"] is not None for e in plan["sites"].values())  # all factored: each rank is checked
    for e in plan["sites"].values():
        assert e["rank"] is None or e["rank"] % 8 == 0 or e["rank"] == min(e["shape"])
    plan = choose_ranks(sites, spectra, Policy(budget=0.5, multiple=4))
    ranks = [e["rank"] for e in plan["sites"].values() if e["rank"] is not None]
    assert len(ranks) >= 2 and all(r % 4 == 0 for r in ranks)  # measured: fc1 12, fc2 4, head dense


def test_overrides(mlp):
    sites, spectra = _spectra_for(mlp)
    pol = Policy(budget=0.5, overrides=(Override("head", dense=True), Override("fc1", rank=3)))
    plan = choose_ranks(sites, spectra, pol)
    assert plan["sites"]["head"]["action"] == "dense" and "override" in plan["sites"]["head"]["reason"]
    assert plan["sites"]["fc1"]["rank"] == 3


def test_tied_sites_stay_dense(tied_lm):
    found = walk(tied_lm)
    spectra = decompose_sites(tied_lm, [s for s in found.sites if not s.tied_with])
    plan = choose_ranks(found.sites, spectra, Policy(rank=2))
    assert plan["sites"]["embed"]["action"] == "dense" and "shared with head" in plan["sites"]["embed"]["reason"]
    assert plan["sites"]["mix"]["rank"] == 2


@pytest.mark.parametrize(
    "kwargs,match",
    [
        ({"rank": 0}, "rank must be an integer >= 1"),
        ({"rank": 2.5}, "rank must be an integer"),
        ({"energy": 0.0}, r"energy must be a fraction in \(0, 1\]"),
        ({"keep": 1.5}, r"keep must be a fraction"),
        ({"budget": -0.1}, r"budget must be a fraction"),
        ({}, "exactly one rank policy"),
        ({"rank": 2, "budget": 0.5}, "exactly one rank policy"),
        ({"rank": 2, "multiple": 0}, "multiple must be a positive integer"),
    ],
)
def test_invalid_policies(kwargs, match):
    with pytest.raises(FactorizeError, match=match):
        Policy(**kwargs)


def test_budget_too_small_says_so(mlp):
    sites, spectra = _spectra_for(mlp)
    with pytest.raises(FactorizeError, match="budget is too small"):
        choose_ranks(sites, spectra, Policy(budget=0.001, multiple=8))
