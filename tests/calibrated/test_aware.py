"""Activation-aware decomposition, checked against independent reference computations."""

from __future__ import annotations

import copy

import numpy as np
import pytest
import scipy.linalg
import torch
from torch import nn

from factorize.calibrated.aware import AwareSpectrum, apply_bias_shifts, aware_spectra, decompose_aware
from factorize.calibrated.stats import InputStats, collect_pair_stats, collect_stats
from factorize.errors import FactorizeError
from factorize.model.sites import matrix_of, walk
from factorize.plan.ranks import Policy, choose_ranks
from factorize.rewrite.apply import apply_plan

pytestmark = pytest.mark.filterwarnings("ignore:too few calibration samples")


def _stats_from(X: torch.Tensor, name: str = "layer") -> InputStats:
    """InputStats of rows X (N, n), built directly (the calibration hooks are tested in test_calibrate.py)."""
    X = X.to(torch.float64)
    return InputStats(name, "linear", X.shape[1], count=X.shape[0], second_moment=X.T @ X, total=X.sum(0),
                      abs_total=X.abs().sum(0))


def _case(m: int, n: int, N: int, seed: int, rank_x: int | None = None):
    g = torch.Generator().manual_seed(seed)
    W = torch.randn(m, n, generator=g, dtype=torch.float64)
    mix = torch.randn(rank_x or n, n, generator=g, dtype=torch.float64)  # correlated (or rank-deficient) inputs
    X = torch.randn(N, rank_x or n, generator=g, dtype=torch.float64) @ mix + 0.5  # (N, n), non-zero mean
    return W, X


@pytest.mark.parametrize("m,n", [(12, 20), (20, 12), (16, 16)])
def test_whitening_equals_reduced_rank_regression_generalised_eigh(m, n):
    # Izenman 1975: the rank-r minimiser of ||(W - W')X^T|| is W C Q_r Q_r^T, where Q holds the top generalised
    # eigenvectors of (C W^T W C) q = lambda C q normalised to Q^T C Q = I (derivation: substitute q = C^{-1/2} p
    # to get the right singular vectors p of W C^{1/2}). Computed here with scipy.linalg.eigh(a, b).
    W, X = _case(m, n, 200, seed=m * n)
    C = (X.T @ X).numpy()
    evals, Q = scipy.linalg.eigh(C @ W.numpy().T @ W.numpy() @ C, C)
    Q = Q[:, ::-1]  # descending
    spec = decompose_aware(W, _stats_from(X), ridge=0.0)
    for r in (1, 3, min(m, n) - 1):
        reference = W.numpy() @ C @ Q[:, :r] @ Q[:, :r].T
        B, A = spec.factors(r)
        np.testing.assert_allclose((B @ A).numpy(), reference, rtol=1e-7, atol=1e-8 * np.abs(reference).max())
    # squared whitened singular values are the generalised eigenvalues (same source)
    np.testing.assert_allclose(spec.energies(), evals[::-1][: spec.computed_rank], rtol=1e-8)


def test_whitening_on_rank_deficient_covariance():
    # 9 independent input directions in a width of 20: C is singular. Izenman's closed form W' = V_r V_r^T W with
    # V the top eigenvectors of W C W^T (the regression of Y = W X on X projected onto its leading directions)
    # needs no inverse; computed here with scipy.linalg.eigh.
    W, X = _case(15, 20, 300, seed=7, rank_x=9)
    C = (X.T @ X).numpy()
    _, V = scipy.linalg.eigh(W.numpy() @ C @ W.numpy().T)
    V = V[:, ::-1]
    spec = decompose_aware(W, _stats_from(X), ridge=0.0)  # Cholesky fails: symmetric square root path
    for r in (1, 4, 8):
        reference = V[:, :r] @ V[:, :r].T @ W.numpy()
        B, A = spec.factors(r)
        np.testing.assert_allclose((B @ A).numpy(), reference, rtol=1e-6, atol=1e-7 * np.abs(reference).max())
    # the default tiny ridge gives the same outputs on the data
    spec_ridge = decompose_aware(W, _stats_from(X))
    B, A = spec_ridge.factors(4)
    ref_out = X.numpy() @ (V[:, :4] @ V[:, :4].T @ W.numpy()).T
    np.testing.assert_allclose((X @ (B @ A).T).numpy(), ref_out, rtol=1e-4, atol=1e-4 * np.abs(ref_out).max())


