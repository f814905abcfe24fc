"""Rank and stored precision together in the weights-only shrink (``cost="bytes"``): the same plan and the same
stored tensors as the in-memory ``compress(model, cost="bytes", ...)``, locally and on a Dask cluster, and an
output that ``load`` rebuilds.

Outside references: numpy's norms for the relative weight error of each stored form, measured on the reloaded
model's merged weights (||W - W_stored||_F / ||W||_F); Dask distributed for the cluster run; the reference reader
``safetensors.safe_open`` for the tensors written. The model is invented (a demo of three layers whose spectra
make every form worth choosing: a rank-6 layer, a flat one, a decaying one).
"""

from __future__ import annotations

import copy
import json

import numpy as np
import pytest
import torch
from safetensors.torch import load_file, save_file
from torch import nn

import factorize
from factorize.errors import FactorizeError
from factorize.outofcore.weights_only import shrink_checkpoint
from factorize.plan.entries import plan_entries

CASES = [  # (budget, precisions): between them they choose factored, rounded and corrected forms
    (0.15, None), (0.25, ("int8", "int4g64", "int4g32")), (0.4, None)]


def _model() -> nn.Module:
    g = torch.Generator().manual_seed(0)
    model = nn.Sequential(nn.Linear(128, 160), nn.ReLU(), nn.Linear(160, 128), nn.ReLU(), nn.Linear(128, 96))
    with torch.no_grad():
        model[0].weight.copy_(torch.randn(160, 6, generator=g) @ torch.randn(6, 128, generator=g) * 0.05)
        model[2].weight.copy_(torch.randn(128, 160, generator=g) * 0.05)
        decay = torch.arange(1, 97, dtype=torch.float32) ** -1.0
        model[4].weight.copy_((torch.randn(96, 96, generator=g) * decay) @ torch.randn(96, 128, generator=g) * 0.05)
    return model.to(torch.bfloat16).eval()


@pytest.fixture(scope="module")
def source(tmp_path_factory):
    model = _model()
    path = tmp_path_factory.mktemp("bytes") / "in.safetensors"
    save_file({k: v.contiguous() for k, v in model.state_dict().items()}, str(path))
    return model, path


def _in_memory(model, budget, precisions):
    example = torch.randn(2, 128, generator=torch.Generator().manual_seed(2)).bfloat16()
    return factorize.compress(copy.deepcopy(model), cost="bytes", budget=budget, precisions=precisions,
                              example=example)


@pytest.mark.parametrize(("budget", "precisions"), CASES)
def test_the_plan_and_the_stored_tensors_equal_compress(source, tmp_path, budget, precisions):
    model, path = source
    expected = _in_memory(model, budget, precisions)
    done = shrink_checkpoint(path, tmp_path / "out.safetensors", cost="bytes", budget=budget, precisions=precisions)
    assert done.plan["sites"] == expected.plan["sites"] and done.plan["selection"] == expected.plan["selection"]
    state = expected.model.state_dict()
    written = load_file(str(tmp_path / "out.safetensors"))
    assert sorted(written) == sorted(state)
    assert all(torch.equal(written[k], state[k]) for k in state)
    assert done.bytes_after == (tmp_path / "out.safetensors").stat().st_size

    # reloaded with one call, in the stored dtype (bit for bit) and in float32
    x = torch.randn(5, 128, generator=torch.Generator().manual_seed(1))
    again = factorize.load(_model(), tmp_path / "out.safetensors")
    assert torch.equal(again(x.bfloat16()), expected.model(x.bfloat16()))
    as_float = factorize.load(_model().float(), tmp_path / "out.safetensors", dtype=torch.float32)
    assert as_float(x).dtype == torch.float32 and torch.allclose(as_float(x), again(x.bfloat16()).float(),
                                                                rtol=0.02, atol=0.02)
    for e in plan_entries(done.plan):
        W = model.get_submodule(e.name).weight.detach().double().numpy()
        measured = np.linalg.norm(W - _effective(again.get_submodule(e.name))) / np.linalg.norm(W)  # numpy norms
        row = done.tensors[f"{e.name}.weight"]
        assert row["precision"] == e.precision
        assert measured == pytest.approx(row["relative_error"], rel=1e-6, abs=1e-9)


