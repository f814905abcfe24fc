"""Rounding a weight matrix to a stored precision, with or without the inputs' second moment.

**Without calibration** (round to nearest, common practice): each row (int8) or group (4-bit) gets the scale
absmax / qmax and every weight rounds to the nearest code, ties to even.

**With calibration**, ``hessian`` H (n x n) is the input second moment X^T X (a sum over samples, as
:class:`factorize.calibrated.stats.InputStats` holds it, or a mean: only its shape matters). The output error of
a weight error dW on those inputs is trace(dW H dW^T) (:func:`weighted_error`), and two things use it:

(a) **scales**: for each row or group, a grid of clipping ratios c of absmax (:data:`CLIP_RATIOS`) is tried,
    scale = c * absmax / qmax, and the ratio with the least sum_j H_jj (W_ij - Wq_ij)^2 over the group is kept
    (the diagonal of H; the grid search on a weighted error is common practice, the diagonal weighting is a
    judgement call of this project: the full H couples groups);
(b) **error feedback** (``method="gptq"``, the default with a full H): GPTQ (Frantar, Ashkboos, Hoefler & Alistarh,
    "GPTQ: accurate post-training quantization for generative pre-trained transformers", ICLR 2023). Columns are
    rounded in order; the error of column j, divided by U_jj, is subtracted from the columns not yet rounded
    through row j of U, the upper Cholesky factor of H^{-1} (H^{-1} = U^T U). This is the optimal brain surgeon
    update restricted to the remaining columns, computed once for all rows. H is dampened by 0.01 * mean(diag H)
    (the paper's default). Updates are applied lazily in blocks of 128 columns (the paper's batching; results
    equal the column-by-column update up to float rounding). A 4-bit group's scale is chosen when its first column
    is reached, from the updated weights of that group (as the paper's implementation does).

A 1-D ``hessian`` is taken as a diagonal (an embedding's token counts): error feedback then has nothing to spread
(U is diagonal), so only the scales are chosen.
"""

from __future__ import annotations

import numpy as np
import torch

from factorize.errors import FactorizeError
from factorize.rounding.formats import (
    FLOAT_DTYPES,
    GROUP_SIZES,
    Rounded,
    check_precision,
    fits,
    pack_int4,
    padded_width,
    qmax,
)

METHODS = ("auto", "nearest", "gptq")
CLIP_RATIOS = tuple(1.0 - 0.05 * i for i in range(11))  # 1.0, 0.95, ..., 0.5 of absmax
GPTQ_DAMP = 0.01  # relative dampening of H (Frantar et al. 2023)
GPTQ_BLOCK = 128  # lazy-update block (a multiple of every group size)


def round_matrix(W: torch.Tensor, precision: str, *, hessian: torch.Tensor | None = None,
                 method: str = "auto") -> Rounded:
    """Round ``W`` (m x n, float) to ``precision``.

    Args:
        W: the weight's matrix view (out x in); not modified.
        precision: one of :data:`factorize.rounding.formats.PRECISIONS`.
        hessian: the inputs' second moment H (n x n, or its diagonal (n,)); None rounds to nearest with absmax
            scales.
        method: ``"auto"`` (error feedback when a full H is given, else round to nearest), ``"nearest"`` (round to
            nearest; with H, the scales are chosen by the weighted error) or ``"gptq"`` (error feedback; needs a
            full H).

    Raises :class:`FactorizeError` for a bad precision, method, matrix or H, or when ``precision`` cannot represent
    W (see :func:`factorize.rounding.formats.fits`).
    """
    W = check_matrix(W, "W")
    check_precision(precision)
    if method not in METHODS:
        raise FactorizeError(f"unknown rounding method {method!r}", fix=f"use one of {', '.join(METHODS)}")
    H = check_hessian(hessian, W.shape[1])
    reason = fits(W, precision)
    if reason is not None:
        raise FactorizeError(f"{precision} cannot store this {W.shape[0]} x {W.shape[1]} matrix: {reason}",
                             fix="keep the layer at a wider precision")
    if method == "gptq" and (H is None or H.dim() != 2):
        raise FactorizeError("error-feedback rounding (method='gptq') needs the full input second moment (n x n)",
                             fix="pass hessian=, or use method='nearest'")
    return _round(W, precision, H, method)


