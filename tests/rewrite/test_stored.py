"""Stored weights in stock layers: outputs, state-dict round trip through safetensors, torch.export and ONNX."""

from __future__ import annotations

import copy
import pickle

import numpy as np
import pytest
import torch
from safetensors.torch import load_file, save_file
from torch import nn

from factorize.errors import FactorizeError
from factorize.rewrite.layers import factor_module
from factorize.rewrite.stored import (
    attach_stored,
    detach_stored,
    is_stored,
    stored_weights,
)
from factorize.rounding import Rounded, round_matrix

torch.manual_seed(0)


def _layers():
    return {
        "linear": (nn.Linear(70, 12), torch.randn(3, 70)),
        "conv2d": (nn.Conv2d(3, 8, 3, padding=1), torch.randn(2, 3, 6, 6)),
        "embedding": (nn.Embedding(20, 48, padding_idx=0), torch.randint(0, 20, (2, 5))),
        "conv1d": (nn.Conv1d(4, 6, 5), torch.randn(2, 4, 9)),
    }


def _matrix(module):
    w = module.weight.detach()
    return w.reshape(w.shape[0], -1)


def _stock_with(module, W):
    """The stock layer with weight = the decoded matrix (the reference the stored layer must match)."""
    ref = copy.deepcopy(module)
    with torch.no_grad():
        ref.weight.copy_(W.reshape(ref.weight.shape))
    return ref


@pytest.mark.parametrize("kind", ["linear", "conv2d", "embedding", "conv1d"])
@pytest.mark.parametrize("precision", ["int8", "int4g64", "float16"])
def test_outputs_equal_the_stock_layer_with_the_decoded_weight(kind, precision):
    module, x = _layers()[kind]
    r = round_matrix(_matrix(module), precision)
    ref = _stock_with(module, r.dequantize())
    stored = attach_stored(module, r)
    assert is_stored(stored) and isinstance(stored, type(ref))
    assert torch.equal(stored.weight, r.dequantize().reshape(ref.weight.shape))  # bit for bit
    torch.testing.assert_close(stored(x), ref(x), rtol=0, atol=1e-6)
    assert "weight" not in dict(stored.named_parameters())
    keys = set(stored.state_dict())
    assert {"stored_weight.q"} <= keys and ("stored_weight.scale" in keys) == (precision != "float16")


def test_thin_layers_of_a_factored_layer():
    dense = nn.Linear(64, 24)
    B, A = torch.randn(24, 8), torch.randn(8, 64)
    layer = factor_module(dense, "linear", B, A)
    rb, ra = round_matrix(B, "int8"), round_matrix(A, "int4g32")
    attach_stored(layer.second, rb)
    attach_stored(layer.first, ra)
    x = torch.randn(5, 64)
    expected = nn.functional.linear(x, rb.dequantize() @ ra.dequantize(), dense.bias)
    torch.testing.assert_close(layer(x), expected, rtol=1e-5, atol=1e-5)
    assert torch.equal(layer.factor_b(), rb.dequantize()) and torch.equal(layer.factor_a(), ra.dequantize())
    assert set(stored_weights(layer)) == {"first", "second"}
    assert {"first.stored_weight.q", "first.stored_weight.scale", "second.stored_weight.q",
            "second.stored_weight.scale", "second.bias"} == set(layer.state_dict())


@pytest.mark.parametrize("precision", ["int8", "int4g64", "bfloat16"])
def test_state_dict_round_trip_through_safetensors(tmp_path, precision):
    module = nn.Linear(70, 12)
    r = round_matrix(_matrix(module), precision)
    attach_stored(module, r)
    path = tmp_path / "w.safetensors"
    save_file(module.state_dict(), str(path))
    loaded = load_file(str(path))
    # rebuild: a fresh layer, the stored form from the file's tensors, then the rest of the state dict
    fresh = nn.Linear(70, 12)
    tensors = {k.split(".")[-1]: v for k, v in loaded.items() if k.startswith("stored_weight.")}
    attach_stored(fresh, Rounded.from_tensors(precision, (12, 70), tensors))
    fresh.load_state_dict(loaded)
    for k, v in module.state_dict().items():
        assert v.dtype == fresh.state_dict()[k].dtype and torch.equal(v, fresh.state_dict()[k])  # bit-exact
    assert torch.equal(fresh.weight, module.weight)


