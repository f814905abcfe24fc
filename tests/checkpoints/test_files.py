"""Tests for factorize/checkpoints/files.py: save -> load round trips, atomic writes, and every bad input.

Outside references: the safetensors format spec (8-byte little-endian header length, then a JSON header, then
the data; github.com/huggingface/safetensors, "Format") and the reference reader ``safetensors.safe_open`` /
``safetensors.torch.load_file``; transformers' GPT2LMHeadModel built from a tiny GPT2Config (no download).
"""

from __future__ import annotations

import json
import os
import shutil
import struct
from collections import namedtuple
from pathlib import Path

import pytest
import torch
from safetensors import safe_open
from safetensors.torch import save_file
from torch import nn

import factorize
from factorize import storage
from factorize.checkpoints import files as io
from factorize.errors import FactorizeError
from factorize.rewrite.layers import Factored
from tests.conftest import CNN, MLP, TiedLM, tiny_gpt2

REPO = Path(__file__).resolve().parents[2]


def _out(y):
    return y.logits if hasattr(y, "logits") else y


class EmbedModel(nn.Module):
    """An embedding feeding a linear layer (embedding site, untied)."""

    def __init__(self) -> None:
        super().__init__()
        self.embed = nn.Embedding(40, 24, padding_idx=0)
        self.proj = nn.Linear(24, 12)

    def forward(self, ids):
        return self.proj(self.embed(ids)).mean(1)


class LateTied(nn.Module):
    """A tie made by the user after construction: a fresh instance is NOT tied."""

    def __init__(self, tie: bool = False) -> None:
        super().__init__()
        self.embed = nn.Embedding(30, 12)
        self.mix = nn.Linear(12, 12)
        self.head = nn.Linear(12, 30, bias=False)
        if tie:
            self.head.weight = self.embed.weight

    def forward(self, ids):
        return self.head(torch.tanh(self.mix(self.embed(ids))))


Case = namedtuple("Case", "build inputs policy")
CASES = {
    "mlp": Case(MLP, lambda: torch.randn(4, 24), {"rank": 5}),
    "cnn": Case(CNN, lambda: torch.randn(2, 3, 12, 12), {"keep": 0.4}),  # conv2d + conv1d sites
    "embedding": Case(EmbedModel, lambda: torch.randint(0, 40, (3, 7)), {"rank": 4}),
    "tied": Case(TiedLM, lambda: torch.randint(0, 50, (2, 5)), {"keep": 0.3}),
    "gpt2": Case(tiny_gpt2, lambda: torch.randint(0, 64, (2, 9)), {"budget": 0.5}),  # Conv1D + tied head
}


@pytest.mark.parametrize("case", list(CASES))
def test_round_trip_is_bit_exact(tmp_path, case):
    c = CASES[case]
    torch.manual_seed(0)
    model = c.build().eval()
    result = factorize.compress(model, **c.policy)
    path = io.save(result.model, tmp_path / "m.safetensors", plan=result.plan)
    torch.manual_seed(123)  # a fresh instance with different initial weights
    fresh = c.build().eval()
    loaded = io.load(fresh, path)
    assert loaded is fresh  # load works in place and returns the model
    x = c.inputs()
    with torch.no_grad():
        assert torch.equal(_out(loaded(x)), _out(result.model(x)))
    shapes = {k: v.shape for k, v in result.model.state_dict().items()}
    assert {k: v.shape for k, v in loaded.state_dict().items()} == shapes
    assert io.read_plan(path) == json.loads(json.dumps(result.plan))


def test_gpt2_tie_is_kept_and_stored_once(tmp_path):
    model = tiny_gpt2()  # transformers.GPT2LMHeadModel from a tiny config: lm_head tied to wte (its default)
    result = factorize.compress(model, rank=4)
    path = io.save(result.model, tmp_path / "g.safetensors", plan=result.plan)
    with safe_open(str(path), framework="pt") as f:  # reference reader
        keys, meta = set(f.keys()), f.metadata()
    assert "transformer.wte.weight" in keys and "lm_head.weight" not in keys
    assert json.loads(meta["factorize.aliases"]) == {"lm_head.weight": "transformer.wte.weight"}
    fresh = io.load(tiny_gpt2(), path)
    assert fresh.lm_head.weight is fresh.transformer.wte.weight


