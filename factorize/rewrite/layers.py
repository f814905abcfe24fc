"""Factored modules: a dense layer rewritten as two thin layers, and back.

The weight matrix view W (m x n) of the original (see :mod:`factorize.model.sites`) is replaced by ``B @ A``
with B (m x r), A (r x n), held by two stock torch layers, ``first`` (A) and ``second`` (B and the original bias):

* linear / transposed projection: ``Linear(n -> r, no bias)`` then ``Linear(r -> m, original bias)``;
* conv1d / conv2d / conv3d: a conv with the original kernel, stride, padding and dilation to r channels, then a
  1x1(x1) conv to the output channels with the original bias (channel decomposition: Zhang, Zou, He & Sun,
  "Accelerating very deep convolutional networks for classification and detection", TPAMI 2016);
* conv_transpose1d / 2d (matrix view: the (out * prod(kernel)) x in matrix applied to each input position's
  channel vector, see :mod:`factorize.model.sites`): a 1x1 conv from the input channels to r channels (A), then a
  transposed conv from r channels with the original kernel, stride, padding, output_padding and dilation and the
  original bias (B, stored (r, out, *kernel)). A pointwise map commutes with the scatter of the transposed conv,
  so at full rank the pair computes the original layer exactly;
* embedding: ``Embedding(V, r)`` holding ``A^T`` then ``Linear(r -> d, no bias)`` holding ``B``.

The state-dict keys are always ``<name>.first.weight``, ``<name>.second.weight`` and ``<name>.second.bias``
(docs/file-format.md).

Everything that depends on the kind (the thin layers, reading and filling the factors, the weight layout, the
attributes of a layer built without ``original``, the merge) is one record per kind in
:mod:`factorize.rewrite.kinds`; this module dispatches through :func:`~factorize.rewrite.kinds.layer_kind`.

**Drop-in.** Parents of a layer read more than its output: T5 reads ``wo.weight.dtype``, ViT and CLIP read
``projection.weight.dtype``, ``nn.MultiheadAttention`` passes ``out_proj.weight`` to a functional kernel,
MobileNetV2 reads ``conv.stride``, Whisper reads ``embed_positions.weight``. So a factored layer answers:

* ``weight``: a **computed** tensor, the product ``B @ A`` in the original weight's layout (Linear (out, in),
  conv (out, in, *k), embedding (V, d), transposed projection (in, out)) and the factors' dtype and device. It is
  not a Parameter: reading it costs one matrix product, writing to it is refused, and it does not appear in
  ``parameters()`` or ``state_dict()``;
* ``bias``: the bias Parameter (held by ``second``);
* every plain attribute of the module it replaced (``stride``, ``padding``, ``in_features``, ``nf``, ...), read
  from a weight-less copy of that module kept beside the factors (not a child module, so no state-dict keys).

Two forms, chosen by :func:`build_factored`:

* **swapped** (the class is exactly ``nn.Linear``, ``nn.Conv1d``/``2d``/``3d``, ``nn.ConvTranspose1d``/``2d``,
  ``nn.Embedding``, or a transposed
  projection whose forward the walker probed): a :class:`Factored` module replaces it and runs the two thin
  layers, which is where the savings in time come from;
* **in place** (a subclass, e.g. Whisper's positional embedding called with an extra keyword, or
  ``nn.MultiheadAttention``'s ``NonDynamicallyQuantizableLinear``): the module keeps its own class and forward
  (the class becomes a subclass of both it and :class:`Factored`), its weight becomes computed from the two
  factors. It saves parameters; its forward still runs the dense op on the computed weight unless the subclass
  kept the stock forward, in which case the two thin layers run.

:func:`to_dense` (and :func:`factorize.rewrite.apply.merge`) restores the original class and layout: GPT-2's
``Conv1D`` comes back as ``Conv1D`` with its (in, out) weight, a subclass comes back as itself.
"""

from __future__ import annotations

import copy

import torch
from torch import nn

from factorize.rewrite.kinds import layer_kind, stock_classes

