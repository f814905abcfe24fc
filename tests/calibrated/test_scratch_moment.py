"""A moment that can be read again is factored in place: the whitening's Cholesky factor takes the moment's own
memory instead of a copy (254 MB for a 5632-wide input in float64), and the results do not change by one bit.

Outside references: numpy's ``linalg.cholesky`` and ``linalg.svd`` (the factor satisfies L L^T = C + lambda I, and
the whitened spectrum is the SVD of W L; Golub & Van Loan, Matrix Computations, sec. 4.2); the same call without
the in-place route is the comparison for bit equality.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch

from factorize.calibrated.aware import decompose_aware, whitened_values
from factorize.calibrated.stats import InputStats
from factorize.errors import FactorizeError
from factorize.spectra.whiten import sqrt_factor


def _stats(C: torch.Tensor, reread=None) -> InputStats:
    n = C.shape[0]
    return InputStats("layer", "linear", n, count=200, second_moment=C, total=torch.ones(n, dtype=torch.float64),
                      abs_total=torch.ones(n, dtype=torch.float64), batches=4, reread=reread)


def _moment(n: int = 48, seed: int = 0) -> torch.Tensor:
    X = torch.randn(200, n, generator=torch.Generator().manual_seed(seed), dtype=torch.float64)
    return X.T @ X


def test_in_place_factor_uses_the_moments_memory_and_matches_numpy() -> None:
    C = _moment()
    expected = np.linalg.cholesky(C.numpy() + 0.5 * np.eye(48))  # numpy's Cholesky of C + lambda I
    copy = C.clone()
    L = sqrt_factor(copy, 0.5, again=C.clone)
    assert L.data_ptr() == copy.data_ptr()  # no n x n copy: the factor is in the moment's storage
    np.testing.assert_allclose(L.numpy(), expected, rtol=1e-10, atol=1e-10)
    assert torch.equal(L, sqrt_factor(C, 0.5))  # the copying route gives the same bits


def test_failed_cholesky_reads_the_moment_again_for_the_eigen_route() -> None:
    C = _moment(8)
    C[3, 3] = -1.0  # not positive definite: Cholesky fails and destroys its input
    reads = []

    def again() -> torch.Tensor:
        reads.append(1)
        return C.clone()

    L = sqrt_factor(C.clone(), 0.0, again=again)
    assert reads == [1]
    assert torch.equal(L, sqrt_factor(C, 0.0))  # the symmetric square root of the copying route, bit for bit


@pytest.mark.parametrize("values_only", [False, True])
def test_released_moment_gives_the_same_spectrum_and_comes_back(values_only: bool) -> None:
    # outside reference: numpy's SVD of W L, with L numpy's Cholesky factor of C + lambda I
    C = _moment()
    W = torch.randn(24, 48, generator=torch.Generator().manual_seed(1))
    fit = whitened_values if values_only else decompose_aware
    plain = fit(W, _stats(C.clone()), ridge=1e-3)
    st = _stats(C.clone(), reread=C.clone)
    lean = fit(W, st, ridge=1e-3)
    assert torch.equal(lean.S, plain.S) and torch.equal(lean.U, plain.U) and torch.equal(lean.Vh, plain.Vh)
    assert st.released and st.second_moment is None and not st.is_diagonal
    assert torch.equal(st.moment(), C) and not st.released  # read back on demand
    L = np.linalg.cholesky(C.numpy() + plain.ridge * np.eye(48))
    s = np.linalg.svd(W.double().numpy() @ L, compute_uv=False)
    np.testing.assert_allclose(lean.S.double().numpy(), s[: len(lean.S)], rtol=1e-5)


def test_a_moment_nobody_can_read_again_is_never_released() -> None:
    st = _stats(_moment())
    decompose_aware(torch.randn(24, 48), st)
    assert not st.released and st.second_moment is not None
    with pytest.raises(FactorizeError, match="no moment to release"):
        st.release_moment()


def test_a_group_shares_one_moment_each_projection_reading_it_again() -> None:
    # q, k and v share an input: the first whitening takes the moment's memory, the next ones read it again and
    # factor that copy in place; every spectrum equals the one from statistics that keep their moment
    C = _moment()
    reads = []

    def reread() -> torch.Tensor:
        reads.append(1)
        return C.clone()

    st = _stats(C.clone(), reread=reread)
    for seed in (1, 2, 3):
        W = torch.randn(24, 48, generator=torch.Generator().manual_seed(seed))
        assert torch.equal(whitened_values(W, st).S, whitened_values(W, _stats(C.clone())).S)
    assert len(reads) == 2 and st.released  # the first projection used the moment read with the statistics


def test_the_triangular_product_is_numpys_w_times_l() -> None:
    # W L with L lower triangular: BLAS dtrmm where scipy is installed (one torch thread), else torch's product;
    # reference numpy's matmul of the same arrays, to float64 rounding.
    from factorize.spectra.whiten import triangular_product
    from factorize.threads import torch_threads

    C = _moment(70, seed=3)
    L = torch.linalg.cholesky(C + torch.eye(70, dtype=torch.float64))
    W = torch.randn(40, 70, generator=torch.Generator().manual_seed(1), dtype=torch.float64)
    want = W.numpy() @ L.numpy()
    for threads in (1, 2):
        with torch_threads(threads):
            got = triangular_product(W, L)
        assert got.shape == (40, 70) and got.is_contiguous()
        np.testing.assert_allclose(got.numpy(), want, rtol=0, atol=1e-13 * np.abs(want).max())
    assert torch.equal(triangular_product(W.float(), L.float()), W.float() @ L.float())  # float32: torch's product
