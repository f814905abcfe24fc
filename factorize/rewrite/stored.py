"""Stored weights in stock layers: a layer keeps its class and forward, its weight is decoded from rounded tensors.

:func:`attach_stored` takes a module whose ``weight`` is a Parameter (``nn.Linear``, ``nn.Conv1d``/``2d``/``3d``,
``nn.Embedding``, the thin ``first`` / ``second`` layers of a factored layer, ...) and a
:class:`~factorize.rounding.formats.Rounded` of that weight flattened to a matrix,
``weight.reshape(weight.shape[0], -1)``: Linear (out, in), conv (out, in * prod(kernel)), embedding table
(vocab, dim) -- one int8 scale per output channel, or per token of an embedding. In place, it

* removes the Parameter and registers a child :class:`StoredWeight` named ``stored_weight``, holding the stored
  tensors as buffers; the state-dict keys become ``<module>.stored_weight.q`` and, for integer formats,
  ``<module>.stored_weight.scale`` (precision and shape are attributes, to be recorded beside the file, e.g. in a
  plan). The child cannot be named ``weight`` itself: torch.export reaches buffers by walking attribute names,
  and ``weight`` answers with the decoded tensor;
* gives the module a class of its own, a subclass of its class made once per class (as
  :func:`factorize.rewrite.layers.in_place_class` does for factored layers), whose ``weight`` is a property
  computing :func:`factorize.rounding.formats.dequantize_tensors` from the buffers, reshaped to the original
  layout, in the original dtype. The stock forward reads ``self.weight`` and so runs on exactly those values.

The decode is casts, floor, reshapes and one product, so the module runs on the CPU and traces through
torch.export (the stored tensors stay buffers of the program) and ONNX: ``torch.onnx.export(..., dynamo=True,
optimize=False)`` keeps the packed tensors as initializers and the decode in the graph; with the exporter's default
``optimize=True`` the decode is constant-folded and the file holds the decoded float weight (same outputs, float
bytes). The weight is not
trainable. :func:`detach_stored` undoes it, giving back a float Parameter holding the decoded weight.
"""

from __future__ import annotations

import math

import torch
from torch import nn

from factorize.errors import FactorizeError
from factorize.rounding.formats import Rounded, dequantize_tensors


class StoredWeight(nn.Module):
    """A weight in stored form: buffers ``q`` (and ``scale``), decoded to ``layout`` in ``dtype`` when called."""

    _factorize_stored = True  # read by factorize.model.count, which may not import this module (layering)

    def __init__(self, rounded: Rounded, layout: tuple[int, ...], dtype: torch.dtype) -> None:
        super().__init__()
        self.precision = rounded.precision
        self.shape = tuple(rounded.shape)  # (m, n) matrix view
        self.layout = tuple(layout)  # the weight's own shape, e.g. (out, in, kh, kw)
        self.dtype = dtype  # the decoded weight's dtype (the replaced Parameter's)
        self.register_buffer("q", rounded.data)
        self.register_buffer("scale", rounded.scale)  # None for float formats (no state-dict key)

    def forward(self) -> torch.Tensor:
        """The decoded weight, in the replaced Parameter's layout and dtype."""
        W = dequantize_tensors(self.precision, self.shape, self.q, self.scale, self.dtype)  # (m, n)
        return W.reshape(self.layout)

    def rounded(self) -> Rounded:
        """The stored form held (sharing the buffers)."""
        return Rounded(self.precision, self.shape, self.q, self.scale)

    @property
    def nbytes(self) -> int:
        return self.rounded().nbytes

    def extra_repr(self) -> str:
        return f"precision={self.precision}, shape={self.shape}"


# ---------------------------------------------------------------------------------------------------------------
# the stored class of a module class

_STORED: dict[type, type] = {}
_STORED_BASE: dict[type, type] = {}


CHILD = "stored_weight"  # the child holding the stored tensors (state-dict keys <module>.stored_weight.q / .scale)


def _stored_value(self, name: str) -> torch.Tensor:
    return self._modules[f"stored_{name}"]()


def _make_property(name: str) -> property:
    return property(lambda self: _stored_value(self, name),
                    doc=f"``{name}`` decoded from its stored form (not a Parameter; see factorize.rewrite.stored).")


def _new_stored(base: type) -> nn.Module:
    """Unpickling helper: an empty instance of the stored class of ``base``."""
    cls = stored_class(base)
    return cls.__new__(cls)


def _reduce_stored(self, protocol):
    rv = object.__reduce_ex__(self, max(protocol, 2))  # (copyreg.__newobj__, (cls,), state, ...)
    return (_new_stored, (_STORED_BASE[type(self)],), *rv[2:])


