"""Decompose a weight matrix into its singular spectrum, with the predicted error at every rank.

Methods:

* ``exact``: ``torch.linalg.svd`` (LAPACK) of the whole matrix; every singular value is known.
* ``gram``: the symmetric eigendecomposition of the smaller Gram matrix (W W^T or W^T W) in float64, whose
  eigenvalues are the squared singular values and whose eigenvectors are the singular vectors of that side
  (Golub & Van Loan, Matrix Computations, 4th ed., sec. 8.6). Forming the Gram matrix squares the condition
  number, so singular values below about sqrt(eps) * s_1 lose relative accuracy; truncation only needs the
  energies s_i^2, which keep an absolute accuracy of about eps * s_1^2 in float64. Much faster than a full
  LAPACK SVD on the CPU (one matrix product and one symmetric eigensolve instead of a bidiagonalisation).
* ``auto``: ``randomized`` when the largest rank needed is well below min(m, n) (sketch at most a sixth) and an
  a-posteriori estimate puts its error within 1% of the optimum; ``gram`` otherwise.
* ``randomized``: the randomized range finder with power (subspace) iterations of Halko, Martinsson & Tropp,
  "Finding structure with randomness", SIAM Review 53(2), 2011 (Algorithms 4.4 and 5.1): a Gaussian sketch of
  k + p columns, q power iterations re-orthonormalised by QR, then the SVD of the small projected matrix.
  Seeded through an explicit ``torch.Generator``: the same matrix and seed give the same factors.

* values first (the budget route): :func:`values_only` (every singular value from ``eigvalsh`` of the Gram
  matrix, no vectors) to allocate ranks, then :func:`leading` (only the kept vectors, by Chebyshev-filtered
  subspace iteration with an exact 1% error guard, both possible because the whole spectrum is known).

All return a :class:`Spectrum`. By the Eckart-Young-Mirsky theorem (Eckart & Young 1936; Mirsky 1960) the
rank-r truncation ``U_r S_r V_r^T`` is the best rank-r approximation in every unitarily invariant norm, with
Frobenius error ``sqrt(sum_{i>r} s_i^2)`` and spectral error ``s_{r+1}``. For a randomized spectrum, which holds
only the leading k values, the Frobenius tail is taken from the exactly known total ``||W||_F^2`` minus the
kept energy, which is the error of the factors actually produced (their columns are orthonormal).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
import torch

from factorize.choices import METHODS
from factorize.errors import FactorizeError
from factorize.execution import resolve_execution
from factorize.spectra import tridiagonal
from factorize.spectra.signs import fix_signs
from factorize.spectra.subspace import filtered_subspace
from factorize.spectra.tridiagonal import SERIAL_UP_TO, Reduction
from factorize.threads import torch_threads

RANDOMIZED_FRACTION = 6  # auto: randomized only when the sketch (rank + oversampling) is at most min(m, n) / this
AUTO_TOLERANCE = 0.01  # auto: accept randomized factors only if provably within 1% of the optimal error


@dataclass
class Spectrum:
    """Singular triplets of one matrix view, and what truncating them costs.

    ``U`` (m x k), ``S`` (k,), ``Vh`` (k x n) are in the compute dtype (float32 or float64). ``total_energy`` is
    ``||W||_F^2`` -- the sum of all squared singular values, including any a randomized method did not compute.
    """

    U: torch.Tensor  # (m, k)
    S: torch.Tensor  # (k,)
    Vh: torch.Tensor  # (k, n)
    total_energy: float
    method: str
    exact: bool  # True when S holds every singular value of the matrix
    gram: torch.Tensor | None = field(default=None, repr=False, compare=False)  # values_only(keep_gram=True)
    reduction: Reduction | None = field(default=None, repr=False, compare=False)  # the same, tridiagonal route

    @property
    def shape(self) -> tuple[int, int]:
        return int(self.U.shape[0]), int(self.Vh.shape[1])

    @property
    def computed_rank(self) -> int:
        """How many singular values are known (``len(S)``)."""
        return int(self.S.shape[0])

    @property
    def vector_rank(self) -> int:
        """How many leading singular vector pairs are held: ``computed_rank`` for a full decomposition, 0 for
        :func:`values_only`, the rank asked for after :func:`leading`."""
        return int(self.U.shape[1])

    def energies(self) -> np.ndarray:
        """Squared singular values s_i^2, float64, in decreasing order."""
        s = self.S.detach().to(torch.float64).cpu().numpy()
        return s * s

    def kept_energy(self) -> np.ndarray:
        """``kept[r]`` = sum_{i<r} s_i^2 for r = 0..k (length k + 1)."""
        return np.concatenate([[0.0], np.cumsum(self.energies())])

    def errors(self) -> np.ndarray:
        """Predicted Frobenius error of the rank-r truncation for r = 0..k (Eckart-Young-Mirsky)."""
        tail = np.maximum(self.total_energy - self.kept_energy(), 0.0)
        return np.sqrt(tail)

    def error(self, rank: int) -> float:
        """Predicted Frobenius error ``||W - W_r||_F`` at ``rank``."""
        return float(self.errors()[min(rank, self.computed_rank)])

    def relative_error(self, rank: int) -> float:
        """``||W - W_r||_F / ||W||_F`` (0 for an all-zero matrix)."""
        return self.error(rank) / np.sqrt(self.total_energy) if self.total_energy > 0 else 0.0

    def energy_fraction(self, rank: int) -> float:
        """Fraction of ``||W||_F^2`` kept at ``rank``."""
        if self.total_energy <= 0:
            return 1.0
        return float(self.kept_energy()[min(rank, self.computed_rank)] / self.total_energy)

    def rank_for_energy(self, fraction: float) -> int:
        """Smallest r keeping at least ``fraction`` of the squared singular values (at most the computed rank)."""
        if self.total_energy <= 0:
            return 1
        kept = self.kept_energy() / self.total_energy
        r = int(np.searchsorted(kept, fraction - 1e-12, side="left"))
        return max(1, min(r, self.computed_rank))

    def without_vectors(self) -> Spectrum:
        """This spectrum without its singular vectors (nor a kept Gram matrix): enough to choose ranks, k floats
        instead of k(m + n). A subclass keeps its per-direction values (e.g. the output energies)."""
        m, n = self.shape
        return replace(self, U=self.U.new_empty(m, 0), S=self.S.clone(), Vh=self.Vh.new_empty(0, n), gram=None,
                       reduction=None)

    def factors(self, rank: int) -> tuple[torch.Tensor, torch.Tensor]:
        """Balanced factors ``B = U_r sqrt(S_r)`` (m x r) and ``A = sqrt(S_r) Vh_r`` (r x n), so ``B @ A = W_r``.

        Splitting the singular values evenly keeps the two factors on the same scale, which helps a later
        fine-tune (neither factor dominates the gradient).
        """
        if not 1 <= rank <= self.vector_rank:
            raise FactorizeError(f"rank {rank} is outside 1..{self.vector_rank} for this spectrum"
                                 + ("" if self.vector_rank == self.computed_rank else
                                    f" (it holds {self.computed_rank} singular values but only {self.vector_rank}"
                                    " vector pairs)"),
                                 fix="compute the vectors for that rank with leading(matrix, rank, values=spectrum)")
        root = self.S[:rank].sqrt()  # (r,)
        return self.U[:, :rank] * root, root[:, None] * self.Vh[:rank]  # (m, r), (r, n)

    def truncated(self, rank: int) -> torch.Tensor:
        """The rank-r approximation itself, m x n."""
        B, A = self.factors(rank)
        return B @ A


def compute_dtype_for(weight: torch.Tensor, precision: str | None = None) -> torch.dtype:
    """float64 for float64 weights or when asked, float32 otherwise (half precision is never decomposed as is)."""
    if precision == "float64" or weight.dtype == torch.float64:
        return torch.float64
    if precision not in (None, "float32"):
        raise FactorizeError(f"unknown precision {precision!r}", fix="use 'float32' or 'float64'")
    return torch.float32


def decompose(
    matrix: torch.Tensor | np.ndarray,
    *,
    method: str = "exact",
    rank: int | None = None,
    oversample: int = 10,
    power_iters: int = 2,
    seed: int = 0,
    precision: str | None = None,
    name: str = "matrix",
) -> Spectrum:
    """Singular spectrum of an m x n matrix.

    Args:
        matrix: the weight's matrix view (out x in); a torch tensor or numpy array. It is not modified.
        method: ``"auto"``, ``"exact"``, ``"gram"`` or ``"randomized"``.
        rank: for ``randomized`` and ``auto``, how many leading singular triplets are needed (k); ignored by
            ``exact`` and ``gram``. Without it ``auto`` and ``randomized`` fall back to ``gram``.
        oversample: extra sketch columns p (Halko et al. 2011 suggest p = 5..10).
        power_iters: power iterations q; each sharpens a slowly decaying spectrum (Halko et al. 2011, sec. 4.5).
        seed: seed of the Gaussian sketch.
        precision: ``"float32"`` or ``"float64"``; default float64 for float64 weights, float32 otherwise.
        name: the layer's name, used in error messages.
    """
    if method not in METHODS:
        raise FactorizeError(f"unknown method {method!r} for {name}", fix=f"use one of {', '.join(METHODS)}")
    w = _prepared(matrix, precision, name)
    if rank is not None and rank <= 0:
        raise FactorizeError(f"{name}: rank must be >= 1, got {rank}")
    if method == "exact":
        return _exact(w)
    if method == "gram" or rank is None:
        return _gram(w)
    if method == "randomized":
        return _randomized(w, rank, oversample, power_iters, seed)[0]
    return _auto(w, rank, oversample, power_iters, seed)


def _prepared(matrix: torch.Tensor | np.ndarray, precision: str | None, name: str) -> torch.Tensor:
    """The matrix as a 2-D tensor in the compute dtype, checked finite (a FactorizeError naming ``name`` if not)."""
    w = _as_matrix(matrix, precision, name)
    if not bool(torch.isfinite(w).all()):
        _raise_not_finite(w, name)
    return w


def _as_matrix(matrix: torch.Tensor | np.ndarray, precision: str | None, name: str) -> torch.Tensor:
    w = torch.as_tensor(matrix).detach()
    if w.dim() != 2:
        raise FactorizeError(f"{name}: expected a 2-D matrix, got shape {tuple(w.shape)}")
    return w.to(compute_dtype_for(w, precision))


def _raise_not_finite(w: torch.Tensor, name: str) -> None:
    bad = int((~torch.isfinite(w)).sum())
    if bad:
        raise FactorizeError(
            f"{name}: the weight holds {bad} NaN or Inf value(s)",
            fix="repair or retrain the layer, or exclude it (exclude=[...] / --exclude)",
        )


def _prepared_with_energy(matrix: torch.Tensor | np.ndarray, precision: str | None,
                          name: str) -> tuple[torch.Tensor, float]:
    """:func:`_prepared` and ``||W||_F^2`` (float64) in one pass over the matrix.

    The float64 sum of squares is finite exactly when every entry is finite, for float32 entries (each square is
    at most 1.2e77 and a matrix holds far fewer than 1e231 of them): NaN and Inf propagate through the sum. So
    the element-wise ``isfinite`` scan is run only when the sum is not finite, to count the offenders (or, for
    float64 entries above about 1e154, to find that they are all finite after all).
    """
    w = _as_matrix(matrix, precision, name)
    total = _frobenius2(w)
    if not np.isfinite(total):
        _raise_not_finite(w, name)
    return w, total


def _exact(w: torch.Tensor) -> Spectrum:
    with lapack_threads(min(w.shape)):
        U, S, Vh = torch.linalg.svd(w, full_matrices=False)  # (m, k), (k,), (k, n); k = min(m, n)
    U, Vh = fix_signs(U, Vh)
    total = float((S.to(torch.float64) ** 2).sum())
    return Spectrum(U, S, Vh, total_energy=total, method="exact", exact=True)


GRAM_BLOCK = 1024  # rows/columns converted to float64 at a time: memory stays near the matrix itself
SERIAL_LAPACK_UP_TO = SERIAL_UP_TO  # 2048: eigensolves/SVDs of at most this order run on one thread (lapack_threads)


def lapack_threads(order: int):
    """Run a factorisation (and, in :func:`values_only` / :func:`leading`, its products) of the given order on one
    thread when it is small.

    Measured on our 2-core machine while other processes ran: a 1024 x 1024 float64 eigh took 0.48 s on one
    thread and 24.8 s on two (MKL's threads wait on each other when the cores are oversubscribed), and 384 x 384
    took 0.04 s against 7.5 s. Up to order 2048 the serial solve is fast enough that the risk is not worth it,
    and a result of that order then never depends on the caller's thread count.
    """
    return torch_threads(1 if order <= SERIAL_LAPACK_UP_TO else None)


def _gram(w: torch.Tensor) -> Spectrum:
    """Singular triplets from the eigendecomposition of the smaller Gram matrix, in float64.

    The float64 work is done in blocks of ``GRAM_BLOCK`` rows or columns, so no float64 copy of the whole matrix
    is ever held; ||W||_F^2 is the trace of the Gram matrix.
    """
    m, n = w.shape
    wide = m <= n
    k = min(m, n)
    gram = torch.zeros(k, k, dtype=torch.float64, device=w.device)  # (k, k), k = min(m, n)
    for blk in _blocks(w, wide):
        b64 = blk.to(torch.float64)
        gram += b64 @ b64.T if wide else b64.T @ b64
    total = float(gram.diagonal().sum())
    with lapack_threads(k):
        evals, evecs = torch.linalg.eigh(gram)  # ascending
    evals, evecs = evals.flip(0).clamp_min(0), evecs.flip(1)
    S = evals.sqrt()  # (k,)
    inv = torch.where(S > S[0] * 1e-12, 1.0 / S, torch.zeros_like(S)) if S.numel() else S  # noqa: SIM300 - tensor, not Yoda
    if wide:  # U = eigenvectors (m, k); Vh = S^-1 U^T W (k, n), column block by column block
        U = evecs
        Vh = torch.cat([((evecs.T @ blk.to(torch.float64)) * inv[:, None]).to(w.dtype) for blk in _blocks(w, True)], 1)
    else:  # V = eigenvectors (n, k); U = W V S^-1 (m, k), row block by row block
        Vh = evecs.T
        U = torch.cat([((blk.to(torch.float64) @ evecs) * inv).to(w.dtype) for blk in _blocks(w, False)], 0)
    U, Vh = fix_signs(U.to(w.dtype), Vh.to(w.dtype))
    return Spectrum(U, S.to(w.dtype), Vh, total_energy=total, method="gram", exact=True)


def _blocks(w: torch.Tensor, columns: bool):
    """Column blocks (for a wide matrix) or row blocks (for a tall one) of ``GRAM_BLOCK``."""
    size = w.shape[1] if columns else w.shape[0]
    for start in range(0, size, GRAM_BLOCK):
        yield w[:, start:start + GRAM_BLOCK] if columns else w[start:start + GRAM_BLOCK]


def _frobenius2(w: torch.Tensor) -> float:
    """||W||_F^2 accumulated in float64 one row block at a time (no float64 copy of the whole matrix)."""
    return float(sum(float(torch.linalg.vector_norm(blk.to(torch.float64))) ** 2 for blk in _blocks(w, False)))


def _randomized(w: torch.Tensor, rank: int, oversample: int, power_iters: int, seed: int) -> tuple[Spectrum, float]:
    """Randomized SVD (Halko et al. 2011, Alg. 4.4 + 5.1). Also returns an a-posteriori estimate of how much more
    energy the optimal rank-k truncation keeps than these factors (0 when the result is exact)."""
    m, n = w.shape
    k = min(rank, m, n)
    sketch = min(k + max(oversample, 0), m, n)
    if sketch >= min(m, n):  # the sketch would be as large as the matrix: exact is cheaper and better
        return _exact(w), 0.0
    gen = torch.Generator(device="cpu").manual_seed(seed)
    omega = torch.randn(n, sketch, generator=gen, dtype=w.dtype).to(w.device)  # (n, k+p)
    Q, _ = torch.linalg.qr(w @ omega)  # (m, k+p): orthonormal basis of the sketched range
    kept: list[float] = []
    for it in range(power_iters + 1):
        small = Q.T @ w  # (k+p, n)
        with lapack_threads(sketch):
            kept.append(float((torch.linalg.svdvals(small)[:k].to(torch.float64) ** 2).sum()))
        if it == power_iters:
            break
        Z, _ = torch.linalg.qr(small.T)  # (n, k+p): subspace iteration, re-orthonormalised each half step
        Q, _ = torch.linalg.qr(w @ Z)  # (m, k+p)
    with lapack_threads(sketch):
        Ub, S, Vh = torch.linalg.svd(small, full_matrices=False)
    U = Q @ Ub  # (m, k+p)
    U, Vh = fix_signs(U[:, :k], Vh[:k])
    spec = Spectrum(U, S[:k], Vh, total_energy=_frobenius2(w), method="randomized", exact=False)  # exact ||W||_F^2
    return spec, _gap_estimate(kept, S, k)


def _gap_estimate(kept: list[float], S: torch.Tensor, k: int) -> float:
    """Energy the optimal rank-k truncation keeps beyond the randomized one, estimated from convergence.

    Each power iteration shrinks the captured-energy gap of subspace iteration by about
    rho = (s_{l+1} / s_k)^4 for a sketch of l columns (Golub & Van Loan, sec. 8.2.4; Halko et al. 2011, sec. 4.5,
    eq. 4.8), so with the last increment d the remaining gap is about d * rho / (1 - rho). s_{l+1} is proxied by
    the smallest sketched value. Returns inf when no estimate is possible (no iteration, or rho close to 1).
    """
    if len(kept) < 2 or S[k - 1] <= 0:
        return float("inf")
    rho = float(S[-1] / S[k - 1]) ** 4
    if rho >= 0.9:
        return float("inf")
    return max(kept[-1] - kept[-2], 0.0) * rho / (1 - rho)


def _auto(w: torch.Tensor, rank: int, oversample: int, power_iters: int, seed: int) -> Spectrum:
    """Randomized where the rank needed is small and its error within 1% of optimal by the estimate; else gram.

    When the estimate cannot vouch for the randomized factors (a flat spectrum: on MiniLM's pretrained matrices at
    rank 32, 35 of 36), the exact route is :func:`leading` at ``rank`` (every singular value, then only the kept
    vectors, within 1% of the optimum by the exact guard), not the full Gram eigendecomposition with every vector:
    measured on one thread on those 36 matrices, 0.28 s against 0.98 s, and ``auto`` as a whole went from 0.87x a
    plain SVD to faster than it."""
    m, n = w.shape
    oversample = max(oversample, rank // 2)
    if (rank + oversample) * RANDOMIZED_FRACTION > min(m, n):
        return _gram(w)
    spec, gap = _randomized(w, rank, oversample, max(power_iters, 2), seed)
    err2 = spec.error(spec.computed_rank) ** 2  # the randomized factors' own error (exact, from ||W||_F)
    if spec.exact or err2 == 0.0 or err2 <= (1 + AUTO_TOLERANCE) ** 2 * max(err2 - gap, 0.0):
        spec.method = "auto:randomized" if not spec.exact else spec.method
        return spec
    out = leading(w, rank, seed=seed)
    out.method = f"auto:{out.method}"
    return out


# ---------------------------------------------------------------------------------------------------------------
# singular values first, vectors only for what is kept

LEADING_MAX_ITERS = 12  # filtered subspace rounds before leading() falls back to the full Gram eigendecomposition
LEADING_DIRECT_FRACTION = 2  # leading(): block of rank + oversampling above order / this -> full eigh directly


SYMMETRIC_BLOCKS = 4  # the Gram matrix is formed in 4 x 4 blocks, computing only the 10 on or below the diagonal


def _small_gram(w: torch.Tensor) -> torch.Tensor:
    """The smaller Gram matrix, W W^T (wide) or W^T W (tall), k x k with k = min(m, n), in w's dtype.

    Symmetric, so only the blocks on and below the diagonal are multiplied and the others are their transposes:
    10 of 16 block products (measured 1024 x 1024 float32, one thread: 0.015 s against 0.027 s for ``w @ w.T``).
    """
    rows = w if w.shape[0] <= w.shape[1] else w.T  # (k, N): G = rows @ rows^T
    k = rows.shape[0]
    if k < 256:
        return rows @ rows.T
    edges = [k * i // SYMMETRIC_BLOCKS for i in range(SYMMETRIC_BLOCKS + 1)]
    gram = rows.new_empty(k, k)
    for i in range(SYMMETRIC_BLOCKS):
        ri = rows[edges[i]:edges[i + 1]]
        for j in range(i + 1):
            blk = ri @ rows[edges[j]:edges[j + 1]].T  # (b_i, b_j)
            gram[edges[i]:edges[i + 1], edges[j]:edges[j + 1]] = blk
            if j < i:
                gram[edges[j]:edges[j + 1], edges[i]:edges[i + 1]] = blk.T
    return gram


def values_only(matrix: torch.Tensor | np.ndarray, *, precision: str | None = None, keep_gram: bool = False,
                name: str = "matrix") -> Spectrum:
    """Every singular value of ``matrix`` and ``||W||_F^2``, without any singular vector.

    The squared singular values are the eigenvalues of the smaller Gram matrix (W W^T or W^T W; Golub & Van Loan,
    Matrix Computations, 4th ed., sec. 8.6), found by a symmetric eigensolve without eigenvectors
    (``torch.linalg.eigvalsh``), in the compute dtype (float32 for float32 and half-precision weights: a float64
    Gram costs several times more). What rank allocation needs are the tail energies sum_{i>r} s_i^2; the
    eigenvalues of the Gram matrix carry an absolute error of about eps * s_1^2 each (Golub & Van Loan, sec. 8.1,
    Weyl's theorem applied to the rounding of the product and of the eigensolve), so tails keep an absolute
    accuracy of about r * eps * s_1^2, while singular values below about sqrt(eps) * s_1 lose relative accuracy.
    ``||W||_F^2`` is accumulated in float64 from the matrix itself.

    Returns a :class:`Spectrum` whose ``S`` holds all min(m, n) values (``exact=True``) and whose ``U`` / ``Vh``
    have width 0 (``vector_rank == 0``); :func:`leading` adds the vectors for the rank that is kept.
    ``keep_gram=True`` keeps the Gram matrix on the result (``spectrum.gram``, k x k, at most the weight's size)
    so that :func:`leading` does not form it again; drop it (``spectrum.gram = None``) once the vectors are in.
    """
    w, total = _prepared_with_energy(matrix, precision, name)
    with lapack_threads(min(w.shape)):  # the Gram product too: same bits whatever the caller's threads
        return _gram_values(w, keep_gram, total)


def _gram_values(w: torch.Tensor, keep_gram: bool = False, total: float | None = None) -> Spectrum:
    m, n = w.shape
    gram = _small_gram(w)  # (k, k)
    red = tridiagonal.reduce(gram) if _route("auto", w) == "tridiagonal" else None  # consumes gram
    if red is not None and red.eigenvalues() is not None:
        evals = torch.from_numpy(red.eigenvalues())  # ascending
        gram = None
    else:
        if _route("auto", w) == "tridiagonal":  # LAPACK refused the reduction (not seen): the plain route
            gram, red = _small_gram(w), None
        with lapack_threads(gram.shape[0]):
            evals = torch.linalg.eigvalsh(gram)  # ascending
    S = evals.flip(0).clamp_min(0).sqrt()  # (k,)
    return Spectrum(w.new_empty(m, 0), S, w.new_empty(0, n), method="values", exact=True,
                    total_energy=_frobenius2(w) if total is None else total,
                    gram=gram if keep_gram else None, reduction=red if keep_gram else None)


ROUTES = ("auto", "tridiagonal", "subspace")  # leading(route=...)
_NUMPY_DTYPE = {torch.float32: np.float32, torch.float64: np.float64}


def _route(route: str, w: torch.Tensor) -> str:
    """``route`` resolved for ``w``: "auto" is "tridiagonal" where :mod:`factorize.spectra.tridiagonal` can run
    (scipy and threadpoolctl installed, a CPU matrix of order >= 2), else "subspace"."""
    usable = tridiagonal.available() and w.device.type == "cpu" and min(w.shape) >= 2
    if route == "auto":
        return "tridiagonal" if usable else "subspace"
    if route == "tridiagonal" and not usable:
        raise FactorizeError("the tridiagonal route needs scipy and threadpoolctl and a CPU matrix of order >= 2",
                             fix="pip install scipy threadpoolctl (or factorize[fast]), or use route='auto'")
    if route not in ROUTES:
        raise FactorizeError(f"unknown route {route!r}", fix=f"use one of {', '.join(ROUTES)}")
    return route


def leading(
    matrix: torch.Tensor | np.ndarray,
    rank: int,
    *,
    values: Spectrum | None = None,
    guard_ranks: tuple[int, ...] | list[int] = (),
    oversample: int | None = None,
    max_iters: int = LEADING_MAX_ITERS,
    tolerance: float = AUTO_TOLERANCE,
    route: str = "auto",
    name: str = "matrix",
    **execution,
) -> Spectrum:
    """The leading ``rank`` singular vector pairs of ``matrix``, within ``tolerance`` (1%) of the optimal error.

    ``route="tridiagonal"`` (the ``"auto"`` choice where scipy and threadpoolctl are installed): the tridiagonal
    reduction of the smaller Gram matrix G that :func:`values_only` made for the values (kept with
    ``keep_gram=True``, made here otherwise), all eigenvectors of the tridiagonal matrix by divide and conquer, and
    the reflectors applied to the ``rank`` kept ones (:mod:`factorize.spectra.tridiagonal`). The same exact guard
    as below is checked on the result (the energy of W on the vectors), with the full eigendecomposition of G as
    the fallback.

    ``route="subspace"``: Chebyshev-filtered subspace iteration on the smaller Gram matrix G (Golub & Van Loan, sec.
    8.2.4; Saad, Numerical Methods for Large Eigenvalue Problems, 2nd ed., 2011, sec. 7.4; Zhou & Saad 2007): a
    seeded Gaussian block of ``rank + oversample`` columns; each round applies a Chebyshev polynomial of G that
    keeps the eigenvalues the block cannot hold within [-1, 1] and amplifies the wanted ones (degree d: d products G
    Y; the interval is exact because every eigenvalue is known, see :mod:`factorize.spectra.subspace`), one thin QR,
    and Rayleigh-Ritz (the eigenpairs of Q^T G Q); the next round starts from the Ritz vectors. Because every
    singular value is known (``values``, from :func:`values_only`, computed here when not given), the error is known
    exactly rather than estimated: with orthonormal Ritz vectors V_r, ``||W - W V_r V_r^T||_F^2 = ||W||_F^2 - sum of
    the top r Ritz values`` and the optimum is ``||W||_F^2 - sum_{i<=r} s_i^2`` (Eckart-Young-Mirsky). The iteration
    stops once the error at ``rank`` and at every rank in ``guard_ranks`` (smaller ranks that will be cut from these
    vectors, e.g. by a sweep) is within ``1 + tolerance`` of its optimum, allowing for the rounding of the Gram
    route (``2 r eps s_1^2``). After ``max_iters`` rounds without that, or when the block would exceed half of
    min(m, n), it falls back to the full eigendecomposition of G (``method`` says which route was taken).

    Returns a :class:`Spectrum` holding all of ``values.S`` (so it still serves rank allocation) and ``rank``
    vector pairs. The pairs are scaled with those singular values, ``U_r = W V_r / S_r`` (tall matrices; wide:
    ``Vh_r = S_r^-1 U_r^T W``), so ``factors(r)`` multiplies back to exactly the projection ``W V_r V_r^T`` for
    every r <= rank. Seeded through an explicit ``torch.Generator``: same matrix and seed, same bytes. ``seed`` and
    ``precision`` (keywords, as for :func:`decompose`) are the :class:`~factorize.execution.Execution` fields read.
    """
    run, rest = resolve_execution(execution.pop("execution", None), execution)  # Execution, or seed=/precision=
    if rest:
        raise FactorizeError(f"leading() got unknown keywords: {', '.join(rest)}", fix="accepted: seed, precision")
    seed, precision = run.seed, run.precision
    if values is None:
        w, total = _prepared_with_energy(matrix, precision, name)
    else:  # ||W||_F^2 only to check that values= belongs to this matrix: accumulated in the compute dtype
        w = _as_matrix(matrix, precision, name)
        total = float(torch.linalg.vector_norm(w)) ** 2
        if not np.isfinite(total):
            _raise_not_finite(w, name)
            total = _frobenius2(w)  # all finite after all: the float64 sum (float32 overflowed)
        elif not np.isclose(values.total_energy, total, rtol=1e-4, atol=0.0):
            # a float32 sum of many squares drifts (measured 3.9e-4 relative at 2048 x 5632, 1e-3 at 600 x 20000,
            # which refused a 1.1B checkpoint's MLP matrices): the float64 sum, as the values pass computed it, decides
            total = _frobenius2(w)
    k = min(w.shape)
    guard = sorted({int(r) for r in guard_ranks} | {int(rank)}) if k else []
    bad = [r for r in guard if not 1 <= r <= k]
    if bad:
        raise FactorizeError(f"{name}: rank(s) {bad} outside 1..{k} for a {tuple(w.shape)} matrix",
                             fix=f"ask for ranks between 1 and {k}")
    if values is None:
        values = _gram_values(w, keep_gram=True, total=total)
    elif (values.shape != tuple(w.shape) or values.computed_rank != k or not values.exact
          or not np.isclose(values.total_energy, total, rtol=1e-4, atol=0.0)):
        raise FactorizeError(f"{name}: values= holds {values.computed_rank} singular values of a {values.shape} "
                             f"matrix with ||W||_F^2 = {values.total_energy:.6g}, not all {k} of this "
                             f"{tuple(w.shape)} one (||W||_F^2 = {total:.6g})",
                             fix="pass values_only(matrix) of this same matrix, or values=None")
    if max_iters < 0 or tolerance < 0:
        raise FactorizeError(f"{name}: max_iters and tolerance must be >= 0, got {max_iters} and {tolerance}")
    route = _route(route, w)
    with lapack_threads(k):  # products too: up to order 2048 the result never depends on the caller's threads
        return _leading(w, int(rank), values, guard, oversample, max_iters, tolerance, seed, route)


def _leading(w: torch.Tensor, rank: int, values: Spectrum, guard: list[int], oversample: int | None,
             max_iters: int, tolerance: float, seed: int, route: str) -> Spectrum:
    m, n = w.shape
    k = min(m, n)
    energies = values.energies()  # float64, decreasing
    kept = np.concatenate([[0.0], np.cumsum(energies)])
    total = values.total_energy
    slack = 2 * np.array(guard) * float(torch.finfo(w.dtype).eps) * (energies[0] if len(energies) else 0.0)
    allowed = (1 + tolerance) ** 2 * np.maximum(total - kept[guard], 0.0) + slack  # err^2 allowed at each guard rank
    gram, vecs, method = None, None, "leading:eigh"
    if route == "tridiagonal":
        red = values.reduction
        if red is None or red.order != k or red.d.dtype != _NUMPY_DTYPE[w.dtype]:
            red = tridiagonal.reduce(_small_gram(w))  # as values_only() would have kept it: the same bits
        vecs = red.top_vectors(rank) if red is not None else None
        method = "leading:tridiagonal"
    else:
        held = values.gram
        gram = held.to(w.dtype) if held is not None and tuple(held.shape) == (k, k) else _small_gram(w)  # (k, k)
        # oversampling: half the rank, but no more than keeps the block within k / LEADING_DIRECT_FRACTION (the
        # filter makes up for a narrower gap with its degree), and at least 16
        p = (max(16, min(rank // 2, k // LEADING_DIRECT_FRACTION - rank)) if oversample is None
             else max(int(oversample), 0))
        block = min(rank + p, k)
        if block * LEADING_DIRECT_FRACTION <= k and max_iters > 0:
            vecs, method = filtered_subspace(gram, energies, total, guard, allowed, rank, block, max_iters, seed)
    projected = None if vecs is None else _projected(w, vecs)
    if projected is not None and route == "tridiagonal":
        # the energy the vectors leave out, exactly (they are orthonormal): ||W||_F^2 - partial sums of ||W^T v||^2
        captured = np.concatenate([[0.0], np.cumsum(
            projected.to(torch.float64).square().sum(dim=1 if m <= n else 0).cpu().numpy())])
        if not bool(np.all(total - captured[guard] <= allowed)):
            projected = None
    if projected is None:  # fallback (or a block too large to pay off): the full symmetric eigendecomposition
        with lapack_threads(k):
            _, evecs = torch.linalg.eigh(_small_gram(w) if gram is None else gram)  # ascending
        vecs, method = evecs.flip(1)[:, :rank], "leading:eigh"  # (k, r)
        projected = _projected(w, vecs)
    S = values.S.to(w.dtype)
    s_r = S[:rank]
    inv = torch.where(s_r > S[0] * 1e-12, 1.0 / s_r, torch.zeros_like(s_r)) if rank else s_r
    if m <= n:  # vecs are left singular vectors (m, r); Vh_r = S_r^-1 U_r^T W (r, n)
        U, Vh = vecs, projected.mul_(inv[:, None])
    else:  # vecs are right singular vectors (n, r); U_r = W V_r S_r^-1 (m, r), scaled in place
        U, Vh = projected.mul_(inv), vecs.T
    U, Vh = fix_signs(U.contiguous(), Vh.contiguous())
    return Spectrum(U, S, Vh, total_energy=total, method=method, exact=True)


def _projected(w: torch.Tensor, vecs: torch.Tensor) -> torch.Tensor:
    """The matrix on the smaller side's vectors: V^T W (r, n) for a wide ``w``, W V (m, r) for a tall one."""
    return vecs.T @ w if w.shape[0] <= w.shape[1] else w @ vecs
