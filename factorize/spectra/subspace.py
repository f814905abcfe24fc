"""Chebyshev-filtered subspace iteration for the leading eigenvectors of a Gram matrix whose eigenvalues are all
known: the route of :func:`factorize.spectra.decompose.leading` when the tridiagonal reduction
(:mod:`factorize.spectra.tridiagonal`) is not available or not asked for."""

from __future__ import annotations

import numpy as np
import torch

from factorize.spectra.tridiagonal import SERIAL_UP_TO
from factorize.threads import torch_threads

LEADING_AMPLIFICATION = 8.0  # leading(): the filter degree is the smallest that amplifies s_r^2 this much ...
LEADING_MAX_DEGREE = 6  # ... at most this degree ...
LEADING_SPREAD = 0.1  # ... and amplifying s_1^2 over s_r^2 by at most this / eps (float32: 8.4e5)


def _chebyshev_plan(lam: np.ndarray, rank: int, block: int, dtype: torch.dtype) -> tuple[int, float, float, float]:
    """Degree and interval of the Chebyshev filter for the top ``rank`` of eigenvalues ``lam`` (descending),
    iterating a block of ``block`` columns: ``(degree, c, e, x_r)``.

    The filter is T_d((G - c I) / e), with [c - e, c + e] = [lambda_min, lambda_{l+1}] the eigenvalues the block
    cannot hold, which it keeps within [-1, 1], while it multiplies the wanted lambda_i >= lambda_r by
    T_d(x_i) >= T_d(x_r), x_i = (lambda_i - c) / e > 1, which grows like (x + sqrt(x^2 - 1))^d (Saad, Numerical
    Methods for Large Eigenvalue Problems, 2nd ed., 2011, sec. 7.4; Zhou & Saad, "Chebyshev-filtered subspace
    iteration", 2007). All eigenvalues are known, so the interval is exact. The degree is the smallest reaching
    ``LEADING_AMPLIFICATION`` at lambda_r, capped by ``LEADING_MAX_DEGREE`` and by the spread
    T_d(x_1) / T_d(x_r): the rounding of the filtered block is about eps * spread relative to its lambda_r
    directions, so the spread stays below ``LEADING_SPREAD / eps``.
    """
    top, low = float(lam[0]), float(lam[-1])
    wall = float(lam[block]) if block < len(lam) else low
    e = max((wall - low) / 2, top * float(torch.finfo(dtype).eps))
    c = wall - e
    x_r, x_1 = (float(lam[rank - 1]) - c) / e, (top - c) / e
    if x_r <= 1.0:  # no gap between lambda_r and the unwanted part: a plain shifted power step
        return 1, c, e, max(x_r, 1.0)
    limit = LEADING_SPREAD / float(torch.finfo(dtype).eps)
    degree = 1
    while degree < LEADING_MAX_DEGREE and np.cosh(degree * np.arccosh(x_r)) < LEADING_AMPLIFICATION:
        spread = np.cosh((degree + 1) * np.arccosh(x_1)) / np.cosh((degree + 1) * np.arccosh(x_r))
        if not spread <= limit:
            break
        degree += 1
    return degree, c, e, x_r


def _chebyshev_filter(gram: torch.Tensor, X: torch.Tensor, GX: torch.Tensor | None, degree: int, c: float,
                      e: float, x_r: float) -> torch.Tensor:
    """T_d((G - cI)/e) X / T_d(x_r) by the three-term recurrence T_{j+1} = 2 x T_j - T_{j-1}, scaled by
    T_j(x_r) at every step so that the lambda_r components keep unit scale (Zhou & Saad 2007, Alg. 3.2, scaled at
    the wanted end). ``GX`` = G X when already known (saves the first product). d products G @ Y."""
    t_prev, t = 1.0, x_r  # T_0(x_r), T_1(x_r)
    Y_prev, Y = X, ((gram @ X if GX is None else GX) - c * X) * (1.0 / (e * t))  # T_1 X / T_1(x_r)
    for _ in range(1, degree):
        t_next = 2 * x_r * t - t_prev
        Y_next = torch.addmm(Y, gram, Y, beta=-c, alpha=1.0).mul_(2 * t / (e * t_next))
        Y_next.sub_(Y_prev, alpha=t_prev / t_next)
        Y_prev, Y, t_prev, t = Y, Y_next, t, t_next
    return Y
def filtered_subspace(gram: torch.Tensor, energies: np.ndarray, total: float, guard: list[int],
                      allowed: np.ndarray, rank: int, block: int, max_iters: int,
                      seed: int) -> tuple[torch.Tensor | None, str]:
    """The top rank eigenvectors of gram (k x rank, decreasing) by filtered subspace iteration on a block of
    block columns, once the energy they leave out at every rank in guard is within allowed (computed
    from the Ritz values: total minus their partial sums), and the route taken; (None, "") after
    max_iters rounds without that. energies: every eigenvalue of gram, decreasing (they fix the filter)."""
    k = int(gram.shape[0])
    degree, c, e, x_r = _chebyshev_plan(energies, rank, block, gram.dtype)
    gen = torch.Generator(device="cpu").manual_seed(seed)
    X = torch.randn(k, block, generator=gen, dtype=gram.dtype).to(gram.device)  # (k, l) Gaussian start
    GX = None
    for it in range(1, max_iters + 1):
        Q, _ = torch.linalg.qr(_chebyshev_filter(gram, X, GX, degree, c, e, x_r))  # (k, l) filtered block
        GQ = gram @ Q  # (k, l)
        H = Q.T @ GQ  # (l, l) Rayleigh quotient (Rayleigh-Ritz: Golub & Van Loan, sec. 8.1)
        with torch_threads(1 if block <= SERIAL_UP_TO else None):
            ritz, Z = torch.linalg.eigh((H + H.T) / 2)  # ascending
        ritz, Z = ritz.flip(0), Z.flip(1)
        captured = np.concatenate([[0.0], np.cumsum(ritz.to(torch.float64).cpu().numpy())])
        if bool(np.all(total - captured[guard] <= allowed)):
            return Q @ Z[:, :rank], f"leading:subspace({it}, degree {degree})"  # (k, r) Ritz vectors
        X, GX = Q @ Z, GQ @ Z  # next round starts from the Ritz vectors, whose G-image is already known
    return None, ""
