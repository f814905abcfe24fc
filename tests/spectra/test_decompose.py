"""Decomposition checked against outside references: numpy/scipy SVD, Eckart-Young-Mirsky, Halko et al. 2011."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
import torch

from factorize import FactorizeError, decompose
from factorize.spectra.decompose import leading, values_only


def _decaying(m: int, n: int, decay: float = 0.85, seed: int = 0) -> np.ndarray:
    """A random matrix with singular values decay**i (orthogonal factors from QR of Gaussians)."""
    rng = np.random.default_rng(seed)
    k = min(m, n)
    U, _ = np.linalg.qr(rng.standard_normal((m, k)))
    V, _ = np.linalg.qr(rng.standard_normal((n, k)))
    return (U * decay ** np.arange(k)) @ V.T


@pytest.mark.parametrize("shape", [(30, 20), (20, 30), (64, 64), (1, 9)])
@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_singular_values_match_numpy_and_scipy(shape, dtype):
    # Reference: numpy.linalg.svd and scipy.linalg.svd (LAPACK gesdd).
    W = torch.randn(*shape, generator=torch.Generator().manual_seed(1), dtype=dtype)
    spec = decompose(W)
    ref_np = np.linalg.svd(W.double().numpy(), compute_uv=False)
    ref_sp = scipy.linalg.svd(W.double().numpy(), compute_uv=False)
    tol = 1e-5 if dtype == torch.float32 else 1e-12
    np.testing.assert_allclose(spec.S.double().numpy(), ref_np, rtol=tol, atol=tol)
    np.testing.assert_allclose(spec.S.double().numpy(), ref_sp, rtol=tol, atol=tol)
    full = spec.truncated(spec.computed_rank)
    np.testing.assert_allclose(full.double().numpy(), W.double().numpy(), atol=100 * tol)


@pytest.mark.parametrize("rank", [1, 3, 10, 19])
def test_eckart_young_mirsky_errors(rank):
    # Eckart & Young 1936; Mirsky 1960: the rank-r truncation has Frobenius error sqrt(sum_{i>r} s_i^2)
    # and spectral error s_{r+1}.
    W = torch.randn(40, 20, generator=torch.Generator().manual_seed(2), dtype=torch.float64)
    spec = decompose(W)
    s = np.linalg.svd(W.numpy(), compute_uv=False)
    Wr = spec.truncated(rank).numpy()
    fro = np.linalg.norm(W.numpy() - Wr)
    assert fro == pytest.approx(np.sqrt((s[rank:] ** 2).sum()), rel=1e-10)
    assert spec.error(rank) == pytest.approx(fro, rel=1e-10)
    assert np.linalg.norm(W.numpy() - Wr, 2) == pytest.approx(s[rank], rel=1e-10)


def test_factors_are_balanced_and_multiply_back():
    W = torch.randn(12, 8, generator=torch.Generator().manual_seed(3), dtype=torch.float64)
    spec = decompose(W)
    B, A = spec.factors(5)
    assert B.shape == (12, 5) and A.shape == (5, 8)
    # sqrt(S) split: column norms of B equal row norms of A (both sqrt(s_i)), since U and V are orthonormal.
    np.testing.assert_allclose(B.norm(dim=0).numpy(), A.norm(dim=1).numpy(), rtol=1e-10)
    np.testing.assert_allclose((B @ A).numpy(), spec.truncated(5).numpy())


@pytest.mark.parametrize("shape,rank", [((200, 120), 10), ((120, 200), 20), ((256, 256), 32)])
def test_randomized_within_two_percent_of_optimum(shape, rank):
    # Halko, Martinsson & Tropp 2011 (Theorem 10.6/10.7): with oversampling p and q power iterations the expected
    # error approaches the optimal sigma tail; on a decaying spectrum two iterations land within 2% of the
    # Eckart-Young optimum.
    W = torch.from_numpy(_decaying(*shape, decay=0.9))
    spec = decompose(W, method="randomized", rank=rank, power_iters=2, oversample=10, seed=0)
    s = np.linalg.svd(W.numpy(), compute_uv=False)
    optimum = np.sqrt((s[rank:] ** 2).sum())
    achieved = np.linalg.norm(W.numpy() - spec.truncated(rank).numpy())
    assert achieved <= 1.02 * optimum
    # The predicted error (||W||_F^2 minus kept energy) is the error of the factors actually produced.
    assert spec.error(rank) == pytest.approx(achieved, rel=1e-6)


def test_randomized_is_deterministic_per_seed():
    W = torch.from_numpy(_decaying(100, 80))
    a = decompose(W, method="randomized", rank=8, seed=7)
    b = decompose(W, method="randomized", rank=8, seed=7)
    assert torch.equal(a.U, b.U) and torch.equal(a.S, b.S) and torch.equal(a.Vh, b.Vh)


def test_signs_agree_between_exact_and_randomized():
    # Sign convention as in scikit-learn's svd_flip: the largest-magnitude entry of each left vector is positive.
    W = torch.from_numpy(_decaying(60, 50, decay=0.6))
    e = decompose(W)
    r = decompose(W, method="randomized", rank=4, power_iters=4)
    np.testing.assert_allclose(r.U[:, :4].numpy(), e.U[:, :4].numpy(), atol=1e-6)


def test_half_precision_is_decomposed_in_float32():
    W = torch.randn(16, 12, generator=torch.Generator().manual_seed(4)).half()
    spec = decompose(W)
    assert spec.S.dtype == torch.float32
    ref = np.linalg.svd(W.double().numpy(), compute_uv=False)  # numpy reference, of the same half values
    np.testing.assert_allclose(spec.S.double().numpy(), ref, rtol=1e-5)


def test_energy_rank_matches_cumulative_sum():
    W = torch.from_numpy(_decaying(50, 40, decay=0.8))
    spec = decompose(W)
    s2 = np.linalg.svd(W.numpy(), compute_uv=False) ** 2  # numpy reference
    frac = np.cumsum(s2) / s2.sum()  # energy kept by rank r: sum_{i<=r} s_i^2 / ||W||_F^2 (common practice)
    for t in (0.5, 0.9, 0.99):
        r = spec.rank_for_energy(t)
        assert frac[r - 1] >= t - 1e-12 and (r == 1 or frac[r - 2] < t)


def test_bad_input_is_named():
    W = torch.randn(4, 4)
    W[1, 2] = float("nan")
    with pytest.raises(FactorizeError, match=r"encoder\.fc1.*NaN"):
        decompose(W, name="encoder.fc1")
    with pytest.raises(FactorizeError, match="unknown method"):
        decompose(torch.randn(3, 3), method="qr")
    with pytest.raises(FactorizeError, match="rank must be >= 1"):
        decompose(torch.randn(3, 3), method="randomized", rank=0)


@pytest.mark.parametrize("shape", [(80, 50), (50, 80)])
def test_gram_method_matches_lapack(shape):
    # Reference: numpy.linalg.svd. The Gram route (Golub & Van Loan, sec. 8.6) keeps the energies s_i^2 to
    # about eps * s_1^2 in float64, so singular values and truncations agree to near machine precision here.
    W = torch.randn(*shape, generator=torch.Generator().manual_seed(5), dtype=torch.float64)
    spec = decompose(W, method="gram")
    U, s, Vt = np.linalg.svd(W.numpy(), full_matrices=False)
    np.testing.assert_allclose(spec.S.numpy(), s, rtol=1e-10, atol=1e-12)
    ref = (U[:, :7] * s[:7]) @ Vt[:7]
    np.testing.assert_allclose(spec.truncated(7).numpy(), ref, atol=1e-10)
    assert spec.exact and spec.method == "gram"


@pytest.mark.parametrize("decay", [0.9, 0.97, 0.99])
def test_auto_stays_within_one_percent_of_optimum(decay):
    # Target of the fast path: at most 1% excess Frobenius error over the Eckart-Young optimum (numpy reference).
    W = torch.from_numpy(_decaying(300, 240, decay=decay)).float()
    s = np.linalg.svd(W.double().numpy(), compute_uv=False)
    for rank in (8, 25):
        spec = decompose(W, method="auto", rank=rank)
        achieved = np.linalg.norm(W.double().numpy() - spec.truncated(rank).double().numpy())
        assert achieved <= 1.01 * np.sqrt((s[rank:] ** 2).sum())


def test_auto_falls_back_to_an_exact_route_when_the_estimate_cannot_vouch():
    # A Gaussian matrix has a flat spectrum (Marchenko-Pastur), so subspace iteration converges slowly and the
    # convergence estimate cannot certify 1%: auto must take an exact route -- every singular value, then the
    # leading vectors under the exact guard (numpy's SVD is the reference for the values and the optimum).
    W = torch.randn(400, 320, generator=torch.Generator().manual_seed(6))
    spec = decompose(W, method="auto", rank=30)
    assert spec.method.startswith("auto:leading")
    s = np.linalg.svd(W.double().numpy(), compute_uv=False)
    np.testing.assert_allclose(spec.S.double().numpy(), s, rtol=1e-4)  # all 320 values, exact
    assert spec.vector_rank == 30
    achieved = np.linalg.norm(W.double().numpy() - spec.truncated(30).double().numpy())
    assert achieved <= 1.01 * np.sqrt((s[30:] ** 2).sum())
    assert decompose(W, method="auto", rank=100).method == "gram"  # rank not well below min(m, n)


# ---------------------------------------------------------------------------------------------------------------
# singular values first (values_only), then only the kept vectors (leading)


def _optimum(W: np.ndarray, rank: int) -> float:
    """Eckart-Young-Mirsky: the best rank-r Frobenius error, from numpy.linalg.svd (outside reference)."""
    s = np.linalg.svd(W, compute_uv=False)
    return float(np.sqrt((s[rank:] ** 2).sum()))


@pytest.mark.parametrize("shape", [(90, 60), (60, 90), (300, 300), (1, 9)])
@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_values_only_match_numpy(shape, dtype):
    # Reference: numpy.linalg.svd. Gram eigenvalues keep an absolute accuracy of about eps * s_1^2 on s_i^2
    # (Golub & Van Loan, sec. 8.1 and 8.6), so energies are compared on that scale.
    W = torch.randn(*shape, generator=torch.Generator().manual_seed(2), dtype=dtype)
    spec = values_only(W)
    ref = np.linalg.svd(W.double().numpy(), compute_uv=False)
    tol = 1e-5 if dtype == torch.float32 else 1e-12
    np.testing.assert_allclose(spec.energies(), ref**2, rtol=0, atol=tol * ref[0] ** 2)
    assert spec.total_energy == pytest.approx(float((W.double() ** 2).sum()), rel=1e-12)
    assert spec.exact and spec.computed_rank == min(shape) and spec.vector_rank == 0
    assert spec.shape == shape and spec.S.dtype == dtype
    with pytest.raises(FactorizeError, match="vector pairs"):
        spec.factors(1)


@pytest.mark.parametrize("shape", [(120, 80), (80, 120), (300, 300)])
@pytest.mark.parametrize("rank", [1, 8, 30])
@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_leading_within_one_percent_of_eckart_young(shape, rank, dtype):
    # Eckart-Young-Mirsky optimum from numpy.linalg.svd; the guard promises <= 1% excess Frobenius error.
    W = torch.as_tensor(_decaying(*shape, decay=0.97, seed=3)).to(dtype)
    spec = leading(W, rank)
    B, A = spec.factors(rank)
    assert B.shape == (shape[0], rank) and A.shape == (rank, shape[1]) and spec.vector_rank == rank
    err = float(np.linalg.norm(W.double().numpy() - (B @ A).double().numpy()))
    assert err <= 1.01 * _optimum(W.double().numpy(), rank) + 1e-6
    np.testing.assert_allclose(spec.energies(), values_only(W).energies())  # all values stay: allocation reuses them


def test_leading_guards_every_rank_it_is_cut_to():
    # A sweep cuts one block of leading vectors to several ranks: each must be within 1% of its own optimum
    # (Eckart-Young-Mirsky, numpy.linalg.svd).
    W = torch.as_tensor(_decaying(200, 150, decay=0.98, seed=4)).float()
    spec = leading(W, 40, guard_ranks=[5, 12, 25])
    for r in (5, 12, 25, 40):
        B, A = spec.factors(r)
        err = float(np.linalg.norm(W.double().numpy() - (B @ A).double().numpy()))
        assert err <= 1.01 * _optimum(W.double().numpy(), r)


def test_leading_falls_back_when_the_iteration_does_not_converge():
    # A slowly decaying spectrum (s_i = 0.995^i) and a guard no subspace iteration meets in one step (tolerance 0,
    # float64): the full Gram eigendecomposition is used instead, which reaches the optimum (numpy.linalg.svd).
    W = torch.as_tensor(_decaying(150, 150, decay=0.995, seed=5))
    spec = leading(W, 20, tolerance=0.0, max_iters=1, route="subspace")
    assert spec.method == "leading:eigh"
    err = float(np.linalg.norm(W.numpy() - spec.truncated(20).numpy()))
    assert err == pytest.approx(_optimum(W.numpy(), 20), rel=1e-9)
    quick = leading(W, 20, route="subspace")  # with the 1% guard the iteration is accepted; it says its steps
    assert quick.method.startswith("leading:subspace(")


def test_leading_is_deterministic_per_seed():
    W = torch.as_tensor(_decaying(200, 120, decay=0.9, seed=6)).float()
    values = values_only(W, keep_gram=True)
    for route in ("auto", "subspace"):
        a = leading(W, 15, values=values, seed=3, route=route)
        b = leading(W, 15, seed=3, route=route)  # forms its own Gram matrix (or reduction): the same bytes
        assert torch.equal(a.U, b.U) and torch.equal(a.Vh, b.Vh) and torch.equal(a.S, b.S)


def test_leading_names_bad_input():
    W = torch.randn(30, 20)
    with pytest.raises(FactorizeError, match=r"layer\.x: rank\(s\) \[0\] outside 1\.\.20"):
        leading(W, 0, name="layer.x")
    with pytest.raises(FactorizeError, match=r"\[21\]"):
        leading(W, 5, guard_ranks=[21])
    with pytest.raises(FactorizeError, match="values="):
        leading(W, 5, values=values_only(torch.randn(20, 30)))


def test_chebyshev_filter_is_the_scaled_chebyshev_polynomial():
    # Reference: numpy.polynomial.chebyshev.chebval applied to the eigenvalues from numpy.linalg.eigh, i.e.
    # T_d((G - cI)/e) X / T_d(x_r) computed through the spectral decomposition G = V diag(lam) V^T.
    from factorize.spectra.subspace import _chebyshev_filter

    rng = np.random.default_rng(7)
    A = rng.standard_normal((40, 40))
    G = A @ A.T
    X = rng.standard_normal((40, 6))
    lam, V = np.linalg.eigh(G)
    c, e, x_r = 20.0, 15.0, 2.5
    for degree in (1, 2, 3, 5):
        coef = np.zeros(degree + 1)
        coef[-1] = 1.0
        ref = V @ (np.polynomial.chebyshev.chebval((lam - c) / e, coef)[:, None] * (V.T @ X))
        ref /= np.polynomial.chebyshev.chebval(x_r, coef)
        got = _chebyshev_filter(torch.from_numpy(G), torch.from_numpy(X), None, degree, c, e, x_r).numpy()
        np.testing.assert_allclose(got, ref, rtol=1e-9, atol=1e-9 * np.abs(ref).max())
        GX = torch.from_numpy(G @ X)  # the first product supplied (as after a Rayleigh-Ritz step): same result
        np.testing.assert_allclose(_chebyshev_filter(torch.from_numpy(G), torch.from_numpy(X), GX, degree, c, e,
                                                     x_r).numpy(), got, rtol=1e-12, atol=1e-12 * np.abs(got).max())


@pytest.mark.parametrize("shape,rank", [((256, 256), 40), ((512, 128), 30), ((128, 512), 12)])
def test_leading_filtered_iteration_on_a_slow_power_law(shape, rank):
    # A slowly decaying spectrum s_i = i^-0.5 (float32), where plain power steps converge slowly: the filtered
    # iteration is taken (degree > 1) and the factors stay within 1% of the Eckart-Young optimum (numpy.linalg.svd).
    rng = np.random.default_rng(8)
    k = min(shape)
    U, _ = np.linalg.qr(rng.standard_normal((shape[0], k)))
    V, _ = np.linalg.qr(rng.standard_normal((shape[1], k)))
    W = torch.from_numpy((U * np.arange(1, k + 1) ** -0.5) @ V.T).float()
    spec = leading(W, rank, route="subspace")
    assert spec.method.startswith("leading:subspace(") and "degree 1)" not in spec.method
    err = float(np.linalg.norm(W.double().numpy() - spec.truncated(rank).double().numpy()))
    assert err <= 1.01 * _optimum(W.double().numpy(), rank)
    # The Ritz vectors (the smaller side: U when wide, V otherwise) are orthonormal, so B A is the projection of W
    # onto them and its error is the one the guard computed.
    ritz = spec.U.T if shape[0] <= shape[1] else spec.Vh
    np.testing.assert_allclose((ritz @ ritz.T).double().numpy(), np.eye(rank), atol=1e-4)


@pytest.mark.parametrize("bad", [float("nan"), float("inf"), -float("inf")])
def test_values_first_route_refuses_non_finite_weights(bad):
    # The check is a float64 sum of squares (NaN and Inf propagate through it); the message counts the entries.
    W = torch.randn(20, 30)
    W[3, 4] = bad
    W[7, 1] = bad
    for call in (lambda: values_only(W, name="enc.fc"), lambda: leading(W, 3, name="enc.fc")):
        with pytest.raises(FactorizeError, match=r"enc\.fc: the weight holds 2 NaN or Inf"):
            call()


def test_leading_refuses_values_of_another_matrix_of_the_same_shape():
    W = torch.randn(30, 20, generator=torch.Generator().manual_seed(9))
    other = 2 * W  # same shape, other ||W||_F^2
    with pytest.raises(FactorizeError, match="values="):
        leading(W, 5, values=values_only(other))
    leading(W, 5, values=values_only(W))  # its own values are accepted


def test_leading_accepts_the_values_of_a_large_matrix_despite_float32_drift():
    # 12 M entries: a float32 sum of their squares drifts by about 1e-3 relative (measured; a 1.1B checkpoint's
    # 2048 x 5632 MLP matrices were refused for 3.9e-4), while the values pass sums in float64. Reference: numpy's
    # float64 sum of squares, which the values must match.
    from factorize.threads import torch_threads

    W = torch.randn(600, 20000, generator=torch.Generator().manual_seed(0)) * 0.02 + 0.001
    with torch_threads(1):  # one thread: the float32 sum's rounding is then fixed
        values = values_only(W)
        drift = abs(float(torch.linalg.vector_norm(W)) ** 2 - values.total_energy) / values.total_energy
        assert drift > 1e-4  # the float32 sum alone would refuse these values
        assert values.total_energy == pytest.approx(float(np.square(W.double().numpy()).sum()), rel=1e-12)
        spec = leading(W, 8, values=values)
        assert spec.vector_rank == 8
        with pytest.raises(FactorizeError, match="values="):
            leading(W * 1.001, 8, values=values)  # a 0.2% change of ||W||_F^2 is still refused


def test_sign_convention_matches_scikit_learns_svd_flip_even_with_ties():
    """Reference: scikit-learn's ``svd_flip`` (u-based decision: each column's largest-magnitude entry made
    positive). Integer entries make ties between a column's maximum and minimum common."""
    from sklearn.utils.extmath import svd_flip

    from factorize.spectra.signs import fix_signs

    gen = torch.Generator().manual_seed(0)
    for _ in range(100):
        U = torch.randint(-3, 4, (7, 5), generator=gen).double()
        Vh = torch.randn(5, 6, generator=gen, dtype=torch.float64)
        ref_u, ref_v = svd_flip(U.numpy().copy(), Vh.numpy().copy(), u_based_decision=True)
        got_u, got_v = fix_signs(U.clone(), Vh.clone())
        zero = (U == 0).all(dim=0).numpy()  # an all-zero column has no sign to fix; conventions may differ
        np.testing.assert_array_equal(got_u.numpy()[:, ~zero], ref_u[:, ~zero])
        np.testing.assert_array_equal(got_v.numpy()[~zero], ref_v[~zero])


def test_without_vectors_keeps_every_singular_value_and_drops_the_rest():
    # numpy's SVD as the reference for the values kept
    g = torch.Generator().manual_seed(3)
    W = torch.randn(9, 6, generator=g, dtype=torch.float64)
    spec = decompose(W, method="exact")
    bare = spec.without_vectors()
    assert bare.U.shape == (9, 0) and bare.Vh.shape == (0, 6) and bare.gram is None
    np.testing.assert_allclose(bare.S.numpy(), np.linalg.svd(W.numpy(), compute_uv=False), rtol=1e-12)
    assert bare.total_energy == spec.total_energy and bare.shape == spec.shape
    assert bare.S.data_ptr() != spec.S.data_ptr()  # a copy: the full spectrum can be freed
