"""The relative error of factors as stored: how far B A is from the weight W it replaces.

||W - BA||_F / ||W||_F, measured on the factors in their stored dtype (not predicted from the spectrum), one row
block at a time in float64 accumulation so the extra memory stays a block, not a second copy of W.
"""

from __future__ import annotations

import math

import torch

ERROR_BLOCK_ROWS = 1024  # rows per block when measuring ||W - BA||_F, bounding the extra memory


@torch.no_grad()
def relative_error(W: torch.Tensor, B: torch.Tensor, A: torch.Tensor) -> float:
    """||W - BA||_F / ||W||_F of the factors as stored (W (m, n), B (m, r), A (r, n)), in float64 accumulation,
    one row block at a time; 0 for an all-zero W."""
    num = den = 0.0
    Af = A.float()
    for i in range(0, W.shape[0], ERROR_BLOCK_ROWS):
        w = W[i : i + ERROR_BLOCK_ROWS].float()  # (b, n)
        d = w - B[i : i + ERROR_BLOCK_ROWS].float() @ Af
        num += float(d.double().pow(2).sum())
        den += float(w.double().pow(2).sum())
    return math.sqrt(num / den) if den > 0 else 0.0
