"""The measures an encoder's users judge it by, and the spread of drift over samples, checked against numpy and
scipy: ``scipy.stats.rankdata`` / ``scipy.stats.spearmanr`` (Spearman 1904), numpy's cosine, argmax and
``np.percentile``."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy.stats import rankdata, spearmanr

from factorize.measure.drift import output_drift
from factorize.measure.similarity import (
    average_ranks,
    embedding_agreement,
    neighbour_agreement,
    similarity_spearman,
    spearman,
)


def _embeddings(n: int = 40, d: int = 16, noise: float = 0.3, seed: int = 0) -> tuple[torch.Tensor, torch.Tensor]:
    g = torch.Generator().manual_seed(seed)
    a = torch.randn(n, d, generator=g, dtype=torch.float64)
    return a, a + noise * torch.randn(n, d, generator=g, dtype=torch.float64)


def _numpy_cosines(x: np.ndarray) -> np.ndarray:
    unit = x / np.linalg.norm(x, axis=1, keepdims=True)
    return unit @ unit.T


def test_average_ranks_and_spearman_match_scipy_with_and_without_ties():
    g = torch.Generator().manual_seed(1)
    for x in (torch.randn(50, generator=g, dtype=torch.float64),
              torch.randint(0, 6, (50,), generator=g).to(torch.float64)):  # the second has many ties
        # scipy.stats.rankdata's default ('average') gives tied values the mean of their ranks
        np.testing.assert_allclose(average_ranks(x).numpy(), rankdata(x.numpy()))
    a = torch.randint(0, 5, (60,), generator=g).to(torch.float64)
    b = a + torch.randint(0, 3, (60,), generator=g).to(torch.float64)
    assert spearman(a, b) == pytest.approx(spearmanr(a.numpy(), b.numpy()).statistic, abs=1e-12)


def test_neighbour_agreement_and_similarity_spearman_match_numpy_and_scipy():
    a, b = _embeddings()
    sa, sb = _numpy_cosines(a.numpy()), _numpy_cosines(b.numpy())
    np.fill_diagonal(sa, -np.inf)
    np.fill_diagonal(sb, -np.inf)
    expected = float(np.mean(sa.argmax(1) == sb.argmax(1)))  # nearest other input by cosine, numpy's argmax
    assert neighbour_agreement(a, b) == pytest.approx(expected)
    assert 0.2 < expected < 1.0  # the noise moves some neighbours but not all: the check can fail either way
    iu = np.triu_indices(len(a), k=1)  # every pair of distinct inputs once
    reference = spearmanr(_numpy_cosines(a.numpy())[iu], _numpy_cosines(b.numpy())[iu]).statistic
    assert similarity_spearman(a, b) == pytest.approx(reference, abs=1e-12)


def test_identical_embeddings_agree_fully_and_a_shuffle_does_not():
    a, _ = _embeddings()
    assert neighbour_agreement(a, a * 3.0) == 1.0  # cosine ignores scale
    assert similarity_spearman(a, a * 3.0) == pytest.approx(1.0)
    shuffled = a[torch.randperm(len(a), generator=torch.Generator().manual_seed(2))]
    assert neighbour_agreement(a, shuffled) < 0.5
    assert abs(similarity_spearman(a, shuffled)) < 0.3
    assert embedding_agreement(a[:2], a[:2]) == {}  # two inputs have no 'nearest other' to compare


def test_output_drift_of_embeddings_has_no_argmax_and_shows_the_tail():
    a, b = _embeddings(n=30)
    d = output_drift([a[:12], a[12:]], [b[:12], b[12:]], kind="embeddings")
    assert "top1_agreement" not in d and "kl" not in d  # no argmax over embedding dimensions
    assert d["neighbour_samples"] == 30  # across batches
    assert d["neighbour_agreement"] == pytest.approx(neighbour_agreement(a, b))
    an, bn = a.numpy(), b.numpy()
    cos = (an * bn).sum(1) / (np.linalg.norm(an, axis=1) * np.linalg.norm(bn, axis=1))
    assert d["cosine_p5"] == pytest.approx(np.percentile(cos, 5))  # numpy's default linear interpolation
    assert d["cosine_min"] == pytest.approx(cos.min()) and d["cosine_min"] <= d["cosine_p5"] <= d["cosine_mean"]
    rel = np.linalg.norm(an - bn, axis=1) / np.linalg.norm(an, axis=1)
    assert d["sample_l2_mean"] == pytest.approx(rel.mean())
    assert d["sample_l2_p95"] == pytest.approx(np.percentile(rel, 95))
    assert d["sample_l2_max"] == pytest.approx(rel.max())
    shape_rule = output_drift(a, b)  # without the kind, a 2-D output with columns is read as class scores
    assert "top1_agreement" in shape_rule and "neighbour_agreement" not in shape_rule
