"""A sentence-transformers folder through ``factorize shrink -o DIR``: the output keeps every file the input had
that factorize does not rewrite, loads with ``factorize.load_directory``, and runs without factorize through the
documented route (ONNX export, then onnxruntime in a process that never imports factorize).

Outside references: transformers' ``BertModel`` built from a tiny config (random weights, nothing downloaded) and
its ``BertTokenizerFast`` reading a hand-written ``vocab.txt``; onnxruntime runs the exported file. The layout of
the sentence-transformers files (``modules.json``, ``1_Pooling/config.json``, ``sentence_bert_config.json``) is
written from memory of that library's folders; only their bytes matter here.
"""

from __future__ import annotations

import io
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch

import factorize
from factorize.checkpoints.directories import (
    MANIFEST,
    WEIGHTS,
    extra_files,
    save_directory,
)
from factorize.cli import main

transformers = pytest.importorskip("transformers")
pytest.importorskip("onnxruntime")
pytest.importorskip("onnxscript")
pytestmark = pytest.mark.filterwarnings("ignore::UserWarning")

WORDS = [
    'the', 'river', 'rose', 'after', 'storm', 'she', 'fixed', 'chain', 'of', 'her', 'bicycle', 'prices',
    'went', 'up', 'in', 'spring', 'a', 'quiet', 'street', 'at', 'night', 'and', 'small', 'dog', 'ran',
    'across', 'field', 'green', 'hills', 'were', 'covered', 'with', 'snow', 'we', 'read', 'book', 'by',
    'lamp', 'old', 'man', 'sold', 'fresh', 'bread', 'market', 'children', 'played', 'near', 'lake', 'rain',
    'fell', 'on', 'roof', 'all', 'day',
]
EXTRA = {  # relative path -> content: what a sentence-transformers folder holds besides the model
    "modules.json": json.dumps([
        {"idx": 0, "name": "0", "path": "", "type": "sentence_transformers.models.Transformer"},
        {"idx": 1, "name": "1", "path": "1_Pooling", "type": "sentence_transformers.models.Pooling"}], indent=2),
    "1_Pooling/config.json": json.dumps({"word_embedding_dimension": 32, "pooling_mode_mean_tokens": True}),
    "sentence_bert_config.json": json.dumps({"max_seq_length": 64, "do_lower_case": False}),
    "config_sentence_transformers.json": json.dumps({"similarity_fn_name": "cosine"}),
    "special_tokens_map.json": json.dumps({"unk_token": "[UNK]", "sep_token": "[SEP]", "pad_token": "[PAD]",
                                           "cls_token": "[CLS]", "mask_token": "[MASK]"}),
    "tokenizer_config.json": json.dumps({"do_lower_case": True, "model_max_length": 64,
                                         "tokenizer_class": "BertTokenizer"}),
    "README.md": "# tiny test encoder\n\nRandom weights; for tests only.\n",
}
SENTENCES = ["The river rose after the storm.", "She fixed the chain of her bicycle.",
             "Prices went up in the spring.", "A quiet street at night.", "The small dog ran across the field.",
             "Green hills were covered with snow."]
ONNX_RUNNER = r"""
import sys
import numpy as np
import onnxruntime as ort
feed = dict(np.load(sys.argv[2]))
session = ort.InferenceSession(sys.argv[1], providers=["CPUExecutionProvider"])
names = [i.name for i in session.get_inputs()]
out = session.run(None, {n: feed[n] for n in names})[0]
assert "factorize" not in sys.modules, "the ONNX route must not need factorize"
np.save(sys.argv[3], out)
print(",".join(names))
"""


def _sentence_transformers_folder(d: Path) -> Path:
    vocab = ["[PAD]", "[UNK]", "[CLS]", "[SEP]", "[MASK]", ".", *WORDS]
    vocab += [f"[unused{i}]" for i in range(100 - len(vocab))]
    cfg = transformers.BertConfig(vocab_size=100, hidden_size=32, num_hidden_layers=2, num_attention_heads=4,
                                  intermediate_size=64, max_position_embeddings=64)
    torch.manual_seed(0)
    transformers.BertModel(cfg).save_pretrained(d)
    (d / "vocab.txt").write_text("\n".join(vocab) + "\n", encoding="utf-8")
    for rel, text in EXTRA.items():
        (d / rel).parent.mkdir(parents=True, exist_ok=True)
        (d / rel).write_text(text, encoding="utf-8")
    return d


