"""Stored precision: weight matrices rounded to fewer bits, and the forms built on them.

* :mod:`factorize.rounding.formats`: the precisions (:data:`PRECISIONS`), their exact byte counts
  (:func:`stored_bytes`), what each cannot represent (:func:`fits`), 4-bit packing, and :class:`Rounded`, a matrix
  in its stored form (``dequantize``, ``tensors`` / ``from_tensors`` for files);
* :mod:`factorize.rounding.quantize`: :func:`round_matrix` (round to nearest, scales chosen on the inputs' second
  moment, error-feedback rounding / GPTQ) and :func:`weighted_error`, the output-weighted error measure;
* :mod:`factorize.rounding.correction`: :func:`round_with_correction` (rounded matrix plus a low-rank correction,
  LQER) and :func:`round_factors` (the two factors of a factored layer).

This package sits at the spectra layer: it imports only :mod:`factorize.errors`, torch and numpy. docs/precision.md
describes the formats.
"""

from factorize.rounding.correction import round_factors, round_with_correction
from factorize.rounding.formats import (
    PRECISIONS,
    Rounded,
    check_precision,
    dequantize_tensors,
    fits,
    group_size,
    is_float,
    layout,
    pack_int4,
    stored_bytes,
    unpack_int4,
)
from factorize.rounding.quantize import METHODS, round_matrix, weighted_error

__all__ = [
    "METHODS", "PRECISIONS", "Rounded", "check_precision", "dequantize_tensors", "fits", "group_size", "is_float",
    "layout", "pack_int4", "round_factors", "round_matrix", "round_with_correction", "stored_bytes", "unpack_int4",
    "weighted_error",
]