_DENSE_KEYS = ("weight", "bias")


class Factored(nn.Module):
    """Base of every factored layer: ``first`` maps the input to r channels, ``second`` maps them out.

    ``original`` is a weight-less copy of the module replaced (used for attribute reads and by :func:`to_dense`);
    it is optional, e.g. for a layer built from bare factors.
    """

    kind: str = ""
    _factorize_factored = True  # read by the walker, which may not import this module (layering)

    def __init__(self, first: nn.Module, second: nn.Module, kind: str, original: nn.Module | None = None) -> None:
        super().__init__()
        self.first = first
        self.second = second
        self.kind = kind
        self.__dict__["_original"] = original  # bypass nn.Module.__setattr__: not a child, no state-dict keys

    @property
    def rank(self) -> int:
        return int(self.factor_a().shape[0])

    def factor_b(self) -> torch.Tensor:
        """B (m x r)."""
        return layer_kind(self.kind).factors(self.first, self.second)[0]

    def factor_a(self) -> torch.Tensor:
        """A (r x n)."""
        return layer_kind(self.kind).factors(self.first, self.second)[1]

    def product(self) -> torch.Tensor:
        """``B @ A``: the dense matrix view this layer computes (m x n)."""
        return self.factor_b() @ self.factor_a()

    @property
    def weight(self) -> torch.Tensor:
        """The dense weight this layer computes, in the replaced module's layout. Computed on every read (one
        matrix product; gradients flow to the factors); not a Parameter and not stored."""
        return layer_kind(self.kind).layout(self.product(), self.first, self.second)

    @property
    def bias(self) -> torch.Tensor | None:
        """The original bias (a Parameter held by ``second``), or None."""
        return self.second.bias

    @property
    def original_class(self) -> type:
        """The class of the module this layer replaced (what :func:`to_dense` gives back)."""
        if type(self) is not Factored:
            return _IN_PLACE_BASE[type(self)]
        original = self.__dict__.get("_original")
        return type(original) if original is not None else layer_kind(self.kind).dense_class

    def forward(self, input: torch.Tensor, *args, **kwargs) -> torch.Tensor:  # noqa: A002 - stock argument name
        """The two thin layers; extra arguments (a transposed conv's ``output_size``) go to ``second``."""
        return self.second(self.first(input), *args, **kwargs)

    def __getattr__(self, name: str):
        try:
            return super().__getattr__(name)
        except AttributeError:
            pass
        original = self.__dict__.get("_original")
        if original is not None and not name.startswith("_") and name in original.__dict__:
            return original.__dict__[name]
        derived = _derived_attributes(self)
        if name in derived:
            return derived[name]
        raise AttributeError(f"'{type(self).__name__}' object has no attribute '{name}'")

    def extra_repr(self) -> str:
        return f"kind={self.kind}, rank={self.rank}"


def _derived_attributes(layer: Factored) -> dict:
    """Attributes of the replaced module rebuilt from the factors, for a layer built without ``original``."""
    modules = layer.__dict__.get("_modules", {})
    first, second = modules.get("first"), modules.get("second")
    if first is None or second is None:
        return {}
    return layer_kind(layer.kind).derived(first, second)


# ---------------------------------------------------------------------------------------------------------------
# in-place form: the module keeps its class (a subclass of it and of Factored is made once per class)

_IN_PLACE: dict[type, type] = {}
_IN_PLACE_BASE: dict[type, type] = {}


def _stock_base(cls: type) -> type | None:
    for base in stock_classes():
        if issubclass(cls, base):
            return base
    return None


def _keeps_stock_forward(cls: type) -> bool:
    """Whether ``cls`` computes exactly its stock base's function (so the two thin layers may run instead)."""
    base = _stock_base(cls)
    if base is None or cls.forward is not base.forward:
        return False
    return getattr(cls, "_conv_forward", None) is getattr(base, "_conv_forward", None)


def _new_in_place(base: type) -> nn.Module:
    """Unpickling helper: an empty instance of the in-place factored class of ``base``."""
    cls = in_place_class(base)
    return cls.__new__(cls)


