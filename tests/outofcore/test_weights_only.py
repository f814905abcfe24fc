"""Tests for factorize/checkpoint.py: weights-only shrink of bare safetensors checkpoints.

Outside references: numpy's SVD for the Eckart-Young error of a rank-r truncation (Eckart & Young 1936:
||W - W_r||_F = sqrt(sum_{i>r} s_i^2)); the reference reader ``safetensors.safe_open`` for every file we write;
the sharded-checkpoint index layout (``weight_map``: tensor name -> shard file) used by transformers'
``*.safetensors.index.json`` files (common practice).
"""

from __future__ import annotations

import json
import shutil
from collections import namedtuple

import numpy as np
import pytest
import torch
from safetensors import safe_open
from safetensors.torch import load_file, save_file
from torch import nn

import factorize
from factorize.checkpoints import files as io
from factorize.errors import FactorizeError
from factorize.outofcore import weights_only as checkpoint
from factorize.outofcore import writer
from tests.conftest import MLP


class Block(nn.Module):
    """A small model with a norm, a bias-free layer, and an integer buffer: things weights-only mode copies."""

    def __init__(self) -> None:
        super().__init__()
        self.up = nn.Linear(20, 40)
        self.norm = nn.LayerNorm(40)
        self.down = nn.Linear(40, 16, bias=False)
        self.register_buffer("steps", torch.tensor([7, 9], dtype=torch.int64))

    def forward(self, x):
        return self.down(torch.relu(self.norm(self.up(x))))


def _model(cls=MLP):
    torch.manual_seed(0)
    return cls().eval()


def _write(tmp_path, model, name="in.safetensors"):
    path = tmp_path / name
    save_file({k: v.contiguous() for k, v in model.state_dict().items()}, str(path))
    return path


def _shard(tmp_path, model, split) -> tuple:
    """Write ``model``'s state dict as two shards plus an index; ``split(name)`` -> 0 or 1."""
    src = tmp_path / "src"
    src.mkdir()
    state = model.state_dict()
    names = ["model-00001-of-00002.safetensors", "model-00002-of-00002.safetensors"]
    parts = [{}, {}]
    for k, v in state.items():
        parts[split(k)][k] = v.contiguous()
    for part, n in zip(parts, names):
        save_file(part, str(src / n))
    index = {"metadata": {"total_size": 0}, "weight_map": {k: names[split(k)] for k in state}}
    (src / "model.safetensors.index.json").write_text(json.dumps(index))
    return src, names


POLICIES = [{"rank": 5}, {"energy": 0.9}, {"keep": 0.4}, {"budget": 0.5}]


@pytest.mark.parametrize("policy", POLICIES, ids=lambda p: next(iter(p)))
def test_same_policy_same_plan_same_outputs_as_compress(tmp_path, policy):
    model = _model()
    out = tmp_path / "out.safetensors"
    rep = checkpoint.shrink_checkpoint(_write(tmp_path, model), out, **policy)
    ref = factorize.compress(model, **policy)
    assert {k: v["rank"] for k, v in rep.plan["sites"].items()} == {k: v["rank"] for k, v in ref.plan["sites"].items()}
    loaded = io.load(MLP(), out)
    x = torch.randn(6, 24)
    with torch.no_grad():
        torch.testing.assert_close(loaded(x), ref.model(x), rtol=1e-6, atol=1e-6)
    assert rep.passes == (2 if "budget" in policy else 1)


def test_randomized_method_matches_compress(tmp_path):
    model = _model()
    out = tmp_path / "out.safetensors"
    checkpoint.shrink_checkpoint(_write(tmp_path, model), out, rank=4, method="randomized", seed=3)
    ref = factorize.compress(model, rank=4, method="randomized", seed=3)
    x = torch.randn(6, 24)
    with torch.no_grad():
        torch.testing.assert_close(io.load(MLP(), out)(x), ref.model(x), rtol=1e-6, atol=1e-6)


def test_keys_and_errors_against_numpy_svd(tmp_path):
    model = _model(Block)
    out = tmp_path / "out.safetensors"
    rep = checkpoint.shrink_checkpoint(_write(tmp_path, model), out, rank=6)
    tensors = load_file(str(out))  # the reference reader
    assert set(tensors) == {"up.first.weight", "up.second.weight", "up.second.bias", "norm.weight", "norm.bias",
                            "down.first.weight", "down.second.weight", "steps"}
    assert tensors["up.first.weight"].shape == (6, 20) and tensors["up.second.weight"].shape == (40, 6)
    # copied unchanged: norm parameters, the int buffer, and the renamed bias
    state = model.state_dict()
    assert torch.equal(tensors["steps"], state["steps"]) and torch.equal(tensors["norm.weight"], state["norm.weight"])
    assert torch.equal(tensors["up.second.bias"], state["up.bias"])
    for name in ("up", "down"):
        W = state[f"{name}.weight"].double().numpy()
        s = np.linalg.svd(W, compute_uv=False)
        expected = np.sqrt((s[6:] ** 2).sum() / (s**2).sum())  # Eckart-Young tail, relative
        row = rep.tensors[f"{name}.weight"]
        assert row["relative_error"] == pytest.approx(expected, rel=1e-4)
        assert row["predicted_error"] == pytest.approx(expected, rel=1e-4)
    fresh = io.load(Block(), out)
    assert torch.equal(fresh.steps, state["steps"])
    assert rep.params_after == sum(t.numel() for t in tensors.values())