def stored_class(base: type) -> type:
    """The class of a ``base`` module with a stored weight: ``base``'s forward, ``weight`` decoded from the child
    ``stored_weight``. Made once per class; pickles and deep-copies through ``base``."""
    if base not in _STORED:
        ns = {"weight": _make_property("weight"), "__reduce_ex__": _reduce_stored, "__module__": base.__module__,
              "__doc__": f"{base.__name__} with a stored weight (see factorize.rewrite.stored)."}
        cls = type(f"Stored{base.__name__}", (base,), ns)
        _STORED[base], _STORED_BASE[cls] = cls, base
    return _STORED[base]


# ---------------------------------------------------------------------------------------------------------------
# attach, detach, query


def attach_stored(module: nn.Module, rounded: Rounded, *, attr: str = "weight") -> nn.Module:
    """Replace ``module``'s Parameter ``attr`` (only ``"weight"``) by ``rounded``, in place; returns ``module``.

    ``rounded.shape`` must be (weight.shape[0], prod(weight.shape[1:])). The buffers take the weight's device;
    the decoded weight its dtype. Everything is checked before ``module`` is touched.
    """
    if not isinstance(module, nn.Module):
        raise FactorizeError(f"expected a torch.nn.Module, got {type(module).__name__}")
    if not isinstance(rounded, Rounded):
        raise FactorizeError(f"expected a Rounded (factorize.rounding.round_matrix), got {type(rounded).__name__}")
    if attr != "weight":
        raise FactorizeError(f"only a module's 'weight' can be stored, got attr={attr!r}")
    if is_stored(module):
        raise FactorizeError(f"this {type(module).__name__} already holds a stored weight",
                             fix="call detach_stored first")
    w = module._parameters.get(attr)
    if not isinstance(w, torch.Tensor):
        raise FactorizeError(f"{type(module).__name__} has no Parameter {attr!r} to store",
                             fix="store the weights of stock layers (Linear, Conv, Embedding) or their thin layers")
    if w.dim() < 2:
        raise FactorizeError(f"{type(module).__name__}.{attr} is {tuple(w.shape)}; a stored weight needs >= 2 dims")
    view = (int(w.shape[0]), math.prod(w.shape[1:]))
    if tuple(rounded.shape) != view:
        raise FactorizeError(f"the stored form is {tuple(rounded.shape)}, {type(module).__name__}.{attr} is "
                             f"{tuple(w.shape)} (matrix view {view})",
                             fix="round weight.reshape(weight.shape[0], -1) of this module")
    moved = Rounded(rounded.precision, rounded.shape, rounded.data.to(w.device),
                    None if rounded.scale is None else rounded.scale.to(w.device))
    child = StoredWeight(moved, tuple(w.shape), w.dtype)
    module.__dict__["_factorize_stored_keys"] = tuple(module._parameters)  # key order, restored by detach_stored
    module.__dict__["_factorize_stored_grad"] = w.requires_grad
    del module._parameters[attr]
    module.__class__ = stored_class(type(module))
    module._modules[CHILD] = child
    return module


@torch.no_grad()
def detach_stored(module: nn.Module) -> nn.Module:
    """Give ``module`` back its class and a plain float Parameter ``weight`` equal to the decoded weight, in place;
    returns ``module``."""
    if not is_stored(module):
        raise FactorizeError(f"this {type(module).__name__} holds no stored weight")
    W = module.weight.detach().clone()
    del module._modules[CHILD]
    module.__class__ = _STORED_BASE[type(module)]
    order = module.__dict__.pop("_factorize_stored_keys", ("weight",))
    grad = module.__dict__.pop("_factorize_stored_grad", True)
    rest = dict(module._parameters)
    module._parameters.clear()
    for key in order:
        module._parameters[key] = nn.Parameter(W, requires_grad=grad) if key == "weight" else rest.pop(key, None)
    module._parameters.update(rest)
    return module


def is_stored(module: nn.Module) -> bool:
    """Whether ``module``'s weight is in stored form (made by :func:`attach_stored`)."""
    return type(module) in _STORED_BASE


def stored_weights(model: nn.Module) -> dict[str, StoredWeight]:
    """Every stored weight of ``model`` by the qualified name of the module holding it."""
    return {name: m._modules[CHILD] for name, m in model.named_modules() if is_stored(m)}


@torch.no_grad()
def cast_floating(model: nn.Module, dtype: torch.dtype) -> nn.Module:
    """Cast ``model``'s floating parameters and buffers to ``dtype`` in place, leaving every stored weight's tensors
    as stored (its codes, scales and half-precision data keep their layout) and decoding it to ``dtype`` instead;
    returns ``model``. What ``model.to(dtype)`` would do if it knew the stored forms."""
    for m in model.modules():
        if isinstance(m, StoredWeight):
            m.dtype = dtype
            continue
        for p in m._parameters.values():
            if p is not None and p.is_floating_point() and p.dtype != dtype:
                p.data = p.data.to(dtype)
        for name, b in m._buffers.items():
            if b is not None and b.is_floating_point() and b.dtype != dtype:
                m._buffers[name] = b.to(dtype)
    return model