def test_tie_restored_when_the_fresh_architecture_does_not_tie(tmp_path):
    torch.manual_seed(0)
    model = LateTied(tie=True).eval()
    result = factorize.compress(model, rank=3)
    path = io.save(result.model, tmp_path / "t.safetensors", plan=result.plan)
    fresh = io.load(LateTied(tie=False).eval(), path)
    assert fresh.head.weight is fresh.embed.weight
    ids = torch.randint(0, 30, (2, 6))
    with torch.no_grad():
        assert torch.equal(fresh(ids), result.model(ids))


def test_header_follows_the_safetensors_layout(tmp_path, mlp):
    # safetensors spec: u64 little-endian N, then N bytes of JSON with "__metadata__" (string -> string)
    result = factorize.compress(mlp, rank=4)
    path = io.save(result.model, tmp_path / "m.safetensors", plan=result.plan, metadata={"owner": "team-a"})
    raw = path.read_bytes()
    (n,) = struct.unpack("<Q", raw[:8])
    header = json.loads(raw[8 : 8 + n])
    meta = header["__metadata__"]
    assert meta["factorize.format"] == "factorize.checkpoint" and meta["factorize.format_version"] == "1"
    assert meta["owner"] == "team-a"
    assert json.loads(meta["factorize.plan"])["sites"]["fc1"]["rank"] == 4
    assert header["fc1.first.weight"]["shape"] == [4, 24] and header["fc1.second.weight"]["shape"] == [48, 4]


def test_written_file_gets_the_usual_permissions(tmp_path, mlp):
    result = factorize.compress(mlp, rank=4)
    old = os.umask(0o022)
    try:
        path = io.save(result.model, tmp_path / "m.safetensors", plan=result.plan)
    finally:
        os.umask(old)
    assert path.stat().st_mode & 0o777 == 0o644  # as any new file under umask 022, not private


def test_save_never_modifies_the_model(tmp_path, mlp):
    result = factorize.compress(mlp, rank=4)
    before = {k: v.clone() for k, v in result.model.state_dict().items()}
    io.save(result.model, tmp_path / "m.safetensors", plan=result.plan)
    after = result.model.state_dict()
    assert all(torch.equal(before[k], after[k]) for k in before)


# ---------------------------------------------------------------------------------------------------------------
# atomic writes


def test_existing_output_refused_unless_force(tmp_path, mlp):
    result = factorize.compress(mlp, rank=4)
    path = tmp_path / "m.safetensors"
    path.write_bytes(b"keep me")
    with pytest.raises(FactorizeError, match="already exists") as e:
        io.save(result.model, path, plan=result.plan)
    assert str(path) in str(e.value) and "--force" in str(e.value)
    assert path.read_bytes() == b"keep me"
    io.save(result.model, path, plan=result.plan, force=True)
    assert io.read_plan(path)["sites"]["fc1"]["rank"] == 4


def test_failure_mid_write_leaves_nothing(tmp_path, mlp, monkeypatch):
    result = factorize.compress(mlp, rank=4)

    def broken(filename, tensors, metadata=None):
        with open(filename, "wb") as f:
            f.write(b"\x10\x00\x00\x00\x00\x00\x00\x00{half")  # a partial file, then the writer dies
        raise RuntimeError("simulated crash while writing")

    monkeypatch.setattr(io, "write_safetensors", broken)
    with pytest.raises(RuntimeError, match="simulated"):
        io.save(result.model, tmp_path / "m.safetensors", plan=result.plan)
    assert list(tmp_path.iterdir()) == []


def test_failed_overwrite_keeps_the_old_file(tmp_path, mlp, monkeypatch):
    result = factorize.compress(mlp, rank=4)
    path = io.save(result.model, tmp_path / "m.safetensors", plan=result.plan)
    old = path.read_bytes()
    def full_disk(*a, **k):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(io, "write_safetensors", full_disk)
    with pytest.raises(FactorizeError, match="No space left"):
        io.save(result.model, path, plan=result.plan, force=True)
    assert path.read_bytes() == old and list(tmp_path.iterdir()) == [path]


