"""Stored precision in a model: rounded dense layers, rounded factors, and rounded-plus-correction layers.

A plan row carries ``precision`` (see :mod:`factorize.plan.forms`). After :func:`factorize.rewrite.apply.apply_plan`
has built the factored layers, :func:`store_precisions` puts each row's stored form in place:

* ``action="dense"`` at a precision below the weight's own: the layer keeps its class and forward, its weight is
  decoded from the stored tensors (:func:`factorize.rewrite.stored.attach_stored`);
* ``action="factor"``: both thin layers (``first`` holds A, ``second`` holds B) get stored weights. A is rounded
  against the layer's input second moment C, B against the rounded A's outputs, Aq C Aq^T
  (:func:`factorize.rounding.round_factors`), when C is given and the thin layers hold the matrix view's rows;
* ``action="corrected"`` (stock ``nn.Linear`` only): a :class:`Corrected` layer, ``base(x) + second(first(x))``,
  with ``base`` the layer rounded to a 4-bit precision and ``first`` / ``second`` a rank-k correction in bfloat16
  fitted to what rounding lost (LQER, Zhang et al. 2024; :func:`factorize.rounding.round_with_correction`).

State-dict keys: ``<layer>.stored_weight.q`` / ``.scale`` for a rounded dense layer,
``<layer>.first.stored_weight.q`` ... for factors, ``<layer>.base.stored_weight.q``, ``<layer>.base.bias``,
``<layer>.first.stored_weight.q``, ``<layer>.second.stored_weight.q`` for the corrected form. With ``weights=False``
the same structure is built with zero-filled stored tensors, for loading a checkpoint into.
"""

from __future__ import annotations

from collections.abc import Mapping

import torch
from torch import nn

from factorize.errors import FactorizeError
from factorize.model.sites import get_module, set_module
from factorize.plan.entries import DENSE, FACTOR, plan_entries
from factorize.plan.forms import DENSE_VIEW_KINDS, VIEW_KINDS, native_precision
from factorize.rewrite.stored import attach_stored, detach_stored, is_stored
from factorize.rounding import Rounded, layout, round_factors, round_matrix, round_with_correction

CORRECTION_PRECISION = "bfloat16"


class Corrected(nn.Module):
    """A linear layer stored rounded plus a low-rank correction: ``base(x) + second(first(x))``.

    ``weight`` answers the dense weight it computes, dequantize(Q) + B A (not a Parameter); ``bias`` is the base's.
    """

    def __init__(self, base: nn.Linear, first: nn.Linear, second: nn.Linear) -> None:
        super().__init__()
        self.base, self.first, self.second = base, first, second

    @property
    def weight(self) -> torch.Tensor:
        return self.base.weight + self.second.weight @ self.first.weight  # (m, n)

    @property
    def bias(self) -> torch.Tensor | None:
        return self.base.bias

    @property
    def in_features(self) -> int:
        return self.base.in_features

    @property
    def out_features(self) -> int:
        return self.base.out_features

    @property
    def rank(self) -> int:
        return int(self.first.out_features)

    def forward(self, input: torch.Tensor) -> torch.Tensor:  # noqa: A002 - stock argument name
        return self.base(input) + self.second(self.first(input))

    def to_dense(self) -> nn.Linear:
        """A plain ``nn.Linear`` computing the same function (float weight)."""
        W = self.weight.detach()
        dense = nn.Linear(self.in_features, self.out_features, bias=self.bias is not None, device=W.device,
                          dtype=W.dtype)
        with torch.no_grad():
            dense.weight.copy_(W)
            if self.bias is not None:
                dense.bias.copy_(self.bias)
        return dense


def _empty(precision: str, shape: tuple[int, int], device: torch.device) -> Rounded:
    tensors = {k: torch.zeros(s, dtype=d, device=device) for k, (d, s) in layout(precision, shape).items()}
    return Rounded.from_tensors(precision, shape, tensors)


def _view(module: nn.Module) -> torch.Tensor:
    w = module.weight
    return w.detach().reshape(w.shape[0], -1)


def _store(module: nn.Module, precision: str, hessian: torch.Tensor | None, weights: bool) -> None:
    """Round ``module.weight`` (its own layout, rows = dim 0) to ``precision`` in place."""
    w = _view(module)
    rounded = round_matrix(w, precision, hessian=hessian) if weights else _empty(precision, tuple(w.shape), w.device)
    attach_stored(module, rounded)


def _store_factors(layer: nn.Module, kind: str, precision: str, hessian, weights: bool) -> None:
    first, second = layer.first, layer.second
    if not weights or kind not in VIEW_KINDS or hessian is None:
        _store(first, precision, None, weights)
        _store(second, precision, None, weights)
        return
    A, B = _view(first), _view(second)  # (r, n), (m, r)
    Bq, Aq = round_factors(B, A, precision, hessian=hessian)
    attach_stored(first, Aq)
    attach_stored(second, Bq)


