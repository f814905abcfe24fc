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


def _queue_greedy(sites, spectra, available, multiple, cost, error_scale):
    """The greedy allocation in its textbook form (a priority queue of each layer's next step; Cormen et al.,
    Introduction to Algorithms, 3rd ed., sec. 16.2 and 6.5): the reference the array form must equal exactly."""
    import heapq

    from factorize.plan.ranks import _dense_cost, _unit_cost

    ranks = {s.name: min(multiple, spectra[s.name].computed_rank) for s in sites}
    spent = float(sum(ranks[s.name] * _unit_cost(s, cost) for s in sites))
    kept = {s.name: spectra[s.name].kept_energy() for s in sites}
    order = {s.name: i for i, s in enumerate(sites)}
    by_name = {s.name: s for s in sites}
    heap = []

    def push(name):
        site, spec, r = by_name[name], spectra[name], ranks[name]
        sc = error_scale.get(name, 1.0 / spec.total_energy) if error_scale else 1.0 / spec.total_energy
        nxt = r + multiple
        if not site.saves_at(nxt) or nxt > spec.computed_rank:
            gain = (spec.total_energy - kept[name][r]) * sc
            step = _dense_cost(site, cost) - r * _unit_cost(site, cost)
        else:
            gain = (kept[name][nxt] - kept[name][r]) * sc
            step = multiple * _unit_cost(site, cost)
        heapq.heappush(heap, (-gain / max(step, 1), order[name], name, nxt, step))

    for s in sites:
        push(s.name)
    while heap:
        _, _, name, nxt, step = heapq.heappop(heap)
        if spent + step > available + 1e-9:
            continue
        spent += step
        site, spec = by_name[name], spectra[name]
        if not site.saves_at(nxt) or nxt > spec.computed_rank:
            ranks[name] = None
        else:
            ranks[name] = nxt
            push(name)
    return ranks


@pytest.mark.parametrize("seed", range(12))
def test_budget_allocation_equals_the_priority_queue_greedy_step_for_step(seed):
    """The array form of the greedy allocation gives exactly what a priority queue of each layer's next step gives
    (reference above), on random layers: mixed shapes, a costlier unit (MACs), rounding to a multiple, measured
    error scales, spectra with ties and flat stretches (so dense steps and rounding in the cumulative energies
    break the per-layer order) and budgets from nearly nothing to nearly everything."""
    from factorize.plan.ranks import _dense_cost, allocate_budget
    from factorize.spectra.decompose import Spectrum

    rng = np.random.default_rng(seed)
    sites, spectra, scale = [], {}, {}
    for i in range(int(rng.integers(1, 9))):
        m, n = (int(x) for x in rng.integers(2, 70, size=2))
        k = min(m, n)
        kind = rng.integers(3)
        s = np.sort(rng.random(k))[::-1] if kind == 0 else np.repeat(rng.random(max(k // 3, 1)), 3)[:k]
        if kind == 2:
            s = np.full(k, 0.5)  # flat: every step gains the same
        s = np.sort(s)[::-1].astype(np.float32)
        s = np.pad(s, (0, k - len(s)))
        macs = int(m * n * rng.integers(1, 5)) if seed % 2 else None
        site = Site(name=f"l{i}", kind="linear", shape=(m, n), params=m * n, has_bias=False, dtype="float32",
                    macs_per_sample=macs)
        S = torch.from_numpy(s.copy())
        spectra[site.name] = Spectrum(U=torch.zeros(m, 0), S=S, Vh=torch.zeros(0, n),
                                      total_energy=float((S.double() ** 2).sum()) + float(rng.random()) * 0.1,
                                      method="exact", exact=True)
        if rng.random() < 0.5:
            scale[site.name] = float(rng.random() * 3)
        sites.append(site)
    cost = "macs" if seed % 2 else "params"
    multiple = int(rng.choice([1, 1, 2, 8]))
    total = sum(_dense_cost(s, cost) for s in sites)
    for fraction in (0.05, 0.2, 0.5, 0.8, 0.97):
        available = fraction * total
        lowest = sum(min(multiple, spectra[s.name].computed_rank) * (s.shape[0] + s.shape[1])
                     * ((s.macs_per_sample // s.params) if cost == "macs" and s.macs_per_sample else 1)
                     for s in sites)
        if lowest > available + 1e-9:
            with pytest.raises(FactorizeError, match="budget is too small"):
                allocate_budget(sites, spectra, available, multiple=multiple, cost=cost, error_scale=scale)
            continue
        want = _queue_greedy(sites, spectra, available, multiple, cost, scale)
        assert allocate_budget(sites, spectra, available, multiple=multiple, cost=cost, error_scale=scale) == want
