"""The Policy: one object for a compression, built from keywords in one place."""

from __future__ import annotations

import json

import pytest

from factorize import FactorizeError, Override, Policy
from factorize.model.sites import Site
from factorize.plan.policy import POLICY_KEYWORDS, rank_needed, resolve_policy


def test_from_keywords_turns_mappings_into_overrides():
    p = Policy.from_keywords(budget=0.5, overrides=[{"pattern": "head", "dense": True}, Override("fc*", rank=3)],
                             include="fc*", exclude=["fc2"], method="exact", seed=3)
    assert p.overrides == (Override("head", dense=True), Override("fc*", rank=3))
    assert p.include == ("fc*",) and p.exclude == ("fc2",) and p.method == "exact" and p.seed == 3


def test_to_dict_is_unchanged_for_existing_fields():
    # Plans are saved in files: the policy they carry keeps the exact shape it had before include/exclude/method/
    # seed joined the Policy (those are left out: plan["method"] and plan["sites"] already record them).
    p = Policy.from_keywords(budget=0.5, multiple=8, overrides=[{"pattern": "head", "dense": True}],
                             include="fc*", method="randomized", seed=7)
    assert json.dumps(p.to_dict()) == ('{"budget": 0.5, "multiple": 8, "cost": "params", '
                                       '"overrides": [{"pattern": "head", "dense": true}]}')
    assert json.dumps(Policy(rank=4).to_dict()) == '{"rank": 4, "multiple": 1, "cost": "params"}'


@pytest.mark.parametrize("kwargs,match", [
    ({"budget": 0.5, "bugdet": 0.4}, "unknown policy keyword: bugdet"),
    ({"budget": 0.5, "overrides": [{"pattern": "x", "rnak": 2}]}, "invalid overrides"),
    ({"budget": 0.5, "overrides": [{"rank": 2}]}, "invalid overrides"),
    ({"budget": 0.5, "method": "magic"}, "unknown method"),
    ({"budget": 0.5, "seed": "1"}, "seed must be an integer"),
    ({"budget": 0.5, "include": ["ok", 3]}, "include patterns must be strings"),
    ({"budget": 0.5, "cost": "flops"}, "cost must be"),
])
def test_bad_keywords_are_errors(kwargs, match):
    with pytest.raises(FactorizeError, match=match):
        Policy.from_keywords(**kwargs)


def test_policy_and_keywords_together_is_an_error():
    with pytest.raises(FactorizeError, match="both given"):
        resolve_policy(Policy(budget=0.5), {"rank": 4})
    assert resolve_policy(None, {"rank": 4}) == Policy(rank=4)
    with pytest.raises(FactorizeError, match="chooses the budget itself"):
        resolve_policy(None, {"rank": 4}, budget=1.0)


def test_keyword_block_declared_once():
    assert set(POLICY_KEYWORDS) == {"rank", "energy", "keep", "budget", "include", "exclude", "overrides", "multiple",
                                    "cost", "precisions", "method", "seed"}


def test_rank_needed_bounds_partial_decompositions():
    site = Site(name="w", kind="linear", shape=(40, 60), params=2400, has_bias=False, dtype="float32")
    assert rank_needed(site, Policy(rank=5, multiple=4)) == 8  # rounded up to the multiple
    assert rank_needed(site, Policy(keep=0.5)) == 12  # floor(0.5 * 2400 / (40 + 60))
    assert rank_needed(site, Policy(budget=0.5)) == site.break_even + 1  # 24 + 1: past break-even stays dense


def test_with_budget_keeps_a_bytes_cost_and_its_precisions():
    """The drift search walks budgets through with_budget: a budget in bytes stays one, with the same precisions."""
    p = Policy(budget=0.5, cost="bytes", precisions=("int8", "int4g64"), multiple=8)
    q = p.with_budget(0.2)
    assert (q.budget, q.cost, q.allowed_precisions, q.multiple) == (0.2, "bytes", ("int8", "int4g64"), 8)
    assert q.to_dict() == {"budget": 0.2, "multiple": 8, "cost": "bytes", "precisions": ["int8", "int4g64"]}