def corrected_layer(module: nn.Module, precision: str, rank: int, hessian, weights: bool) -> Corrected:
    """The corrected form of a stock ``nn.Linear`` (a new module; ``module`` is not modified)."""
    if type(module) is not nn.Linear:
        raise FactorizeError(f"the corrected form is built for nn.Linear layers, not {type(module).__name__}",
                             fix="plan a dense or factored form for this layer")
    W, dev, dt = module.weight.detach(), module.weight.device, module.weight.dtype
    m, n = W.shape
    base = nn.Linear(n, m, bias=module.bias is not None, device=dev, dtype=dt)
    first = nn.Linear(n, rank, bias=False, device=dev, dtype=dt)
    second = nn.Linear(rank, m, bias=False, device=dev, dtype=dt)
    with torch.no_grad():
        if module.bias is not None:
            base.bias.copy_(module.bias)
        if weights:
            Q, B, A = round_with_correction(W, precision, rank, hessian=hessian)
            attach_stored(base, Q)
            attach_stored(first, round_matrix(A, CORRECTION_PRECISION))
            attach_stored(second, round_matrix(B, CORRECTION_PRECISION))
        else:
            attach_stored(base, _empty(precision, (m, n), dev))
            attach_stored(first, _empty(CORRECTION_PRECISION, (rank, n), dev))
            attach_stored(second, _empty(CORRECTION_PRECISION, (m, rank), dev))
    layer = Corrected(base, first, second)
    layer.train(module.training)
    return layer


def store_precisions(model: nn.Module, plan: Mapping, *, hessians: Mapping[str, torch.Tensor] | None = None,
                     weights: bool = True) -> nn.Module:
    """Store the weights of every dense or factored plan row whose precision is below its weight's own, in place
    (``model`` already rewritten by ``apply_plan``; corrected rows are built there).

    ``hessians``: name -> input second moment (n x n) of the layers whose rounding uses calibration (error-feedback
    rounding); others are rounded to nearest. ``weights=False`` builds the structure only (zero-filled), to load
    a checkpoint into.
    """
    hessians = hessians or {}
    for e in plan_entries(plan):
        if e.form not in (FACTOR, DENSE) or e.precision is None:
            continue
        module, H = get_module(model, e.name), hessians.get(e.name)
        weight = module.first.weight if e.form == FACTOR else module.weight
        if e.precision == native_precision(weight.dtype):
            continue
        if e.form == FACTOR:
            _store_factors(module, e.kind, e.precision, H if e.kind in VIEW_KINDS else None, weights)
        else:
            _store(module, e.precision, H if e.kind in DENSE_VIEW_KINDS else None, weights)
    return model


def stored_nbytes(model: nn.Module) -> int:
    """Bytes of every stored weight in ``model`` (as saved)."""
    return sum(m.stored_weight.nbytes for m in model.modules() if is_stored(m))


def release_precisions(model: nn.Module) -> nn.Module:
    """Undo :func:`apply_plan`'s stored forms in place: stored weights back to float Parameters, corrected layers to
    ``nn.Linear`` (the functions computed stay the same)."""
    for name, m in list(model.named_modules()):
        if isinstance(m, Corrected):
            set_module(model, name, m.to_dense())
    for m in model.modules():
        if is_stored(m):
            detach_stored(m)
    return model


def integer_kernels(model: nn.Module) -> nn.Module:
    """A copy of ``model`` whose int8-stored linear layers (dense, and the thin layers of factored ones) run on
    torch's integer kernels: ``torch.ao.nn.quantized.dynamic.Linear`` holding exactly the stored codes and
    per-row scales (symmetric, zero point 0). The activations are then rounded to 8 bits on the fly as well
    (dynamic quantization, per tensor), which adds drift of its own: measure the result on your inputs, apart
    from the stored model's drift. A runtime form: save and load the stored model, then convert.

    Layers stored in other precisions, convolutions and embeddings are left as they are. Returns ``model``
    unchanged (a copy) when torch has no integer linear kernel on this build.
    """
    import copy as _copy
    import warnings

    target = _copy.deepcopy(model)
    try:
        from torch.ao.nn.quantized.dynamic import Linear as IntegerLinear
    except ImportError:  # pragma: no cover - builds without the quantized engine
        return target
    swaps = {}
    for name, module in target.named_modules():
        if not (is_stored(module) and isinstance(module, nn.Linear) and module.stored_weight.precision == "int8"):
            continue
        child = module.stored_weight
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # torch marks its quantized tensor constructors deprecated
            codes = child.q.to("cpu")
            scale = child.scale.to("cpu", torch.float64)
            weight = torch._make_per_channel_quantized_tensor(codes, scale, torch.zeros_like(scale, dtype=torch.long),
                                                              0)
            layer = IntegerLinear(module.in_features, module.out_features, bias_=module.bias is not None,
                                  dtype=torch.qint8)
            layer.set_weight_bias(weight, None if module.bias is None else module.bias.detach().float())
        swaps[name] = layer
    for name, layer in swaps.items():
        set_module(target, name, layer)
    return target
