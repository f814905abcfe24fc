"""Stored precisions: what each format keeps, how many bytes it takes, and how it turns back into floats.

A weight matrix W (m x n: m output rows, n input columns) is stored in one of :data:`PRECISIONS`:

* ``float32``, ``bfloat16``, ``float16``: a plain cast; ``q`` is the cast matrix (m, n), no scale.
* ``int8``: symmetric integers in [-127, 127], one float32 scale per output row (per-channel rounding, common
  practice): W ~ q * scale[:, None]. ``q`` int8 (m, n), ``scale`` float32 (m,).
* ``int4g32`` / ``int4g64`` / ``int4g128``: symmetric 4-bit integers in [-7, 7] (the code -8 is never used, so
  the grid is symmetric about zero and a weight and its negation round alike), one float16 scale per group of
  g consecutive weights along each row's input dimension (group-wise rounding, common practice). When g does
  not divide n, the last group of each row is **padded** with zero weights up to g, so the row holds
  n_pad = ceil(n / g) * g codes; the padding costs bytes and :func:`stored_bytes` counts it. Codes are stored
  offset by 8 (nibble = q + 8, in [1, 15]) and packed two a byte, the even column in the low nibble and the
  odd column in the high nibble: ``q`` uint8 (m, n_pad / 2), ``scale`` float16 (m, n_pad / g).

Scales are the stored values: a float16 group scale is rounded up to the next float16 when rounding to nearest
would make scale * 7 fall short of the group's largest magnitude, so round-to-nearest with an absmax scale never
clips (the bound |W - dequantize| <= scale / 2 holds elementwise with the stored scale).

:func:`dequantize_tensors` is the one decoder: :meth:`Rounded.dequantize` and the module form
(:mod:`factorize.rewrite.stored`) both call it, so a stored layer's weight equals ``dequantize()`` bit for bit.
It uses only casts, reshapes, floor and products, so it traces through torch.export and ONNX.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import torch

from factorize.choices import PRECISIONS
from factorize.errors import FactorizeError

FLOAT_DTYPES = {"float32": torch.float32, "bfloat16": torch.bfloat16, "float16": torch.float16}
INT8_MAX = 127  # symmetric int8: [-127, 127] (common practice)
INT4_MAX = 7  # symmetric 4-bit: [-7, 7]
INT4_OFFSET = 8  # nibble = code + 8
GROUP_SIZES = {"int4g32": 32, "int4g64": 64, "int4g128": 128}


def check_precision(name: object) -> str:
    """``name`` if it is one of :data:`PRECISIONS`, else a :class:`FactorizeError` naming it and the accepted ones."""
    if not isinstance(name, str) or name not in PRECISIONS:
        raise FactorizeError(f"unknown stored precision {name!r}",
                             fix=f"use one of {', '.join(PRECISIONS)}")
    return name


def is_float(precision: str) -> bool:
    """Whether ``precision`` is a plain float cast (no scale)."""
    return precision in FLOAT_DTYPES


def group_size(precision: str) -> int | None:
    """The group size of a 4-bit precision (None for the others)."""
    return GROUP_SIZES.get(precision)


def qmax(precision: str) -> int:
    """The largest integer code of an integer precision."""
    return INT8_MAX if precision == "int8" else INT4_MAX


def padded_width(precision: str, n: int) -> int:
    """Columns a row holds once its last group is padded (n for every format but 4-bit)."""
    g = GROUP_SIZES.get(precision)
    return n if g is None else -(-n // g) * g


def _check_shape(shape: object) -> tuple[int, int]:
    if (not isinstance(shape, (tuple, list, torch.Size)) or len(shape) != 2
            or not all(isinstance(d, int) and not isinstance(d, bool) and d > 0 for d in shape)):
        raise FactorizeError(f"expected a matrix shape (m, n) of two positive integers, got {shape!r}")
    return int(shape[0]), int(shape[1])


def layout(precision: str, shape: tuple[int, int]) -> dict[str, tuple[torch.dtype, tuple[int, ...]]]:
    """The stored tensors of an (m, n) matrix: name -> (dtype, shape). The one place the formats are spelled out."""
    m, n = shape
    if precision in FLOAT_DTYPES:
        return {"q": (FLOAT_DTYPES[precision], (m, n))}
    if precision == "int8":
        return {"q": (torch.int8, (m, n)), "scale": (torch.float32, (m,))}
    n_pad = padded_width(precision, n)
    return {"q": (torch.uint8, (m, n_pad // 2)), "scale": (torch.float16, (m, n_pad // GROUP_SIZES[precision]))}


def stored_bytes(precision: str, shape: tuple[int, int]) -> int:
    """Exact bytes the stored form of an (m, n) matrix takes: data plus scales (padding included).

    float32: 4mn; bfloat16 / float16: 2mn; int8: mn + 4m; int4 with group g: m * n_pad / 2 + 2m * n_pad / g,
    n_pad = ceil(n / g) * g.
    """
    check_precision(precision)
    shape = _check_shape(shape)
    return sum(math.prod(s) * torch.empty((), dtype=d).element_size() for d, s in layout(precision, shape).values())


def fits(W: torch.Tensor, precision: str) -> str | None:
    """Why ``precision`` cannot represent ``W`` (a value or a scale would overflow to infinity, or W is not finite),
    or None when it can. Lets a planner keep such a layer wider and record the reason."""
    check_precision(precision)
    W = torch.as_tensor(W).detach()
    if not bool(torch.isfinite(W).all()):
        return "the weight holds NaN or Inf values"
    if W.numel() == 0:
        return None
    peak = float(W.abs().max())
    if precision in FLOAT_DTYPES:
        top = torch.finfo(FLOAT_DTYPES[precision]).max
        if bool(torch.isinf(W.to(FLOAT_DTYPES[precision])).any()):
            return f"largest magnitude {peak:.6g} overflows {precision} (largest finite {top:.6g})"
        return None
    if precision in GROUP_SIZES:
        top = torch.finfo(torch.float16).max
        if peak / INT4_MAX > top:
            return (f"largest magnitude {peak:.6g} needs a group scale of {peak / INT4_MAX:.6g}, beyond float16's "
                    f"largest finite {top:.6g}")
    return None


# ---------------------------------------------------------------------------------------------------------------
# 4-bit packing


def pack_int4(codes: torch.Tensor) -> torch.Tensor:
    """Integer codes in [-8, 7], shape (m, 2k) -> uint8 (m, k): nibble = code + 8, even column low, odd high."""
    u = (codes.to(torch.int16) + INT4_OFFSET).to(torch.uint8)  # (m, 2k) in [0, 15]
    return u[:, 0::2] | (u[:, 1::2] << 4)  # (m, k)


def unpack_int4(packed: torch.Tensor, dtype: torch.dtype = torch.uint8) -> torch.Tensor:
    """uint8 (m, k) -> the nibbles (m, 2k) (code + 8, in [0, 15]) in ``dtype``, inverse of :func:`pack_int4`.

    Split with float arithmetic (hi = floor(p / 16), lo = p - 16 hi; exact for 0..255) rather than bit shifts:
    ONNX exporters and runtimes disagree on shifts of unsigned bytes, every one handles these."""
    p = packed.to(torch.float32)  # (m, k)
    hi = torch.floor(p / 16)
    lo = p - 16 * hi
    return torch.stack((lo, hi), dim=-1).reshape(packed.shape[0], -1).to(dtype)  # (m, 2k): lo, hi, lo, hi, ...


# ---------------------------------------------------------------------------------------------------------------
# decoding


def dequantize_tensors(precision: str, shape: tuple[int, int], q: torch.Tensor, scale: torch.Tensor | None,
                       dtype: torch.dtype = torch.float32) -> torch.Tensor:
    """The float matrix (m, n) that stored tensors stand for, in ``dtype`` (products are formed in float32).

    Trusts its inputs (shapes and dtypes as :func:`layout` says); traceable by torch.export and ONNX."""
    m, n = shape
    if precision in FLOAT_DTYPES:
        return q.to(dtype)
    if precision == "int8":
        return (q.to(torch.float32) * scale.to(torch.float32)[:, None]).to(dtype)  # (m, n)
    g = GROUP_SIZES[precision]
    codes = unpack_int4(q, torch.float32) - INT4_OFFSET  # (m, n_pad)
    W = codes.reshape(m, -1, g) * scale.to(torch.float32)[:, :, None]  # (m, G, g)
    return W.reshape(m, -1)[:, :n].to(dtype)  # drop the padding


@dataclass(frozen=True, eq=False)
class Rounded:
    """A matrix in its stored form.

    ``data``: the cast matrix (float formats), int8 codes (m, n), or packed 4-bit codes uint8 (m, n_pad / 2);
    ``scale``: None (float formats), float32 (m,) (int8) or float16 (m, n_pad / g) (4-bit).
    """

    precision: str
    shape: tuple[int, int]
    data: torch.Tensor
    scale: torch.Tensor | None = None

    def dequantize(self, dtype: torch.dtype = torch.float32) -> torch.Tensor:
        """The float matrix (m, n) this form stands for."""
        return dequantize_tensors(self.precision, self.shape, self.data, self.scale, dtype)

    @property
    def nbytes(self) -> int:
        """Bytes of the stored tensors (:func:`stored_bytes`)."""
        return stored_bytes(self.precision, self.shape)

    def tensors(self) -> dict[str, torch.Tensor]:
        """The tensors to save: ``q`` and, for integer formats, ``scale``."""
        out = {"q": self.data}
        if self.scale is not None:
            out["scale"] = self.scale
        return out

    @classmethod
    def from_tensors(cls, precision: str, shape: tuple[int, int], tensors: Mapping[str, torch.Tensor]) -> Rounded:
        """Rebuild from :meth:`tensors` (e.g. read from a file), checking every name, dtype and shape."""
        check_precision(precision)
        shape = _check_shape(shape)
        expected = layout(precision, shape)
        problems = [f"unexpected tensor {k!r}" for k in tensors if k not in expected]
        for name, (dtype, dims) in expected.items():
            t = tensors.get(name)
            if not isinstance(t, torch.Tensor):
                problems.append(f"{name!r} is missing")
            elif t.dtype != dtype or tuple(t.shape) != dims:
                problems.append(f"{name!r} is {t.dtype} {tuple(t.shape)}, expected {dtype} {dims}")
        if problems:
            raise FactorizeError(f"the stored tensors do not match {precision} for a {shape[0]} x {shape[1]} matrix",
                                 problems, fix="save and load the tensors of the same Rounded form")
        return cls(precision, shape, tensors["q"], tensors.get("scale"))