def test_include_exclude_and_passed_over(tmp_path):
    model = _model()
    state = dict(model.state_dict())
    state["extra_matrix"] = torch.randn(8, 8)  # 2-D but not <module>.weight: nothing to rewrite
    src = tmp_path / "in.safetensors"
    save_file(state, str(src))
    out = tmp_path / "out.safetensors"
    rep = checkpoint.shrink_checkpoint(src, out, rank=3, exclude=["head"])
    assert rep.passed_over["head.weight"] == "excluded by pattern"
    assert "no layer to rewrite" in rep.passed_over["extra_matrix"]
    keys = set(load_file(str(out)))
    assert {"head.weight", "head.bias", "extra_matrix", "fc1.first.weight"} <= keys
    rep2 = checkpoint.shrink_checkpoint(src, tmp_path / "o2.safetensors", rank=3, include="fc2.weight")
    assert list(rep2.plan["sites"]) == ["fc2"]
    with pytest.raises(FactorizeError, match="no 2-D floating tensor"):
        checkpoint.shrink_checkpoint(src, tmp_path / "o3.safetensors", rank=3, include="nothing.*")


def test_half_precision_weights_keep_their_dtype(tmp_path):
    model = _model().to(torch.bfloat16)
    out = tmp_path / "out.safetensors"
    checkpoint.shrink_checkpoint(_write(tmp_path, model), out, rank=4)
    with safe_open(str(out), framework="pt") as f:
        assert f.get_tensor("fc1.first.weight").dtype == torch.bfloat16
    loaded = io.load(MLP().to(torch.bfloat16), out)
    assert loaded.fc1.first.weight.dtype == torch.bfloat16


def test_embedding_must_be_excluded_and_the_load_says_why(tmp_path):
    class Emb(nn.Module):
        def __init__(self):
            super().__init__()
            self.embed = nn.Embedding(50, 16)
            self.proj = nn.Linear(16, 16)

    model = _model(Emb)
    src = _write(tmp_path, model)
    out = tmp_path / "out.safetensors"
    checkpoint.shrink_checkpoint(src, out, rank=4)  # the table (50, 16) is taken as a linear weight
    with pytest.raises(FactorizeError, match="does not fit") as e:
        io.load(Emb(), out)
    assert any("embed" in p and "linear" in p for p in e.value.problems)
    checkpoint.shrink_checkpoint(src, out, rank=4, exclude="embed", force=True)
    loaded = io.load(Emb(), out)
    assert torch.equal(loaded.embed.weight, model.embed.weight)


# ---------------------------------------------------------------------------------------------------------------
# sharded checkpoints


def test_sharded_round_trip_with_bias_in_another_shard(tmp_path):
    model = _model()
    # fc1.weight in shard 0, fc1.bias in shard 1: the bias must follow its weight
    src, names = _shard(tmp_path, model, lambda k: 0 if k in ("fc1.weight", "fc2.weight", "fc2.bias") else 1)
    out = tmp_path / "out"
    rep = checkpoint.shrink_checkpoint(src / "model.safetensors.index.json", out, budget=0.5)
    assert sorted(p.name for p in out.iterdir()) == sorted([*names, "model.safetensors.index.json"])
    index = json.loads((out / "model.safetensors.index.json").read_text())
    assert index["weight_map"]["fc1.second.bias"] == names[0]  # moved to the weight's shard
    for shard in names:
        with safe_open(str(out / shard), framework="pt") as f:  # each shard readable on its own
            assert f.metadata()["factorize.plan_in"] == "model.safetensors.index.json"
            assert set(f.keys()) == {k for k, v in index["weight_map"].items() if v == shard}
    assert index["metadata"]["total_size"] == sum(
        t.numel() * t.element_size() for n in names for t in load_file(str(out / n)).values()
    )
    ref = factorize.compress(model, budget=0.5)
    x = torch.randn(4, 24)
    with torch.no_grad():
        torch.testing.assert_close(io.load(MLP(), out)(x), ref.model(x), rtol=1e-6, atol=1e-6)
    assert io.read_plan(out)["sites"] == json.loads(json.dumps(rep.plan["sites"]))


def test_missing_shard_is_named(tmp_path):
    src, names = _shard(tmp_path, _model(), lambda k: 0 if k.startswith("fc") else 1)
    (src / names[1]).unlink()
    with pytest.raises(FactorizeError, match="missing") as e:
        checkpoint.shrink_checkpoint(src, tmp_path / "out", rank=3)
    assert any(names[1] in p for p in e.value.problems)
    assert not (tmp_path / "out").exists()