def test_detach_gives_back_a_plain_parameter():
    module = nn.Conv2d(3, 4, 3)
    keys = list(module.state_dict())
    r = round_matrix(_matrix(module), "int4g32")
    attach_stored(module, r)
    detach_stored(module)
    assert type(module) is nn.Conv2d and list(module.state_dict()) == keys
    assert isinstance(module.weight, nn.Parameter) and module.weight.requires_grad
    assert torch.equal(module.weight.detach(), r.dequantize().reshape(4, 3, 3, 3))


def test_copies_and_pickles_keep_the_stored_form():
    module = attach_stored(nn.Linear(16, 4), round_matrix(torch.randn(4, 16), "int8"))
    x = torch.randn(2, 16)
    for other in (copy.deepcopy(module), pickle.loads(pickle.dumps(module))):
        assert is_stored(other) and torch.equal(other(x), module(x))


def test_refusals_leave_the_module_as_it_was():
    module = nn.Linear(16, 4)
    before = module.weight.detach().clone()
    with pytest.raises(FactorizeError, match="matrix view"):
        attach_stored(module, round_matrix(torch.randn(4, 15), "int8"))
    with pytest.raises(FactorizeError, match="Rounded"):
        attach_stored(module, torch.randn(4, 16))
    with pytest.raises(FactorizeError, match="only a module's 'weight'"):
        attach_stored(module, round_matrix(torch.randn(4, 16), "int8"), attr="bias")
    assert type(module) is nn.Linear and torch.equal(module.weight, before)
    attach_stored(module, round_matrix(torch.randn(4, 16), "int8"))
    with pytest.raises(FactorizeError, match="already"):
        attach_stored(module, round_matrix(torch.randn(4, 16), "int8"))
    with pytest.raises(FactorizeError, match="no stored weight"):
        detach_stored(nn.Linear(2, 2))


@pytest.mark.parametrize("precision", ["int8", "int4g64"])
def test_torch_export_runs_it(precision):
    module = attach_stored(nn.Linear(70, 12), round_matrix(torch.randn(12, 70), precision)).eval()
    x = torch.randn(3, 70)
    program = torch.export.export(module, (x,))
    assert program.state_dict["stored_weight.q"].dtype == module.stored_weight.q.dtype  # stays stored
    torch.testing.assert_close(program.module()(x), module(x), rtol=0, atol=1e-6)


@pytest.mark.parametrize(("precision", "optimize"), [("int8", True), ("int4g64", False)])
def test_onnx_parity(tmp_path, precision, optimize):
    # optimize=True is the exporter's default (it folds the decode into a float weight); optimize=False keeps the
    # stored tensors and the decode in the graph
    onnx = pytest.importorskip("onnx")
    ort = pytest.importorskip("onnxruntime")
    module = attach_stored(nn.Linear(70, 12), round_matrix(torch.randn(12, 70), precision)).eval()
    x = torch.randn(3, 70)
    program = torch.onnx.export(module, (x,), dynamo=True, optimize=optimize, verbose=False, report=False)
    path = tmp_path / "m.onnx"
    program.save(str(path))
    kinds = {i.data_type for i in onnx.load(str(path)).graph.initializer}
    if not optimize:  # the packed codes travel as integers (ONNX INT8 = 3, UINT8 = 2); folded otherwise
        assert (3 if precision == "int8" else 2) in kinds
    session = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    got = session.run(None, {session.get_inputs()[0].name: x.numpy()})[0]
    np.testing.assert_allclose(got, module(x).detach().numpy(), rtol=0, atol=1e-5)  # onnxruntime, tolerance 1e-5
