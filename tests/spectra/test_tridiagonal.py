"""The tridiagonal route of the values-first pass (values from ?sytrd + ?sterf, kept vectors from ?stevd and the
reflectors), checked against numpy.linalg.svd / numpy.linalg.eigh and the Eckart-Young-Mirsky theorem."""

import numpy as np
import pytest
import torch

pytest.importorskip("scipy")
threadpoolctl = pytest.importorskip("threadpoolctl")

from factorize.errors import FactorizeError  # noqa: E402
from factorize.spectra import tridiagonal  # noqa: E402
from factorize.spectra.decompose import leading, values_only  # noqa: E402


def _optimum(W: np.ndarray, r: int) -> float:
    s = np.linalg.svd(W, compute_uv=False)  # reference: numpy's LAPACK SVD in float64
    return float(np.sqrt((s[r:] ** 2).sum()))


@pytest.mark.parametrize("shape", [(120, 300), (300, 120), (200, 200), (2, 7)])
@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_kept_factors_reach_the_eckart_young_optimum(shape, dtype):
    # Eckart & Young 1936 / Mirsky 1960: the best rank-r approximation misses by sqrt(sum_{i>r} s_i^2). The route
    # computes exact eigenvectors, so its factors reach that optimum up to rounding, at the kept rank and at every
    # smaller rank cut from them.
    W = torch.randn(*shape, generator=torch.Generator().manual_seed(sum(shape)), dtype=dtype)
    Wd = W.double().numpy()
    values = values_only(W, keep_gram=True)
    assert values.reduction is not None and values.gram is None
    k = min(shape)
    rank = max(1, k // 3)
    spec = leading(W, rank, values=values, guard_ranks=[1, max(1, rank // 2)])
    assert spec.method == "leading:tridiagonal"
    rel = 1e-4 if dtype == torch.float32 else 1e-10
    for r in sorted({1, max(1, rank // 2), rank}):
        err = float(np.linalg.norm(Wd - spec.truncated(r).double().numpy()))
        assert err == pytest.approx(_optimum(Wd, r), rel=rel)


def test_values_match_numpys_singular_values():
    # The squared singular values are the Gram matrix's eigenvalues (Golub & Van Loan, sec. 8.6); in float64 the
    # route's energies agree with numpy.linalg.svd's to rounding (absolute error about k * eps * s_1^2).
    rng = np.random.default_rng(1)
    W = rng.standard_normal((90, 140))
    want = np.linalg.svd(W, compute_uv=False) ** 2
    got = values_only(torch.from_numpy(W)).energies()
    np.testing.assert_allclose(got, want, atol=1e-12 * want[0])


def test_reflectors_and_tridiagonal_vectors_rebuild_the_gram_matrix():
    # With every eigenvector kept, V diag(lambda) V^T must give G back (reference eigenvalues: numpy.linalg.eigh):
    # this checks the layout of LAPACK's reflectors as applied by torch.ormqr.
    rng = np.random.default_rng(2)
    A = rng.standard_normal((50, 80))
    G = A @ A.T
    red = tridiagonal.reduce(torch.from_numpy(G.copy()))
    lam = np.linalg.eigh(G)[0][::-1]
    np.testing.assert_allclose(np.sort(red.eigenvalues())[::-1], lam, rtol=1e-10, atol=1e-10 * lam[0])
    V = red.top_vectors(50).numpy()
    np.testing.assert_allclose(V.T @ V, np.eye(50), atol=1e-12)
    np.testing.assert_allclose((V * lam) @ V.T, G, atol=1e-10 * lam[0])


def test_the_route_is_deterministic_and_independent_of_kept_state():
    W = torch.randn(150, 380, generator=torch.Generator().manual_seed(4))
    a, b = values_only(W, keep_gram=True), values_only(W)
    assert torch.equal(a.S, b.S)
    x, y = leading(W, 30, values=a), leading(W, 30, values=b)  # kept reduction vs one made again
    assert torch.equal(x.U, y.U) and torch.equal(x.Vh, y.Vh)


def test_lapack_failure_falls_back_to_the_full_eigendecomposition(monkeypatch):
    W = torch.randn(40, 60, generator=torch.Generator().manual_seed(5), dtype=torch.float64)
    monkeypatch.setattr(tridiagonal.Reduction, "top_vectors", lambda self, rank: None)
    spec = leading(W, 7)
    assert spec.method == "leading:eigh"
    err = float(np.linalg.norm(W.numpy() - spec.truncated(7).numpy()))
    assert err == pytest.approx(_optimum(W.numpy(), 7), rel=1e-10)


def test_without_the_optional_packages_the_plain_route_is_taken(monkeypatch):
    W = torch.randn(60, 45, generator=torch.Generator().manual_seed(6), dtype=torch.float64)
    monkeypatch.setattr(tridiagonal, "available", lambda: False)
    values = values_only(W, keep_gram=True)
    assert values.reduction is None and values.gram is not None
    assert leading(W, 5, values=values).method.startswith(("leading:subspace", "leading:eigh"))
    with pytest.raises(FactorizeError, match="scipy and threadpoolctl"):
        leading(W, 5, route="tridiagonal")


def test_unknown_route_is_refused():
    with pytest.raises(FactorizeError, match="unknown route 'fast'"):
        leading(torch.randn(8, 6), 2, route="fast")


def test_blas_runs_serially_inside_and_is_restored_after():
    tridiagonal.available()  # loads scipy's BLAS
    before = [i["num_threads"] for i in threadpoolctl.threadpool_info() if i["user_api"] == "blas"]
    with tridiagonal.blas_serial(100), tridiagonal.blas_serial(100):  # nested (as concurrent callers would be)
        inside = [i["num_threads"] for i in threadpoolctl.threadpool_info() if i["user_api"] == "blas"]
    after = [i["num_threads"] for i in threadpoolctl.threadpool_info() if i["user_api"] == "blas"]
    assert all(n == 1 for n in inside) and after == before