def test_index_pointing_to_the_wrong_shard(tmp_path):
    src, names = _shard(tmp_path, _model(), lambda k: 0 if k.startswith("fc") else 1)
    index = json.loads((src / "model.safetensors.index.json").read_text())
    index["weight_map"]["head.weight"] = names[0]
    (src / "model.safetensors.index.json").write_text(json.dumps(index))
    with pytest.raises(FactorizeError, match="does not match its shards"):
        checkpoint.shrink_checkpoint(src, tmp_path / "out", rank=3)


# ---------------------------------------------------------------------------------------------------------------
# safe writes


def test_output_refused_and_input_never_overwritten(tmp_path):
    src = _write(tmp_path, _model())
    before = src.read_bytes()
    out = tmp_path / "out.safetensors"
    out.write_bytes(b"old")
    with pytest.raises(FactorizeError, match="already exists") as e:
        checkpoint.shrink_checkpoint(src, out, rank=3)
    assert "--force" in str(e.value) and out.read_bytes() == b"old"
    with pytest.raises(FactorizeError, match="is the input"):
        checkpoint.shrink_checkpoint(src, src, rank=3, force=True)
    assert src.read_bytes() == before
    sharded, _ = _shard(tmp_path, _model(), lambda k: 0)
    with pytest.raises(FactorizeError, match="input checkpoint's directory"):
        checkpoint.shrink_checkpoint(sharded, sharded, rank=3, force=True)


@pytest.mark.parametrize("sharded", [False, True])
def test_failure_mid_way_leaves_nothing(tmp_path, monkeypatch, sharded):
    model = _model()
    if sharded:
        src, _ = _shard(tmp_path, model, lambda k: 0 if k.startswith("fc1") else 1)
        out = tmp_path / "out"
    else:
        src, out = _write(tmp_path, model), tmp_path / "out.safetensors"
    calls = []
    real = writer.CheckpointWriter._write_layer

    def dies_on_third(self, c, w):
        calls.append(c.module)
        if len(calls) == 3:
            raise RuntimeError("simulated crash")
        return real(self, c, w)

    monkeypatch.setattr(writer.CheckpointWriter, "_write_layer", dies_on_third)
    before = sorted(p.name for p in tmp_path.rglob("*"))
    with pytest.raises(RuntimeError, match="simulated"):
        checkpoint.shrink_checkpoint(src, out, rank=3)
    assert sorted(p.name for p in tmp_path.rglob("*")) == before  # no output, no temporary file


def test_free_disk_checked_before_writing(tmp_path, monkeypatch):
    src = _write(tmp_path, _model())
    monkeypatch.setattr(shutil, "disk_usage", lambda p: namedtuple("U", "total used free")(10**6, 10**6, 100))
    with pytest.raises(FactorizeError, match="not enough free disk space"):
        checkpoint.shrink_checkpoint(src, tmp_path / "out.safetensors", rank=3)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in.safetensors"]


def test_header_larger_than_reserve_falls_back_to_a_copy(tmp_path, monkeypatch):
    model = _model()
    monkeypatch.setattr(checkpoint, "plan_bound", lambda sites, policy: 0)
    monkeypatch.setattr(writer, "entry_bound", lambda name, ndim: 1)
    out = tmp_path / "out.safetensors"
    checkpoint.shrink_checkpoint(_write(tmp_path, model), out, rank=4, metadata={"note": "x" * 5000})
    with safe_open(str(out), framework="pt") as f:
        assert f.metadata()["note"] == "x" * 5000
    x = torch.randn(2, 24)
    with torch.no_grad():
        torch.testing.assert_close(io.load(MLP(), out)(x), factorize.compress(model, rank=4).model(x))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in.safetensors", "out.safetensors"]


def test_shards_of_one_name_in_two_folders_keep_apart(tmp_path):
    # an index may place shards called the same in different folders; the output must not let one replace the other
    src = tmp_path / "src"
    (src / "a").mkdir(parents=True)
    (src / "b").mkdir()
    g = torch.Generator().manual_seed(0)
    save_file({"x.weight": torch.randn(32, 24, generator=g)}, str(src / "a" / "w.safetensors"))
    save_file({"y.weight": torch.randn(32, 24, generator=g)}, str(src / "b" / "w.safetensors"))
    index = src / "model.safetensors.index.json"
    index.write_text(json.dumps({"weight_map": {"x.weight": "a/w.safetensors", "y.weight": "b/w.safetensors"}}))
    out = tmp_path / "out"
    result = checkpoint.shrink_checkpoint(index, out, rank=4)
    names = sorted(p.name for p in out.iterdir())
    assert len(result.files) == 3 and len(set(names)) == 3
    written = json.loads((out / "model.safetensors.index.json").read_text())["weight_map"]
    assert {written["x.first.weight"], written["y.first.weight"]} == {n for n in names if n.endswith(".safetensors")}