def test_not_enough_disk_space(tmp_path, mlp, monkeypatch):
    result = factorize.compress(mlp, rank=4)
    monkeypatch.setattr(shutil, "disk_usage", lambda p: namedtuple("U", "total used free")(10**6, 10**6, 1000))
    with pytest.raises(FactorizeError, match="not enough free disk space"):
        io.save(result.model, tmp_path / "m.safetensors", plan=result.plan)
    assert list(tmp_path.iterdir()) == []


def test_unwritable_or_missing_directory(tmp_path, mlp, monkeypatch):
    result = factorize.compress(mlp, rank=4)
    with pytest.raises(FactorizeError, match="does not exist"):
        io.save(result.model, tmp_path / "no" / "m.safetensors", plan=result.plan)
    locked = tmp_path / "locked"
    locked.mkdir()
    locked.chmod(0o500)
    if os.geteuid() == 0:  # root ignores permission bits: make the access check see what a user would
        real = os.access
        monkeypatch.setattr(os, "access", lambda p, mode: False if str(p) == str(locked) else real(p, mode))
    with pytest.raises(FactorizeError, match="cannot write in") as e:
        io.save(result.model, locked / "m.safetensors", plan=result.plan)
    assert "permission denied" in str(e.value)
    assert list(locked.iterdir()) == []


def test_directory_refusing_new_files(tmp_path, mlp, monkeypatch):
    # creating the temporary file itself fails (here: os.open raises EACCES), e.g. on a read-only mount
    result = factorize.compress(mlp, rank=4)

    def refuse(*a, **k):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(os, "open", refuse)
    with pytest.raises(FactorizeError, match="cannot create files"):
        io.save(result.model, tmp_path / "m.safetensors", plan=result.plan)
    monkeypatch.undo()
    assert list(tmp_path.iterdir()) == []


def test_save_checks_plan_and_metadata(tmp_path, mlp):
    a = factorize.compress(mlp, rank=4)
    b = factorize.compress(mlp, rank=6)
    with pytest.raises(FactorizeError, match="does not describe") as e:
        io.save(a.model, tmp_path / "m.safetensors", plan=b.plan)
    assert len(e.value.problems) == 3  # every layer listed at once
    with pytest.raises(FactorizeError, match="reserved"):
        io.save(a.model, tmp_path / "m.safetensors", plan=a.plan, metadata={"factorize.plan": "x"})
    with pytest.raises(FactorizeError, match="not a factorize plan"):
        io.save(a.model, tmp_path / "m.safetensors", plan={"sites": {}})
    assert list(tmp_path.iterdir()) == []


# ---------------------------------------------------------------------------------------------------------------
# bad input on load


@pytest.fixture
def saved(tmp_path, mlp):
    result = factorize.compress(mlp, rank=4)
    return io.save(result.model, tmp_path / "m.safetensors", plan=result.plan), result


def test_missing_file(tmp_path):
    with pytest.raises(FactorizeError, match="no such file"):
        io.load(MLP(), tmp_path / "absent.safetensors")


def test_not_a_safetensors_file(tmp_path):
    text = tmp_path / "notes.safetensors"
    text.write_text("these are not tensors, just a text file of some length\n")
    with pytest.raises(FactorizeError, match="not a safetensors file"):
        io.read_plan(text)
    tiny = tmp_path / "tiny.safetensors"
    tiny.write_bytes(b"abc")
    with pytest.raises(FactorizeError, match="too short"):
        io.read_plan(tiny)
    pickled = tmp_path / "model.pt"
    torch.save({"w": torch.zeros(2)}, pickled)  # torch.save writes a zip archive
    with pytest.raises(FactorizeError, match="zip archive"):
        io.read_plan(pickled)


def test_truncated_file(saved, tmp_path):
    path, _ = saved
    cut = tmp_path / "cut.safetensors"
    cut.write_bytes(path.read_bytes()[:-100])
    with pytest.raises(FactorizeError, match="truncated"):
        io.load(MLP(), cut)


def test_header_claiming_more_than_the_file(tmp_path):
    bad = tmp_path / "bad.safetensors"
    bad.write_bytes(struct.pack("<Q", 5000) + b'{"x": {}}')
    with pytest.raises(FactorizeError, match="claims 5000 bytes"):
        io.read_plan(bad)


