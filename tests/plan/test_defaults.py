"""Safe defaults on transformers models (factorize/plan/defaults.py): under a budget the input embedding table
(``get_input_embeddings()``) and heads tied to it stay dense and outside the budget unless named.

Outside references: transformers' ``BertModel`` / ``BertForMaskedLM`` built from tiny configs (random weights,
nothing downloaded); which module is the input embedding and which head shares its weight is transformers' own
answer (``get_input_embeddings()``, ``config.tie_word_embeddings``).
"""

from __future__ import annotations

import pytest
import torch
from torch import nn

import factorize
from factorize.model.sites import input_embedding_names
from factorize.plan.defaults import HELD_REASON, held_note

transformers = pytest.importorskip("transformers")
pytestmark = pytest.mark.filterwarnings("ignore::UserWarning")


def _bert(cls: str = "BertModel"):
    cfg = transformers.BertConfig(vocab_size=100, hidden_size=32, num_hidden_layers=2, num_attention_heads=4,
                                  intermediate_size=64, max_position_embeddings=32)
    torch.manual_seed(0)
    return getattr(transformers, cls)(cfg).eval()


def _ids():
    return {"input_ids": torch.randint(5, 100, (3, 10), generator=torch.Generator().manual_seed(0))}


def _held(plan) -> list[str]:
    return [n for n, e in plan["sites"].items() if e["reason"] == HELD_REASON]


def test_transformers_answer_names_the_table_and_its_tied_head() -> None:
    mlm = _bert("BertForMaskedLM")
    assert mlm.cls.predictions.decoder.weight is mlm.get_input_embeddings().weight  # transformers ties them
    assert input_embedding_names(mlm) == ["bert.embeddings.word_embeddings", "cls.predictions.decoder"]
    assert input_embedding_names(nn.Sequential(nn.Embedding(10, 4), nn.Linear(4, 4))) == []  # not transformers


def test_a_budget_leaves_the_input_embedding_dense_and_outside_the_budget() -> None:
    model = _bert()
    result = factorize.compress(model, budget=0.5, example=_ids())
    rows = result.plan["sites"]
    assert _held(result.plan) == ["embeddings.word_embeddings"]
    assert rows["embeddings.word_embeddings"]["action"] == "dense"
    assert next(iter(rows)) == "embeddings.word_embeddings"  # module order kept
    assert not isinstance(result.model.embeddings.word_embeddings, factorize.Factored)
    # the budget is the fraction of the selected layers' parameters: the held row is not among them
    selected = [e for n, e in rows.items() if n not in _held(result.plan)]
    assert sum(e["params_after"] for e in selected) <= 0.5 * sum(e["params"] for e in selected)
    assert "embeddings.word_embeddings" in held_note(result.plan)
    # named by an include pattern, it is an ordinary site again (here factored by the allocation)
    named = factorize.compress(model, budget=0.5, example=_ids(), include="*")
    assert _held(named.plan) == [] and "budget=" in named.plan["sites"]["embeddings.word_embeddings"]["reason"]
    assert held_note(named.plan) is None


def test_overrides_excludes_and_per_layer_rules_are_left_alone() -> None:
    model = _bert()
    over = factorize.compress(model, budget=0.5, example=_ids(),
                              overrides=[{"pattern": "*word_embeddings", "rank": 4}])
    assert over.plan["sites"]["embeddings.word_embeddings"]["rank"] == 4 and not _held(over.plan)
    out = factorize.compress(model, budget=0.5, example=_ids(), exclude="*word_embeddings")
    assert "embeddings.word_embeddings" not in out.plan["sites"]
    ranked = factorize.compress(model, rank=4, example=_ids())  # a per-layer rule: the user's own choice per layer
    assert ranked.plan["sites"]["embeddings.word_embeddings"]["rank"] == 4


def test_tied_head_bytes_budgets_and_calibration_hold_it_too() -> None:
    mlm = _bert("BertForMaskedLM")
    plain = factorize.compress(mlm, budget=0.5, example=_ids())
    assert _held(plain.plan) == ["bert.embeddings.word_embeddings", "cls.predictions.decoder"]
    in_bytes = factorize.compress(mlm, budget=0.5, cost="bytes", example=_ids())
    assert _held(in_bytes.plan) == ["bert.embeddings.word_embeddings", "cls.predictions.decoder"]
    assert "bytes_before" in factorize.plan_summary(in_bytes.plan)  # the held rows carry bytes like the rest
    calibrated = factorize.compress(mlm, budget=0.5, calibration=[_ids()])
    assert _held(calibrated.plan) == ["bert.embeddings.word_embeddings", "cls.predictions.decoder"]
    with torch.no_grad():  # the tie is kept: one tensor for both
        assert calibrated.model.cls.predictions.decoder.weight is \
            calibrated.model.bert.embeddings.word_embeddings.weight
