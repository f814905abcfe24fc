"""The whitening square root: L with L L^T = C + lam I for an input second moment C (Cholesky, or the symmetric
square root when Cholesky fails), and the whitened weight W L. Shared by the activation-aware fit
(:mod:`factorize.calibrated.aware`) and the rounding's weighted low-rank correction
(:mod:`factorize.rounding.correction`)."""

from __future__ import annotations

from collections.abc import Callable

import torch


def sqrt_factor(C: torch.Tensor, lam: float, again: Callable[[], torch.Tensor] | None = None) -> torch.Tensor:
    """L with L L^T = C + lam I: Cholesky, or the symmetric square root when Cholesky fails (Golub & Van Loan
    sec. 4.2 and 8.1).

    Memory: one n x n copy besides C. The shift is added to the copy's diagonal in place and the Cholesky factor
    overwrites that copy (LAPACK's potrf works in place; ``out=`` aliasing the input is what torch passes to it),
    so a 5632-wide input moment in float64 costs 254 MB here instead of three times that. With ``again`` (a
    function giving C anew: it was read from a file, or is a private copy) C itself becomes the factor, no copy at
    all, and a failed Cholesky (which destroys its input) takes C from ``again`` for the eigen route.
    """
    shifted = C if again is not None else C.clone()
    shifted.diagonal().add_(lam)  # C + lam I without an identity and a lam * I temporary
    info = torch.empty((), dtype=torch.int32, device=C.device)
    L, info = torch.linalg.cholesky_ex(shifted, out=(shifted, info))  # in place: L is shifted's storage
    if int(info) == 0:
        return L
    if again is None:
        shifted.copy_(C)  # the failed factorisation overwrote the copy: shift again, then the eigen route
    else:
        del C, L, shifted
        shifted = again()  # it overwrote C itself
    shifted.diagonal().add_(lam)
    evals, evecs = torch.linalg.eigh(shifted)  # symmetric: C = V diag(e) V^T
    del shifted
    return evecs * evals.clamp_min(0).sqrt()  # V diag(sqrt(e)); (V e^1/2)(V e^1/2)^T = C


def whitened(W64: torch.Tensor, C: torch.Tensor | None, diag: torch.Tensor, lam: float,
             again: Callable[[], torch.Tensor] | None = None) -> torch.Tensor:
    """W L, L L^T = C + lam I (the diagonal's square root when only the diagonal of C is kept): (m, n). With
    ``again``, C's memory holds L afterwards (:func:`sqrt_factor`)."""
    return W64 * (diag + lam).sqrt() if C is None else W64 @ sqrt_factor(C, lam, again)