def _reduce_in_place(self, protocol):
    rv = object.__reduce_ex__(self, max(protocol, 2))  # (copyreg.__newobj__, (cls,), state, ...)
    return (_new_in_place, (_IN_PLACE_BASE[type(self)],), *rv[2:])


def _in_place_repr(self) -> str:
    return f"{_IN_PLACE_BASE[type(self)].extra_repr(self)}, factored kind={self.kind}, rank={self.rank}"


def in_place_class(base: type) -> type:
    """The class of an in-place factored ``base`` module: ``base``'s forward and methods, with ``weight`` and
    ``bias`` computed from the factors. Made once per class; pickles as ``base`` (reduced through it)."""
    if base not in _IN_PLACE:
        ns = {"weight": Factored.weight, "bias": Factored.bias, "__reduce_ex__": _reduce_in_place,
              "extra_repr": _in_place_repr, "__module__": base.__module__,
              "__doc__": f"{base.__name__} with its weight factored in place (see factorize.rewrite.layers)."}
        if _keeps_stock_forward(base):
            ns["forward"] = Factored.forward
        cls = type(f"Factored{base.__name__}", (base, Factored), ns)
        _IN_PLACE[base], _IN_PLACE_BASE[cls] = cls, base
    return _IN_PLACE[base]


def _fresh_copy(module: nn.Module) -> nn.Module:
    """A shallow copy of ``module`` that shares tensors but none of its registries (parameters, children, hooks)."""
    new = copy.copy(module)
    for key, value in list(new.__dict__.items()):
        if isinstance(value, dict):
            new.__dict__[key] = copy.copy(value)
    return new


def _shell(module: nn.Module) -> nn.Module:
    """A weight-less copy of ``module``: its attributes and class, without weight and bias tensors."""
    shell = _fresh_copy(module)
    for key in _DENSE_KEYS:
        if key in shell._parameters:
            shell._parameters[key] = None
    return shell


def swaps(module: nn.Module, kind: str) -> bool:
    """Whether a factored ``module`` is swapped for a :class:`Factored` (else it is factored in place)."""
    return layer_kind(kind).swaps(module)


# ---------------------------------------------------------------------------------------------------------------
# building, filling, merging


def _thin_layers(module: nn.Module, kind: str, rank: int) -> tuple[nn.Module, nn.Module]:
    record = layer_kind(kind)
    m, n = record.matrix(module).shape
    return record.thin_layers(module, rank, m, n, isinstance(getattr(module, "bias", None), torch.Tensor),
                              module.weight)


def build_factored(module: nn.Module, kind: str, rank: int) -> Factored:
    """An uninitialised factored layer with the structure of ``module`` at ``rank`` (weights to be filled).

    ``module`` is not modified: the result is a new object, swapped (a :class:`Factored`) or in place (a copy of
    ``module`` of its in-place factored class, sharing its other parameters and children); the caller puts it
    where ``module`` was.
    """
    first, second = _thin_layers(module, kind, rank)
    if swaps(module, kind):
        return Factored(first, second, kind, original=_shell(module))
    layer = _fresh_copy(module)
    layer.__dict__["_factorize_dense_keys"] = tuple(layer._parameters)  # key order, restored by to_dense
    for key in _DENSE_KEYS:
        layer._parameters.pop(key, None)
    layer.__class__ = in_place_class(type(module))
    layer.first, layer.second, layer.kind = first, second, kind
    return layer


def with_factors(layer: Factored, first: nn.Module, second: nn.Module) -> Factored:
    """A copy of ``layer`` (same form, class and remembered original) holding new ``first`` and ``second`` layers,
    e.g. at another rank. ``layer`` itself is not modified."""
    new = _fresh_copy(layer)
    new._modules["first"], new._modules["second"] = first, second
    return new