def test_identity_covariance_is_plain_truncated_svd():
    # Eckart & Young 1936: with C = I the output error is the weight error, so whitening is plain truncated SVD.
    g = torch.Generator().manual_seed(3)
    W = torch.randn(10, 14, generator=g, dtype=torch.float64)
    n = 14
    stats = InputStats("x", "linear", n, count=n, second_moment=torch.eye(n, dtype=torch.float64),
                       total=torch.zeros(n, dtype=torch.float64), abs_total=torch.ones(n, dtype=torch.float64))
    spec = decompose_aware(W, stats, ridge=0.0)
    U, s, Vt = np.linalg.svd(W.numpy(), full_matrices=False)  # numpy reference
    np.testing.assert_allclose(spec.S.numpy(), s, rtol=1e-10)
    for r in (1, 5, 9):
        B, A = spec.factors(r)
        np.testing.assert_allclose((B @ A).numpy(), (U[:, :r] * s[:r]) @ Vt[:r], rtol=1e-9, atol=1e-10)
        assert spec.error(r) == pytest.approx(np.sqrt((s[r:] ** 2).sum()), rel=1e-9)


@pytest.mark.parametrize("method", ["whiten", "scale"])
@pytest.mark.parametrize("center", [False, True])
def test_predicted_error_matches_measured(method, center):
    # The predicted error is the output error on the calibration inputs: ||(W - W')X^T + (b - b')||_F with the
    # bias correction b' - b = W mu - W' mu when centred (definition; checked by direct computation).
    W, X = _case(24, 32, 400, seed=11)
    spec = decompose_aware(W, _stats_from(X), method=method, center=center)
    mu = X.mean(0)
    for r in (2, 8, 20):
        B, A = spec.factors(r)
        err = X @ (W - B @ A).T  # (N, m)
        shift = spec.bias_shift(r)
        assert (shift is not None) == center  # a bias correction exactly when centred
        if center:
            torch.testing.assert_close(shift, (W - B @ A) @ mu, rtol=1e-8, atol=1e-9)
            err = err - shift  # the corrected bias removes the mean error
        measured = float(torch.linalg.matrix_norm(err))
        assert spec.error(r) == pytest.approx(measured, rel=1e-4)


def test_centring_never_worse_and_scale_never_beats_whitening():
    W, X = _case(24, 32, 400, seed=12)
    plain = decompose_aware(W, _stats_from(X))
    centred = decompose_aware(W, _stats_from(X), center=True)
    scaled = decompose_aware(W, _stats_from(X), method="scale")
    for r in range(1, 24):
        assert centred.error(r) <= plain.error(r) * (1 + 1e-9)  # one more free vector (the bias)
        assert plain.error(r) <= scaled.error(r) * (1 + 1e-6)  # whitening is the optimum (Izenman 1975)


def test_scale_method_is_asvd():
    # ASVD (Yuan et al. 2023): W' = [truncated SVD of W diag(s)] diag(s)^-1 with s_j = mean|x_j|^alpha.
    W, X = _case(12, 18, 300, seed=13)
    spec = decompose_aware(W, _stats_from(X), method="scale", alpha=0.5)
    s = X.abs().mean(0).numpy() ** 0.5
    U, sv, Vt = np.linalg.svd(W.numpy() * s, full_matrices=False)
    for r in (1, 6, 11):
        reference = ((U[:, :r] * sv[:r]) @ Vt[:r]) / s
        B, A = spec.factors(r)
        np.testing.assert_allclose((B @ A).numpy(), reference, rtol=1e-8, atol=1e-9)


