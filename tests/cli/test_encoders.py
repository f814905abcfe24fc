"""A sentence encoder from the terminal, judged as its users judge it: ``shrink --pooling mean`` on a transformers
directory reports cosine of the pooled embeddings (mean, 5th percentile, worst), nearest-neighbour agreement and
the rank correlation of pairwise similarities, and never an argmax over embedding dimensions (top-1, KL).

Outside references: transformers' ``BertModel`` built from a tiny config (random weights, nothing downloaded) and
its ``BertTokenizerFast`` reading a hand-written ``vocab.txt``; the pooled embeddings are recomputed here with
numpy and compared with the report's numbers.
"""

from __future__ import annotations

import io
import json

import numpy as np
import pytest
import torch

import factorize
from factorize.cli import main

transformers = pytest.importorskip("transformers")
pytestmark = pytest.mark.filterwarnings("ignore::UserWarning")

WORDS = ("the river rose after storm she fixed chain of her bicycle prices went up in spring a quiet street at "
         "night and small dog ran across field green hills were covered with snow").split()


def _encoder_dir(tmp_path):
    vocab = ["[PAD]", "[UNK]", "[CLS]", "[SEP]", "[MASK]", *dict.fromkeys(WORDS)]
    (tmp_path / "vocab.txt").write_text("\n".join(vocab) + "\n", encoding="utf-8")
    tok = transformers.BertTokenizerFast(vocab_file=str(tmp_path / "vocab.txt"))
    cfg = transformers.BertConfig(vocab_size=len(vocab), hidden_size=32, num_hidden_layers=2, num_attention_heads=4,
                                  intermediate_size=64, max_position_embeddings=64)
    torch.manual_seed(0)
    d = tmp_path / "encoder"
    transformers.BertModel(cfg).eval().save_pretrained(d)
    tok.save_pretrained(d)
    g = torch.Generator().manual_seed(1)
    lines = [" ".join(WORDS[int(i)] for i in torch.randint(0, len(WORDS), (int(k),), generator=g))
             for k in torch.randint(4, 10, (12,), generator=g)]
    (tmp_path / "heldout.txt").write_text("\n".join(lines) + "\n", encoding="utf-8")
    return d, lines


def _shrink(tmp_path, d, *extra, rank="4", include="encoder.*"):
    out, err = io.StringIO(), io.StringIO()
    rc = main(["shrink", "--model", str(d), "--inputs", str(tmp_path / "heldout.txt"), "--rank", rank, "--include",
               include, "-o", str(tmp_path / "small"), "--repeats", "0", "-q", "--force", "--no-alternatives",
               "--pooling", "mean", *extra], stdout=out, stderr=err)
    assert rc == 0, err.getvalue() + out.getvalue()
    return out.getvalue()


def test_shrink_with_pooling_judges_an_encoder_by_cosine_and_neighbours(tmp_path, monkeypatch):
    monkeypatch.setenv("COLUMNS", "160")
    d, lines = _encoder_dir(tmp_path)
    report = json.loads(_shrink(tmp_path, d, "--json"))["report"]
    drift = report["drift"]
    assert "top1_agreement" not in drift and "kl" not in drift  # no argmax over the 32 embedding dimensions
    assert report["judged_kind"] == "embeddings" and "--pooling mean" in report["judged_as"]
    assert drift["neighbour_samples"] == 12 and 0 <= drift["neighbour_agreement"] <= 1
    assert drift["cosine_min"] <= drift["cosine_p5"] <= drift["cosine_mean"]

    # the same numbers from the two models' mean-pooled embeddings, recomputed with numpy (common practice:
    # the mean over the attention mask is the sentence embedding of Sentence-BERT)
    tok = transformers.AutoTokenizer.from_pretrained(d, local_files_only=True)
    batch = tok(lines, padding=True, return_tensors="pt")
    original = transformers.BertModel.from_pretrained(d).eval()
    small = factorize.load_directory(tmp_path / "small")
    with torch.no_grad():
        a, b = (m(**batch).last_hidden_state.numpy() for m in (original, small))
    w = batch["attention_mask"].numpy()[..., None]
    pa, pb = (a * w).sum(1) / w.sum(1), (b * w).sum(1) / w.sum(1)
    cos = (pa * pb).sum(1) / (np.linalg.norm(pa, axis=1) * np.linalg.norm(pb, axis=1))
    assert drift["cosine_mean"] == pytest.approx(cos.mean(), abs=1e-5)
    assert drift["cosine_min"] == pytest.approx(cos.min(), abs=1e-5)

    def nearest(p):
        s = (p / np.linalg.norm(p, axis=1, keepdims=True)) @ (p / np.linalg.norm(p, axis=1, keepdims=True)).T
        np.fill_diagonal(s, -np.inf)
        return s.argmax(1)

    assert drift["neighbour_agreement"] == pytest.approx(np.mean(nearest(pa) == nearest(pb)))

    # the screen a person reads, after a harsh shrink (rank 1 everywhere, the token embeddings too) so that the
    # verdict is a warning: it names the cosine, mean and worst, and never an argmax over dimensions
    text = " ".join(_shrink(tmp_path, d, rank="1", include="*").split())
    assert "top-1" not in text and "KL" not in text
    for words in ("cosine similarity, mean", "cosine similarity, 5th percentile", "cosine similarity, worst sample",
                  "nearest-neighbour agreement (12 inputs)", "rank correlation of pairwise similarities",
                  "judged as: sentence encoder (--pooling mean)", "drop --pooling",
                  "High drift: mean cosine similarity to the original is", "the worst sample's cosine similarity"):
        assert words in text, words


def test_sweep_with_pooling_writes_the_encoder_metrics_to_csv(tmp_path, monkeypatch):
    # a sweep judges every budget as shrink does: its CSV carries the encoder's columns (cosine mean, 5th
    # percentile, worst, nearest-neighbour agreement, Spearman rank correlation) and no argmax over dimensions
    monkeypatch.setenv("COLUMNS", "200")
    d, _ = _encoder_dir(tmp_path)
    out, err = io.StringIO(), io.StringIO()
    rc = main(["sweep", "--model", str(d), "--inputs", str(tmp_path / "heldout.txt"), "--budgets", "0.3,0.6",
               "--include", "encoder.*", "--pooling", "mean", "--csv", str(tmp_path / "sweep.csv"), "-q"],
              stdout=out, stderr=err)
    assert rc == 0, err.getvalue() + out.getvalue()
    header, *rows = (tmp_path / "sweep.csv").read_text(encoding="utf-8").splitlines()
    columns = header.split(",")
    for key in ("cosine_mean", "cosine_p5", "cosine_min", "neighbour_agreement", "similarity_spearman"):
        assert key in columns, key
    assert "top1_agreement" not in columns and "kl" not in columns
    assert len(rows) == 2
    values = [dict(zip(columns, r.split(","))) for r in rows]
    for v in values:
        assert float(v["cosine_min"]) <= float(v["cosine_p5"]) <= float(v["cosine_mean"]) <= 1 + 1e-6
    screen = " ".join(out.getvalue().split())
    assert "neighbours agree" in screen and "top-1" not in screen
