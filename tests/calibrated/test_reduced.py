"""Whitened factors at a planned rank from the values pass's kept tridiagonal reduction (values first, vectors once),
and the exactly symmetric moment accumulation the block-by-block shrink packs.

Outside references: numpy's ``linalg.svd`` of the whitened weight W L (L L^T = C + lambda I from numpy's
``linalg.cholesky``): the activation-aware optimum at rank r is U_r U_r^T W with U_r the top left singular vectors
of W L (reduced-rank regression, Izenman 1975; Eckart-Young-Mirsky for the whitened problem); the Rayleigh
quotients z^T T z of a tridiagonal T built densely in numpy; numpy's ``X.T @ X`` for the moment.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch

from factorize.calibrated.aware import whitened_values
from factorize.calibrated.reduced import factors_from_reduction
from factorize.calibrated.stats import InputStats, add_gram
from factorize.spectra import tridiagonal
from factorize.spectra.tridiagonal import Reduction
from factorize.spectra.whiten import sqrt_factor

pytestmark = pytest.mark.skipif(not tridiagonal.available(), reason="the tridiagonal route needs scipy")


def _case(m: int, n: int, seed: int = 0):
    g = torch.Generator().manual_seed(seed)
    X = torch.randn(400, n, generator=g, dtype=torch.float64) @ torch.randn(n, n, generator=g, dtype=torch.float64)
    C = X.T @ X
    C = (C + C.T) / 2
    W = torch.randn(m, n, generator=g, dtype=torch.float64)
    st = InputStats("layer", "linear", n, count=400, second_moment=C.clone(), total=X.sum(0),
                    abs_total=X.abs().sum(0), batches=1)
    return W, C, st


def _optimum(W: torch.Tensor, C: torch.Tensor, lam: float, r: int) -> np.ndarray:
    """U_r U_r^T W from numpy's SVD of W L, L = numpy's Cholesky factor of C + lam I."""
    L = np.linalg.cholesky(C.numpy() + lam * np.eye(C.shape[0]))
    U = np.linalg.svd(W.numpy() @ L)[0][:, :r]
    return U @ U.T @ W.numpy()


@pytest.mark.parametrize(("m", "n", "r"), [(60, 90, 17), (120, 50, 11), (64, 64, 40)])  # wide, tall, square
def test_factors_from_the_reduction_are_the_whitened_optimum(m, n, r):
    W, C, st = _case(m, n)
    values = whitened_values(W, st, keep_reduction=True)
    assert values.reduction is not None
    spec = factors_from_reduction(W, values.reduction, values.total_energy, values.ridge, r, st.count,
                                  lambda: sqrt_factor(C.clone(), values.ridge))
    assert spec is not None and spec.computed_rank == r
    B, A = spec.factors(r)
    want = _optimum(W, C, values.ridge, r)
    np.testing.assert_allclose((B @ A).numpy(), want, atol=1e-9 * np.abs(want).max())
    np.testing.assert_allclose(spec.S.numpy() ** 2, values.energies()[:r], rtol=1e-12)


def test_a_tall_weight_needs_its_whitening_factor():
    W, _, st = _case(80, 30)
    values = whitened_values(W, st, keep_reduction=True)
    assert factors_from_reduction(W, values.reduction, values.total_energy, values.ridge, 5, 400) is None


def test_the_guard_refuses_vectors_that_are_not_the_top_ones(monkeypatch):
    W, _, st = _case(60, 90)
    values = whitened_values(W, st, keep_reduction=True)
    red = values.reduction
    k = red.order

    def bottom(self, rank):  # eigenvectors of T, but of its smallest eigenvalues
        _, Z = np.linalg.eigh(_dense(self))
        return torch.from_numpy(Z[:, :rank].copy())

    monkeypatch.setattr(Reduction, "tridiagonal_vectors", bottom)
    assert factors_from_reduction(W, red, values.total_energy, values.ridge, 10, 400) is None
    monkeypatch.setattr(Reduction, "tridiagonal_vectors", lambda self, rank: torch.ones(k, rank, dtype=torch.float64))
    assert factors_from_reduction(W, red, values.total_energy, values.ridge, 10, 400) is None  # not orthonormal


def _dense(red: Reduction) -> np.ndarray:
    return np.diag(red.d) + np.diag(red.e, 1) + np.diag(red.e, -1)


def test_captured_energy_is_the_rayleigh_quotient_sum_and_packing_round_trips():
    W, _, st = _case(50, 70, seed=3)
    red = whitened_values(W, st, keep_reduction=True).reduction
    z = red.tridiagonal_vectors(12)
    T = _dense(red)
    assert red.captured(z) == pytest.approx(float(np.trace(z.numpy().T @ T @ z.numpy())), rel=1e-13)
    again = Reduction.unpacked(red.packed())
    for field in ("tau", "d", "e", "values"):
        assert np.array_equal(getattr(again, field), getattr(red, field)), field
    assert torch.equal(again.top_vectors(12), red.top_vectors(12))  # the reflectors LAPACK reads, bit for bit


@pytest.mark.parametrize("n", [5, 300, 700])
def test_add_gram_is_exactly_symmetric_and_numpys_gram(n):
    g = torch.Generator().manual_seed(n)
    C = torch.zeros(n, n, dtype=torch.float64)
    X = [torch.randn(257, n, generator=g, dtype=torch.float64) for _ in range(3)]
    for x in X:
        add_gram(C, x)
    assert torch.equal(C, C.T)
    want = sum(x.numpy().T @ x.numpy() for x in X)
    np.testing.assert_allclose(C.numpy(), want, atol=1e-12 * np.abs(want).max())
