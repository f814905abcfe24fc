"""The sign convention of every singular-vector pair factorize produces, so factors are reproducible across routes."""

from __future__ import annotations

import torch


def fix_signs(U: torch.Tensor, Vh: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Make each left singular vector's largest-magnitude entry positive, so results are reproducible across
    methods and runs (the same convention as scikit-learn's ``svd_flip``).

    In place (the callers pass freshly computed factors) and without an ``abs()`` copy of U: the entry of largest
    magnitude is the column's maximum or its minimum, the first in order when both have the same magnitude --
    the same entry ``U.abs().argmax(0)`` finds. For a tall factor that saves two copies of U at the peak.
    """
    cols = torch.arange(U.shape[1], device=U.device)
    imax, imin = U.argmax(dim=0), U.argmin(dim=0)  # (k,)
    vmax, vmin = U[imax, cols], U[imin, cols]
    idx = torch.where(vmax > -vmin, imax, torch.where(-vmin > vmax, imin, torch.minimum(imax, imin)))
    signs = torch.sign(U[idx, cols])
    signs[signs == 0] = 1
    return U.mul_(signs), Vh.mul_(signs[:, None])
