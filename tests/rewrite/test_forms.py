"""Stored precision in a model: every form and precision applied from a plan, saved, loaded bit for bit, exported."""

from __future__ import annotations

import copy

import pytest
import torch
from torch import nn

from factorize.checkpoints.files import load, save
from factorize.errors import FactorizeError
from factorize.model.sites import walk
from factorize.plan.ranks import PLAN_FORMAT, PRECISION_PLAN_VERSION
from factorize.rewrite.apply import apply_plan, check_plan
from factorize.rewrite.forms import Corrected, release_precisions, stored_nbytes
from factorize.rewrite.stored import is_stored
from factorize.rounding import PRECISIONS, round_matrix, round_with_correction, stored_bytes


def _model():
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(64, 48), nn.ReLU(), nn.Linear(48, 32), nn.ReLU(), nn.Linear(32, 16)).eval()


def _plan(model, rows):
    sites = walk(model).by_name()
    out = {}
    for name, (action, precision, rank) in rows.items():
        s = sites[name]
        e = {"kind": s.kind, "shape": list(s.shape), "action": action, "rank": rank if action == "factor" else None,
             "reason": "test", "params": s.params, "params_after": s.params, "precision": precision}
        if action == "corrected":
            e["correction_rank"] = rank
        out[name] = e
    return {"format": PLAN_FORMAT, "version": PRECISION_PLAN_VERSION, "method": "exact", "policy": {}, "sites": out}


LOW = [p for p in PRECISIONS if p != "float32"]


@pytest.mark.parametrize("precision", LOW)
def test_every_precision_saves_and_loads_bit_for_bit(tmp_path, precision):
    model = _model()
    plan = _plan(model, {"0": ("factor", precision, 8), "2": ("dense", precision, None),
                         "4": ("corrected", "int4g32", 4) if precision.startswith("int4")
                         else ("dense", "float32", None)})
    compressed = apply_plan(model, plan)
    assert is_stored(compressed[0].first) and is_stored(compressed[0].second) and is_stored(compressed[2])
    path = save(compressed, tmp_path / "m.safetensors", plan=plan)
    loaded = load(_model(), path)
    a, b = compressed.state_dict(), loaded.state_dict()
    assert a.keys() == b.keys()
    for k in a:
        assert a[k].dtype == b[k].dtype and torch.equal(a[k], b[k]), k  # bit for bit
    x = torch.randn(5, 64)
    assert torch.equal(compressed(x), loaded(x))


def test_stored_values_are_the_rounded_ones():
    # the dense layer's decoded weight is round_matrix's dequantized value exactly (factorize.rounding, tested
    # against numpy in tests/rounding); the corrected layer computes dequantize(Q) + B A
    model = _model()
    plan = _plan(model, {"2": ("dense", "int8", None), "4": ("corrected", "int4g32", 4)})
    compressed = apply_plan(model, plan)
    assert torch.equal(compressed[2].weight, round_matrix(model[2].weight.detach(), "int8").dequantize())
    assert isinstance(compressed[4], Corrected)
    Q, B, A = round_with_correction(model[4].weight.detach(), "int4g32", 4)
    expected = Q.dequantize() + round_matrix(B, "bfloat16").dequantize() @ round_matrix(A, "bfloat16").dequantize()
    torch.testing.assert_close(compressed[4].weight, expected, rtol=0, atol=1e-6)
    assert stored_nbytes(compressed) == (stored_bytes("int8", (32, 48)) + stored_bytes("int4g32", (16, 32))
                                         + stored_bytes("bfloat16", (4, 32)) + stored_bytes("bfloat16", (16, 4)))


def test_corrected_at_full_rank_reproduces_the_layer():
    # at full rank the correction is E itself (Eckart-Young), so only the correction's bfloat16 storage is lost
    model = _model()
    plan = _plan(model, {"4": ("corrected", "int4g64", 16)})
    compressed = apply_plan(model, plan)
    x = torch.randn(7, 32)
    torch.testing.assert_close(compressed[4](x), model[4](x), rtol=0, atol=2e-2)


