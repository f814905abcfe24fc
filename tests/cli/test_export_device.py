"""``factorize export`` and the device, dtype and thread options of shrink/sweep/compare, run in-process.

Parity of the exported files is checked against torch itself (the written ``.pt2`` reloaded with
torch.export.load; the ``.onnx`` run with onnxruntime, the ONNX reference runtime); the stored dtype is read from
the safetensors header with the reference reader (safetensors' safe_open).
"""

from __future__ import annotations

import importlib.util
import io
import json
import sys
import textwrap

import numpy as np
import pytest
import torch
from safetensors import safe_open

import factorize
from factorize.cli import main

NET = textwrap.dedent("""
    import torch
    from torch import nn

    class Net(nn.Module):
        def __init__(self):
            super().__init__()
            self.fc1, self.fc2, self.head = nn.Linear(20, 48), nn.Linear(48, 48), nn.Linear(48, 5)

        def forward(self, x):
            return self.head(torch.relu(self.fc2(torch.relu(self.fc1(x)))))

    def build():
        torch.manual_seed(0)
        return Net()
""")
HAS_ORT = all(importlib.util.find_spec(m) for m in ("onnx", "onnxscript", "onnxruntime"))


@pytest.fixture
def work(tmp_path, monkeypatch):
    (tmp_path / "exportnet.py").write_text(NET)
    monkeypatch.syspath_prepend(str(tmp_path))
    monkeypatch.chdir(tmp_path)
    sys.modules.pop("exportnet", None)
    x = np.random.default_rng(0).standard_normal((16, 20)).astype(np.float32)
    np.savez(tmp_path / "x.npz", x=x)
    return tmp_path


def _run(*argv: str) -> tuple[int, dict | None, str]:
    out, err = io.StringIO(), io.StringIO()
    rc = main([*argv, "--json", "--quiet"], stdout=out, stderr=err)
    return rc, json.loads(out.getvalue()) if out.getvalue().strip() else None, err.getvalue()


def _shrink(*extra: str) -> dict:
    rc, doc, err = _run("shrink", "-m", "exportnet:build", "--inputs", "x.npz", "--budget", "0.5", "--repeats", "0",
                        "-o", "small.safetensors", *extra)
    assert rc == 0, err
    return doc


def _compressed():
    from exportnet import build

    return factorize.load(build(), "small.safetensors").eval()


def test_export_pt2_from_a_shrunk_checkpoint(work):
    _shrink()
    rc, doc, err = _run("export", "-m", "exportnet:build", "--weights", "small.safetensors", "--inputs", "x.npz",
                        "-o", "small.pt2")
    assert rc == 0, err
    assert doc["format"] == "pt2" and doc["max_abs_diff"] <= 1e-4
    x = torch.randn(5, 20, generator=torch.Generator().manual_seed(3))  # another batch size than the traced 2
    got = torch.export.load("small.pt2").module()(x)
    with torch.no_grad():
        want = _compressed()(x)
    assert (got - want).abs().max().item() <= 1e-4


@pytest.mark.skipif(not HAS_ORT, reason='onnx/onnxscript/onnxruntime missing: pip install "factorize[export]"')
def test_export_onnx_from_a_shrunk_checkpoint(work):
    import onnxruntime as ort

    _shrink()
    rc, doc, err = _run("export", "-m", "exportnet:build", "--weights", "small.safetensors", "--inputs", "x.npz",
                        "-o", "small.onnx")
    assert rc == 0, err
    assert doc["checked_with"] == "onnxruntime" and doc["max_abs_diff"] <= 1e-4
    x = np.random.default_rng(4).standard_normal((7, 20)).astype(np.float32)
    session = ort.InferenceSession("small.onnx", providers=["CPUExecutionProvider"])
    got = session.run(None, {session.get_inputs()[0].name: x})[0]
    with torch.no_grad():
        want = _compressed()(torch.from_numpy(x)).numpy()
    assert np.abs(got - want).max() <= 1e-4


@pytest.mark.parametrize("argv, words", [
    (["-o", "m.bin"], "cannot tell the format"),
    (["-o", "m.pt2", "--batch-size", "1"], "--fixed-batch"),
    (["-o", "m.pt2", "--random-inputs", "4x7"], "cannot run on these inputs"),
    (["-o", "m.pt2", "--weights", "missing.safetensors"], "missing.safetensors"),
])
def test_export_bad_input_exits_2(work, argv, words):
    rc, doc, _ = _run("export", "-m", "exportnet:build", "--inputs", "x.npz", *argv) if "--random-inputs" not in \
        argv else _run("export", "-m", "exportnet:build", *argv)
    assert rc == 2 and words in json.dumps(doc), doc
    assert not list(work.glob("m.*"))


@pytest.mark.parametrize("dtype", ["float16", "bfloat16"])
def test_dtype_stores_the_checkpoint_in_that_dtype_and_it_reloads(work, dtype):
    doc = _shrink("--dtype", dtype)
    assert any(dtype in n for n in doc["report"]["notes"])
    want = getattr(torch, dtype)
    with safe_open("small.safetensors", framework="pt") as f:
        stored = {f.get_tensor(k).dtype for k in f.keys()}  # noqa: SIM118 - a safe_open handle, not a dict
    assert stored == {want}
    from exportnet import build

    model = factorize.load(build().to(want), "small.safetensors")
    assert {p.dtype for p in model.parameters()} == {want}
    assert factorize.factored_layers(model)


def test_device_cpu_and_threads_give_the_same_checkpoint(work):
    before = torch.get_num_threads()
    a = _shrink()["plan"]
    done = _shrink("--device", "cpu", "--threads", "1", "--force")
    b = done["plan"]
    assert done["report"]["versions"]["threads"] == 1  # the run used --threads ...
    assert torch.get_num_threads() == before  # ... and the caller's count is restored afterwards
    assert {k: v.get("rank") for k, v in a["sites"].items()} == {k: v.get("rank") for k, v in b["sites"].items()}


@pytest.mark.skipif(torch.cuda.is_available(), reason="the refusal is for machines without a GPU")
@pytest.mark.parametrize("command", [["shrink", "--budget", "0.5"], ["sweep"], ["compare", "--against", "x.npz"]])
def test_cuda_without_a_gpu_exits_2_before_loading(work, command):
    rc, doc, _ = _run(*command[:1], "-m", "exportnet:build", "--inputs", "x.npz", *command[1:], "--device", "cuda")
    assert rc == 2 and "no CUDA GPU" in doc["error"], doc
    assert not list(work.glob("*.factorized.safetensors"))


@pytest.mark.parametrize("argv", [["--threads", "0"], ["--device", "gpu"], ["--dtype", "float64"]])
def test_bad_device_options_are_usage_errors(work, argv, capsys):
    with pytest.raises(SystemExit) as exit_:
        main(["shrink", "-m", "exportnet:build", *argv])
    assert exit_.value.code == 2
