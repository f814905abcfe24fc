"""Perplexity of causal language models, checked against transformers' own next-token loss."""

from __future__ import annotations

import math

import pytest
import torch

import factorize
from factorize.errors import FactorizeError
from factorize.measure.perplexity import is_causal_lm, next_token_loss, perplexity
from factorize.measure.report import Report
from tests.conftest import MLP, tiny_gpt2


def _ids(batch=3, tokens=12, vocab=64, seed=0):
    return torch.randint(0, vocab, (batch, tokens), generator=torch.Generator().manual_seed(seed))


def test_perplexity_is_exp_of_transformers_loss():
    # reference: transformers' GPT2LMHeadModel computes the mean next-token cross-entropy for labels=input_ids
    model = tiny_gpt2()
    ids = _ids()
    with torch.no_grad():
        expected = math.exp(float(model(input_ids=ids, labels=ids).loss))
    assert perplexity(model, [{"input_ids": ids}]) == pytest.approx(expected, rel=1e-5)
    assert perplexity(model, [ids]) == pytest.approx(expected, rel=1e-5)  # a bare (B, T) integer tensor too


def test_padding_is_left_out_like_transformers_ignore_index():
    # reference: transformers skips labels equal to -100; our mask skips positions whose attention_mask is 0
    model = tiny_gpt2()
    ids = _ids(batch=2, tokens=10)
    mask = torch.ones_like(ids)
    mask[1, 6:] = 0
    labels = ids.masked_fill(mask == 0, -100)
    with torch.no_grad():
        expected = float(model(input_ids=ids, attention_mask=mask, labels=labels).loss)
    loss, count = next_token_loss(model, [{"input_ids": ids, "attention_mask": mask}])
    assert loss == pytest.approx(expected, rel=1e-5)
    assert count == 9 + 5  # tokens 2..10 of the first row, 2..6 of the second


def test_token_count_weights_batches_by_tokens():
    model = tiny_gpt2()
    a, b = _ids(batch=1, tokens=8, seed=1), _ids(batch=3, tokens=8, seed=2)
    la, na = next_token_loss(model, [a])
    lb, nb = next_token_loss(model, [b])
    both, n = next_token_loss(model, [a, b])
    assert n == na + nb and both == pytest.approx((la * na + lb * nb) / n, rel=1e-9)


def test_evaluate_reports_perplexity_for_causal_lms_only():
    model = tiny_gpt2()
    assert is_causal_lm(model) and not is_causal_lm(MLP())
    batches = [{"input_ids": _ids(seed=s)} for s in range(2)]
    same = factorize.evaluate(model, model, batches, latency_repeats=0)
    assert same.perplexity_before == pytest.approx(same.perplexity_after) and same.perplexity_ratio == pytest.approx(1)
    small = factorize.compress(model, rank=1, include="transformer.h.*")
    report = factorize.evaluate(model, small.model, batches, plan=small.plan, latency_repeats=0)
    assert report.perplexity_ratio is not None and report.perplexity_ratio != pytest.approx(1, abs=1e-6)
    assert report.to_json()["perplexity_ratio"] == pytest.approx(report.perplexity_ratio)
    mlp = MLP()
    plain = factorize.evaluate(mlp, mlp, [torch.randn(4, 24)], latency_repeats=0)
    assert plain.perplexity_before is None and "perplexity" not in plain.to_markdown()


def test_perplexity_refuses_inputs_without_tokens():
    with pytest.raises(FactorizeError, match="no token ids"):
        perplexity(tiny_gpt2(), [torch.randn(2, 5)])


@pytest.mark.parametrize(
    ("fields", "calibrated", "expect"),
    [
        ({"drift": {"cosine_mean": 0.61, "relative_l2": 0.8}}, False, "calibration inputs"),
        ({"drift": {"cosine_mean": 0.80, "relative_l2": 0.5}}, True, "heal"),
        ({"drift": {"top1_agreement": 0.9, "relative_l2": 0.1}}, True, "top-1 agreement"),
        ({"perplexity_before": 10.0, "perplexity_after": 12.0}, True, "perplexity rose to 1.200x"),
        ({"accuracy_before": 0.97, "accuracy_after": 0.90}, None, "accuracy fell by 7.00 points"),
    ],
)
def test_high_drift_names_the_next_step(fields, calibrated, expect):
    report = Report(calibrated=calibrated, **fields)
    advice = report.advice()
    assert len(advice) == 1 and advice[0].startswith("High drift") and expect in advice[0]
    assert advice[0] in report.to_markdown() and report.to_json()["advice"] == advice


def test_low_drift_gives_no_advice():
    report = Report(drift={"cosine_mean": 0.99, "relative_l2": 0.05}, perplexity_before=10.0, perplexity_after=10.5,
                    calibrated=False)
    assert report.advice() == [] and "High drift" not in report.to_markdown()