def test_release_gives_plain_layers_with_the_same_function():
    model = _model()
    plan = _plan(model, {"0": ("factor", "int8", 8), "2": ("dense", "int4g64", None), "4": ("corrected", "int4g64", 4)})
    compressed = apply_plan(model, plan)
    x = torch.randn(3, 64)
    y = compressed(x)
    released = release_precisions(copy.deepcopy(compressed))
    assert not any(is_stored(m) for m in released.modules())
    assert type(released[4]) is nn.Linear
    torch.testing.assert_close(released(x), y, rtol=0, atol=1e-5)


def test_plan_rows_with_bad_precision_or_correction_are_refused():
    model = _model()
    plan = _plan(model, {"2": ("dense", "int3", None), "4": ("corrected", "int4g64", 0)})
    with pytest.raises(FactorizeError) as err:
        check_plan(plan)
    text = str(err.value)
    assert "int3" in text and "correction_rank" in text


def test_export_parity_for_rounded_forms(tmp_path):
    # torch.export and ONNX (onnxruntime) run the stored forms; tolerance 1e-4 absolute on outputs of size ~1
    pytest.importorskip("onnxruntime")
    from factorize.checkpoints.export import export_onnx, export_program

    model = _model()
    plan = _plan(model, {"0": ("factor", "int4g64", 8), "2": ("dense", "int8", None), "4": ("corrected", "int4g32", 4)})
    compressed = apply_plan(model, plan)
    x = torch.randn(4, 64)
    program = export_program(compressed, x, tmp_path / "m.pt2")
    assert program.max_abs_diff is None or program.max_abs_diff <= 1e-4
    onnx = export_onnx(compressed, x, tmp_path / "m.onnx")
    assert onnx.max_abs_diff is not None and onnx.max_abs_diff <= 1e-4


def test_merge_gives_back_the_original_classes_and_keys():
    # merge: factored, rounded and corrected layers back to plain nn.Linear with the original state-dict keys
    from factorize.rewrite.apply import merge

    model = _model()
    plan = _plan(model, {"0": ("factor", "int8", 8), "2": ("dense", "int4g64", None), "4": ("corrected", "int4g64", 4)})
    compressed = apply_plan(model, plan)
    merged = merge(compressed)
    assert [type(m) for m in merged] == [type(m) for m in model]
    assert merged.state_dict().keys() == model.state_dict().keys()
    x = torch.randn(6, 64)
    torch.testing.assert_close(merged(x), compressed(x), rtol=0, atol=1e-5)


def test_integer_kernels_hold_the_stored_codes_and_stay_close():
    # torch's dynamic int8 linear (torch.ao) on the stored codes: its weight dequantizes to exactly the stored
    # values; activations rounded to 8 bits per tensor add a drift of their own (common practice: ~1% relative)
    from factorize.rewrite.forms import integer_kernels

    model = _model()
    plan = _plan(model, {"0": ("factor", "int8", 8), "2": ("dense", "int8", None), "4": ("dense", "int4g64", None)})
    compressed = apply_plan(model, plan)
    fast = integer_kernels(compressed)
    assert type(fast[2]).__name__ == "Linear" and type(fast[2]).__module__.startswith("torch.ao")
    assert type(fast[0].first).__module__.startswith("torch.ao") and is_stored(fast[4])  # int4 stays stored
    assert torch.equal(fast[2].weight().dequantize(), compressed[2].weight)
    x = torch.randn(16, 64)
    y, ref = fast(x), compressed(x)
    assert float((y - ref).norm() / ref.norm()) < 0.05
    assert is_stored(compressed[2])  # the stored model itself is unchanged


def test_stored_weights_count_as_the_parameters_they_replace():
    # a rounded weight still holds m x n numbers (fewer bits): the parameter count stays, the bytes fall
    from factorize.model.count import count_bytes, count_parameters

    model = _model()
    compressed = apply_plan(model, _plan(model, {"2": ("dense", "int8", None)}))
    assert count_parameters(compressed) == count_parameters(model)
    assert count_bytes(model) - count_bytes(compressed) == 4 * 32 * 48 - stored_bytes("int8", (32, 48))