def _mean_pool(hidden: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """Mean over the attention mask: the pooling 1_Pooling/config.json asks for (common practice for encoders)."""
    m = mask.unsqueeze(-1).to(hidden.dtype)
    return (hidden * m).sum(1) / m.sum(1).clamp_min(1)


@pytest.mark.slow  # about 15-30 s: the ONNX export traces BERT, and onnxruntime starts in a fresh process
def test_shrunk_folder_keeps_its_files_loads_and_runs_without_factorize(tmp_path, monkeypatch) -> None:
    src = _sentence_transformers_folder(tmp_path / "encoder")
    before = {p.relative_to(src): p.read_bytes() for p in src.rglob("*") if p.is_file()}
    (tmp_path / "sentences.txt").write_text("\n".join(SENTENCES) + "\n", encoding="utf-8")
    monkeypatch.chdir(tmp_path)
    out, err = io.StringIO(), io.StringIO()
    rc = main(["shrink", "-m", "encoder", "-i", "sentences.txt", "--budget", "0.5", "-o", "small", "--repeats", "0",
               "-q", "--json"], stdout=out, stderr=err)
    assert rc == 0, err.getvalue()
    small = tmp_path / "small"
    # every file the input had that factorize does not write, byte for byte; never the original weights
    for rel in [*EXTRA, "vocab.txt"]:
        assert (small / rel).read_bytes() == before[Path(rel)], rel
    assert not (small / "model.safetensors").exists() and (small / WEIGHTS).is_file() and (small / MANIFEST).is_file()
    assert {p.relative_to(src) for p in src.rglob("*") if p.is_file()} == set(before)  # the input is unchanged
    assert all((src / rel).read_bytes() == data for rel, data in before.items())
    note = json.loads(out.getvalue())["report"]["notes"]
    assert any("copied unchanged" in n and "modules.json" in n for n in note)

    compressed = factorize.load_directory(small)  # the documented loader
    assert factorize.factored_layers(compressed)
    tok = transformers.AutoTokenizer.from_pretrained(small, local_files_only=True)  # from the copied files
    batch = tok(SENTENCES, padding=True, return_tensors="pt")
    assert int((batch["input_ids"] == 1).sum()) == 0  # every word is in the hand-written vocabulary
    with torch.no_grad():
        expected = compressed(**batch).last_hidden_state

    rc = main(["export", "-m", "small", "-i", "sentences.txt", "-o", "small.onnx", "-q", "--json"],
              stdout=(out := io.StringIO()), stderr=(err := io.StringIO()))
    assert rc == 0, err.getvalue()
    np.savez(tmp_path / "feed.npz", **{k: v.numpy() for k, v in batch.items()})
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    ran = subprocess.run([sys.executable, "-c", ONNX_RUNNER, "small.onnx", "feed.npz", "onnx_out.npy"],
                         cwd=tmp_path, env=env, capture_output=True, text=True, timeout=120, check=False)
    assert ran.returncode == 0, ran.stderr
    got = torch.from_numpy(np.load(tmp_path / "onnx_out.npy"))
    # tolerance: 1e-4 absolute, float32 kernels of two runtimes on values of order 1 (common practice)
    assert got.shape == expected.shape
    assert float((got - expected).abs().max()) < 1e-4
    pooled = _mean_pool(got, batch["attention_mask"]), _mean_pool(expected, batch["attention_mask"])
    assert float((pooled[0] - pooled[1]).abs().max()) < 1e-4


def test_save_directory_copies_the_source_folder_but_never_its_weights(tmp_path) -> None:
    src = _sentence_transformers_folder(tmp_path / "encoder")
    (src / "pytorch_model.bin").write_bytes(b"not copied")
    (src / "onnx").mkdir()
    (src / "onnx" / "model.onnx").write_bytes(b"not copied")
    (src / ".git").mkdir()
    (src / ".git" / "HEAD").write_text("ref\n")
    listed = {str(p) for p in extra_files(src)}
    assert listed == {*EXTRA, "vocab.txt"}
    model = transformers.BertModel.from_pretrained(src, local_files_only=True).eval()
    ids = torch.tensor([[2, 6, 7, 8, 3], [2, 9, 10, 11, 3]])
    result = factorize.compress(model, budget=0.5, example={"input_ids": ids})
    d = save_directory(result.model, result.plan, tmp_path / "out", source=src)
    written = {str(p.relative_to(d)) for p in d.rglob("*") if p.is_file()}
    assert written == {*EXTRA, "vocab.txt", "config.json", WEIGHTS, MANIFEST}
    assert json.loads((d / "config.json").read_text())["architectures"] == ["BertModel"]  # factorize's own
    assert json.loads((d / MANIFEST).read_text())["plan"] == result.plan
    with pytest.raises(factorize.FactorizeError, match="source directory"):
        save_directory(result.model, result.plan, src, source=src, force=True)
