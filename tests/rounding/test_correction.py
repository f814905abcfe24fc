"""Rounded plus a low-rank correction (LQER), and rounded factors, against numpy references."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from factorize.errors import FactorizeError
from factorize.rounding import (
    round_factors,
    round_matrix,
    round_with_correction,
    weighted_error,
)


def _w(m, n, seed=0):
    return torch.randn(m, n, generator=torch.Generator().manual_seed(seed))


def _moment(n, samples, seed):
    g = torch.Generator().manual_seed(seed)
    X = torch.randn(samples, n, generator=g) @ (torch.randn(n, n, generator=g) / n**0.5 + 0.3 * torch.eye(n))
    return X.T.double() @ X.double()


@pytest.mark.parametrize("shape", [(12, 40), (40, 12)])
@pytest.mark.parametrize("weighted", [False, True])
def test_full_rank_reproduces_w(shape, weighted):
    W = _w(*shape)
    H = _moment(shape[1], 200, 1) if weighted else None
    Q, B, A = round_with_correction(W, "int4g32", min(shape), hessian=H)
    assert B.shape == (shape[0], min(shape)) and A.shape == (min(shape), shape[1])
    # reference: the rounding error reconstructed with numpy's SVD at full rank is the error itself
    E = W.double().numpy() - Q.dequantize(torch.float64).numpy()
    U, S, Vt = np.linalg.svd(E, full_matrices=False)
    np.testing.assert_allclose((U * S) @ Vt, E, atol=1e-10)
    np.testing.assert_allclose(Q.dequantize().numpy() + (B @ A).numpy(), W.numpy(), atol=1e-5)


def test_truncated_correction_is_the_truncated_svd_of_the_error():
    # Eckart-Young-Mirsky: the best rank-r correction leaves exactly the discarded squared singular values of E
    W = _w(30, 64, 2)
    r = 5
    Q, B, A = round_with_correction(W, "int4g64", r)
    E = W.double().numpy() - Q.dequantize(torch.float64).numpy()
    S = np.linalg.svd(E, compute_uv=False)
    left = np.sum((E - (B.double() @ A.double()).numpy()) ** 2)
    assert left == pytest.approx(np.sum(S[r:] ** 2), rel=1e-5)


def test_weighted_correction_leaves_the_discarded_whitened_values():
    # reduced-rank regression (Izenman 1975) / SVD-LLM whitening: with H = L L^T the rank-r optimum leaves the
    # discarded squared singular values of E L (numpy Cholesky and SVD as the reference)
    W, H = _w(24, 48, 3), _moment(48, 300, 3)
    r = 6
    Q, B, A = round_with_correction(W, "int8", r, hessian=H, method="nearest")
    E = W.double().numpy() - Q.dequantize(torch.float64).numpy()
    L = np.linalg.cholesky(H.numpy())
    S = np.linalg.svd(E @ L, compute_uv=False)
    left = weighted_error(W.double() - Q.dequantize(torch.float64), (B @ A).double(), H)
    assert left == pytest.approx(np.sum(S[r:] ** 2), rel=1e-4)
    # and it beats the unweighted correction on the weighted measure
    _, B0, A0 = round_with_correction(W, "int8", r, method="nearest")
    assert left < weighted_error(W.double() - Q.dequantize(torch.float64), (B0 @ A0).double(), H)


def test_rank_zero_and_bad_rank():
    W = _w(6, 10)
    Q, B, A = round_with_correction(W, "int8", 0)
    assert B.shape == (6, 0) and A.shape == (0, 10)
    assert torch.equal(Q.dequantize() + B @ A, round_matrix(W, "int8").dequantize())
    for bad in (-1, 7, 2.0, True):
        with pytest.raises(FactorizeError, match="rank"):
            round_with_correction(W, "int8", bad)


def test_round_factors_weights_b_by_what_it_sees():
    # B sees A's outputs, whose second moment is A H A^T: error feedback on it lowers the product's output error
    # against rounding both factors to nearest (Frantar et al. 2023; measured ratios 0.56-0.61 on these seeds)
    ratios = []
    for seed in range(4):
        B, A, H = _w(40, 16, seed), _w(16, 64, seed + 10), _moment(64, 256, seed)
        target = B @ A
        Bq, Aq = round_factors(B, A, "int4g32", hessian=H)
        Bn, An = round_factors(B, A, "int4g32")
        e_fb = weighted_error(target, Bq.dequantize() @ Aq.dequantize(), H)
        e_nn = weighted_error(target, Bn.dequantize() @ An.dequantize(), H)
        ratios.append(e_fb / e_nn)
    assert np.mean(ratios) < 1 and max(ratios) < 1


def test_round_factors_shapes_and_precisions():
    B, A = _w(10, 4), _w(4, 70)
    Bq, Aq = round_factors(B, A, ("int8", "int4g64"))
    assert (Bq.precision, Aq.precision) == ("int8", "int4g64")
    assert Bq.shape == (10, 4) and Aq.shape == (4, 70)
    with pytest.raises(FactorizeError, match="columns"):
        round_factors(B, _w(5, 70), "int8")
    with pytest.raises(FactorizeError, match="precision"):
        round_factors(B, A, ("int8", "int2"))