def at_rank(layer: Factored, B: torch.Tensor, A: torch.Tensor) -> Factored:
    """A copy of ``layer`` (same form, class and remembered original) at rank ``A.shape[0]``, holding B (m x r')
    and A (r' x n) and ``layer``'s bias; its thin layers have ``layer``'s geometry, dtype, device and
    ``requires_grad``. ``layer`` itself is not modified."""
    second = layer.second
    first_new, second_new = layer_kind(layer.kind).thin_layers(
        layer, int(A.shape[0]), int(B.shape[0]), int(A.shape[1]), second.bias is not None, second.weight)
    new = with_factors(layer, first_new, second_new)
    fill_factors(new, B, A, second.bias)
    new.train(layer.training)
    return new


@torch.no_grad()
def fill_factors(layer: Factored, B: torch.Tensor, A: torch.Tensor, bias: torch.Tensor | None) -> None:
    """Copy B (m x r), A (r x n) and the bias into ``layer``, casting to its dtype."""
    layer_kind(layer.kind).fill(layer.first, layer.second, B, A)
    if bias is not None:
        layer.second.bias.copy_(bias)


def factor_module(module: nn.Module, kind: str, B: torch.Tensor, A: torch.Tensor) -> Factored:
    """A factored replacement for ``module`` computing ``B @ A`` in place of its weight matrix view."""
    layer = build_factored(module, kind, int(A.shape[0]))
    bias = getattr(module, "bias", None)
    fill_factors(layer, B, A, bias if isinstance(bias, torch.Tensor) else None)
    layer.train(module.training)
    return layer


def _parameter(value: torch.Tensor | None, like: torch.Tensor) -> nn.Parameter | None:
    if value is None:
        return None
    return nn.Parameter(value.detach().clone(), requires_grad=like.requires_grad)


@torch.no_grad()
def to_dense(layer: Factored) -> nn.Module:
    """Merge a factored layer back into one dense module computing ``B @ A``, of the class and weight layout of the
    module it replaced (GPT-2's ``Conv1D`` stays ``Conv1D`` with its (in, out) weight; a subclass stays itself).
    A :class:`Factored` built without ``original`` comes back as the stock torch layer of its kind (a transposed
    projection as ``nn.Linear``, which computes the same function). ``layer`` is not modified."""
    W, bias, ref = layer.weight.detach(), layer.second.bias, layer.second.weight
    if type(layer) is not Factored:  # in place: give the module its own class back
        dense = _fresh_copy(layer)
        del dense._modules["first"], dense._modules["second"]
        dense.__dict__.pop("kind", None)
        order = dense.__dict__.pop("_factorize_dense_keys", _DENSE_KEYS)
        dense.__class__ = _IN_PLACE_BASE[type(layer)]
        fresh = {"weight": _parameter(W, ref), "bias": _parameter(bias, ref)}
        rest = dict(dense._parameters)
        dense._parameters.clear()
        for key in order:
            dense._parameters[key] = fresh[key] if key in fresh else rest.pop(key, None)
        dense._parameters.update(rest)
        dense.train(layer.training)
        return dense
    original = layer.__dict__.get("_original")
    if original is not None:
        dense = copy.deepcopy(original)
        dense._parameters["weight"] = _parameter(W, ref)
        if "bias" in dense._parameters or bias is not None:
            dense._parameters["bias"] = _parameter(bias, ref)
    else:
        dense = _stock_dense(layer, W, ref)
    dense.train(layer.training)
    return dense


def _stock_dense(layer: Factored, W: torch.Tensor, ref: torch.Tensor) -> nn.Module:
    bias = layer.second.bias
    like = {"device": ref.device, "dtype": ref.dtype}
    dense = layer_kind(layer.kind).stock_dense(layer.first, layer.second, W, like)
    if bias is not None:
        dense.bias.copy_(bias)
    return dense


def is_factored(module: nn.Module) -> bool:
    """Whether ``module`` is a factored layer made by factorize (swapped or in place)."""
    return isinstance(module, Factored)


def factored_layers(model: nn.Module) -> dict[str, Factored]:
    """Every factored layer of ``model`` by qualified name."""
    return {name: m for name, m in model.named_modules() if isinstance(m, Factored)}
