"""The symmetric eigenproblem of a Gram matrix through its tridiagonal reduction, kept between the singular values
and the kept vectors (an optional route: it needs scipy, for LAPACK's reduction, and threadpoolctl, to run it on
a stated number of threads; without them the callers use ``torch.linalg.eigvalsh`` and a filtered iteration).

A symmetric k x k matrix G is reduced to tridiagonal form T = Q^T G Q by k - 2 Householder reflections (LAPACK
``?sytrd``; Golub & Van Loan, Matrix Computations, 4th ed., sec. 8.3.1), which is most of the work of a symmetric
eigensolve. Every eigenvalue of T (= of G) then costs O(k^2) (``?sterf``, the root-free QL/QR iteration; sec.
8.3.3), and the kept eigenvectors of T (a few: inverse iteration, ``?stein``; many: all by divide and conquer,
``?stevd``, Cuppen 1981, sec. 8.4.4) cost little next to the reduction. The eigenvectors of G are Q z: applying the
reflectors to the r columns that are kept costs about 2 k^2 r (``torch.ormqr``), instead of a second reduction or an
iteration on G.

Why an optional dependency: torch exposes no tridiagonal reduction, and its ``eigvalsh`` (one thread) was measured
slower than scipy's blocked ``ssytrd`` + ``ssterf`` (384 x 384: 5.5 ms against 3.3 ms; 1024 x 1024: 65 ms against
32 ms; BENCHMARKS.md, "Budget pass").
"""

from __future__ import annotations

import threading
from contextlib import contextmanager
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
import torch

SERIAL_UP_TO = 2048  # as decompose.SERIAL_LAPACK_UP_TO: reductions of at most this order run on one BLAS thread


@lru_cache(maxsize=1)
def _backend():
    """``(scipy.linalg.lapack, ThreadpoolController)``, or None when either is missing (the route is then off)."""
    try:
        import scipy.linalg.lapack as lapack
        from threadpoolctl import ThreadpoolController
    except ImportError:
        return None
    return lapack, ThreadpoolController()  # after scipy's import, so its BLAS library is among those it controls


def available() -> bool:
    """Whether the tridiagonal route can run here (scipy and threadpoolctl importable)."""
    return _backend() is not None


_LOCK = threading.Lock()
_SERIAL_USERS = [0, None]  # callers inside blas_serial(), and the limiter that restores the thread counts


@contextmanager
def blas_serial(order: int):
    """scipy's BLAS on one thread for a problem of at most ``SERIAL_UP_TO`` (left as it is above), so the bits do
    not depend on the thread count and a one-thread comparison is one thread. Counted, so that concurrent callers
    (``workers > 1``) restore the count only when the last one leaves."""
    if order > SERIAL_UP_TO:
        yield
        return
    controller = _backend()[1]
    with _LOCK:
        if _SERIAL_USERS[0] == 0:
            _SERIAL_USERS[1] = controller.limit(limits=1, user_api="blas")
        _SERIAL_USERS[0] += 1
    try:
        yield
    finally:
        with _LOCK:
            _SERIAL_USERS[0] -= 1
            if _SERIAL_USERS[0] == 0:
                _SERIAL_USERS[1].restore_original_limits()
                _SERIAL_USERS[1] = None