def test_randomized_solver_matches_exact_leading_triplets():
    # Halko, Martinsson & Tropp 2011: with a decaying spectrum the randomized range finder recovers the leading
    # singular values to high accuracy.
    g = torch.Generator().manual_seed(14)
    U0, _ = torch.linalg.qr(torch.randn(80, 80, generator=g, dtype=torch.float64))
    W = (U0 * (0.7 ** torch.arange(80, dtype=torch.float64))) @ torch.randn(80, 120, generator=g, dtype=torch.float64)
    X = torch.randn(500, 120, generator=g, dtype=torch.float64)
    exact = decompose_aware(W, _stats_from(X), solver="exact")
    fast = decompose_aware(W, _stats_from(X), solver="randomized", rank=8)
    assert fast.computed_rank == 8 and not fast.exact
    torch.testing.assert_close(fast.S[:8], exact.S[:8], rtol=1e-6, atol=0)
    assert fast.error(8) == pytest.approx(exact.error(8), rel=1e-6)


def test_factors_are_balanced_and_float32_for_float32_weights():
    W, X = _case(10, 12, 100, seed=15)
    spec = decompose_aware(W.float(), _stats_from(X))
    B, A = spec.factors(5)
    assert B.dtype == torch.float32 and A.dtype == torch.float32
    torch.testing.assert_close(B.norm(dim=0), A.norm(dim=1), rtol=1e-5, atol=1e-6)


def test_model_sites_conv(cnn):
    # Through the whole path (collect -> spectra -> plan -> apply -> bias correction) the measured layer output
    # error on the calibration inputs equals the predicted one, for convolutions (patch statistics) as well.
    torch.manual_seed(16)
    x = torch.randn(6, 3, 12, 12)
    sites = [s for s in walk(cnn).sites if s.kind.startswith("conv")]
    stats = collect_stats(cnn, sites, [x[:3], x[3:]])
    spectra = aware_spectra(cnn, sites, stats)
    plan = choose_ranks(sites, spectra, Policy(keep=0.4))
    compressed = apply_plan(cnn, plan, spectra=spectra)
    apply_bias_shifts(compressed, plan, spectra)
    seen = {}  # name -> (input, output) of the original layer

    def keep(name):
        def hook(module, args, output):
            seen[name] = (args[0].detach(), output.detach())
        return hook

    hooks = [cnn.get_submodule(s.name).register_forward_hook(keep(s.name)) for s in sites]
    with torch.no_grad():
        cnn(x)
    for h in hooks:
        h.remove()
    for s in sites:  # each compressed layer fed the original layer's calibration input
        inp, out = seen[s.name]
        with torch.no_grad():
            y_new = compressed.get_submodule(s.name)(inp)
        measured = float(torch.linalg.vector_norm((y_new - out).double()))
        assert spectra[s.name].error(plan["sites"][s.name]["rank"]) == pytest.approx(measured, rel=1e-3)


def test_embedding_whitening_weights_columns_by_counts():
    # One-hot inputs: the output error is sum_v count_v ||w_v - w'_v||^2 (definition), so whitening by the
    # diagonal second moment is the weighted low-rank problem with column weights sqrt(count).
    torch.manual_seed(17)
    emb = nn.Sequential(nn.Embedding(30, 8))
    ids = torch.randint(0, 20, (40, 5))  # tokens 20..29 never seen
    stats = collect_stats(emb, None, [ids])
    spec = decompose_aware(matrix_of(emb[0], "embedding"), stats["0"])
    counts = torch.bincount(ids.reshape(-1), minlength=30).double()
    W = emb[0].weight.detach().double().T  # (8, 30)
    for r in (2, 5):
        B, A = spec.factors(r)
        measured = float((((W - (B @ A).double()) ** 2) * counts).sum().sqrt())
        assert spec.error(r) == pytest.approx(measured, rel=1e-4)
    assert spec.error(8) < 1e-6 * spec.error(0)