def _effective(layer) -> np.ndarray:
    """The weight a reloaded layer computes with, in float64 numpy: B A (factored), the decoded weight (rounded),
    or the decoded weight plus B A (corrected)."""
    def arr(t):
        return t.detach().double().numpy()

    if hasattr(layer, "base"):
        return arr(layer.base.weight) + arr(layer.second.weight) @ arr(layer.first.weight)
    if hasattr(layer, "first"):
        return arr(layer.second.weight) @ arr(layer.first.weight)
    return arr(layer.weight)


def test_every_form_is_chosen_by_some_case(source, tmp_path):
    _, path = source
    forms = set()
    for budget, precisions in CASES:
        done = shrink_checkpoint(path, tmp_path / f"{budget}.safetensors", cost="bytes", budget=budget,
                                 precisions=precisions)
        forms |= {(e.form, e.precision == "bfloat16") for e in plan_entries(done.plan)}
    assert {f for f, _ in forms} == {"factor", "dense", "corrected"}


def test_a_sharded_input_and_a_cluster_give_the_same_bytes(source, tmp_path, dask_engine):
    model, path = source
    src = tmp_path / "sharded"
    src.mkdir()
    state = {k: v.contiguous() for k, v in model.state_dict().items()}
    halves = [{k: v for k, v in state.items() if k.startswith("0.")},
              {k: v for k, v in state.items() if not k.startswith("0.")}]
    names = ["model-00001-of-00002.safetensors", "model-00002-of-00002.safetensors"]
    for part, name in zip(halves, names):
        save_file(part, str(src / name))
    index = {"metadata": {}, "weight_map": {k: names[i] for i, part in enumerate(halves) for k in part}}
    (src / "model.safetensors.index.json").write_text(json.dumps(index))
    keywords = dict(cost="bytes", budget=0.4)
    here = shrink_checkpoint(src, tmp_path / "here", **keywords)
    there = shrink_checkpoint(src, tmp_path / "there", cluster=dask_engine, **keywords)
    assert there.engine["engine"] != "local"
    files = sorted(p.name for p in (tmp_path / "here").iterdir())
    assert files == sorted(p.name for p in (tmp_path / "there").iterdir())
    assert all((tmp_path / "here" / f).read_bytes() == (tmp_path / "there" / f).read_bytes() for f in files)
    assert here.plan == there.plan == shrink_checkpoint(path, tmp_path / "one.safetensors", **keywords).plan
    x = torch.randn(3, 128, dtype=torch.bfloat16)
    assert torch.equal(factorize.load(_model(), tmp_path / "here")(x), _in_memory(model, 0.4, None).model(x))


def test_latency_is_refused_without_a_model(source, tmp_path):
    _, path = source
    with pytest.raises(FactorizeError, match="cost='latency'"):
        shrink_checkpoint(path, tmp_path / "x.safetensors", cost="latency", budget=0.5)
    assert not (tmp_path / "x.safetensors").exists()


def test_command_line_bytes_budget_in_weights_only_mode(source, tmp_path):
    import io

    from factorize.cli import main

    _, path = source
    out, err = io.StringIO(), io.StringIO()
    rc = main(["shrink", "-m", str(path), "--cost", "bytes", "--budget", "0.25", "--precisions", "int8,int4g64",
               "-o", str(tmp_path / "cli.safetensors"), "--json", "-q"], stdout=out, stderr=err)
    assert rc == 0, err.getvalue()
    plan = json.loads(out.getvalue())["plan"]
    assert plan["selection"]["cost"] == "bytes" and plan["policy"]["precisions"] == ["int8", "int4g64"]
    assert "ignored" not in err.getvalue()


def test_loading_in_float32_keeps_the_stored_codes_and_decodes_them_in_float32(source, tmp_path):
    _, path = source
    done = shrink_checkpoint(path, tmp_path / "out.safetensors", cost="bytes", budget=0.4)
    written = load_file(str(tmp_path / "out.safetensors"))
    model = factorize.load(_model().float(), tmp_path / "out.safetensors", dtype=torch.float32)
    state = model.state_dict()
    stored = [k for k in written if ".stored_weight." in k]
    assert stored and all(state[k].dtype == written[k].dtype and torch.equal(state[k], written[k]) for k in stored)
    dense = next(e.name for e in plan_entries(done.plan) if e.form == "dense" and e.precision == "int8")
    q = written[f"{dense}.stored_weight.q"].numpy().astype(np.float32)
    scale = written[f"{dense}.stored_weight.scale"].numpy()
    layer = model.get_submodule(dense)
    assert layer.weight.dtype == torch.float32
    np.testing.assert_array_equal(layer.weight.detach().numpy(), q * scale[:, None])  # int8: W = q * scale per row
