"""Activation-aware decomposition: factors that keep what a layer outputs on real inputs, not its weights.

Plain truncated SVD minimises ||W - W'||_F, the error of the weights. What matters is the error of the layer's
outputs on the inputs it sees: for inputs X (rows x_i, second moment C = X^T X, see :mod:`factorize.calibrated.stats`)

    ||(W - W') X^T||_F^2 = trace((W - W') C (W - W')^T).

**Whitening** (``method="whiten"``). Write C = L L^T (L a Cholesky factor, or the symmetric square root C^{1/2};
both give the same answer). The rank-r W' minimising the output error is

    W' = U_r U_r^T W,   U_r = the top r left singular vectors of W L,

the reduced-rank regression solution (Izenman, "Reduced-rank regression for the multivariate linear model", J.
Multivariate Analysis 1975): ||(W - W')X^T||_F = ||W L - W' L||_F, and by Eckart-Young the best rank-r
approximation of W L is U_r U_r^T (W L). The same construction is SVD-LLM's truncation-aware whitening (Wang et
al., "SVD-LLM", 2024), where the truncation loss equals the discarded whitened singular values: the predicted
output error at rank r is sqrt(sum_{i>r} s_i^2) with s_i the singular values of W L, and the total output
energy is ||W L||_F^2 = trace(W C W^T). No inverse of C is needed, so this works when C is singular.

**Ridge.** C is factored as C + lambda I with lambda = ``ridge`` * mean(diag C), ridge = 1e-6 by default: a
numerical safeguard that makes the Cholesky factor exist and changes the objective by lambda ||W - W'||_F^2,
far below 1% of the output error. When a layer saw fewer samples than its input width, C is singular for a
statistical reason and ridge = 1e-2 is used instead (a judgement call of this project, no published value): the
directions the samples never explored then fall back to weight-space error instead of being free. If the
Cholesky factorisation still fails, the symmetric square root from an eigendecomposition (eigenvalues clipped
at 0) is used.

**Diagonal scaling** (``method="scale"``, Yuan et al., "ASVD: activation-aware singular value decomposition",
2023): scale input column j by s_j = (mean |x_j|)^alpha (alpha = 0.5 by default), take the SVD of W diag(s),
truncate, and unscale. Since W diag(s) = U S V^T, the unscaled truncation U_r S_r V_r^T diag(s)^{-1} equals
U_r U_r^T W: again a projection of W, with U from the scaled matrix. It needs only per-channel magnitudes to
choose U; its output error at every rank is still computed exactly from C: with M = W C W^T,
||(W - U_r U_r^T W) X^T||_F^2 = trace(M) - sum_{i<=r} u_i^T M u_i.

**Centring and bias correction.** A layer with a bias can absorb the mean of the error: with mean input mu and
b' = b + (W - W') mu, the output error is that of the centred inputs, so the same construction is applied to
the covariance C - N mu mu^T. This never does worse than the uncentred solution (it has one more free vector);
the correction is the "bias correction" used after quantization (Nagel et al., "Data-free quantization through
weight equalization and bias correction", ICCV 2019 -- cited from memory).

**Sequential refit** (``stats.cross`` set, see :func:`factorize.calibrated.stats.collect_pair_stats`): when the inputs X
now come from a partly compressed model while the targets are the original layer's outputs on the original
inputs X_ref, the rank-r W' minimising ||W X_ref^T - W' X^T||_F is reduced-rank regression with a least-squares
step first (Izenman 1975): W_ls = (W C_rx + lambda W)(C + lambda I)^{-1} with C_rx = X_ref^T X -- a ridge that
pulls towards the original W rather than towards 0, so identical inputs give back W exactly and directions the
samples barely explore keep the original weights (generalised ridge regression towards a prior value; Hoerl &
Kennard, Technometrics 1970, from memory) -- then W' = U_r U_r^T W_ls with U from W_ls L. The least-squares
residual (no rank can remove it) is added to the predicted error.

**Output weighting** (``output_gram=G``, see :func:`factorize.calibrated.gradients.collect_output_grams`): not every
output direction of a layer matters equally downstream. With G the mean Gauss-Newton matrix of the final output with
respect to the layer's output, trace(G dW C dW^T) approximates the final-output error of a weight error dW
(first order, Kronecker-factored as in K-FAC, Martens & Grosse 2015). Write G + mu I = R^T R (mu =
0.1 * mean(diag G), a judgement call that keeps R^{-1} well conditioned; R is the transposed Cholesky factor); the
rank-r minimiser of ||R (W - W') L||_F is W' = R^{-1} U_r U_r^T R W with U_r the top left singular vectors of R W L
(Eckart-Young applied to R W L; R and L invertible), a two-sided version of the whitening above and of
Fisher-weighted SVD (Hsu et al. 2022). Errors are then in final-output units, comparable across layers. Any other
factor R' = Q R (Q orthogonal, e.g. the symmetric root) gives the same W': the left singular vectors become Q U_r.

**The output side** (``stats.side == "output"``, see :mod:`factorize.calibrated.stats`): for a layer narrower at
its output (m < n) only K = W C W^T (m x m) is kept. Every quantity above is a function of it: with the ridge,
W (C + lambda I) W^T = K + lambda W W^T; centring subtracts N (W mu)(W mu)^T; and with Z any m x m factor of
R (K + lambda W W^T) R^T (Z Z^T equal to it, R = I without output weights), Z Z^T = (R W L)(R W L)^T, so Z and
R W L have the same left singular vectors and singular values (reduced-rank regression from the output side,
Izenman 1975; Eckart-Young for the whitened form), hence the same W', energies and ranks. The lambda of the ridge
needs only the diagonal of C, which output-side statistics keep.

Factors: ``factors(r)`` returns B = U_r diag(c) and A = diag(1/c) U_r^T W with c_i = sqrt(||u_i^T W|| / ||u_i||),
so B @ A = U_r U_r^T W exactly and each rank-one term is split evenly between the two factors by weight norm.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
from torch import nn

from factorize.calibrated.stats import InputStats, weight_sums
from factorize.choices import AWARE_METHODS
from factorize.errors import FactorizeError
from factorize.execution import EXECUTION_KEYWORDS, Execution, resolve_execution
from factorize.model.sites import Site, get_module, matrix_of
from factorize.plan.entries import factored_entries
from factorize.spectra.decompose import Spectrum, compute_dtype_for, decompose, values_only
from factorize.spectra.sites import per_site
from factorize.spectra.whiten import sqrt_factor, whitened

DEFAULT_RIDGE = 1e-6  # relative to mean(diag C): numerical safeguard only
FEW_SAMPLES_RIDGE = 1e-2  # relative ridge when a layer saw fewer samples than its input width (a judgement call)
REFIT_RIDGE = 0.1  # relative ridge of the sequential least-squares step (chosen by measurement, see docs/quality.md)
DEFAULT_ALPHA = 0.5  # ASVD's scaling exponent (Yuan et al. 2023)
OUTPUT_RIDGE = 0.1  # relative ridge on the output Gram matrix (a judgement call; keeps R^{-1} well conditioned)
SOLVER_NAMES = ("auto", "exact", "gram", "randomized")  # the decompositions a whitened matrix may be given to


@dataclass(frozen=True)
class AwareFit:
    """How activation-aware factors are fitted to a layer, the same for every layer of a run: passed whole to
    :func:`decompose_aware`, :func:`aware_spectra` and :func:`compress_sequential` (each also takes these
    fields as keywords, turned into one by :meth:`from_keywords`).

    Attributes:
        method: ``"whiten"`` (reduced-rank regression / SVD-LLM) or ``"scale"`` (ASVD diagonal scaling).
        alpha: ASVD's exponent for ``"scale"``.
        center: optimise the error of centred inputs, paired with the bias correction
            (:meth:`AwareSpectrum.bias_shift`); ``"auto"`` centres the layers that have a bias and are not
            embeddings (for a bare matrix, in :func:`decompose_aware`, ``"auto"`` does not centre).
        ridge: relative ridge on C (None: 1e-6, or 1e-2 when the layer saw fewer samples than its width).
        refit_ridge: relative ridge of the sequential least-squares step.
        output_ridge: relative ridge on the output Gram matrix G (G + mu I, mu = output_ridge * mean(diag G)).
        solver: SVD algorithm of :func:`factorize.spectra.decompose.decompose` on the whitened matrix
            (``"gram"``, ``"exact"``, ``"randomized"`` or ``"auto"``; the last two compute only ``rank``
            triplets).
    """

    method: str = "whiten"
    alpha: float = DEFAULT_ALPHA
    center: bool | str = "auto"
    ridge: float | None = None
    refit_ridge: float = REFIT_RIDGE
    output_ridge: float = OUTPUT_RIDGE
    solver: str = "gram"

    def __post_init__(self) -> None:
        if self.method not in AWARE_METHODS:
            raise FactorizeError(f"unknown activation-aware method {self.method!r}",
                                 fix=f"use one of {', '.join(AWARE_METHODS)}")
        if self.solver not in SOLVER_NAMES:
            raise FactorizeError(f"unknown solver {self.solver!r}", fix=f"use one of {', '.join(SOLVER_NAMES)}")

    @classmethod
    def from_keywords(cls, fit: AwareFit | None, execution: Execution | None,
                      keywords: Mapping[str, Any]) -> tuple[AwareFit, Execution]:
        """(fit, execution) from the objects or from keywords named like their fields (not both for one object);
        an unknown keyword is an error listing the accepted ones."""
        names = [f.name for f in dataclasses.fields(cls)]
        execution, rest = resolve_execution(execution, keywords)
        unknown = [k for k in rest if k not in names]
        if unknown:
            raise FactorizeError(f"unknown keyword{'s' if len(unknown) > 1 else ''}: {', '.join(unknown)}",
                                 fix="accepted: fit, execution, " + ", ".join((*names, *EXECUTION_KEYWORDS)))
        if fit is not None and rest:
            raise FactorizeError("an AwareFit and its keywords were both given", [f"{k}=" for k in rest],
                                 fix="put them into the AwareFit (dataclasses.replace(fit, ...)) or pass keywords only")
        return (fit if fit is not None else cls(**rest)), execution


@dataclass
class AwareSpectrum(Spectrum):
    """A :class:`~factorize.spectra.decompose.Spectrum` whose errors are output errors on the calibration inputs.

    ``U`` (m x k) holds the kept output directions (orthonormal, or R^{-1} U when output-weighted), ``S`` the
    singular values of the whitened (or scaled) matrix, and ``Vh`` = diag(1/S) U^T W_target, so that
    ``U_r diag(S_r) Vh_r`` is the rank-r replacement, as for any spectrum. ``energy[i]`` is the output energy
    (squared Frobenius error on the calibration inputs) that direction i removes; ``total_energy`` is the output
    energy of the layer, trace(W C W^T) (weighted by G when output-weighted), plus ``residual`` for a refit.
    """

    energy: np.ndarray | None = None  # (k,) output energy per direction (whiten: S^2; scale: u_i^T M u_i)
    residual: float = 0.0  # output energy no rank removes (sequential refit's least-squares residual)
    mean_shift: torch.Tensor | None = None  # (m,) W mu_ref, for the bias correction (None: no correction)
    rows_mean: torch.Tensor | None = None  # (k,) (U^T W_target) mu, for the bias correction
    ridge: float = 0.0  # absolute ridge lambda added to C
    samples: int = 0  # calibration rows behind C

    def energies(self) -> np.ndarray:
        return self.energy if self.energy is not None else super().energies()

    def factors(self, rank: int) -> tuple[torch.Tensor, torch.Tensor]:
        """B (m x r), A (r x n) with B @ A = U_r U_r^T W_target, balanced by the norms of U_r^T W_target."""
        if not 1 <= rank <= self.computed_rank:
            raise FactorizeError(f"rank {rank} is outside 1..{self.computed_rank} for this spectrum")
        rows = self.S[:rank, None] * self.Vh[:rank]  # (r, n) = U_r^T W_target
        cols = self.U[:, :rank]  # (m, r)
        a = torch.linalg.vector_norm(rows, dim=1)  # (r,)
        b = torch.linalg.vector_norm(cols, dim=0)  # (r,)
        ok = (a > 0) & (b > 0)
        c = torch.where(ok, a / torch.where(ok, b, torch.ones_like(b)), torch.ones_like(a)).sqrt()  # sqrt(a / b)
        return cols * c, rows / c[:, None]  # (m, r), (r, n): column i of B and row i of A have equal norms

    def bias_shift(self, rank: int) -> torch.Tensor | None:
        """Vector to add to the layer's bias at ``rank``: W mu_ref - W'_r mu (None when not centred)."""
        if self.mean_shift is None or self.rows_mean is None:
            return None
        return self.mean_shift - self.U[:, :rank] @ self.rows_mean[:rank]  # (m,)


# ---------------------------------------------------------------------------------------------------------------
# second-moment algebra


def _ridge_for(stats: InputStats, C_diag: torch.Tensor, ridge: float | None) -> float:
    rel = ridge if ridge is not None else (FEW_SAMPLES_RIDGE if stats.count < stats.width else DEFAULT_RIDGE)
    mean_diag = float(C_diag.mean()) if C_diag.numel() else 0.0
    return rel * mean_diag if mean_diag > 0 else rel


def _moments(stats: InputStats, center: bool):
    """(C, mu) of the inputs, centred when asked (C then the covariance sum (x - mu)(x - mu)^T)."""
    mu = stats.mean
    if stats.is_diagonal:
        return None, mu  # embedding: handled by column scaling
    C = stats.covariance() if center else stats.moment()
    return C, mu


def _check_stats(W: torch.Tensor, stats: InputStats, name: str) -> None:
    if not isinstance(stats, InputStats):
        raise FactorizeError(f"{name}: expected InputStats from factorize.calibrated.stats.collect_stats, got "
                             f"{type(stats).__name__}")
    if stats.width != W.shape[1]:
        raise FactorizeError(
            f"{name}: the calibration statistics are for inputs of width {stats.width}, the weight has {W.shape[1]} "
            "input columns", fix="collect statistics on the same model and layer")
    if stats.count <= 0:
        raise FactorizeError(f"{name}: the calibration batches never reached this layer (0 samples)",
                             fix="give inputs that run through it, or exclude it")
    if stats.is_output_side and (tuple(stats.output_moment.shape) != (W.shape[0],) * 2 or not np.allclose(
            weight_sums(W.to(torch.float64)), stats.weight_check, rtol=1e-9,
            atol=1e-9 * (W.numel() * abs(stats.weight_check[1])) ** 0.5)):  # sum |W| <= sqrt(numel * sum W^2)
        raise FactorizeError(
            f"{name}: the output-side statistics were collected with another weight than the one given (they hold "
            "W C W^T, which depends on W)", fix="collect statistics on the same model and layer, with this weight")


# ---------------------------------------------------------------------------------------------------------------
# the decomposition


def decompose_aware(
    W: torch.Tensor,
    stats: InputStats,
    fit: AwareFit | None = None,
    *,
    output_gram: torch.Tensor | None = None,
    rank: int | None = None,
    execution: Execution | None = None,
    name: str = "matrix",
    **keywords: Any,
) -> AwareSpectrum:
    """Activation-aware spectrum of a weight's matrix view W (m x n) given its input statistics.

    Args:
        W: the weight's matrix view (out x in); not modified.
        stats: :class:`~factorize.calibrated.stats.InputStats` of the layer's inputs (with ``cross`` set, the
            sequential refit is used).
        fit: :class:`AwareFit` (method, alpha, center, ridge, refit_ridge, output_ridge, solver), or its fields
            as keywords. ``center`` counts only for layers with a bias; ``"auto"`` does not centre here.
        output_gram: G (m x m), how much each output direction moves the final output
            (:func:`factorize.calibrated.gradients.collect_output_grams`); when given, the error is weighted on both
            sides, ||G^{1/2} (W - W') L||_F, and errors are in final-output units (see the module docstring).
        rank: how many triplets a partial solver must compute.
        execution: :class:`~factorize.execution.Execution` (its seed and precision count here, as for
            :func:`factorize.spectra.decompose.decompose`), or ``seed`` / ``precision`` as keywords.
        name: the layer's name, for messages.

    Returns:
        An :class:`AwareSpectrum`; ``errors()`` are output errors ||(W - W'_r) X^T||_F on the calibration inputs.
    """
    fit, execution = AwareFit.from_keywords(fit, execution, keywords)
    return decompose_fitted(W, stats, fit, output_gram, rank, execution.seed, execution.precision, name)


def decompose_fitted(W, stats, fit: AwareFit, output_gram, rank, seed, precision, name) -> AwareSpectrum:
    """:func:`decompose_aware` with its options checked."""
    center = fit.center != "auto" and bool(fit.center)  # "auto" needs the layer (see aware_spectra): off here
    W = torch.as_tensor(W).detach()
    if W.dim() != 2:
        raise FactorizeError(f"{name}: expected a 2-D matrix, got shape {tuple(W.shape)}")
    _check_stats(W, stats, name)
    if not bool(torch.isfinite(W).all()):
        raise FactorizeError(f"{name}: the weight holds NaN or Inf values",
                             fix="repair or retrain the layer, or exclude it")
    out_dtype = compute_dtype_for(W, precision)
    W64 = W.to(device=_device_of(stats, W), dtype=torch.float64)
    left = _left_weight(output_gram, W64, fit.output_ridge, name)
    if left is not None and fit.method != "whiten":
        raise FactorizeError(f"{name}: output weighting needs method='whiten'", fix="use method='whiten'")
    if stats.is_output_side:
        return _decompose_output_side(W64, stats, fit, center, left, rank, seed, out_dtype, name)
    if stats.cross is not None:
        return _refit(W64, stats, fit, center, rank, seed, out_dtype, name, left)
    if fit.method == "whiten":
        mu = stats.mean
        C, again = _whitening_moment(stats, center)  # with again, C's memory becomes L: no n x n copy
        diag = stats.diagonal if C is None else C.diagonal()
        lam = _ridge_for(stats, diag, fit.ridge)
        Z = whitened(W64, C, diag, lam, again)  # (m, n) = W L
        del C, diag  # L (in C's memory with again) is not needed past Z
        if left is not None:
            Z = left[0] @ Z  # (m, n) = R W L
        spec = decompose(Z, method=fit.solver, rank=rank, seed=seed, precision="float64", name=name)
        energy, total = spec.energies(), spec.total_energy
    else:
        C, mu = _moments(stats, center and not stats.is_diagonal)
        diag = stats.diagonal if C is None else C.diagonal()
        lam = _ridge_for(stats, diag, fit.ridge)
        spec, energy, total = _scaled(W64, stats, fit, _output_gram(W64, C, diag, lam), rank, seed, name)
    return _finish(W64, spec, energy, total, 0.0, mu if center else None, mu, lam, stats.count, out_dtype,
                   fit.method, left=left)


def _whitening_moment(stats: InputStats, center: bool) -> tuple[torch.Tensor | None, Callable | None]:
    """(C, how to get C again when the whitening may overwrite it, else None); C is None for an embedding. A
    centred covariance is a private copy; a moment that can be read again from its file (``stats.reread``) is
    handed over (:meth:`InputStats.release_moment`), or read again when an earlier whitening of the same group
    already took it. Only a moment the statistics must keep is copied by the whitening (:func:`sqrt_factor`)."""
    if stats.is_diagonal:
        return None, None
    if center:
        return stats.covariance(), stats.covariance
    if stats.reread is not None:
        return (stats.reread() if stats.released else stats.release_moment()), stats.reread
    return stats.moment(), None


def _scaled(W64, stats: InputStats, fit: AwareFit, M: torch.Tensor, rank, seed, name):
    """method="scale": SVD of W diag(s) (ASVD scales), energies u_i^T M u_i on M = W (C + lam I) W^T, total."""
    s = stats.abs_mean.clamp_min(0) ** fit.alpha  # (n,) ASVD channel scales
    s = torch.where(s > 0, s, s.max().clamp_min(1e-30) * 1e-8)  # dead channels: tiny, not zero
    spec = decompose(W64 * s, method=fit.solver, rank=rank, seed=seed, precision="float64", name=name)
    energy = ((spec.U.T @ M) * spec.U.T).sum(1).cpu().numpy()  # u_i^T M u_i
    return spec, energy, float(M.trace())


def _decompose_output_side(W64, stats, fit: AwareFit, center, left, rank, seed, out_dtype, name) -> AwareSpectrum:
    """:func:`decompose_fitted` from output-side statistics (see the module docstring): the m x m route."""
    mu, N = stats.mean, stats.count
    K = stats.output_moment  # (m, m) = W C W^T
    diag = stats.square_total  # (n,) = diag C
    if center:
        Wmu = W64 @ mu  # (m,)
        K = K - N * torch.outer(Wmu, Wmu)  # W (C - N mu mu^T) W^T
        diag = diag - N * mu * mu
    lam = _ridge_for(stats, diag, fit.ridge)
    M = K + lam * (W64 @ W64.T)  # (m, m) = W (C + lam I) W^T
    if fit.method == "whiten":
        Z = sqrt_factor(M if left is None else left[0] @ M @ left[0].T, 0.0)  # Z Z^T = R W (C + lam I) W^T R^T
        spec = decompose(Z, method=fit.solver, rank=rank, seed=seed, precision="float64", name=name)
        energy, total = spec.energies(), spec.total_energy
    else:
        spec, energy, total = _scaled(W64, stats, fit, M, rank, seed, name)
    return _finish(W64, spec, energy, total, 0.0, mu if center else None, mu, lam, N, out_dtype, fit.method, left=left)


def whitened_values(W: torch.Tensor, stats: InputStats, fit: AwareFit | None = None, *,
                    execution: Execution | None = None, name: str = "matrix", keep_reduction: bool = False,
                    **keywords: Any) -> AwareSpectrum:
    """:func:`decompose_aware`'s energies for "whiten" (input side, not centred, no refit), no vectors. With
    ``keep_reduction``, the tridiagonal reduction behind the values stays on the result (``reduction``; None
    without scipy) for :func:`factorize.calibrated.reduced.factors_from_reduction`."""
    fit, execution = AwareFit.from_keywords(fit, execution, keywords)  # fit.ridge and execution.precision count
    _check_stats(W64 := torch.as_tensor(W).detach().to(torch.float64), stats, name)
    C, again = _whitening_moment(stats, False)  # with again, C's memory becomes L
    lam = _ridge_for(stats, diag := stats.diagonal if C is None else C.diagonal(), fit.ridge)
    Z = whitened(W64, C, diag, lam, again)
    del C, diag
    spec = values_only(Z, precision="float64", keep_gram=keep_reduction, name=name)  # every s_i of W L (m x n)
    return AwareSpectrum(spec.U, spec.S.to(compute_dtype_for(W, execution.precision)), spec.Vh, spec.total_energy,
                         "whiten", True, energy=spec.energies(), ridge=float(lam), samples=stats.count,
                         reduction=spec.reduction)


def _device_of(stats: InputStats, W: torch.Tensor) -> torch.device:
    t = stats.second_moment if stats.second_moment is not None else stats.diagonal
    t = stats.output_moment if stats.is_output_side else t
    return t.device if t is not None else W.device


def _output_gram(W: torch.Tensor, C: torch.Tensor | None, diag: torch.Tensor, lam: float) -> torch.Tensor:
    if C is None:
        return (W * (diag + lam)) @ W.T
    return W @ C @ W.T + lam * (W @ W.T)


def _left_weight(G: torch.Tensor | None, W: torch.Tensor, rel: float, name: str):
    """(R, R^{-1}) with R^T R = G + mu I (R the transposed Cholesky factor; the symmetric root where Cholesky
    fails), or None without an output Gram matrix. Every such R gives the same W' (see the module docstring)."""
    if G is None:
        return None
    G = torch.as_tensor(G).to(device=W.device, dtype=torch.float64)
    m = W.shape[0]
    if tuple(G.shape) != (m, m):
        raise FactorizeError(f"{name}: the output weights are {tuple(G.shape)}, the layer has {m} outputs",
                             fix="collect them on the same model and layer")
    if not bool(torch.isfinite(G).all()):
        raise FactorizeError(f"{name}: the output weights hold NaN or Inf values")
    mean_diag = float(G.diagonal().mean())
    mu = rel * mean_diag if mean_diag > 0 else 1.0
    eye = torch.eye(m, dtype=G.dtype, device=G.device)
    L, info = torch.linalg.cholesky_ex(G + mu * eye)
    if int(info) == 0:  # R = L^T: about 6x cheaper than the symmetric root at m = 1536 (one thread), same W'
        return L.T, torch.linalg.solve_triangular(L.T, eye, upper=True)
    evals, evecs = torch.linalg.eigh(G + mu * eye)  # not positive definite to rounding: the symmetric root
    evals = evals.clamp_min(mu)  # G is PSD: the ridge is the floor
    return (evecs * evals.sqrt()) @ evecs.T, (evecs / evals.sqrt()) @ evecs.T


def _finish(W_target, spec, energy, total, residual, mu_ref, mu, lam, count, out_dtype, method,
            W_ref: torch.Tensor | None = None, left=None) -> AwareSpectrum:
    """Build the AwareSpectrum: Vh = diag(1/S) U^T W_target (so U S Vh = U U^T W_target). With an output weight R,
    the kept directions are R^{-1} U and the rows U^T R W_target."""
    U = spec.U.to(torch.float64)  # (m, k)
    if left is not None:
        rows = U.T @ left[0] @ W_target  # (k, n)
        U = left[1] @ U  # (m, k), no longer orthonormal
    else:
        rows = U.T @ W_target  # (k, n)
    S = spec.S.to(torch.float64)
    safe = torch.where(S > 0, S, torch.ones_like(S))
    Vh = torch.where((S > 0)[:, None], rows / safe[:, None], torch.zeros_like(rows))
    shift = rows_mean = None
    if mu_ref is not None:
        W0 = W_ref if W_ref is not None else W_target
        shift = (W0 @ mu_ref).to(out_dtype)  # (m,)
        rows_mean = (rows @ mu).to(out_dtype)  # (k,)
    return AwareSpectrum(
        U.to(out_dtype), S.to(out_dtype), Vh.to(out_dtype), total_energy=float(total) + residual,
        method=method, exact=spec.exact, energy=np.asarray(energy, dtype=np.float64), residual=float(residual),
        mean_shift=shift, rows_mean=rows_mean, ridge=float(lam), samples=int(count),
    )


def _refit(W, stats, fit: AwareFit, center, rank, seed, out_dtype, name, left=None):
    """Sequential refit: reduced-rank regression of the original outputs on the current inputs (Izenman 1975)."""
    if fit.method != "whiten":
        raise FactorizeError(f"{name}: the sequential refit needs method='whiten'", fix="use method='whiten'")
    n, N = stats.width, stats.count
    mu, mu_ref = stats.mean, stats.reference_total / max(N, 1)
    C = stats.moment()  # sum x x^T (current inputs)
    C_ref = stats.reference_moment  # sum x_ref x_ref^T
    C_rx = stats.cross  # sum x_ref x^T
    if center:
        C = C - N * torch.outer(mu, mu)
        C_ref = C_ref - N * torch.outer(mu_ref, mu_ref)
        C_rx = C_rx - N * torch.outer(mu_ref, mu)
    eye = torch.eye(n, dtype=C.dtype, device=C.device)
    mean_diag = float(C.diagonal().mean()) or 1.0
    lam_ls = fit.refit_ridge * mean_diag
    # ridge towards the original weight: argmin ||W X_ref^T - W_t X^T||^2 + lam ||W_t - W||^2
    W_ls = torch.linalg.solve(C + lam_ls * eye, (W @ C_rx + lam_ls * W).T).T  # (m, n) = (W C_rx + lam W)(C + lam I)^-1
    lam = _ridge_for(stats, C.diagonal(), fit.ridge)
    Z = W_ls @ sqrt_factor(C, lam)  # (m, n)
    Rw, Rls = (W, W_ls) if left is None else (left[0] @ W, left[0] @ W_ls)
    spec = decompose(Z if left is None else left[0] @ Z, method=fit.solver, rank=rank, seed=seed, precision="float64",
                     name=name)
    # least-squares residual ||R(W X_ref^T - W_ls X^T)||^2 = tr(Rw C_ref Rw^T) - 2 tr(Rw C_rx Rls^T) + tr(Rls C Rls^T)
    residual = float(((Rw @ C_ref) * Rw).sum() - 2 * ((Rw @ C_rx) * Rls).sum() + ((Rls @ C) * Rls).sum())
    residual = max(residual, 0.0)
    return _finish(W_ls, spec, spec.energies(), spec.total_energy, residual, mu_ref if center else None, mu, lam,
                   N, out_dtype, fit.method, W_ref=W, left=left)


# ---------------------------------------------------------------------------------------------------------------
# many sites at once, and the apply step


def aware_spectra(
    model: nn.Module,
    sites: Iterable[Site],
    stats: Mapping[str, InputStats],
    fit: AwareFit | None = None,
    *,
    ranks: Mapping[str, int] | None = None,
    output_grams: Mapping[str, torch.Tensor] | None = None,
    execution: Execution | None = None,
    **keywords: Any,
) -> dict[str, AwareSpectrum]:
    """Activation-aware spectrum of every site from its statistics.

    ``fit`` (:class:`AwareFit`, or its fields as keywords) says how each layer is fitted; its ``center="auto"``
    centres (with bias correction) the layers that have a bias and are not embeddings. ``ranks`` bounds the
    triplets a partial solver computes. ``output_grams`` (from
    :func:`factorize.calibrated.gradients.collect_output_grams`) weight each site's output directions.
    ``execution`` (:class:`~factorize.execution.Execution`, or its fields as keywords) says how it runs:
    ``workers > 1`` decomposes that many layers at once in threads; results equal a serial run's.
    A site with no statistics, or whose statistics hold no sample, is an error listing every such site.
    """
    fit, execution = AwareFit.from_keywords(fit, execution, keywords)
    sites = list(sites)
    missing = [s.name for s in sites if s.name not in stats or stats[s.name].count <= 0]
    if missing:
        raise FactorizeError(
            "the calibration batches never reached some layers, so they have no input statistics", missing,
            fix="give sample inputs that run through these layers, or exclude them (exclude=[...])",
        )

    def one(site: Site) -> AwareSpectrum:
        W = matrix_of(get_module(model, site.name), site.kind)  # (m, n)
        one_fit = dataclasses.replace(fit, center=center_for(site, fit.center))
        k = (ranks or {}).get(site.name)
        G = (output_grams or {}).get(site.name)
        return decompose_fitted(W, stats[site.name], one_fit, G, k, execution.seed, execution.precision, site.name)

    return per_site(one, sites, workers=execution.workers, progress=execution.progress)


def center_for(site: Site, center: bool | str) -> bool:
    """Whether ``site`` gets mean-centred factors under the ``center`` option (``"auto"``: where a bias absorbs it)."""
    if site.kind.startswith("conv_transpose"):
        return False  # its m = out * prod(kernel) rows overlap-add into the output: no per-channel bias absorbs a shift
    if center == "auto":
        return site.has_bias and site.kind != "embedding"
    if center and not site.has_bias:
        return False  # nowhere to put the correction
    return bool(center)


@torch.no_grad()
def apply_bias_shifts(model: nn.Module, plan: Mapping, spectra: Mapping[str, Spectrum]) -> None:
    """Add each factored layer's bias correction (:meth:`AwareSpectrum.bias_shift`) to its output bias, in place.

    Call once, right after :func:`factorize.rewrite.apply.apply_plan` built the factored layers from ``spectra``.
    """
    for e in factored_entries(plan):
        spec = spectra.get(e.name)
        if not isinstance(spec, AwareSpectrum):
            continue
        shift = spec.bias_shift(e.rank)
        layer = get_module(model, e.name)
        bias = getattr(getattr(layer, "second", None), "bias", None)
        if shift is None or bias is None:
            continue
        bias.add_(shift.to(device=bias.device, dtype=bias.dtype).reshape(bias.shape))
