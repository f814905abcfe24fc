"""The registry of layer kinds: for each kind the walker recognises, how its factored form is laid out.

A kind's record answers every question that depends on the kind, so :mod:`factorize.rewrite.layers` (the
``Factored`` module, building, filling, merging) and :mod:`factorize.training.loop` (a factored layer at a lower
rank) dispatch through :func:`layer_kind` instead of comparing kind strings:

* :meth:`LayerKind.matrix`: the module's weight as its (m x n) matrix view (delegates to the walker's
  :func:`factorize.model.sites.matrix_of`, which owns the views);
* :meth:`LayerKind.thin_layers`: the two thin layers at rank r, ``first`` (A, r x n) then ``second`` (B, m x r,
  with the original bias), read from the geometry of a module of the kind (the original module, or a factored
  layer, which answers the same attributes);
* :meth:`LayerKind.factors` / :meth:`LayerKind.fill`: B and A read from / copied into the thin layers;
* :meth:`LayerKind.layout`: the product ``B @ A`` back in the original weight's layout;
* :meth:`LayerKind.derived`: the replaced module's attributes rebuilt from the thin layers (a layer built
  without ``original``);
* :meth:`LayerKind.stock_dense`: the stock torch layer of the kind holding a merged weight (same case).

The layouts (channel decomposition of convolutions: Zhang, Zou, He & Sun, "Accelerating very deep convolutional
networks for classification and detection", TPAMI 2016; the transposed convolution as a 1x1 conv then a
transposed conv, exact at full rank since a pointwise map commutes with the scatter) are described in
:mod:`factorize.rewrite.layers`. State-dict keys are ``first.weight``, ``second.weight``, ``second.bias`` for
every kind (docs/file-format.md).

Adding a kind: recognise it in :mod:`factorize.model.sites` (``_kind_of``, ``matrix_of``), then add one record
here (a subclass of :class:`LayerKind` overriding what differs, registered with :func:`register_kind`).
"""

from __future__ import annotations

from typing import Any

import torch
from torch import nn

from factorize.model.sites import CONV_KINDS, CONV_TRANSPOSE_KINDS, matrix_of

_REGISTRY: dict[str, LayerKind] = {}


class LayerKind:
    """How one kind of layer is factored. The base class is the linear layer (``Linear(n -> r)`` then
    ``Linear(r -> m)``); other kinds override what differs."""

    name: str = "linear"
    stock: type | None = nn.Linear  # the torch class a module must be exactly to be swapped (else: in place)
    always_swapped: bool = False  # swapped whatever its class (a transposed projection the walker probed)

    @property
    def dense_class(self) -> type:
        """The class a factored layer built without ``original`` merges back to."""
        return self.stock or nn.Linear

    def swaps(self, module: nn.Module) -> bool:
        """Whether a factored ``module`` of this kind is swapped for a ``Factored`` (else factored in place)."""
        return self.always_swapped or type(module) is self.stock

    def kernel(self, source: Any) -> tuple[int, ...]:
        """The kernel size of a module of this kind (the original or a factored layer); () for kinds without."""
        return ()

    def matrix(self, module: nn.Module) -> torch.Tensor:
        """The module's weight as its (m x n) matrix view."""
        return matrix_of(module, self.name)

    def thin_layers(self, source: Any, rank: int, m: int, n: int, bias: bool,
                    ref: torch.Tensor) -> tuple[nn.Module, nn.Module]:
        """``first`` (A) and ``second`` (B and the bias) at ``rank``, uninitialised. ``source`` gives the geometry
        (kernel, stride, ...: the original module or a factored layer of this kind); ``ref`` the device, dtype and
        ``requires_grad`` (a frozen weight, e.g. Whisper's sinusoidal positions, stays frozen)."""
        # built on the meta device and given empty storage: every caller fills them, so the stock layers' random
        # initialisation (most of the time of building a factored copy of a model, a sweep builds eight) is skipped
        first, second = self._pair(source, rank, m, n, bias, {"device": "meta", "dtype": ref.dtype})
        first, second = first.to_empty(device=ref.device), second.to_empty(device=ref.device)
        for p in (*first.parameters(), *second.parameters()):
            p.requires_grad_(ref.requires_grad)
        return first, second

    def _pair(self, source: Any, rank: int, m: int, n: int, bias: bool, like: dict) -> tuple[nn.Module, nn.Module]:
        return nn.Linear(n, rank, bias=False, **like), nn.Linear(rank, m, bias=bias, **like)

    def factors(self, first: nn.Module, second: nn.Module) -> tuple[torch.Tensor, torch.Tensor]:
        """(B (m x r), A (r x n)) as views of the thin layers' weights."""
        b, a = second.weight, first.weight
        return b.reshape(b.shape[0], -1), a.reshape(a.shape[0], -1)  # 1x1 conv (m, r, 1[,1]) -> (m, r)

    def fill(self, first: nn.Module, second: nn.Module, B: torch.Tensor, A: torch.Tensor) -> None:
        """Copy B (m x r) and A (r x n) into the thin layers (no grad; cast to their dtype)."""
        first.weight.copy_(A.reshape(first.weight.shape))  # (r, n) or (r, in, *k)
        second.weight.copy_(B.reshape(second.weight.shape))  # (m, r) or (m, r, 1[, 1[, 1]])

    def layout(self, W: torch.Tensor, first: nn.Module, second: nn.Module) -> torch.Tensor:
        """The product W = B @ A (m x n) in the original weight's layout."""
        return W

    def derived(self, first: nn.Module, second: nn.Module) -> dict:
        """Attributes of the replaced module rebuilt from the thin layers."""
        return {"in_features": first.in_features, "out_features": second.out_features}

    def stock_dense(self, first: nn.Module, second: nn.Module, W: torch.Tensor, like: dict) -> nn.Module:
        """The stock torch layer of this kind holding ``W`` (in the original weight's layout; no grad). The bias
        is left to the caller."""
        dense = self._stock_empty(first, second, W, like)
        dense.weight.copy_(W)
        return dense

    def _stock_empty(self, first: nn.Module, second: nn.Module, W: torch.Tensor, like: dict) -> nn.Module:
        return nn.Linear(W.shape[1], W.shape[0], bias=second.bias is not None, **like)