def test_sequential_refit_absorbs_input_error(mlp):
    # Reduced-rank regression with a least-squares step (Izenman 1975): fitting the original outputs W X_ref from
    # perturbed inputs X is never worse than whitening on X alone, and its prediction matches the measurement.
    torch.manual_seed(18)
    batches = [torch.randn(64, 24) for _ in range(4)]
    current = copy.deepcopy(mlp)
    with torch.no_grad():
        current.fc1.weight.mul_(1.0 + 0.2 * torch.randn_like(current.fc1.weight))  # an earlier layer's error
    site = walk(mlp).by_name()["fc2"]
    pair = collect_pair_stats(mlp, current, site, batches)
    W = mlp.fc2.weight.detach()
    refit = decompose_aware(W, pair, center=True, refit_ridge=1e-8)
    plain = decompose_aware(W, InputStats("fc2", "linear", 48, count=pair.count, second_moment=pair.second_moment,
                                          total=pair.total, abs_total=pair.abs_total), center=True)
    x = torch.cat(batches)
    x_ref = torch.relu(mlp.fc1(x)).detach().double()
    x_cur = torch.relu(current.fc1(x)).detach().double()
    target = x_ref @ W.double().T  # (N, m), bias cancels
    for r in (4, 12, 30):
        errs = []
        for spec in (refit, plain):
            B, A = spec.factors(r)
            y = x_cur @ (B @ A).double().T + spec.bias_shift(r).double()
            errs.append(float(torch.linalg.matrix_norm(y - target)))
        assert refit.error(r) == pytest.approx(errs[0], rel=1e-4)
        assert errs[0] <= errs[1] * (1 + 1e-6)


def test_bad_input():
    W, X = _case(5, 6, 20, seed=19)
    with pytest.raises(FactorizeError, match="unknown activation-aware method"):
        decompose_aware(W, _stats_from(X), method="fisher")
    with pytest.raises(FactorizeError, match=r"width 6.*7 input columns"):
        decompose_aware(torch.randn(5, 7), _stats_from(X))
    empty = InputStats("layer", "linear", 6)
    with pytest.raises(FactorizeError, match="never reached"):
        decompose_aware(W, empty)
    assert isinstance(decompose_aware(W, _stats_from(X)), AwareSpectrum)


def test_sequential_mode_runs_in_forward_order():
    # The first factored layer sees the original inputs, so its sequential factors equal the per-layer ones
    # (the refit's ridge pulls towards the original weight, so identical inputs give back W); later layers are
    # refitted and the whole model tracks the original at least as well on the calibration inputs (empirical).
    from factorize.calibrated.sequential import compress_sequential
    from factorize.default import load_default, load_digits_split

    model = load_default()
    x, _ = load_digits_split("calibration")  # scikit-learn's digits (Alpaydin & Kaynak, UCI 1998), 256 samples
    batches = [x[:128], x[128:]]
    sites = walk(model).sites
    spectra = aware_spectra(model, sites, collect_stats(model, sites, batches))
    plan = choose_ranks(sites, spectra, Policy(keep=0.3))
    per_layer = apply_plan(model, plan, spectra=spectra)
    apply_bias_shifts(per_layer, plan, spectra)
    seq, seq_spectra = compress_sequential(model, plan, batches)
    assert list(seq_spectra) == [n for n in ("fc1", "fc2", "fc3", "fc4") if plan["sites"][n]["action"] == "factor"]
    first = next(iter(seq_spectra))
    torch.testing.assert_close(seq.get_submodule(first).product(), per_layer.get_submodule(first).product(),
                               rtol=1e-4, atol=1e-5)
    with torch.no_grad():
        ref = model(x)
        d_seq = float(torch.linalg.matrix_norm(seq(x) - ref) / torch.linalg.matrix_norm(ref))
        d_layer = float(torch.linalg.matrix_norm(per_layer(x) - ref) / torch.linalg.matrix_norm(ref))
    assert d_seq < d_layer
    assert all(p.requires_grad for p in seq.parameters())  # still a trainable model


