"""Factored modules: a dense layer rewritten as two thin layers, and back.

All of them are plain ``nn.Module`` subclasses built from stock torch layers, so they train with autograd, run
under ``torch.compile`` and ``torch.export``, and serialise with an ordinary ``state_dict``. The weight matrix
view W (m x n) of the original (see :mod:`factorize.walk`) is replaced by ``B @ A`` with B (m x r), A (r x n):

* linear / transposed projection: ``Linear(n -> r, no bias)`` then ``Linear(r -> m, original bias)``;
* conv1d / conv2d: a conv with the original kernel, stride, padding and dilation to r channels, then a 1x1 conv
  to the output channels with the original bias (channel decomposition: Zhang, Zou, He & Sun, "Accelerating very
  deep convolutional networks for classification and detection", TPAMI 2016);
* embedding: ``Embedding(V, r)`` holding ``A^T`` then ``Linear(r -> d, no bias)`` holding ``B``.
"""

from __future__ import annotations

import torch
from torch import nn

from factorize.model.sites import matrix_of


class Factored(nn.Module):
    """Base of every factored layer: ``first`` maps the input to r channels, ``second`` maps them out."""

    kind: str = ""

    def __init__(self, first: nn.Module, second: nn.Module, kind: str) -> None:
        super().__init__()
        self.first = first
        self.second = second
        self.kind = kind

    @property
    def rank(self) -> int:
        return int(self.factor_a().shape[0])

    def factor_b(self) -> torch.Tensor:
        """B (m x r)."""
        return self.second.weight.reshape(self.second.weight.shape[0], -1)  # 1x1 conv: (m, r, 1[,1]) -> (m, r)

    def factor_a(self) -> torch.Tensor:
        """A (r x n)."""
        if self.kind == "embedding":
            return self.first.weight.t()  # table (V, r) -> (r, V)
        return self.first.weight.reshape(self.first.weight.shape[0], -1)  # (r, n)

    def product(self) -> torch.Tensor:
        """``B @ A``: the dense matrix view this layer computes (m x n)."""
        return self.factor_b() @ self.factor_a()

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.second(self.first(x))

    def extra_repr(self) -> str:
        return f"kind={self.kind}, rank={self.rank}"


def _empty_like_linear(n_in: int, n_out: int, bias: bool, ref: torch.Tensor) -> nn.Linear:
    return nn.Linear(n_in, n_out, bias=bias, device=ref.device, dtype=ref.dtype)


def build_factored(module: nn.Module, kind: str, rank: int) -> Factored:
    """An uninitialised factored layer with the structure of ``module`` at ``rank`` (weights to be filled)."""
    w = module.weight
    m, n = matrix_of(module, kind).shape
    bias = getattr(module, "bias", None)
    has_bias = isinstance(bias, torch.Tensor)
    if kind in ("linear", "transposed"):
        first = _empty_like_linear(n, rank, False, w)
        second = _empty_like_linear(rank, m, has_bias, w)
    elif kind in ("conv1d", "conv2d"):
        conv = nn.Conv1d if kind == "conv1d" else nn.Conv2d
        first = conv(
            module.in_channels, rank, module.kernel_size, stride=module.stride, padding=module.padding,
            dilation=module.dilation, bias=False, padding_mode=module.padding_mode, device=w.device, dtype=w.dtype,
        )
        second = conv(rank, module.out_channels, 1, bias=has_bias, device=w.device, dtype=w.dtype)
    elif kind == "embedding":
        first = nn.Embedding(
            module.num_embeddings, rank, padding_idx=module.padding_idx, scale_grad_by_freq=module.scale_grad_by_freq,
            sparse=module.sparse, device=w.device, dtype=w.dtype,
        )
        second = _empty_like_linear(rank, m, False, w)
    else:
        raise ValueError(f"unknown kind {kind!r}")
    return Factored(first, second, kind)


@torch.no_grad()
def fill_factors(layer: Factored, B: torch.Tensor, A: torch.Tensor, bias: torch.Tensor | None) -> None:
    """Copy B (m x r), A (r x n) and the bias into ``layer``, casting to its dtype."""
    first, second = layer.first, layer.second
    if layer.kind == "embedding":
        first.weight.copy_(A.t())  # (V, r); a zero padding row of W stays (numerically) zero in A^T
    else:
        first.weight.copy_(A.reshape(first.weight.shape))  # (r, n) or (r, in, *k)
    second.weight.copy_(B.reshape(second.weight.shape))  # (m, r) or (m, r, 1[, 1])
    if bias is not None:
        second.bias.copy_(bias)


def factor_module(module: nn.Module, kind: str, B: torch.Tensor, A: torch.Tensor) -> Factored:
    """A factored replacement for ``module`` computing ``B @ A`` in place of its weight matrix view."""
    layer = build_factored(module, kind, int(A.shape[0]))
    bias = getattr(module, "bias", None)
    fill_factors(layer, B, A, bias if isinstance(bias, torch.Tensor) else None)
    layer.train(module.training)
    return layer


@torch.no_grad()
def to_dense(layer: Factored) -> nn.Module:
    """Merge a factored layer back into one dense torch layer computing ``B @ A`` (a transposed projection comes
    back as ``nn.Linear``, which computes the same function)."""
    W = layer.product()  # (m, n)
    m, n = W.shape
    bias = layer.second.bias
    ref = layer.second.weight
    if layer.kind in ("linear", "transposed"):
        dense = nn.Linear(n, m, bias=bias is not None, device=ref.device, dtype=ref.dtype)
        dense.weight.copy_(W)
    elif layer.kind in ("conv1d", "conv2d"):
        f = layer.first
        conv = nn.Conv1d if layer.kind == "conv1d" else nn.Conv2d
        dense = conv(
            f.in_channels, m, f.kernel_size, stride=f.stride, padding=f.padding, dilation=f.dilation,
            bias=bias is not None, padding_mode=f.padding_mode, device=ref.device, dtype=ref.dtype,
        )
        dense.weight.copy_(W.reshape(dense.weight.shape))
    else:  # embedding
        f = layer.first
        dense = nn.Embedding(
            f.num_embeddings, m, padding_idx=f.padding_idx, scale_grad_by_freq=f.scale_grad_by_freq,
            sparse=f.sparse, device=ref.device, dtype=ref.dtype,
        )
        dense.weight.copy_(W.t())
    if bias is not None:
        dense.bias.copy_(bias)
    dense.train(layer.training)
    return dense


def is_factored(module: nn.Module) -> bool:
    """Whether ``module`` is a factored layer made by factorize."""
    return isinstance(module, Factored)


def factored_layers(model: nn.Module) -> dict[str, Factored]:
    """Every factored layer of ``model`` by qualified name."""
    return {name: m for name, m in model.named_modules() if isinstance(m, Factored)}
