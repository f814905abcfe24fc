"""Two forms built on rounding: a rounded matrix plus a low-rank correction, and rounded factors.

**Rounded plus correction** (:func:`round_with_correction`; LQER, Zhang, Cheng, Constantinides & Zhao,
"LQER: low-rank quantization error reconstruction for LLMs", ICML 2024). W is rounded to Q, and the rank-r
matrix B A closest to what rounding lost, E = W - dequantize(Q), is added back: W ~ dequantize(Q) + B A.

* Without calibration: the truncated SVD of E (Eckart-Young-Mirsky: the best rank-r approximation in the
  Frobenius norm).
* With the input second moment H: the rank-r E' minimising the output error trace((E - E') H (E - E')^T).
  Write H + lam I = L L^T (Cholesky; lam = 1e-6 mean(diag H), a numerical safeguard). Then
  trace((E - E') H (E - E')^T) ~ ||(E - E') L||_F^2, and the best rank-r E' is U_r U_r^T E with U_r the top r
  left singular vectors of E L: reduced-rank regression (Izenman, J. Multivariate Analysis 1975), the same
  construction as SVD-LLM's whitening (Wang et al. 2024) and this project's calibrated truncation. It is
  re-derived here with torch.linalg because this package sits below the calibrated one.

B = U_r diag(c), A = diag(1/c) U_r^T E with c_i = sqrt(||row i of U_r^T E||): each rank-one term split evenly
between the factors by norm. At full rank (r = min(m, n)) U_r U_r^T E = E, so the form reproduces W.

**Rounded factors** (:func:`round_factors`): a factored layer computes B (A x). A sees the layer's input, so its
second moment is H; B sees A's outputs, whose second moment is A H A^T. A is rounded first and B is rounded
against the second moment of the *rounded* A's outputs, Aq H Aq^T, which is what B will see.
"""

from __future__ import annotations

import torch

from factorize.errors import FactorizeError
from factorize.rounding.formats import Rounded, check_precision
from factorize.rounding.quantize import check_hessian, check_matrix, round_matrix
from factorize.spectra.whiten import sqrt_factor

CORRECTION_RIDGE = 1e-6  # relative to mean(diag H): numerical safeguard only


def round_with_correction(W: torch.Tensor, precision: str, rank: int, *, hessian: torch.Tensor | None = None,
                          method: str = "auto") -> tuple[Rounded, torch.Tensor, torch.Tensor]:
    """``W`` (m x n) rounded to ``precision`` plus a rank-``rank`` correction: (Q, B (m x r), A (r x n)) with
    W ~ Q.dequantize() + B @ A. ``method`` is passed to :func:`round_matrix`; B and A are in W's dtype.

    Raises :class:`FactorizeError` for a rank outside 0..min(m, n) and for what :func:`round_matrix` refuses.
    """
    W = check_matrix(W, "W")
    m, n = W.shape
    if isinstance(rank, bool) or not isinstance(rank, int) or not 0 <= rank <= min(m, n):
        raise FactorizeError(f"correction rank {rank!r} is outside 0..{min(m, n)} for a {m} x {n} matrix")
    H = check_hessian(hessian, n)
    Q = round_matrix(W, precision, hessian=H, method=method)
    E = W.detach().to(torch.float64) - Q.dequantize(torch.float64)  # (m, n)
    B, A = _low_rank(E, rank, None if H is None else H.to(E.device))
    return Q, B.to(W.dtype), A.to(W.dtype)


def _low_rank(E: torch.Tensor, rank: int, H: torch.Tensor | None) -> tuple[torch.Tensor, torch.Tensor]:
    """(B (m, r), A (r, n)) float64 with B A the best rank-r approximation of E (weighted by H when given)."""
    if rank == 0:
        return E.new_zeros(E.shape[0], 0), E.new_zeros(0, E.shape[1])
    Z = E if H is None else E @ _sqrt_factor(H)  # (m, n)
    U = torch.linalg.svd(Z, full_matrices=False)[0][:, :rank]  # (m, r)
    rows = U.T @ E  # (r, n) = U_r^T E
    c = torch.linalg.vector_norm(rows, dim=1).sqrt()  # (r,), columns of U have norm 1
    c = torch.where(c > 0, c, torch.ones_like(c))
    return U * c, rows / c[:, None]


def _sqrt_factor(H: torch.Tensor) -> torch.Tensor:
    """L with L L^T = H + lam I: Cholesky, else the symmetric square root (eigenvalues clipped at 0)."""
    if H.dim() == 1:
        return torch.diag((H + CORRECTION_RIDGE * _mean_or_one(H)).sqrt())
    return sqrt_factor(H, CORRECTION_RIDGE * _mean_or_one(H.diagonal()))


def _mean_or_one(d: torch.Tensor) -> float:
    mean = float(d.mean())
    return mean if mean > 0 else 1.0


def round_factors(B: torch.Tensor, A: torch.Tensor, precision: str | tuple[str, str], *,
                  hessian: torch.Tensor | None = None, method: str = "auto") -> tuple[Rounded, Rounded]:
    """Round the factors of a factored layer (B m x r, A r x n): (B rounded, A rounded).

    ``precision``: one name for both, or (B's, A's). ``hessian``: the layer's input second moment H (n x n or
    its diagonal); A is rounded against H, then B against Aq H Aq^T with Aq the rounded A. Without H both are
    rounded to nearest.
    """
    B, A = check_matrix(B, "B"), check_matrix(A, "A")
    if B.shape[1] != A.shape[0]:
        raise FactorizeError(f"B is {tuple(B.shape)} and A is {tuple(A.shape)}; B's columns must equal A's rows")
    pb, pa = (precision, precision) if isinstance(precision, str) else tuple(precision)
    check_precision(pb)
    check_precision(pa)
    H = check_hessian(hessian, A.shape[1])
    Aq = round_matrix(A, pa, hessian=H, method=method)
    HB = None
    if H is not None:
        A64 = Aq.dequantize(torch.float64)  # (r, n)
        H = H.to(A64.device)
        HB = (A64 * H) @ A64.T if H.dim() == 1 else A64 @ H @ A64.T  # (r, r)
    return round_matrix(B, pb, hessian=HB, method=method), Aq
