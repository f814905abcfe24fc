"""Stored formats: names, exact byte counts, 4-bit packing, the stored tensors, and what a format cannot hold."""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch

from factorize.errors import FactorizeError
from factorize.rounding import (
    PRECISIONS,
    Rounded,
    check_precision,
    fits,
    pack_int4,
    round_matrix,
    stored_bytes,
    unpack_int4,
)

SHAPES = [(3, 5), (8, 32), (16, 70), (4, 128), (5, 130), (2, 1)]  # 70, 130, 5, 1: no group size divides them


def test_precision_names():
    for p in PRECISIONS:
        assert check_precision(p) == p
    with pytest.raises(FactorizeError) as err:
        check_precision("int3")
    text = str(err.value)
    assert "'int3'" in text and all(p in text for p in PRECISIONS)  # names the bad value and lists the good ones
    with pytest.raises(FactorizeError):
        round_matrix(torch.ones(2, 2), "fp8")
    with pytest.raises(FactorizeError):
        stored_bytes("int4g16", (2, 2))


@pytest.mark.parametrize("precision", PRECISIONS)
@pytest.mark.parametrize("shape", SHAPES)
def test_stored_bytes_equal_the_tensors(precision, shape):
    W = torch.randn(*shape, generator=torch.Generator().manual_seed(0))
    r = round_matrix(W, precision)
    held = sum(t.numel() * t.element_size() for t in r.tensors().values())
    assert stored_bytes(precision, shape) == r.nbytes == held


@pytest.mark.parametrize("g", [32, 64, 128])
def test_padding_of_the_last_group_is_counted(g):
    # documented rule: n_pad = ceil(n / g) * g codes a row, half a byte each, and one 2-byte scale per group
    m, n = 6, g + 3
    n_pad = math.ceil(n / g) * g
    assert n_pad == 2 * g
    assert stored_bytes(f"int4g{g}", (m, n)) == m * n_pad // 2 + 2 * m * (n_pad // g)
    r = round_matrix(torch.randn(m, n), f"int4g{g}")
    assert tuple(r.data.shape) == (m, n_pad // 2) and tuple(r.scale.shape) == (m, 2)
    assert tuple(r.dequantize().shape) == (m, n)


def test_bytes_per_weight_of_each_format():
    # the table of docs/precision.md, on a wide matrix: 4, 2, 2, 1 + 4/n, 0.5 + 2/g bytes a weight
    m, n = 1, 4096
    per = {p: stored_bytes(p, (m, n)) / n for p in PRECISIONS}
    assert per == {"float32": 4, "bfloat16": 2, "float16": 2, "int8": 1 + 4 / n,
                   "int4g32": 0.5 + 2 / 32, "int4g64": 0.5 + 2 / 64, "int4g128": 0.5 + 2 / 128}


def test_bad_shape_is_refused():
    for shape in [(0, 3), (2,), (2, 3, 4), (2.0, 3)]:
        with pytest.raises(FactorizeError):
            stored_bytes("int8", shape)


def test_packing_against_numpy_bit_operations():
    # reference: numpy's bitwise and / shifts on uint8 (nibble = code + 8; even column low, odd column high)
    rng = np.random.default_rng(0)
    codes = rng.integers(-8, 8, size=(7, 22))
    u = (codes + 8).astype(np.uint8)
    expected = u[:, 0::2] | (u[:, 1::2] << 4)
    packed = pack_int4(torch.from_numpy(codes))
    assert packed.dtype == torch.uint8
    np.testing.assert_array_equal(packed.numpy(), expected)
    lo, hi = expected & 0x0F, expected >> 4
    nibbles = np.stack([lo, hi], axis=-1).reshape(7, 22)
    np.testing.assert_array_equal(unpack_int4(packed).numpy(), nibbles)
    np.testing.assert_array_equal(nibbles.astype(np.int64) - 8, codes)  # round trip


def test_every_byte_unpacks():
    every = torch.arange(256, dtype=torch.uint8)[None, :]  # all 256 byte values
    ref = every.numpy()
    nibbles = unpack_int4(every).numpy()
    np.testing.assert_array_equal(nibbles[0, 0::2], ref[0] & 0x0F)  # numpy bit operations
    np.testing.assert_array_equal(nibbles[0, 1::2], ref[0] >> 4)


@pytest.mark.parametrize("precision", PRECISIONS)
def test_tensors_round_trip(precision):
    W = torch.randn(5, 70, generator=torch.Generator().manual_seed(1))
    r = round_matrix(W, precision)
    back = Rounded.from_tensors(precision, (5, 70), {k: v.clone() for k, v in r.tensors().items()})
    assert torch.equal(back.dequantize(), r.dequantize())
    assert set(r.tensors()) == ({"q"} if precision in ("float32", "bfloat16", "float16") else {"q", "scale"})


def test_from_tensors_lists_every_problem():
    r = round_matrix(torch.randn(4, 64), "int4g32")
    with pytest.raises(FactorizeError) as err:
        Rounded.from_tensors("int4g32", (4, 64), {"q": r.data.to(torch.int8), "extra": r.scale})
    text = str(err.value)
    assert "'q'" in text and "'scale' is missing" in text and "'extra'" in text


def test_float16_overflow_has_a_reason():
    W = torch.tensor([[1.0, 70000.0], [0.5, -2.0]])  # float16's largest finite value is 65504 (IEEE 754 binary16)
    reason = fits(W, "float16")
    assert reason is not None and "float16" in reason and "65504" in reason
    assert fits(W, "bfloat16") is None and fits(W, "float32") is None and fits(W, "int8") is None
    assert fits(W, "int4g32") is None  # scale 70000 / 7 = 10000 fits float16
    with pytest.raises(FactorizeError, match="wider precision"):
        round_matrix(W, "float16")
    big = torch.tensor([[7 * 70000.0, 1.0]])
    assert "scale" in fits(big, "int4g64")  # the float16 group scale itself would overflow
    assert "NaN" in fits(torch.tensor([[float("nan"), 1.0]]), "int8")
    assert fits(torch.tensor([[65504.0]]), "float16") is None  # the largest finite value itself fits
