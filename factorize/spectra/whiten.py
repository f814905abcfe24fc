"""The whitening square root: L with L L^T = C + lam I for an input second moment C (Cholesky, or the symmetric
square root when Cholesky fails), and the whitened weight W L. Shared by the activation-aware fit
(:mod:`factorize.calibrated.aware`) and the rounding's weighted low-rank correction
(:mod:`factorize.rounding.correction`)."""

from __future__ import annotations

from collections.abc import Callable

import torch


def sqrt_factor(C: torch.Tensor, lam: float, again: Callable[[], torch.Tensor] | None = None) -> torch.Tensor:
    """L with L L^T = C + lam I (see :func:`triangular_sqrt_factor`, which also says whether L is triangular)."""
    return triangular_sqrt_factor(C, lam, again)[0]


def triangular_sqrt_factor(C: torch.Tensor, lam: float,
                           again: Callable[[], torch.Tensor] | None = None) -> tuple[torch.Tensor, bool]:
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
        return L, True
    if again is None:
        shifted.copy_(C)  # the failed factorisation overwrote the copy: shift again, then the eigen route
    else:
        del C, L, shifted
        shifted = again()  # it overwrote C itself
    shifted.diagonal().add_(lam)
    evals, evecs = torch.linalg.eigh(shifted)  # symmetric: C = V diag(e) V^T
    del shifted
    return evecs * evals.clamp_min(0).sqrt(), False  # V diag(sqrt(e)); (V e^1/2)(V e^1/2)^T = C


def whitened(W64: torch.Tensor, C: torch.Tensor | None, diag: torch.Tensor, lam: float,
             again: Callable[[], torch.Tensor] | None = None) -> torch.Tensor:
    """W L, L L^T = C + lam I (the diagonal's square root when only the diagonal of C is kept): (m, n). With
    ``again``, C's memory holds L afterwards (:func:`sqrt_factor`)."""
    if C is None:
        return W64 * (diag + lam).sqrt()
    L, lower = triangular_sqrt_factor(C, lam, again)
    return triangular_product(W64, L) if lower else W64 @ L


def triangular_product(W: torch.Tensor, L: torch.Tensor) -> torch.Tensor:
    """W L for a lower-triangular L: BLAS ``dtrmm`` (half the multiplications of a full product; measured one
    thread, float64: 2048 x 5632 by 5632 x 5632 in 1.9 s against 3.3 s) where scipy is installed, the tensors are
    float64 on the CPU and torch runs on one thread (scipy's BLAS is then held to one thread too); else ``W @ L``.
    The two differ only by rounding (about 1e-15 relative)."""
    from factorize.spectra import tridiagonal  # scipy and threadpoolctl are optional (the ``fast`` extra)

    if not (tridiagonal.available() and torch.get_num_threads() == 1 and W.device.type == L.device.type == "cpu"
            and W.dtype == L.dtype == torch.float64 and W.dim() == L.dim() == 2):
        return W @ L
    from scipy.linalg.blas import dtrmm

    with tridiagonal.blas_serial(1):  # Z^T = L^T W^T: Fortran views of the row-major tensors, no copies
        Zt = dtrmm(1.0, L.contiguous().numpy().T, W.contiguous().numpy().T, side=0, lower=0, trans_a=0)
    return torch.from_numpy(Zt.T)  # (m, n), row-major