@dataclass
class Reduction:
    """T = Q^T G Q of a symmetric k x k matrix G (``?sytrd``, lower): ``d`` (k,) and ``e`` (k - 1,) the diagonal and
    sub-diagonal of T; Q = H_1 ... H_{k-1}, H_i = I - tau_i v_i v_i^T, with v_i[i] = 1 and v_i[i+1:] stored below
    the sub-diagonal of ``reflectors`` (column i - 1; LAPACK's layout). All in G's dtype, on the CPU."""

    reflectors: np.ndarray  # (k, k), Fortran order
    tau: np.ndarray  # (k - 1,)
    d: np.ndarray  # (k,)
    e: np.ndarray  # (k - 1,)
    values: np.ndarray | None = None  # the eigenvalues, ascending, once computed

    @property
    def order(self) -> int:
        return int(self.d.shape[0])

    def eigenvalues(self) -> np.ndarray | None:
        """Every eigenvalue of G, ascending (``?sterf``, once; None if it does not converge)."""
        if self.values is None:
            lapack = _backend()[0]
            sterf = lapack.ssterf if self.d.dtype == np.float32 else lapack.dsterf
            values, info = sterf(self.d, self.e)  # copies: d and e stay for the vectors
            self.values = values if info == 0 else None
        return self.values

    def top_vectors(self, rank: int) -> torch.Tensor | None:
        """The eigenvectors of G for its ``rank`` largest eigenvalues, k x rank, in decreasing order of eigenvalue
        (None if LAPACK reports a failure): the eigenvectors of T, then Q applied to them (``torch.ormqr``)."""
        z = self.tridiagonal_vectors(rank)
        return None if z is None else self.applied(z)

    def applied(self, z: torch.Tensor) -> torch.Tensor:
        """Q z for eigenvectors z (k x r) of T: the eigenvectors of G (in place; ``torch.ormqr``, about 2 k^2 r)."""
        if self.order > 1:  # Q = diag(1, Q'), Q' the product of the reflectors of the trailing (k-1) x (k-1) part
            H = torch.from_numpy(self.reflectors)[1:, :-1]  # (k-1, k-1): vectors below its diagonal, QR layout
            z[1:] = torch.ormqr(H, torch.from_numpy(self.tau), z[1:], left=True, transpose=False)
        return z

    def captured(self, z: torch.Tensor) -> float | None:
        """sum_i z_i^T T z_i for vectors z (k x r) of T, in float64 -- the energy of G on Q z, since
        (Q z)^T G (Q z) = z^T T z -- or None when the columns of z are not orthonormal to 1e3 ulps of their
        dtype, so that the sum would not be an energy. O(k r) for T, O(k r^2) for the orthonormality check."""
        z64 = z.to(torch.float64)
        r = int(z64.shape[1])
        tol = 1e3 * float(np.finfo(self.d.dtype).eps) * max(self.order, 1) ** 0.5
        if r and float((z64.T @ z64 - torch.eye(r, dtype=torch.float64)).abs().max()) > tol:
            return None
        d = torch.from_numpy(self.d.astype(np.float64))[:, None]  # (k, 1)
        e = torch.from_numpy(self.e.astype(np.float64))[:, None]  # (k - 1, 1)
        Tz = d * z64  # (k, r): T z, tridiagonal
        Tz[:-1] += e * z64[1:]
        Tz[1:] += e * z64[:-1]
        return float((z64 * Tz).sum())

    def packed(self) -> dict[str, torch.Tensor]:
        """The reduction as flat tensors for a file (:meth:`unpacked` rebuilds it bit for bit): of the reflectors
        only what LAPACK stores below the sub-diagonal (k (k - 1) / 2 - (k - 1) values, a bit under half of G)."""
        k = self.order
        cols = [self.reflectors[j + 2:, j] for j in range(max(k - 2, 0))]  # column j: v_{j+1}[j+2:]
        flat = np.concatenate(cols) if cols else np.zeros(0, dtype=self.d.dtype)
        out = {"reflectors": torch.from_numpy(np.ascontiguousarray(flat)), "tau": torch.from_numpy(self.tau.copy()),
               "d": torch.from_numpy(self.d.copy()), "e": torch.from_numpy(self.e.copy())}
        if self.values is not None:
            out["values"] = torch.from_numpy(self.values.copy())
        return out

    @classmethod
    def unpacked(cls, parts: dict[str, torch.Tensor]) -> Reduction:
        """The reduction :meth:`packed` flattened (the unused upper part of the reflectors' array left zero)."""
        d = parts["d"].numpy()
        k = int(d.shape[0])
        c = np.zeros((k, k), dtype=d.dtype, order="F")
        flat, at = parts["reflectors"].numpy(), 0
        for j in range(max(k - 2, 0)):
            c[j + 2:, j] = flat[at:at + k - j - 2]
            at += k - j - 2
        values = parts["values"].numpy() if "values" in parts else None
        return cls(c, parts["tau"].numpy(), d, parts["e"].numpy(), values)

    def tridiagonal_vectors(self, rank: int) -> torch.Tensor | None:
        """The top ``rank`` eigenvectors of T, k x rank, decreasing. For at most a quarter of them, when T does not
        split: inverse iteration (``?stein``, O(k rank) plus re-orthogonalisation within clusters; Golub & Van
        Loan, sec. 8.2.2) from the eigenvalues of ``?sterf``. Otherwise, or if it fails: ``?stevd`` (all vectors
        by divide and conquer) and the top ``rank`` kept. Measured at k = 384, one thread: ``sstein`` 0.45 ms for
        21 vectors, ``sstevd`` 2.7 ms (``sstemr`` took about 5 ms for 110)."""
        k = self.order
        lapack = _backend()[0]
        single = self.d.dtype == np.float32
        if 4 * rank <= k and not self._splits() and self.eigenvalues() is not None:
            w = self.eigenvalues()[k - rank:]  # ascending, the top rank
            stein = lapack.sstein if single else lapack.dstein
            Z, info = stein(self.d, self.e, w, np.ones(k, dtype=np.int32), np.full(k, k, dtype=np.int32))
            if info == 0:
                return torch.from_numpy(Z[:, :rank][:, ::-1].copy(order="C"))  # (k, r), decreasing
        stevd = lapack.sstevd if single else lapack.dstevd
        with blas_serial(k):
            _, Z, info = stevd(self.d, self.e)  # ascending; Z (k, k)
        if info != 0:
            return None
        return torch.from_numpy(Z[:, k - rank:][:, ::-1].copy(order="C"))  # (k, r), decreasing

    def _splits(self) -> bool:
        """Whether T falls apart into blocks, by LAPACK's ``?stebz`` test e_j^2 <= ulp^2 |d_j d_{j+1}| + safe
        minimum (``?stein`` is then handed one block, so such a T takes the divide-and-conquer route)."""
        info = np.finfo(self.d.dtype)
        d = self.d.astype(np.float64)
        e2 = self.e.astype(np.float64) ** 2
        return bool(np.any(e2 <= float(info.eps) ** 2 * np.abs(d[:-1] * d[1:]) + float(info.tiny)))


def reduce(gram: torch.Tensor) -> Reduction | None:
    """The tridiagonal reduction of the symmetric CPU matrix ``gram`` (float32 or float64), which it overwrites
    (None if LAPACK reports a failure). Only the lower triangle is read."""
    lapack = _backend()[0]
    k = int(gram.shape[0])
    a = gram.numpy().T  # Fortran order without a copy (G is symmetric, so G^T's lower part is G's)
    sytrd, sytrd_lwork = ((lapack.ssytrd, lapack.ssytrd_lwork) if a.dtype == np.float32 else
                          (lapack.dsytrd, lapack.dsytrd_lwork))
    lwork, info = sytrd_lwork(k, lower=1)
    if info != 0:
        return None
    with blas_serial(k):
        c, d, e, tau, info = sytrd(a, lower=1, lwork=max(int(lwork), 1), overwrite_a=1)  # blocked with this lwork
    if info != 0:
        return None
    return Reduction(c, tau, d, e)
