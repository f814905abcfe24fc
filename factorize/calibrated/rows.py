"""What one row of a layer's input is, for each kind, so that rows match the site's matrix view (out x in).

* linear / transposed projection: the input flattened over every leading dimension (tokens, positions);
* conv_transpose1d / 2d: each input position's channel vector (the matrix view is applied per position);
* conv1d / conv2d / conv3d: the unfolded input patches (``torch.nn.functional.unfold`` with the layer's kernel,
  stride, padding and dilation), so rows have length in_channels * prod(kernel), the conv's matrix view;
* embedding: the token ids.

:func:`row_pieces` yields the same rows a few samples at a time for a conv, so a batch's unfolded patches (which
can be far larger than the batch) are never held whole.
"""

from __future__ import annotations

import math

import torch
import torch.nn.functional as F
from torch import nn

from factorize.model.sites import CONV_KINDS

CHUNK_BYTES = 64 * 2**20  # bytes of float64 rows (and of a conv's unfolded patches) handled at a time




def _conv_patches(module: nn.Module, x: torch.Tensor, kind: str) -> torch.Tensor:
    """Unfolded patches (rows, in * prod(kernel)) of a conv input, in the layout of ``weight.reshape(out, -1)``."""
    if kind == "conv1d":
        if x.dim() == 2:
            x = x.unsqueeze(0)  # unbatched (C, L)
        pad = module._reversed_padding_repeated_twice  # (left, right); also covers padding="same"
        if any(pad):
            x = F.pad(x, pad, mode="constant" if module.padding_mode == "zeros" else module.padding_mode)
        x4 = x.unsqueeze(2)  # (B, C, 1, L)
        cols = F.unfold(x4, (1, module.kernel_size[0]), dilation=(1, module.dilation[0]), stride=(1, module.stride[0]))
    elif kind == "conv3d":
        return _patches_3d(module, x)
    else:
        if x.dim() == 3:
            x = x.unsqueeze(0)  # unbatched (C, H, W)
        pad = module._reversed_padding_repeated_twice
        if any(pad):
            x = F.pad(x, pad, mode="constant" if module.padding_mode == "zeros" else module.padding_mode)
        cols = F.unfold(x, module.kernel_size, dilation=module.dilation, stride=module.stride)  # (B, C*kh*kw, L)
    return cols.transpose(1, 2).reshape(-1, cols.shape[1])  # (B*L, C*k)


def _patches_3d(module: nn.Module, x: torch.Tensor) -> torch.Tensor:
    """Conv3d patches (rows, in * kd * kh * kw) via ``Tensor.unfold`` per spatial axis (``F.unfold`` is 2-D only);
    a dilated window is unfolded whole, then every ``dilation``-th element kept."""
    if x.dim() == 4:
        x = x.unsqueeze(0)  # unbatched (C, D, H, W)
    pad = module._reversed_padding_repeated_twice
    if any(pad):
        x = F.pad(x, pad, mode="constant" if module.padding_mode == "zeros" else module.padding_mode)
    for axis, (k, s, d) in enumerate(zip(module.kernel_size, module.stride, module.dilation)):
        x = x.unfold(2 + axis, (k - 1) * d + 1, s)[..., ::d]  # (B, C, ..., windows, k) appended per axis
    b, _, od, oh, ow = x.shape[:5]
    return x.permute(0, 2, 3, 4, 1, 5, 6, 7).reshape(b * od * oh * ow, -1)  # (B*L, C*kd*kh*kw)


def input_rows(module: nn.Module, kind: str, x: torch.Tensor, mask: torch.Tensor | None = None) -> torch.Tensor:
    """One site's input as rows matching its matrix view (embedding: the flat token ids).

    ``mask`` (B, T) drops padded positions of linear / transposed / embedding inputs whose leading dimensions
    are (B, T); it is ignored where the shapes do not line up (convolutions, pooled inputs).
    """
    if kind in ("conv1d", "conv2d", "conv3d"):
        return _conv_patches(module, x, kind)
    if kind.startswith("conv_transpose"):  # the 1x1 first factor sees each position's channel vector
        batched = x.dim() == (3 if kind == "conv_transpose1d" else 4)
        return (x.movedim(1, -1) if batched else x.movedim(0, -1)).reshape(-1, x.shape[1 if batched else 0])
    lead = x.shape if kind == "embedding" else x.shape[:-1]
    if mask is not None and tuple(mask.shape) == tuple(lead):
        keep = mask.to(x.device).bool()
        return x[keep]  # (rows, n) or (rows,) ids
    return x.reshape(-1) if kind == "embedding" else x.reshape(-1, x.shape[-1])


def row_pieces(module: nn.Module, kind: str, x: torch.Tensor, mask: torch.Tensor | None):
    """The input rows of ``x``, a few samples at a time for a conv so its unfolded batch is never whole."""
    if kind not in CONV_KINDS or x.dim() != CONV_KINDS.index(kind) + 3:  # unbatched or not a conv: at once
        yield input_rows(module, kind, x, mask)
        return
    per_sample = x[0].numel() * math.prod(module.kernel_size) * 8  # bytes of one sample's patches, at most
    step = max(1, CHUNK_BYTES // max(per_sample, 1))
    for start in range(0, x.shape[0], step):
        yield input_rows(module, kind, x[start:start + step], mask)