def _round(W: torch.Tensor, precision: str, H: torch.Tensor | None, method: str) -> Rounded:
    """The body of :func:`round_matrix`: trusts its inputs."""
    shape = (int(W.shape[0]), int(W.shape[1]))
    if precision in FLOAT_DTYPES:
        return Rounded(precision, shape, W.detach().to(FLOAT_DTYPES[precision]).clone(), None)
    W32 = W.detach().to(torch.float32)
    H = None if H is None else H.to(W32.device)
    diag = None if H is None else (H if H.dim() == 1 else H.diagonal()).to(torch.float32)
    if H is not None and H.dim() == 2 and method in ("auto", "gptq"):
        codes, scale = _gptq(W32, precision, H, diag)
    else:
        scale = _choose_scales(W32, precision, diag)  # (m,) or (m, G)
        codes = _codes(W32, precision, scale)
    return _assemble(precision, shape, codes, scale)


def _assemble(precision: str, shape: tuple[int, int], codes: torch.Tensor, scale: torch.Tensor) -> Rounded:
    """Integer codes (m, n) and scales -> the stored form (4-bit codes padded with zeros and packed)."""
    if precision == "int8":
        return Rounded(precision, shape, codes.to(torch.int8), scale.to(torch.float32))
    m, n = shape
    n_pad = padded_width(precision, n)
    padded = torch.zeros(m, n_pad, dtype=torch.int16, device=codes.device)
    padded[:, :n] = codes.to(torch.int16)
    return Rounded(precision, shape, pack_int4(padded), scale.to(torch.float16))


# ---------------------------------------------------------------------------------------------------------------
# scales and codes