def test_output_weighted_whitening_is_two_sided_eckart_young():
    # With an output weight R = (G + mu I)^{1/2} and input factor L, ||R (W - W') L||_F is minimised by
    # W' = R^{-1} [R W L]_r L^{-1} (Eckart-Young on R W L, R and L invertible); reference via numpy's SVD, with the
    # symmetric root for R where the library takes the Cholesky factor (any R with R^T R = G + mu I gives this W')
    W, X = _case(14, 18, 300, seed=21)
    g = torch.Generator().manual_seed(22)
    J = torch.randn(6, 14, generator=g, dtype=torch.float64)
    G = J.T @ J / 6  # rank 6 of 14: the ridge makes it invertible
    spec = decompose_aware(W, _stats_from(X), ridge=0.0, output_gram=G, output_ridge=0.1)
    mu = 0.1 * float(G.diagonal().mean())
    e, V = np.linalg.eigh(G.numpy() + mu * np.eye(14))
    R = (V * np.sqrt(e)) @ V.T
    C = (X.T @ X).numpy()
    Lc = np.linalg.cholesky(C)
    U, s, Vt = np.linalg.svd(R @ W.numpy() @ Lc)
    for r in (1, 5, 10):
        reference = np.linalg.solve(R, (U[:, :r] * s[:r]) @ Vt[:r]) @ np.linalg.inv(Lc)
        B, A = spec.factors(r)
        np.testing.assert_allclose((B @ A).numpy(), reference, rtol=1e-6, atol=1e-7 * np.abs(reference).max())
        measured = np.linalg.norm(R @ (W.numpy() - (B @ A).numpy()) @ X.numpy().T)
        assert spec.error(r) == pytest.approx(measured, rel=1e-6)
        torch.testing.assert_close(B.norm(dim=0), A.norm(dim=1), rtol=1e-8, atol=1e-10)  # balanced factors
    with pytest.raises(FactorizeError, match="output weights are"):
        decompose_aware(W, _stats_from(X), output_gram=torch.eye(5, dtype=torch.float64))


def test_fit_object_and_keywords_give_the_same_bytes():
    # AwareFit passed whole is the keyword form's object: same bytes; "auto" centring cannot be decided for a bare
    # matrix, so there it does not centre. Reference for the energies: the squared singular values of W L, L L^T = C
    # (whitening, Izenman 1975), from numpy.linalg.cholesky and numpy.linalg.svd.
    from factorize.calibrated.aware import AwareFit
    from factorize.execution import Execution

    W, X = _case(10, 14, 120, seed=31)
    stats = _stats_from(X)
    by_keywords = decompose_aware(W, stats, method="scale", alpha=0.25, center=True, ridge=1e-4, seed=2)
    whole = decompose_aware(W, stats, AwareFit(method="scale", alpha=0.25, center=True, ridge=1e-4),
                            execution=Execution(seed=2))
    assert torch.equal(by_keywords.S, whole.S) and torch.equal(by_keywords.U, whole.U)
    auto = decompose_aware(W, stats, AwareFit(ridge=0.0))
    plain = decompose_aware(W, stats, ridge=0.0, center=False)
    assert torch.equal(auto.S, plain.S)
    L = np.linalg.cholesky((X.T @ X).numpy())
    np.testing.assert_allclose(plain.energies(), np.linalg.svd(W.numpy() @ L, compute_uv=False) ** 2, rtol=1e-8)
    with pytest.raises(FactorizeError, match="both given"):
        decompose_aware(W, stats, AwareFit(), ridge=0.0)
    with pytest.raises(FactorizeError, match="unknown keyword: workerz"):
        decompose_aware(W, stats, workerz=2)
    with pytest.raises(FactorizeError, match="unknown solver"):
        AwareFit(solver="lanczos")
