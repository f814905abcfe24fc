"""The embedding stage of the block-by-block shrink reads only the calibration's rows of the token embedding.

Checked against transformers' own model classes built from tiny configs (tests/outofcore/families.py): with the
calibration's token ids given, the stage holds one row per distinct id, and the hidden states and extra inputs it
records for the blocks equal, bit for bit, those of the stage built with the whole table (which
tests/outofcore/test_blockwise_families.py checks against hooks on the whole model). Row reads are checked against
plain indexing of the stored tensor. Sentence-pair token types reach the embedding stage (checked against BERT's
own embeddings) and are checked against what the model takes."""

from __future__ import annotations

import pytest
import torch
from safetensors.torch import save_file

from factorize.errors import FactorizeError
from factorize.outofcore.architecture import check_source
from factorize.outofcore.stem import Stem, token_types
from factorize.outofcore.tokens import token_batches
from factorize.storage import headers, read_rows
from tests.outofcore.families import VOCAB, padded_calibration, write_family

transformers = pytest.importorskip("transformers")


@pytest.mark.parametrize("per_read", [1, 7, 4096])
def test_rows_equal_indexing_the_stored_tensor_across_read_boundaries(per_read, tmp_path, monkeypatch):
    monkeypatch.setattr(headers, "ROWS_PER_READ", per_read)
    table = torch.randn(50, 3).to(torch.bfloat16)
    path = tmp_path / "t.safetensors"
    save_file({"w": table}, str(path))
    rows = torch.tensor([0, 3, 6, 7, 13, 14, 20, 21, 49])
    got = read_rows(path, "w", rows)
    assert got.dtype == torch.bfloat16
    assert torch.equal(got, table[rows])  # reference: torch indexing of the whole tensor


def _same(a, b) -> bool:
    if isinstance(a, torch.Tensor):
        return isinstance(b, torch.Tensor) and a.dtype == b.dtype and torch.equal(a, b)
    if isinstance(a, (tuple, list)):
        return type(a) is type(b) and len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b))
    if isinstance(a, dict):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    return a == b


@pytest.mark.parametrize("kind", ["gpt2", "llama", "gemma", "bert"])
def test_only_the_calibrations_rows_and_the_same_block_inputs(kind, tmp_path):
    arch = check_source(write_family(transformers, kind, tmp_path / kind))
    first, second = padded_calibration(VOCAB, (3, 4))
    used = torch.cat([first.reshape(-1), second["input_ids"].reshape(-1)])
    whole, rows = Stem(arch), Stem(arch, used)
    table = rows.model.get_input_embeddings().weight
    assert table.shape[0] == len(torch.unique(used)) < VOCAB
    for ids, mask in ((first, None), (second["input_ids"], second["attention_mask"])):
        h_whole, extras_whole = whole.run(ids, mask)
        h_rows, extras_rows = rows.run(ids, mask)
        assert torch.equal(h_rows, h_whole)
        assert _same(extras_rows, extras_whole)


def test_sentence_pair_token_types_reach_the_embedding_stage(tmp_path):
    # outside reference: transformers' BertModel (tiny config) on the same ids and token_type_ids; its embedding
    # output is what enters block 0 (the BERT embeddings add a token-type row to every position)
    directory = write_family(transformers, "bert", tmp_path / "bert")
    arch = check_source(directory)
    model = transformers.BertModel.from_pretrained(directory).eval()
    g = torch.Generator().manual_seed(3)
    ids = torch.randint(0, VOCAB, (3, 10), generator=g)
    kinds = torch.zeros(3, 10, dtype=torch.int64)
    kinds[:, 6:] = 1  # the second sentence of each pair
    (_, _, checked), = token_batches([{"input_ids": ids, "token_type_ids": kinds}], VOCAB, token_types(arch))
    assert torch.equal(checked, kinds)
    stem = Stem(arch, ids)
    h, _ = stem.run(ids, None, checked)
    with torch.no_grad():
        expected = model.embeddings(input_ids=ids, token_type_ids=kinds)
    torch.testing.assert_close(h, expected, rtol=1e-6, atol=1e-6)
    assert not torch.allclose(stem.run(ids, None)[0], expected, atol=1e-3)  # without them, another input


def test_token_types_are_checked_against_the_model(tmp_path):
    bert = check_source(write_family(transformers, "bert", tmp_path / "bert"))
    llama = check_source(write_family(transformers, "llama", tmp_path / "llama"))
    ids = torch.randint(0, VOCAB, (2, 6), generator=torch.Generator().manual_seed(0))
    assert token_types(bert) == 2 and token_types(llama) is None
    zeros = {"input_ids": ids, "token_type_ids": torch.zeros_like(ids)}
    assert token_batches([zeros], VOCAB, None)[0][2] is None  # all zeros: nothing to pass, any model
    with pytest.raises(FactorizeError, match="takes no token types"):
        token_batches([{"input_ids": ids, "token_type_ids": torch.ones_like(ids)}], VOCAB, token_types(llama))
    with pytest.raises(FactorizeError, match="outside the model's 2 token types"):
        token_batches([{"input_ids": ids, "token_type_ids": torch.full_like(ids, 2)}], VOCAB, token_types(bert))
