"""Pooled outputs, checked against the pooling formulas computed by hand with numpy."""

from __future__ import annotations

import numpy as np
import pytest
import torch

import factorize
from factorize.errors import FactorizeError
from factorize.measure.pooling import pool
from tests.conftest import tiny_bert


def _states():
    g = torch.Generator().manual_seed(0)
    states = torch.randn(3, 5, 4, generator=g)
    mask = torch.tensor([[1, 1, 1, 1, 1], [1, 1, 1, 0, 0], [1, 0, 0, 0, 0]])
    return states, {"input_ids": torch.zeros(3, 5, dtype=torch.long), "attention_mask": mask}


def test_mean_cls_and_last_pooling_follow_their_definitions():
    states, batch = _states()
    s, m = states.numpy(), batch["attention_mask"].numpy()
    # mean pooling over real tokens: the sentence embedding of Sentence-BERT (Reimers & Gurevych 2019)
    expected = np.stack([s[i, m[i] == 1].mean(0) for i in range(3)])
    np.testing.assert_allclose(pool(states, batch, "mean").numpy(), expected, rtol=1e-6)
    np.testing.assert_allclose(pool(states, batch, "cls").numpy(), s[:, 0])
    np.testing.assert_allclose(pool(states, batch, "last").numpy(), np.stack([s[0, 4], s[1, 2], s[2, 0]]))
    np.testing.assert_allclose(pool(states, states, "mean").numpy(), s.mean(1), rtol=1e-6)  # no mask: all tokens


def test_pooling_refuses_unknown_names_and_flat_outputs():
    states, batch = _states()
    with pytest.raises(FactorizeError, match="unknown pooling"):
        pool(states, batch, "max")
    with pytest.raises(FactorizeError, match="per-token outputs"):
        pool(states[:, 0], batch, "mean")


def test_evaluate_judges_an_encoder_on_its_pooled_output():
    model = tiny_bert()
    g = torch.Generator().manual_seed(3)
    ids = torch.randint(0, 64, (4, 9), generator=g)
    mask = torch.ones_like(ids)
    mask[2:, 6:] = 0
    batches = [{"input_ids": ids, "attention_mask": mask}]
    small = factorize.compress(model, rank=2, include="*encoder*")
    report = factorize.evaluate(model, small.model, batches, pooling="mean", latency_repeats=0)
    with torch.no_grad():
        a = pool(model(**batches[0]).last_hidden_state, batches[0], "mean").numpy()
        b = pool(small.model(**batches[0]).last_hidden_state, batches[0], "mean").numpy()
    cos = (a * b).sum(1) / (np.linalg.norm(a, axis=1) * np.linalg.norm(b, axis=1))
    assert report.drift["cosine_mean"] == pytest.approx(float(cos.mean()), rel=1e-5)
    assert report.samples == 4
