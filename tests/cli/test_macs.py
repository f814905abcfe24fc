"""MACs are counted once, one way, by every command: ``shrink`` and ``compare`` on the same two models report the
same totals, over every factorizable layer of the original, and the report says which layers it counted.

Outside references: transformers' ``BertModel`` from a tiny config (random weights, nothing downloaded) and its
``BertTokenizerFast`` on a hand-written vocabulary; the hand count below walks torch's own ``nn.Linear`` modules
(mn multiply-accumulates per output position, common practice; a dense embedding is a lookup, 0).
"""

from __future__ import annotations

import io
import json
from pathlib import Path

import pytest
import torch

from factorize.cli import main

transformers = pytest.importorskip("transformers")
pytestmark = pytest.mark.filterwarnings("ignore::UserWarning")
WORDS = ["the", "river", "rose", "after", "storm", "she", "fixed", "chain", "of", "her", "bicycle", "prices", "went",
         "up", "in", "spring", "a", "quiet", "street", "at", "night"]
SENTENCES = ["The river rose after the storm.", "She fixed the chain of her bicycle.", "Prices went up in the spring.",
             "A quiet street at night."]


def _bert_folder(d: Path) -> Path:
    vocab = ["[PAD]", "[UNK]", "[CLS]", "[SEP]", "[MASK]", ".", *WORDS]
    cfg = transformers.BertConfig(vocab_size=len(vocab), hidden_size=32, num_hidden_layers=2, num_attention_heads=4,
                                  intermediate_size=64, max_position_embeddings=64)
    torch.manual_seed(0)
    transformers.BertModel(cfg).save_pretrained(d)
    (d / "vocab.txt").write_text("\n".join(vocab) + "\n", encoding="utf-8")
    return d


def _run(argv: list[str]) -> dict:
    out, err = io.StringIO(), io.StringIO()
    assert main(argv, stdout=out, stderr=err) == 0, err.getvalue()
    return json.loads(out.getvalue())


def test_shrink_and_compare_count_the_same_macs(tmp_path, monkeypatch) -> None:
    src = _bert_folder(tmp_path / "bert")
    (tmp_path / "sentences.txt").write_text("\n".join(SENTENCES) + "\n", encoding="utf-8")
    monkeypatch.chdir(tmp_path)
    common = ["-i", "sentences.txt", "--batch-size", "4", "--repeats", "0", "-q", "--json"]
    shrunk = _run(["shrink", "-m", "bert", "--budget", "0.7", "-o", "small", *common])["report"]
    compared = _run(["compare", "-m", "bert", "--against", "small", *common])["report"]
    # the tables differ: compare has no plan, so it lists the factored layers; shrink's plan also has linear
    # layers kept dense (at this budget), whose MACs a table-wide sum would count on one side only ...
    assert len(shrunk["layers"]) != len(compared["layers"])
    assert any(row["rank"] is None and row["kind"] == "linear" for row in shrunk["layers"])
    for key in ("macs_before", "macs_after", "mac_totals"):  # ... the totals do not
        assert shrunk[key] == compared[key], key
    assert shrunk["macs_after"] < shrunk["macs_before"]
    # hand count over torch's nn.Linear modules: T tokens per sample (the padded batch), the pooler sees one
    tok = transformers.AutoTokenizer.from_pretrained(src, local_files_only=True)
    tokens = tok(SENTENCES, padding=True, return_tensors="pt")["input_ids"].shape[1]
    model = transformers.BertModel.from_pretrained(src, local_files_only=True)
    linears = [(n, m) for n, m in model.named_modules() if isinstance(m, torch.nn.Linear)]
    hand = sum(m.in_features * m.out_features * (1 if n.startswith("pooler") else tokens) for n, m in linears)
    assert shrunk["macs_before"] == hand  # dense embeddings are lookups: 0
    embeddings = sum(isinstance(m, torch.nn.Embedding) for m in model.modules())
    assert shrunk["mac_totals"]["layers"] == len(linears) + embeddings
    assert "every factorizable layer of the original" in shrunk["mac_totals"]["counted"]
