"""Tests for factorize/training/watch.py: healing watches, and shows on its progress line, the held-out measure the
model's users judge it by (pooled cosine for encoders, perplexity for causal language models, drift otherwise).

The models are transformers' model classes built from tiny configs (no download); every watched value is checked
against a computation made here from outside the project: torch's cosine similarity of mean-pooled states (the
Sentence-BERT embedding, Reimers & Gurevych 2019) and transformers' own language-model loss."""

from __future__ import annotations

import math

import pytest
import torch
import torch.nn.functional as F

import factorize
from factorize.errors import FactorizeError
from factorize.training.heal import heal
from tests.conftest import MLP, tiny_bert, tiny_gpt2


def _token_batches(count: int, size: int, length: int, seed: int, pad: bool) -> list[dict]:
    gen = torch.Generator().manual_seed(seed)
    out = []
    for _ in range(count):
        ids = torch.randint(1, 64, (size, length), generator=gen)
        mask = torch.ones(size, length, dtype=torch.long)
        if pad:
            mask[0, length // 2:] = 0  # one padded sample: padding must not count in the pooled vector
        out.append({"input_ids": ids, "attention_mask": mask})
    return out


def _pooled_cosine(teacher, student, batches, how: str = "mean") -> float:
    cos = []
    with torch.no_grad():
        for b in batches:
            a, s = teacher(**b).last_hidden_state, student(**b).last_hidden_state  # (B, T, d)
            if how == "cls":
                pa, ps = a[:, 0], s[:, 0]
            else:
                m = b["attention_mask"].unsqueeze(-1).float()  # (B, T, 1)
                pa, ps = (a * m).sum(1) / m.sum(1), (s * m).sum(1) / m.sum(1)
            cos.append(F.cosine_similarity(pa.double(), ps.double(), dim=-1))
    return torch.cat(cos).mean().item()


def _perplexity(model, batches) -> float:
    # transformers' causal-LM loss (labels shifted inside the model), token-weighted over the batches
    total = count = 0.0
    with torch.no_grad():
        for b in batches:
            n = b["input_ids"].numel() - b["input_ids"].shape[0]
            total += model(**b, labels=b["input_ids"]).loss.item() * n
            count += n
    return math.exp(total / count)


def test_encoder_heal_watches_the_mean_pooled_cosine_and_shows_it(capsys) -> None:
    teacher = tiny_bert()
    student = factorize.compress(teacher, rank=4, include="encoder.*").model
    data, heldout = _token_batches(3, 8, 10, 0, True), _token_batches(1, 8, 10, 1, True)
    before = _pooled_cosine(teacher, student, heldout)
    result = heal(student, teacher, data, steps=6, heldout=heldout, lr=1e-3, eval_every=2, progress=True)
    assert result.metric == "cosine_mean" and result.pooling == "mean"
    assert result.checks[0].drift == pytest.approx(before, abs=1e-6)
    assert result.best_drift == pytest.approx(_pooled_cosine(teacher, student, heldout), abs=1e-6)  # state kept
    assert result.best_drift >= result.initial_drift  # higher is better, and step 0 is a candidate
    assert "neighbour_agreement" in result.checks[0].metrics and "cosine_p5" in result.checks[0].metrics
    assert "held-out cosine (mean-pooled)" in capsys.readouterr().err


def test_pooling_can_be_chosen() -> None:
    teacher = tiny_bert()
    student = factorize.compress(teacher, rank=4, include="encoder.*").model
    data, heldout = _token_batches(2, 8, 10, 0, True), _token_batches(1, 8, 10, 1, True)
    before = _pooled_cosine(teacher, student, heldout, "cls")
    result = heal(student, teacher, data, steps=2, heldout=heldout, pooling="cls", progress=False)
    assert result.pooling == "cls" and result.checks[0].drift == pytest.approx(before, abs=1e-6)


def test_language_model_heal_watches_perplexity_and_shows_it(capsys) -> None:
    teacher = tiny_gpt2()
    student = factorize.compress(teacher, rank=4, include="transformer.h.*").model
    data, heldout = _token_batches(3, 4, 12, 0, False), _token_batches(2, 4, 12, 1, False)
    ppl_teacher, ppl_before = _perplexity(teacher, heldout), _perplexity(student, heldout)
    result = heal(student, teacher, data, steps=6, heldout=heldout, lr=1e-3, eval_every=2, progress=True)
    assert result.metric == "perplexity" and result.pooling is None and result.loss == "kl"
    first = result.checks[0]
    assert first.drift == pytest.approx(ppl_before, rel=1e-4)
    assert first.metrics["perplexity_original"] == pytest.approx(ppl_teacher, rel=1e-4)
    assert first.metrics["perplexity_ratio"] == pytest.approx(ppl_before / ppl_teacher, rel=1e-4)
    assert result.best_drift == pytest.approx(_perplexity(student, heldout), rel=1e-4)
    assert result.best_drift <= result.initial_drift  # lower is better
    assert "held-out perplexity" in capsys.readouterr().err


def test_other_models_watch_relative_l2(capsys) -> None:
    torch.manual_seed(0)
    teacher = MLP().eval()
    student = factorize.compress(teacher, rank=4).model
    data, heldout = list(torch.randn(48, 24).split(16)), [torch.randn(16, 24)]
    result = heal(student, teacher, data, steps=4, heldout=heldout, eval_every=2, progress=True)
    assert result.metric == "relative_l2" and result.pooling is None
    assert "held-out relative_l2" in capsys.readouterr().err


def test_bad_pooling_and_metric_are_refused() -> None:
    torch.manual_seed(0)
    teacher = MLP().eval()
    student = factorize.compress(teacher, rank=4).model
    data = [torch.randn(8, 24)]
    with pytest.raises(FactorizeError, match="pooling must be"):
        heal(student, teacher, data, steps=1, pooling="max", progress=False)
    with pytest.raises(FactorizeError, match="perplexity"):
        heal(student, teacher, data, steps=1, pooling="mean", metric="perplexity", progress=False)
    with pytest.raises(FactorizeError, match="token ids"):  # a model that is no language model, asked for perplexity
        heal(student, teacher, data, steps=1, heldout=[torch.randn(8, 24)], metric="perplexity", progress=False)