class _Transposed(LayerKind):
    """A projection storing its weight (in, out), e.g. GPT-2's ``Conv1D``; factored as linear layers."""

    name, stock, always_swapped = "transposed", None, True

    def layout(self, W, first, second):
        return W.t()  # stored (in, out)

    def derived(self, first, second):
        return {**super().derived(first, second), "nx": first.in_features, "nf": second.out_features}

    def stock_dense(self, first, second, W, like):
        return super().stock_dense(first, second, W.t(), like)  # an nn.Linear (out, in) computes the same function


class _Conv(LayerKind):
    """conv1d / 2d / 3d: a conv with the original kernel to r channels, then a 1x1(x1) conv to the outputs."""

    def __init__(self, name: str, cls: type) -> None:
        self.name, self.stock = name, cls

    def kernel(self, source):
        return tuple(source.kernel_size)

    def _pair(self, source, rank, m, n, bias, like):
        conv = self.stock
        first = conv(source.in_channels, rank, source.kernel_size, stride=source.stride, padding=source.padding,
                     dilation=source.dilation, bias=False, padding_mode=source.padding_mode, **like)
        return first, conv(rank, source.out_channels, 1, bias=bias, **like)

    def layout(self, W, first, second):
        return W.reshape(W.shape[0], *first.weight.shape[1:])  # (out, in, *kernel)

    def derived(self, first, second):
        return {"in_channels": first.in_channels, "out_channels": second.out_channels,
                "kernel_size": first.kernel_size, "stride": first.stride, "padding": first.padding,
                "dilation": first.dilation, "groups": 1, "padding_mode": first.padding_mode,
                "transposed": False, "output_padding": first.output_padding}

    def _stock_empty(self, first, second, W, like):
        f = first
        return self.stock(f.in_channels, W.shape[0], f.kernel_size, stride=f.stride, padding=f.padding,
                          dilation=f.dilation, bias=second.bias is not None, padding_mode=f.padding_mode, **like)


