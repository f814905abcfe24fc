"""Whitened factors at a planned rank from the tridiagonal reduction the values pass kept (values first, vectors
once: no second whitening, Gram matrix or eigensolve).

The values pass (:func:`factorize.calibrated.aware.whitened_values` with ``keep_reduction=True``) forms the whitened
weight Z = W L (L L^T = C + lam I), its smaller Gram matrix G, and reduces G to tridiagonal form T = Q^T G Q
(:mod:`factorize.spectra.tridiagonal`) to get every singular value. Once the plan has fixed the rank r, the kept
vectors follow from that reduction alone: the top r eigenvectors z of T (inverse iteration, or divide and conquer
for many), then Q z. For a wide Z (m <= n) these are the left singular vectors U_r of Z, which is all the
activation-aware optimum U_r U_r^T W needs (reduced-rank regression, Izenman 1975); for a tall Z they are the right
singular vectors V_r, and U_r = Z V_r S_r^-1 = W (L V_r) S_r^-1 needs L once more (an n x n Cholesky factor of the
narrow side, not Z itself).

The guard is the one :func:`factorize.spectra.decompose.leading` checks, computed on T: with orthonormal z, the
energy G keeps on Q z is z^T T z (Q is orthogonal), so the error of the kept rank is known without G; it must be
within 1% of the Eckart-Young optimum from the values (allowing for the rounding of the Gram route). When it is not
(or LAPACK reports a failure) the caller takes the full route (:func:`factorize.calibrated.aware.decompose_aware`).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import torch

from factorize.calibrated.aware import AwareSpectrum
from factorize.spectra.decompose import AUTO_TOLERANCE, compute_dtype_for
from factorize.spectra.signs import fix_signs
from factorize.spectra.tridiagonal import Reduction


def factors_from_reduction(W: torch.Tensor, red: Reduction, total: float, lam: float, rank: int, count: int,
                           sqrt_factor: Callable[[], torch.Tensor] | None = None, *, precision: str | None = None,
                           tolerance: float = AUTO_TOLERANCE) -> AwareSpectrum | None:
    """The whitened spectrum of ``W`` (m x n) at ``rank`` from the reduction of the smaller Gram matrix of W L.

    Args:
        W: the weight's matrix view (out x in), any float dtype; not modified.
        red: the reduction with its eigenvalues (``values``), of W L L^T W^T (m <= n) or L^T W^T W L (m > n).
        total: ||W L||_F^2, float64 (the values pass's ``total_energy``).
        lam: the absolute ridge of the whitening (the values pass's ``ridge``).
        rank: the planned rank, 1..min(m, n).
        count: calibration rows behind C (kept on the result).
        sqrt_factor: for a tall W only, gives L again (the same factor the values pass used).
        precision: as for :func:`~factorize.calibrated.aware.decompose_aware` (the dtype of the result).
        tolerance: the guard's allowed relative excess error (1%).

    Returns:
        An :class:`~factorize.calibrated.aware.AwareSpectrum` with ``rank`` vector pairs (as ``decompose_aware``
        would give them, up to rounding), or None when the guard fails or LAPACK reports a failure.
    """
    m, n = W.shape
    k = min(m, n)
    values = red.eigenvalues()
    if values is None or red.order != k or not 1 <= rank <= k or (m > n and sqrt_factor is None):
        return None
    energy = np.clip(values[::-1].astype(np.float64), 0.0, None)  # decreasing
    z = red.tridiagonal_vectors(rank)  # (k, r), eigenvectors of T
    captured = None if z is None else red.captured(z)
    if captured is None:
        return None
    slack = 2 * rank * float(np.finfo(red.d.dtype).eps) * float(energy[0])  # the Gram route's rounding
    if total - captured > (1 + tolerance) ** 2 * max(total - float(energy[:rank].sum()), 0.0) + slack:
        return None
    vecs = red.applied(z).to(torch.float64)  # (k, r): eigenvectors of G
    S = torch.from_numpy(np.sqrt(energy[:rank]))  # (r,) float64
    W64 = W.detach().to(torch.float64)
    if m <= n:  # left singular vectors of W L
        U = vecs
    else:  # right ones: U_r = W L V_r S_r^-1
        inv = torch.where(S[0] * 1e-12 < S, 1.0 / S, torch.zeros_like(S))
        U = (W64 @ (sqrt_factor() @ vecs)) * inv  # (m, r)
    U, _ = fix_signs(U.contiguous(), U.new_empty(rank, 0))  # the sign convention of every other route
    rows = U.T @ W64  # (r, n) = U_r^T W
    safe = torch.where(S > 0, S, torch.ones_like(S))
    Vh = torch.where((S > 0)[:, None], rows / safe[:, None], torch.zeros_like(rows))
    out = compute_dtype_for(W, precision)
    return AwareSpectrum(U.to(out), S.to(out), Vh.to(out), total_energy=float(total), method="whiten", exact=True,
                         energy=energy[:rank].copy(), ridge=float(lam), samples=int(count))
