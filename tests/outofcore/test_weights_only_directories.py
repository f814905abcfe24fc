"""A weights-only shrink of a transformers directory writes a directory that reloads with one call.

Outside references: transformers' ``LlamaForCausalLM`` built from the checkpoint's tiny config (the reloaded model
must compute what the original architecture computes with each factored weight replaced by B @ A, read back with
the reference reader ``safetensors.safe_open``); the sharded-checkpoint index layout (``weight_map``) of
transformers' ``*.safetensors.index.json`` files (common practice).
"""

from __future__ import annotations

import importlib.util
import shutil
from pathlib import Path

import pytest
import torch
from safetensors import safe_open

from factorize.checkpoints.directories import load_directory
from factorize.checkpoints.files import load, read_plan
from factorize.errors import FactorizeError
from factorize.outofcore.weights_only import shrink_checkpoint
from factorize.plan.entries import factored_ranks

transformers = pytest.importorskip("transformers")

ROOT = Path(__file__).resolve().parents[2]
POLICY = {"budget": 0.5, "exclude": "*embed_tokens*"}


def _writer():
    spec = importlib.util.spec_from_file_location("llama_checkpoint", ROOT / "benchmarks" / "llama_checkpoint.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod.write_llama_checkpoint


@pytest.fixture(scope="module")
def sharded(tmp_path_factory):
    d = _writer()(tmp_path_factory.mktemp("src") / "tiny", scale="tiny", shard_mb=0.1, seed=0)
    (d / "tokenizer_config.json").write_text("{}")  # a side file the output must carry over
    (d / "1_Pooling").mkdir()
    (d / "1_Pooling" / "config.json").write_text('{"pooling": "mean"}')
    return d


@pytest.fixture(scope="module")
def single(tmp_path_factory, sharded):
    """The same model as one model.safetensors beside config.json."""
    d = tmp_path_factory.mktemp("single") / "tiny"
    d.mkdir()
    shutil.copy(sharded / "config.json", d / "config.json")
    model = transformers.LlamaForCausalLM.from_pretrained(sharded, local_files_only=True)
    model.save_pretrained(d, safe_serialization=True)
    assert (d / "model.safetensors").is_file() and not (d / "model.safetensors.index.json").exists()
    return d


def _files(d: Path) -> dict[str, bytes]:
    return {str(p.relative_to(d)): p.read_bytes() for p in sorted(d.rglob("*")) if p.is_file()}


def _reference(src: Path, out: Path, weights: str) -> torch.nn.Module:
    """transformers' own model from the source directory, each factored weight replaced by B @ A from the output."""
    model = transformers.LlamaForCausalLM.from_pretrained(src, local_files_only=True).float().eval()
    plan = read_plan(out / weights)
    index = out / weights
    files = sorted(out.glob("*.safetensors")) if index.name.endswith(".json") else [index]
    factors = {}
    for f in files:
        with safe_open(str(f), framework="pt") as g:
            names = [k for k in g.keys() if ".first." in k or ".second." in k]  # noqa: SIM118 - not iterable
            factors.update({k: g.get_tensor(k) for k in names})
    with torch.no_grad():
        for name in factored_ranks(plan):
            B, A = factors[name + ".second.weight"], factors[name + ".first.weight"]
            model.get_submodule(name).weight.copy_(B.float() @ A.float())
    return model


def test_a_sharded_directory_and_its_index_give_the_same_files_and_the_directory_reloads(sharded, tmp_path):
    by_dir = shrink_checkpoint(sharded, tmp_path / "a", **POLICY)
    shrink_checkpoint(sharded / "model.safetensors.index.json", tmp_path / "b", **POLICY)
    a, b = _files(tmp_path / "a"), _files(tmp_path / "b")
    assert a == b
    assert {"config.json", "tokenizer_config.json", "1_Pooling/config.json"} <= set(a)  # side files carried over
    assert a["config.json"] == (sharded / "config.json").read_bytes()
    assert not any(n.endswith(".safetensors") for n in a if "/" in n)
    assert sorted(by_dir.files) == sorted(str(tmp_path / "a" / n) for n in a if n.endswith(("safetensors",
                                                                                               ".json")) and
                                          n.startswith("model"))
    assert factored_ranks(by_dir.plan)

    model = load_directory(tmp_path / "a")  # one call; the dtype stored (bfloat16)
    assert isinstance(model, transformers.LlamaForCausalLM)
    assert {p.dtype for p in model.parameters()} == {torch.bfloat16}
    as_float = load_directory(tmp_path / "a", dtype=torch.float32)
    assert {p.dtype for p in as_float.parameters()} == {torch.float32}
    ids = torch.randint(0, 256, (2, 9), generator=torch.Generator().manual_seed(0))
    expected = _reference(sharded, tmp_path / "a", "model.safetensors.index.json")(ids).logits.float()
    got = as_float(ids).logits
    # reference: transformers' LlamaForCausalLM with W replaced by B @ A (float32 products of the stored factors)
    torch.testing.assert_close(got, expected, rtol=1e-4, atol=1e-4)


def test_a_single_file_directory_gives_a_directory_and_the_file_itself_a_file(single, tmp_path):
    shrink_checkpoint(single, tmp_path / "dir", **POLICY)
    shrink_checkpoint(single / "model.safetensors", tmp_path / "file.safetensors", **POLICY)
    out = _files(tmp_path / "dir")
    assert set(out) == {"config.json", "generation_config.json", "model.safetensors"}
    assert out["model.safetensors"] == (tmp_path / "file.safetensors").read_bytes()  # the same shrink, two forms
    model = load_directory(tmp_path / "dir", dtype=torch.float32)
    ids = torch.randint(0, 256, (2, 7), generator=torch.Generator().manual_seed(1))
    expected = _reference(single, tmp_path / "dir", "model.safetensors")(ids).logits
    torch.testing.assert_close(model(ids).logits, expected, rtol=1e-4, atol=1e-4)
    # the file form reloads into a model built in any dtype, with one call
    fresh = transformers.LlamaForCausalLM(transformers.AutoConfig.from_pretrained(single)).eval()
    load(fresh, tmp_path / "file.safetensors", dtype=torch.float32)
    torch.testing.assert_close(fresh(ids).logits, expected, rtol=1e-4, atol=1e-4)


def test_load_without_dtype_still_asks_for_the_stored_dtype(single, tmp_path):
    shrink_checkpoint(single / "model.safetensors", tmp_path / "f.safetensors", **POLICY)
    fresh = transformers.LlamaForCausalLM(transformers.AutoConfig.from_pretrained(single))
    with pytest.raises(FactorizeError, match="file has BF16, model has float32"):
        load(fresh, tmp_path / "f.safetensors")
    with pytest.raises(FactorizeError, match="not a floating torch dtype"):
        load(fresh, tmp_path / "f.safetensors", dtype=torch.int8)


def test_the_input_directory_is_never_the_output(single):
    with pytest.raises(FactorizeError, match="input checkpoint's directory"):
        shrink_checkpoint(single, single, **POLICY, force=True)