class _ConvTranspose(LayerKind):
    """conv_transpose1d / 2d: a 1x1 conv from the input channels to r channels (A), then a transposed conv from
    r channels with the original kernel, stride, padding, output_padding and dilation (B, stored (r, out, *k))."""

    def __init__(self, name: str, cls: type, pointwise: type) -> None:
        self.name, self.stock, self.pointwise = name, cls, pointwise

    def kernel(self, source):
        return tuple(source.kernel_size)

    def _pair(self, source, rank, m, n, bias, like):
        first = self.pointwise(source.in_channels, rank, 1, bias=False, **like)
        second = self.stock(rank, source.out_channels, source.kernel_size, stride=source.stride,
                            padding=source.padding, output_padding=source.output_padding, dilation=source.dilation,
                            bias=bias, **like)
        return first, second

    def factors(self, first, second):
        b, a = second.weight, first.weight
        return b.reshape(b.shape[0], -1).t(), a.reshape(a.shape[0], -1)  # (r, out, *k) -> (out * k, r)

    def fill(self, first, second, B, A):
        first.weight.copy_(A.reshape(first.weight.shape))
        second.weight.copy_(B.t().reshape(second.weight.shape))  # (out * k, r) -> (r, out, *kernel)

    def layout(self, W, first, second):
        return W.t().reshape(W.shape[1], *second.weight.shape[1:])  # (in, out, *kernel)

    def derived(self, first, second):
        s = second
        return {"in_channels": first.in_channels, "out_channels": s.out_channels, "kernel_size": s.kernel_size,
                "stride": s.stride, "padding": s.padding, "dilation": s.dilation, "groups": 1,
                "padding_mode": s.padding_mode, "transposed": True, "output_padding": s.output_padding}

    def _stock_empty(self, first, second, W, like):
        s = second
        return self.stock(first.in_channels, s.out_channels, s.kernel_size, stride=s.stride, padding=s.padding,
                          output_padding=s.output_padding, dilation=s.dilation, bias=s.bias is not None, **like)


class _Embedding(LayerKind):
    """embedding: ``Embedding(V, r)`` holding A^T, then ``Linear(r -> d, no bias)`` holding B."""

    name, stock = "embedding", nn.Embedding

    def _pair(self, source, rank, m, n, bias, like):
        first = nn.Embedding(source.num_embeddings, rank, padding_idx=source.padding_idx,
                             scale_grad_by_freq=source.scale_grad_by_freq, sparse=source.sparse, **like)
        return first, nn.Linear(rank, m, bias=False, **like)

    def factors(self, first, second):
        return second.weight, first.weight.t()  # table (V, r) -> (r, V)

    def fill(self, first, second, B, A):
        first.weight.copy_(A.t())  # (V, r); a zero padding row of W stays (numerically) zero in A^T
        second.weight.copy_(B)

    def layout(self, W, first, second):
        return W.t()  # (V, d)

    def derived(self, first, second):
        return {"num_embeddings": first.num_embeddings, "embedding_dim": second.out_features,
                "padding_idx": first.padding_idx, "max_norm": None, "norm_type": 2.0,
                "scale_grad_by_freq": first.scale_grad_by_freq, "sparse": first.sparse}

    def _stock_empty(self, first, second, W, like):
        f = first
        return nn.Embedding(f.num_embeddings, W.shape[1], padding_idx=f.padding_idx,
                            scale_grad_by_freq=f.scale_grad_by_freq, sparse=f.sparse, **like)


def register_kind(kind: LayerKind) -> LayerKind:
    """Add (or replace) the record of ``kind.name``; returns it."""
    _REGISTRY[kind.name] = kind
    return kind


def layer_kind(name: str) -> LayerKind:
    """The record of the kind called ``name``; ``ValueError`` for a kind no record describes."""
    try:
        return _REGISTRY[name]
    except KeyError:
        raise ValueError(f"unknown kind {name!r}") from None


def registered_kinds() -> tuple[str, ...]:
    """The names of every registered kind, in registration order."""
    return tuple(_REGISTRY)


def stock_classes() -> tuple[type, ...]:
    """The stock torch classes the kinds swap (for finding a subclass's stock base)."""
    return tuple(k.stock for k in _REGISTRY.values() if k.stock is not None)


register_kind(LayerKind())
for _name, _cls in zip(CONV_KINDS, (nn.Conv1d, nn.Conv2d, nn.Conv3d)):
    register_kind(_Conv(_name, _cls))
for _name, _cls, _pointwise in zip(CONV_TRANSPOSE_KINDS, (nn.ConvTranspose1d, nn.ConvTranspose2d),
                                   (nn.Conv1d, nn.Conv2d)):
    register_kind(_ConvTranspose(_name, _cls, _pointwise))
register_kind(_Embedding())
register_kind(_Transposed())
