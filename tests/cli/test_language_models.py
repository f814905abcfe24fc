"""A causal language model from the terminal: a transformers directory with a tokenizer, text files for
calibration and evaluation, and perplexity in the report."""

from __future__ import annotations

import io
import json

import pytest
import torch

from factorize.cli import main

transformers = pytest.importorskip("transformers")
tokenizers = pytest.importorskip("tokenizers")

WORDS = ("the model keeps what it does while the layers shrink and a short check says how much was lost on "
         "these sentences only").split()


def _lm_dir(tmp_path):
    # a tiny GPT-2 (transformers' own class, built from a config with random weights) and a word-level tokenizer
    # (tokenizers' WordLevel model) without a padding token, as GPT-2's own tokenizer has none
    vocab = {"[UNK]": 0, "<eos>": 1, **{w: i + 2 for i, w in enumerate(dict.fromkeys(WORDS))}}
    tok = tokenizers.Tokenizer(tokenizers.models.WordLevel(vocab, unk_token="[UNK]"))
    tok.pre_tokenizer = tokenizers.pre_tokenizers.Whitespace()
    fast = transformers.PreTrainedTokenizerFast(tokenizer_object=tok, unk_token="[UNK]", eos_token="<eos>")
    cfg = transformers.GPT2Config(vocab_size=len(vocab), n_positions=64, n_embd=48, n_layer=2, n_head=4,
                                  bos_token_id=1, eos_token_id=1)
    torch.manual_seed(0)
    model = transformers.GPT2LMHeadModel(cfg).eval()
    d = tmp_path / "lm"
    model.save_pretrained(d)
    fast.save_pretrained(d)
    g = torch.Generator().manual_seed(1)
    for name, n in (("calib.txt", 24), ("heldout.txt", 12)):
        lines = [" ".join(WORDS[int(i)] for i in torch.randint(0, len(WORDS), (int(k),), generator=g))
                 for k in torch.randint(4, 12, (n,), generator=g)]
        (tmp_path / name).write_text("\n".join(lines) + "\n")
    return d


def test_text_files_calibrate_and_evaluate_a_causal_lm_with_perplexity(tmp_path):
    d = _lm_dir(tmp_path)
    out, err = io.StringIO(), io.StringIO()
    rc = main(["shrink", "--model", str(d), "--calibration", str(tmp_path / "calib.txt"), "--inputs",
               str(tmp_path / "heldout.txt"), "--budget", "0.5", "--include", "transformer.h.*", "-o",
               str(tmp_path / "lm.safetensors"), "--json", "-q", "--repeats", "0"], stdout=out, stderr=err)
    assert rc == 0, err.getvalue() + out.getvalue()
    report = json.loads(out.getvalue())["report"]
    assert report["perplexity_before"] > 1 and report["perplexity_after"] > 1
    assert report["perplexity_ratio"] == pytest.approx(report["perplexity_after"] / report["perplexity_before"])
    # judged as a language model: next-token agreement over the real tokens (the argmax over the vocabulary at
    # each position), beside the perplexity ratio; the per-sequence relative L2 tail is shown with it
    assert report["judged_kind"] == "language model" and 0 < report["drift"]["top1_agreement"] <= 1
    assert report["drift"]["sample_l2_mean"] <= report["drift"]["sample_l2_max"]


def test_text_inputs_for_a_model_without_tokenizer_is_a_clear_error(tmp_path):
    (tmp_path / "t.txt").write_text("some words\n")
    out, err = io.StringIO(), io.StringIO()
    rc = main(["shrink", "-m", "factorize.default:load_default", "--inputs", str(tmp_path / "t.txt"),
               "-o", str(tmp_path / "o.safetensors"), "--json"], stdout=out, stderr=err)
    assert rc == 2 and "need a tokenizer" in json.loads(out.getvalue())["error"]


def test_pooling_option_judges_the_pooled_output(tmp_path):
    # the same compression judged on token states and on the last real token's state gives two different drifts
    # (evaluate(pooling=...) itself is checked against hand-computed pooling in tests/measure/test_pooling.py)
    d = _lm_dir(tmp_path)
    base = ["shrink", "--model", str(d), "--inputs", str(tmp_path / "heldout.txt"), "--rank", "2", "--include",
            "transformer.h.*", "--json", "-q", "--repeats", "0", "--force"]
    reports = {}
    for pooling in (None, "last"):
        out, err = io.StringIO(), io.StringIO()
        extra = ["--pooling", pooling] if pooling else []
        rc = main([*base, "-o", str(tmp_path / f"{pooling}.safetensors"), *extra], stdout=out, stderr=err)
        assert rc == 0, err.getvalue()
        reports[pooling] = json.loads(out.getvalue())["report"]
    assert reports["last"]["drift"]["relative_l2"] != pytest.approx(reports[None]["drift"]["relative_l2"])
    assert reports["last"]["samples"] == reports[None]["samples"] == 12
    # pooled, the last token's state is an embedding: no argmax over its dimensions (before, top-1 was shown)
    assert reports["last"]["judged_kind"] == "embeddings" and "top1_agreement" not in reports["last"]["drift"]
