"""Choose a rank for every site from its spectrum: the plan.

Policies (exactly one per call, see :class:`Policy`):

* ``rank=N``   the same rank everywhere, capped at each layer's computed rank;
* ``energy=t`` per layer, the smallest r keeping fraction t of sum(s_i^2);
* ``keep=f``   every layer keeps fraction f of its own parameters: r = floor(f * mn / (m + n));
* ``budget=f`` the sites together keep fraction f of their parameters (or multiply-accumulates); ranks are
  allocated greedily by the largest error reduction per unit spent. Each layer's error is measured relative to
  its own energy (s_i^2 / sum s^2) unless the caller passes its own scale (for example a measured
  sensitivity). Because singular values decrease, each layer's gain per unit is non-increasing, so the greedy
  allocation is optimal up to the last step (the classic exchange argument for separable concave gains).

Always: a layer whose factored form would not save (r(m + n) >= mn, common practice) stays dense, and so does a
weight shared by several modules. Optional rounding to a multiple of 8 or 16 suits fast matrix kernels
(common practice).

The plan is plain JSON-serialisable data::

    {"format": "factorize.plan", "version": 1, "method": "exact", "policy": {...},
     "sites": {"encoder.fc1": {"kind": "linear", "shape": [m, n], "rank": 48, "action": "factor",
                               "reason": "...", "params": mn, "params_after": 48*(m+n),
                               "predicted_error": 0.12}, ...}}
"""

from __future__ import annotations

import fnmatch
import math
from collections.abc import Mapping, Sequence

import numpy as np

from factorize.errors import FactorizeError
from factorize.model.sites import Site
from factorize.plan.entries import DENSE, FACTOR, factored_entries, factored_ranks
from factorize.plan.policy import POLICY_KEYS, Override, Policy, rank_needed  # noqa: F401 - re-exported
from factorize.spectra.decompose import Spectrum

PLAN_FORMAT = "factorize.plan"
PLAN_VERSION = 1  # rank-only plans
PRECISION_PLAN_VERSION = 2  # plans whose entries record a stored precision (factorize.plan.forms)


# ---------------------------------------------------------------------------------------------------------------
# per-layer rules


def _round_up(r: int, multiple: int) -> int:
    return int(math.ceil(r / multiple) * multiple)


