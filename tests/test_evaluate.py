"""Tests for factorize/evaluate.py: running models, output drift, and the full evaluation."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy.spatial.distance import cosine as scipy_cosine_distance
from scipy.special import softmax as scipy_softmax
from scipy.stats import entropy as scipy_entropy
from torch import nn

from factorize.errors import FactorizeError
from factorize.evaluate import output_drift, primary_output, run_model


class _Tupled(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.fc = nn.Linear(4, 3)

    def forward(self, x, scale=1.0):
        return (self.fc(x) * scale, "extra")


class _Keyword(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.fc = nn.Linear(4, 3)

    def forward(self, input_ids, attention_mask=None):
        out = self.fc(input_ids)
        return {"last_hidden_state": out * attention_mask[..., None], "pooler": out.sum(-1)}


# --- run_model -------------------------------------------------------------------------------------------------


def test_run_model_feeds_each_batch_by_contract_and_restores_train_mode() -> None:
    torch.manual_seed(0)
    tupled, keyword = _Tupled().train(), _Keyword()
    x = torch.randn(5, 4)
    outs = run_model(tupled, [x, (x, 2.0), [x]])
    assert [tuple(o.shape) for o in outs] == [(5, 3)] * 3
    torch.testing.assert_close(outs[1], 2.0 * outs[0])
    assert tupled.training, "the training flag must be restored"
    assert not outs[0].requires_grad  # computed under no_grad
    mask = torch.ones(5, dtype=torch.float32)
    (out,) = run_model(keyword, [{"input_ids": x, "attention_mask": mask}])
    torch.testing.assert_close(out, keyword.fc(x).detach())


def test_primary_output_prefers_logits_then_hidden_state() -> None:
    transformers = pytest.importorskip("transformers")
    a, b = torch.ones(2, 3), torch.zeros(2, 3, 4)
    out = transformers.modeling_outputs.SequenceClassifierOutput(logits=a)
    assert primary_output(out) is a
    out = transformers.modeling_outputs.BaseModelOutputWithPooling(last_hidden_state=b, pooler_output=a)
    assert primary_output(out) is b
    assert primary_output(((b,), a)) is b  # first tensor, depth first
    with pytest.raises(FactorizeError, match="holds no tensor"):
        primary_output(("text", None))


# --- output_drift, checked against scipy -----------------------------------------------------------------------


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_output_drift_matches_scipy_on_logits(dtype) -> None:
    gen = torch.Generator().manual_seed(1)
    a = torch.randn(40, 7, generator=gen, dtype=dtype)
    b = a + 0.3 * torch.randn(40, 7, generator=gen, dtype=dtype)
    d = output_drift([a[:25], a[25:]], [b[:25], b[25:]])  # two batches, as run_model returns
    A, B = a.double().numpy(), b.double().numpy()
    # relative L2 error, Frobenius norm (numpy reference)
    assert d["relative_l2"] == pytest.approx(np.linalg.norm(A - B) / np.linalg.norm(A), rel=1e-9)
    # cosine per sample (scipy.spatial.distance.cosine = 1 - cosine similarity)
    cos = np.array([1 - scipy_cosine_distance(A[i], B[i]) for i in range(40)])
    assert d["cosine_mean"] == pytest.approx(cos.mean(), rel=1e-9)
    assert d["cosine_min"] == pytest.approx(cos.min(), rel=1e-9)
    # top-1 agreement and KL(p || q) of the softmax (scipy.stats.entropy(p, q) is KL in nats)
    assert d["top1_agreement"] == pytest.approx(np.mean(A.argmax(1) == B.argmax(1)))
    kl = np.mean([scipy_entropy(scipy_softmax(A[i]), scipy_softmax(B[i])) for i in range(40)])
    assert d["kl"] == pytest.approx(kl, rel=1e-6)
    assert d["samples"] == 40


def test_output_drift_of_identical_outputs_is_zero() -> None:
    a = torch.randn(8, 5)
    d = output_drift(a, a.clone())
    assert d["relative_l2"] == 0.0 and d["top1_agreement"] == 1.0
    assert d["cosine_min"] == pytest.approx(1.0) and d["kl"] == pytest.approx(0.0, abs=1e-12)


def test_output_drift_features_flatten_all_but_batch_and_skip_class_metrics() -> None:
    gen = torch.Generator().manual_seed(2)
    a = torch.randn(6, 4, 5, generator=gen)  # (B, T, C) hidden states
    b = a + 0.1 * torch.randn(6, 4, 5, generator=gen)
    d = output_drift(a, b)
    assert "top1_agreement" not in d and "kl" not in d
    A, B = a.reshape(6, -1).double().numpy(), b.reshape(6, -1).double().numpy()
    cos = [1 - scipy_cosine_distance(A[i], B[i]) for i in range(6)]
    assert d["cosine_min"] == pytest.approx(min(cos), rel=1e-9)
    # kind="logits" on (B, T, V): per-token top-1 and KL over the last dimension
    d = output_drift(a, b, kind="logits")
    assert d["top1_agreement"] == pytest.approx(float((a.argmax(-1) == b.argmax(-1)).double().mean()))
    assert "kl" in d and "kl" not in output_drift(a, b, kind="scores")


def test_output_drift_rejects_mismatched_outputs() -> None:
    with pytest.raises(FactorizeError, match="differ in shape") as err:
        output_drift([torch.zeros(2, 3), torch.zeros(2, 3)], [torch.zeros(2, 3), torch.zeros(2, 4)])
    assert "batch 1" in str(err.value)
    with pytest.raises(FactorizeError, match="unknown output kind"):
        output_drift(torch.ones(2, 3), torch.ones(2, 3), kind="probabilities")