def _grouped(W: torch.Tensor, precision: str) -> torch.Tensor:
    """(m, n) -> (m, G, g) with zero padding (int8: one group per row)."""
    m, n = W.shape
    g = GROUP_SIZES.get(precision, n)
    n_pad = -(-n // g) * g
    if n_pad != n:
        W = torch.cat((W, W.new_zeros(m, n_pad - n)), dim=1)
    return W.reshape(m, n_pad // g, g)


def _stored_scale(peak: torch.Tensor, precision: str) -> torch.Tensor:
    """The stored scale for groups whose largest magnitude is ``peak``: peak / qmax, as float32 (int8) or as the
    float16 that keeps scale * 7 >= peak (4-bit; rounded up by one float16 step where rounding to nearest fell
    short). Returned as float32 values."""
    s = peak / qmax(precision)
    if precision == "int8":
        return s
    s16 = s.to(torch.float16)
    short = s16.to(torch.float32) * qmax(precision) < peak
    bumped = (s16.view(torch.int16) + 1).view(torch.float16)  # next float16 up (positive, finite values)
    return torch.where(short, bumped, s16).to(torch.float32)


def _codes(W: torch.Tensor, precision: str, scale: torch.Tensor) -> torch.Tensor:
    """Round to nearest: codes (m, n) = clamp(round(W / scale)), scale (m,) or (m, G)."""
    m, n = W.shape
    top = qmax(precision)
    s = scale if scale.dim() == 2 else scale[:, None]  # (m, G)
    safe = torch.where(s > 0, s, torch.ones_like(s))
    Wg = _grouped(W, precision)  # (m, G, g)
    q = torch.clamp(torch.round(Wg / safe[:, :, None]), -top, top)
    return q.reshape(m, -1)[:, :n]


def _choose_scales(W: torch.Tensor, precision: str, diag: torch.Tensor | None) -> torch.Tensor:
    """Absmax scales (no H), or for each group the clipping ratio with the least diagonal-weighted error:
    (m,) for int8, (m, G) for 4-bit (float32 values of the stored scales)."""
    d = None if diag is None else _grouped(diag[None, :], precision)[0]  # (G, g), zero weight on padding
    best = _group_scales(_grouped(W, precision), d, precision)  # (m, G)
    return best if precision != "int8" else best[:, 0]


def _group_scales(Wg: torch.Tensor, d: torch.Tensor | None, precision: str) -> torch.Tensor:
    """Scales (m, G) of grouped weights Wg (m, G, g) under weights d (G, g) (None: absmax)."""
    peak = Wg.abs().amax(dim=2)  # (m, G)
    best = _stored_scale(peak, precision)
    if d is None:
        return best
    best_cost = _group_cost(Wg, best, d, precision)
    for ratio in CLIP_RATIOS[1:]:
        s = _stored_scale(peak * ratio, precision)
        cost = _group_cost(Wg, s, d, precision)
        better = cost < best_cost
        best = torch.where(better, s, best)
        best_cost = torch.where(better, cost, best_cost)
    return best


def _group_cost(Wg: torch.Tensor, s: torch.Tensor, d: torch.Tensor, precision: str) -> torch.Tensor:
    """sum_j d_j (w_j - s q_j)^2 per group: (m, G)."""
    top = qmax(precision)
    safe = torch.where(s > 0, s, torch.ones_like(s))[:, :, None]  # (m, G, 1)
    err = Wg - torch.clamp(torch.round(Wg / safe), -top, top) * safe
    return (err.square() * d[None]).sum(dim=2)


# ---------------------------------------------------------------------------------------------------------------
# error feedback (GPTQ)


def _inverse_cholesky(H: torch.Tensor) -> torch.Tensor:
    """U upper triangular with U^T U = (H + damp I)^{-1}, damp = 0.01 mean(diag H) (raised tenfold on failure)."""
    H = H.to(torch.float64)
    n = H.shape[0]
    mean = float(H.diagonal().mean())
    damp = GPTQ_DAMP * (mean if mean > 0 else 1.0)
    for _ in range(4):
        Hd = H + damp * torch.eye(n, dtype=H.dtype, device=H.device)
        L, info = torch.linalg.cholesky_ex(Hd)
        if int(info) == 0:
            Hinv = torch.cholesky_inverse(L)  # (n, n)
            U, info = torch.linalg.cholesky_ex(Hinv, upper=True)
            if int(info) == 0:
                return U
        damp *= 10
    raise FactorizeError("the input second moment is not positive semi-definite (Cholesky failed even with "
                         "dampening)", fix="pass X^T X of real inputs as hessian=")


def _gptq(W: torch.Tensor, precision: str, H: torch.Tensor, diag: torch.Tensor):
    """Error-feedback rounding of W (m, n) float32: (codes (m, n), scales).

    Column by column within blocks of GPTQ_BLOCK, the block held transposed so that each column is a contiguous
    row, the step size and the clamp hoisted out of the column loop (per group, or once per matrix), and the update
    of the columns not yet rounded as one outer product: the same arithmetic per element as the textbook loop,
    with a third of its per-column tensor operations (the loop is what a calibrated bytes plan spends its time in).
    """
    m, n = W.shape
    U = _inverse_cholesky(H).to(torch.float32)  # (n, n)
    g = GROUP_SIZES.get(precision)
    top = float(qmax(precision))
    scale = _choose_scales(W, precision, diag) if g is None else W.new_zeros(m, -(-n // g))  # (m,) or (m, G)
    W = W.clone()
    codes = W.new_zeros(n, m)  # transposed while filled
    safe = None if g is not None else torch.where(scale > 0, scale, torch.ones_like(scale))  # (m,)
    for i1 in range(0, n, GPTQ_BLOCK):
        i2 = min(i1 + GPTQ_BLOCK, n)
        W1, U1 = W[:, i1:i2].T.contiguous(), U[i1:i2, i1:i2]  # (b, m) transposed, (b, b)
        Err1 = torch.zeros_like(W1)  # (b, m)
        for i in range(i2 - i1):
            j = i1 + i
            if g is not None and j % g == 0:  # a new group: its scale from the weights as updated so far
                k = min(g, i2 - i1 - i)
                s_j = _group_scales(W1[i:i + k].T[:, None, :], diag[None, j:j + k], precision)[:, 0]
                scale[:, j // g] = s_j
                safe = torch.where(s_j > 0, s_j, torch.ones_like(s_j))
            w = W1[i]
            q = torch.clamp(torch.round(w / safe), -top, top)  # (m,)
            codes[j] = q
            err = Err1[i]
            torch.div(w - q * safe, U1[i, i], out=err)  # (m,)
            if i + 1 < i2 - i1:  # spread over the columns not yet rounded
                W1[i + 1:].sub_(U1[i, i + 1:, None] * err[None, :])
        W[:, i2:] -= Err1.T @ U[i1:i2, i2:]  # lazy block update
    return codes.T.contiguous(), scale


# ---------------------------------------------------------------------------------------------------------------
# the error measure


def weighted_error(W: torch.Tensor, Wq: torch.Tensor, hessian: torch.Tensor | None = None, *,
                   output_gram: torch.Tensor | None = None) -> float:
    """The error of replacing W by Wq (both m x n), accumulated in float64.

    Without ``hessian``: ||W - Wq||_F^2. With H (n x n, or its diagonal (n,)): trace((W - Wq) H (W - Wq)^T), the
    squared output error on the inputs H came from (||(W - Wq) X^T||_F^2 when H = X^T X). With ``output_gram`` G
    (m x m) as well: trace(G (W - Wq) H (W - Wq)^T), the Gauss-Newton weighting of the calibrated path.
    """
    W, Wq = check_matrix(W, "W"), check_matrix(Wq, "Wq")
    if W.shape != Wq.shape:
        raise FactorizeError(f"W is {tuple(W.shape)} and Wq is {tuple(Wq.shape)}; expected the same shape")
    H = check_hessian(hessian, W.shape[1])
    dW = W.detach().to(torch.float64) - Wq.detach().to(device=W.device, dtype=torch.float64)  # (m, n)
    H = None if H is None else H.to(dW.device)
    right = dW if H is None else (dW * H if H.dim() == 1 else dW @ H)  # (m, n)
    if output_gram is not None:
        G = torch.as_tensor(output_gram).detach().to(device=dW.device, dtype=torch.float64)
        if tuple(G.shape) != (W.shape[0],) * 2:
            raise FactorizeError(f"output_gram is {tuple(G.shape)}, expected ({W.shape[0]}, {W.shape[0]})")
        dW = G @ dW
    return float((dW * right).sum())


# ---------------------------------------------------------------------------------------------------------------
# validation


def check_matrix(W, what: str) -> torch.Tensor:
    if isinstance(W, np.ndarray):
        W = torch.from_numpy(W)
    if not isinstance(W, torch.Tensor) or W.dim() != 2 or not W.is_floating_point():
        got = f"{W.dtype} {tuple(W.shape)}" if isinstance(W, torch.Tensor) else type(W).__name__
        raise FactorizeError(f"{what}: expected a 2-D float tensor (m, n), got {got}")
    if W.numel() == 0:
        raise FactorizeError(f"{what}: the matrix is empty ({tuple(W.shape)})")
    return W


def check_hessian(H, n: int) -> torch.Tensor | None:
    if H is None:
        return None
    H = torch.as_tensor(H).detach()
    if tuple(H.shape) not in ((n, n), (n,)):
        raise FactorizeError(f"hessian is {tuple(H.shape)}; expected ({n}, {n}) or its diagonal ({n},) for a matrix "
                             f"with {n} input columns", fix="pass X^T X of this layer's inputs")
    H = H.to(torch.float64)
    if not bool(torch.isfinite(H).all()):
        raise FactorizeError("hessian holds NaN or Inf values", fix="pass X^T X of finite inputs")
    diag = H if H.dim() == 1 else H.diagonal()
    if bool((diag < 0).any()):
        raise FactorizeError("hessian has a negative diagonal entry; a second moment X^T X has none",
                             fix="pass X^T X of this layer's inputs")
    return H