def _round_down(r: int, multiple: int) -> int:
    return max(multiple, (r // multiple) * multiple) if r >= 1 else r


def site_entry(site: Site, spectrum: Spectrum | None, rank: int | None, reason: str) -> dict:
    """One plan row. ``rank=None`` means keep dense."""
    if rank is not None and spectrum is not None and rank > spectrum.computed_rank:
        # exact spectra: cap at min(m, n). Partial (randomized) spectra stop at the break-even rank, so a rank
        # beyond them cannot save anything: treat it as full rank, which the check below keeps dense.
        rank = spectrum.computed_rank if spectrum.exact else site.max_rank
    if rank is not None and not site.saves_at(rank):
        reason = (
            f"rank {rank} would store {site.factored_params(rank)} numbers, not fewer than the dense "
            f"{site.params} (break-even rank {site.break_even}); kept dense"
        )
        rank = None
    entry = {
        "kind": site.kind,
        "shape": list(site.shape),
        "rank": rank,
        "action": FACTOR if rank is not None else DENSE,
        "reason": reason,
        "params": site.params,
        "params_after": site.factored_params(rank) if rank is not None else site.params,
    }
    if site.kernel:
        entry["kernel"] = list(site.kernel)
    if spectrum is not None:
        entry["predicted_error"] = spectrum.relative_error(rank) if rank is not None else 0.0
        entry["energy_kept"] = spectrum.energy_fraction(rank) if rank is not None else 1.0
    return entry


def _fixed_rank(site: Site, spectrum: Spectrum, *, rank=None, energy=None, keep=None, multiple: int = 1):
    """(rank, reason) under a per-layer rule."""
    if rank is not None:
        return _round_up(rank, multiple), f"rank={rank}"
    if energy is not None:
        r = spectrum.rank_for_energy(energy)
        if not spectrum.exact and spectrum.energy_fraction(r) < energy:
            r = site.max_rank  # the computed part of the spectrum does not reach t: only dense or full rank does
        return _round_up(r, multiple), f"energy={energy}: smallest rank keeping {energy:.4g} of sum(s^2)"
    r = math.floor(keep * site.params / (site.shape[0] + site.shape[1]))
    if r < 1:
        return 1, f"keep={keep}: below rank 1, raised to 1"
    return _round_down(r, multiple), f"keep={keep}: floor(f*mn/(m+n))"


def _override_for(name: str, overrides: Sequence[Override]) -> Override | None:
    for o in overrides:  # the first matching pattern wins
        if fnmatch.fnmatchcase(name, o.pattern):
            return o
    return None


# ---------------------------------------------------------------------------------------------------------------
# global budget


def _unit_cost(site: Site, cost: str) -> int:
    """Cost of one rank unit: (m + n) parameters, or (m + n) MACs per output position."""
    positions = (site.macs_per_sample // site.params) if (cost == "macs" and site.macs_per_sample) else 1
    return (site.shape[0] + site.shape[1]) * positions


def _dense_cost(site: Site, cost: str) -> int:
    return site.params * ((site.macs_per_sample // site.params) if (cost == "macs" and site.macs_per_sample) else 1)


def allocate_budget(
    sites: Sequence[Site],
    spectra: Mapping[str, Spectrum],
    available: float,
    *,
    multiple: int = 1,
    cost: str = "params",
    error_scale: Mapping[str, float] | None = None,
) -> dict[str, int | None]:
    """Greedy allocation of ``available`` cost units across ``sites``: name -> rank, or None for dense.

    Every site starts at rank ``multiple`` (a factored layer needs at least one rank unit). Then, repeatedly, the
    step with the largest scaled error reduction per unit of cost is taken: adding ``multiple`` ranks (gain: the
    next squared singular values), or -- once the next step would reach the break-even rank or the end of the
    computed spectrum -- going dense (gain: the whole remaining tail). A step that no longer fits is dropped, and
    with it every later step of that layer. Ties go to the earlier site.

    Computed without a priority queue, with the same result step for step: each site's steps are known in
    advance, and a step whose gain per unit exceeds its predecessor's (the dense step, or rounding in the
    cumulative energies) is taken right after it, so ordering every step by its site's running minimum of gain
    per unit (then site order, then step) is the order a queue of each site's next step would pop. Everything
    that fits in that order is taken at once; at a step that does not fit, its site stops and the rest is summed
    again. A queue costs a Python-level push and pop per rank step (86,000 of them in a sweep of MiniLM's 36
    layers over 8 budgets, about 45 ms per budget).
    """
    ranks: dict[str, int] = {}
    spent = 0
    for s in sites:
        ranks[s.name] = min(multiple, spectra[s.name].computed_rank)
        spent += ranks[s.name] * _unit_cost(s, cost)
    if spent > available + 1e-9:
        need = spent / max(sum(_dense_cost(s, cost) for s in sites), 1)
        raise FactorizeError(
            f"the budget is too small: even rank {multiple} in every selected layer keeps {need:.2%} of their "
            f"{'parameters' if cost == 'params' else 'multiply-accumulates'}",
            fix="raise the budget, exclude some layers, or use keep=/rank= for a per-layer rule",
        )
    if not sites:
        return ranks
    scale = dict(error_scale or {})
    keys, costs, owner, step, to = [], [], [], [], []
    for i, site in enumerate(sites):
        spec, r0 = spectra[site.name], ranks[site.name]
        kept = spec.kept_energy()
        sc = scale.get(site.name, 1.0 / spec.total_energy if spec.total_energy > 0 else 0.0)
        top = _last_saving_rank(site, r0, spec.computed_rank, multiple)
        frm = np.arange(r0, top, multiple, dtype=np.int64)  # rank steps frm -> frm + multiple, then dense
        unit = _unit_cost(site, cost)
        gains = (kept[frm + multiple] - kept[frm]) * sc
        dense_cost = _dense_cost(site, cost) - top * unit
        dense_gain = (spec.total_energy - kept[top]) * sc
        key = np.append(-gains / max(multiple * unit, 1), -dense_gain / max(dense_cost, 1))
        keys.append(np.maximum.accumulate(key))  # a queue pops a step whose key beats its predecessor's at once
        costs.append(np.append(np.full(len(frm), multiple * unit, dtype=np.int64), dense_cost))
        owner.append(np.full(len(key), i, dtype=np.int64))
        step.append(np.arange(len(key), dtype=np.int64))
        to.append(np.append(frm + multiple, -1))  # -1: dense
    key, cost_of, site_of, step_of, rank_to = (np.concatenate(a) for a in (keys, costs, owner, step, to))
    order = np.lexsort((step_of, site_of, key))  # ascending key (the queue's -gain per unit), then site, then step
    cost_of, site_of, rank_to = cost_of[order], site_of[order], rank_to[order]
    alive = np.ones(len(sites), dtype=bool)
    last = np.full(len(sites), -2, dtype=np.int64)  # the last step taken per site (-2: none)
    limit = available + 1e-9
    pos = np.arange(len(order))
    while len(pos):
        pos = pos[alive[site_of[pos]]]
        total = spent + np.cumsum(cost_of[pos])  # whole numbers: exact in float64 below 2**53, as a running sum
        over = np.flatnonzero(total.astype(np.float64) > limit)
        fit = pos if not len(over) else pos[: over[0]]
        last[site_of[fit]] = rank_to[fit]  # a site's steps come in rank order, so its last write is its rank
        if not len(over):
            break
        if over[0] > 0:
            spent = int(total[over[0] - 1])
        alive[site_of[pos[over[0]]]] = False  # that step does not fit: its site stops there
        pos = pos[over[0] + 1:]
    for i, site in enumerate(sites):
        if last[i] == -1:
            ranks[site.name] = None  # dense
        elif last[i] >= 0:
            ranks[site.name] = int(last[i])
    return ranks


def _last_saving_rank(site: Site, r0: int, computed: int, multiple: int) -> int:
    """The highest rank r0 + j * multiple that is computed and still saves (``Site.saves_at``), else r0."""
    lo, hi = 0, max((computed - r0) // multiple, 0)  # bisection over j: saves_at is monotone in the rank
    while lo < hi:
        mid = (lo + hi + 1) // 2
        if site.saves_at(r0 + mid * multiple):
            lo = mid
        else:
            hi = mid - 1
    return r0 + lo * multiple


# ---------------------------------------------------------------------------------------------------------------
# the plan


def choose_ranks(
    sites: Sequence[Site],
    spectra: Mapping[str, Spectrum],
    policy: Policy,
    *,
    method: str = "exact",
    factor_tied: bool = False,
    error_scale: Mapping[str, float] | None = None,
) -> dict:
    """Build the plan: for every site a rank or "dense", with the reason."""
    missing = [s.name for s in sites if s.name not in spectra and not (s.tied_with and not factor_tied)]
    if missing:
        raise FactorizeError("no spectrum for some sites", missing, fix="decompose every site before choosing ranks")
    entries: dict[str, dict] = {}
    pool: list[Site] = []
    fixed_cost = 0
    for site in sites:
        spec = spectra.get(site.name)
        if site.tied_with and not factor_tied:
            entries[site.name] = site_entry(
                site, spec, None,
                f"weight shared with {', '.join(site.tied_with)}; factoring one owner would untie them",
            )
            continue
        o = _override_for(site.name, policy.overrides)
        if o is not None and o.dense:
            entries[site.name] = site_entry(site, spec, None, f"override {o.pattern!r}: keep dense")
        elif o is not None:
            r, why = _fixed_rank(site, spec, rank=o.rank, energy=o.energy, keep=o.keep, multiple=policy.multiple)
            entries[site.name] = site_entry(site, spec, r, f"override {o.pattern!r}: {why}")
        elif policy.budget is None:
            r, why = _fixed_rank(
                site, spec, rank=policy.rank, energy=policy.energy, keep=policy.keep, multiple=policy.multiple
            )
            entries[site.name] = site_entry(site, spec, r, why)
        else:
            pool.append(site)
            continue
        e = entries[site.name]
        fixed_cost += e["params_after"] if policy.cost == "params" else _entry_cost(site, e)
    if pool:
        everything = [s for s in sites if not (s.tied_with and not factor_tied)]
        total = sum(_dense_cost(s, policy.cost) for s in everything)
        available = policy.budget * total - fixed_cost
        ranks = allocate_budget(
            pool, spectra, available, multiple=policy.multiple, cost=policy.cost, error_scale=error_scale
        )
        for site in pool:
            r = ranks[site.name]
            why = f"budget={policy.budget}: greedy allocation by error reduction per {policy.cost[:-1]}"
            entries[site.name] = site_entry(site, spectra[site.name], r, why if r is not None else why + "; dense")
    order = [s.name for s in sites]
    return {
        "format": PLAN_FORMAT,
        "version": PLAN_VERSION,
        "method": method,
        "policy": policy.to_dict(),
        "sites": {name: entries[name] for name in order},
    }


def _entry_cost(site: Site, entry: dict) -> int:
    r = entry["rank"]
    return _dense_cost(site, "macs") if r is None else r * _unit_cost(site, "macs")


def plan_ranks(plan: Mapping) -> dict[str, int]:
    """name -> rank for the sites a plan factors."""
    return factored_ranks(plan)


def plan_summary(plan: Mapping) -> dict:
    """Totals over a plan's sites: parameters before/after and how many layers are factored."""
    sites = plan["sites"].values()
    before = sum(e["params"] for e in sites)
    after = sum(e["params_after"] for e in sites)
    return {
        "sites": len(plan["sites"]),
        "factored": sum(1 for _ in factored_entries(plan)),
        "params_before": before,
        "params_after": after,
        "kept_fraction": after / before if before else 1.0,
        **_bytes_summary(list(sites)),
    }


def _bytes_summary(sites: list) -> dict:
    """Stored bytes before/after, for plans whose rows record them (budgets in bytes); empty otherwise."""
    if not sites or not all("bytes_after" in e for e in sites):
        return {}
    before, after = sum(e["bytes"] for e in sites), sum(e["bytes_after"] for e in sites)
    return {"bytes_before": before, "bytes_after": after, "kept_bytes_fraction": after / before if before else 1.0}