def test_header_entry_past_the_end(tmp_path):
    header = json.dumps({"x": {"dtype": "F32", "shape": [4, 4], "data_offsets": [0, 64]}}).encode()
    bad = tmp_path / "bad.safetensors"
    bad.write_bytes(struct.pack("<Q", len(header)) + header + b"\0" * 16)  # 16 of 64 data bytes
    with pytest.raises(FactorizeError, match="truncated"):
        storage.read_header(bad)


def test_plain_safetensors_is_not_a_factorize_checkpoint(tmp_path, mlp):
    plain = tmp_path / "plain.safetensors"
    save_file(mlp.state_dict(), str(plain))
    with pytest.raises(FactorizeError, match="not a factorize checkpoint") as e:
        io.load(MLP(), plain)
    assert "load_state_dict" in str(e.value)


def test_unknown_format_version(tmp_path, saved):
    path, _ = saved
    with safe_open(str(path), framework="pt") as f:
        tensors = {k: f.get_tensor(k) for k in f.keys()}  # noqa: SIM118 - a safe_open handle, not a dict
        meta = f.metadata()
    meta["factorize.format_version"] = "99"
    newer = tmp_path / "newer.safetensors"
    save_file(tensors, str(newer), metadata=meta)
    with pytest.raises(FactorizeError, match="version '99'") as e:
        io.load(MLP(), newer)
    assert "upgrade" in str(e.value)


def test_wrong_architecture_lists_every_problem_and_restores_the_model(saved):
    path, _ = saved
    with pytest.raises(FactorizeError, match="does not fit") as e:
        io.load(MLP(hidden=32), path)  # every factored site has another shape
    assert len(e.value.problems) == 3

    class Wider(MLP):
        def __init__(self):
            super().__init__()
            self.extra = nn.Linear(3, 3)

    wider = Wider()
    with pytest.raises(FactorizeError, match="does not fit") as e:
        io.load(wider, path)
    assert {p.split(":")[0] for p in e.value.problems} == {"extra.weight", "extra.bias"}
    assert not any(isinstance(m, Factored) for m in wider.modules())  # left as it was


def test_dtype_mismatch_is_listed_unless_not_strict(saved):
    path, result = saved
    with pytest.raises(FactorizeError) as e:
        io.load(MLP().double(), path)
    assert any("F32" in p for p in e.value.problems)
    with pytest.warns(UserWarning, match="cast"):
        m = io.load(MLP().double(), path, strict=False)
    x = torch.randn(3, 24)
    torch.testing.assert_close(m(x.double()).float(), result.model(x), rtol=1e-5, atol=1e-6)


def test_not_strict_allows_extra_model_keys(saved):
    path, result = saved

    class Wider(MLP):
        def __init__(self):
            super().__init__()
            self.extra = nn.Linear(3, 3)

    with pytest.warns(UserWarning, match="extra.weight"):
        m = io.load(Wider(), path, strict=False)
    x = torch.randn(3, 24)
    assert torch.equal(m(x), result.model(x))


def test_the_same_model_saves_to_the_same_bytes(tmp_path, mlp):
    # the reference safetensors writer orders metadata keys differently from run to run; ours sorts them, so the
    # same model and plan give byte-identical files (checked across separate processes below, where hash seeds
    # differ, and within one process here)
    import subprocess
    import sys

    result = factorize.compress(mlp, rank=4)
    a = io.save(result.model, tmp_path / "a.safetensors", plan=result.plan, metadata={"z": "1", "a": "2", "m": "3"})
    b = io.save(result.model, tmp_path / "b.safetensors", plan=result.plan, metadata={"m": "3", "z": "1", "a": "2"})
    assert a.read_bytes() == b.read_bytes()
    with safe_open(str(a), "pt") as f:  # still an ordinary safetensors file for the reference reader
        assert set(f.keys()) == set(result.model.state_dict()) and f.metadata()["z"] == "1"
    script = (
        "import sys, torch, factorize; from tests.conftest import MLP; torch.manual_seed(0); m = MLP(); "
        "r = factorize.compress(m, rank=4); factorize.save(r.model, sys.argv[1], plan=r.plan)"
    )
    outs = []
    for i, seed in enumerate(("1", "2")):
        out = tmp_path / f"p{i}.safetensors"
        env = {**os.environ, "PYTHONHASHSEED": seed}
        subprocess.run([sys.executable, "-c", script, str(out)], check=True, env=env, cwd=REPO)
        outs.append(out.read_bytes())
    assert outs[0] == outs[1]
