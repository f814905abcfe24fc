"""The typed view of plan entries reads a plan without changing it."""

from __future__ import annotations

import json

import torch
from torch import nn

from factorize.model.sites import walk
from factorize.plan.entries import (
    CORRECTED,
    DENSE,
    FACTOR,
    FORMS,
    PlanEntry,
    factored_names,
    factored_ranks,
    is_factored_entry,
    plan_entries,
)
from factorize.plan.policy import Policy
from factorize.plan.ranks import choose_ranks, plan_ranks, plan_summary
from factorize.spectra.sites import decompose_sites


def _plan() -> dict:
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(32, 32), nn.ReLU(), nn.Linear(32, 4), nn.ReLU(), nn.Linear(4, 4))
    found = walk(model)
    spectra = decompose_sites(model, found.sites)
    return choose_ranks(found.sites, spectra, Policy(rank=8))


def test_records_mirror_the_json_entries_and_leave_the_plan_unchanged():
    plan = _plan()
    before = json.dumps(plan, sort_keys=False)
    records = list(plan_entries(plan))
    assert json.dumps(plan, sort_keys=False) == before
    assert [r.name for r in records] == list(plan["sites"])
    for r in records:
        e = plan["sites"][r.name]
        assert isinstance(r, PlanEntry)
        assert (r.form, r.kind, list(r.shape), r.rank, r.reason) == (e["action"], e["kind"], e["shape"], e["rank"],
                                                                       e["reason"])
        assert (r.params, r.params_after, r.predicted_error) == (e["params"], e["params_after"], e["predicted_error"])
        assert r.precision is None  # plan version 1 records no stored precision
        assert r.factored == (e["action"] == "factor") == is_factored_entry(e)


def test_factored_helpers_agree_with_the_plan():
    plan = _plan()
    forms = {e["action"] for e in plan["sites"].values()}
    assert forms == {FACTOR, DENSE}  # the 32x32 layer is factored at rank 8; the 4-wide ones cannot save
    assert factored_ranks(plan) == plan_ranks(plan) == {"0": 8}
    assert factored_names(plan) == ["0"]
    assert plan_summary(plan)["factored"] == 1


def test_unknown_or_missing_forms_are_neither_factored_nor_rewritten():
    odd = {"sites": {"a": {"action": "shrink", "rank": 3}, "b": {}, "c": "not an entry"}}
    records = list(plan_entries(odd))
    assert [r.name for r in records] == ["a", "b"]
    assert not any(r.factored or r.rewritten for r in records)
    assert factored_ranks(odd) == {}
    assert set(FORMS) == {FACTOR, DENSE, CORRECTED}
