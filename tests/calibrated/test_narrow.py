"""Statistics on the narrow (output) side give the same activation-aware optimum as the input side.

References: reduced-rank regression (Izenman, "Reduced-rank regression for the multivariate linear model", J.
Multivariate Analysis 1975): the rank-r minimiser of ||(W - W') X^T||_F is U_r U_r^T W with U_r the top
eigenvectors of W C W^T; for the output-weighted form, Eckart-Young applied to the whitened matrix R W L. Every
reference below is computed directly in numpy from the input rows, never through the package's own algebra.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn

import factorize
from factorize.calibrated import stats as stats_module
from factorize.calibrated.aware import aware_spectra, decompose_aware
from factorize.calibrated.rows import input_rows
from factorize.calibrated.sequential import compress_sequential
from factorize.calibrated.stats import collect_stats, statistics_side, stats_bytes
from factorize.errors import FactorizeError
from factorize.model.sites import matrix_of, walk
from factorize.plan.ranks import Policy, choose_ranks

pytestmark = pytest.mark.filterwarnings("ignore:too few calibration samples")

# (layer, input batch shape): every layer is narrower at its output (m < n), so "narrow" picks the output side
LAYERS = {
    "linear": (lambda: nn.Linear(40, 7), (30, 40)),
    "conv1d": (lambda: nn.Conv1d(6, 5, 4, padding=1, stride=2), (5, 6, 19)),
    "conv2d": (lambda: nn.Conv2d(3, 4, (3, 2), dilation=(1, 2)), (4, 3, 7, 8)),
    "conv3d": (lambda: nn.Conv3d(2, 3, 2), (3, 2, 4, 4, 3)),
    "conv_transpose1d": (lambda: nn.ConvTranspose1d(12, 2, 3), (6, 12, 5)),
}


def _collect(kind: str, seed: int = 0):
    torch.manual_seed(seed)
    make, shape = LAYERS[kind]
    model = nn.Sequential(make().double())
    batches = [torch.randn(*shape, dtype=torch.float64) + 0.3 for _ in range(2)]  # a mean, so centring matters
    site = walk(model).sites[0]
    assert statistics_side(site) == "output"  # m < n for every case here
    inp = collect_stats(model, None, batches, side="input")["0"]
    out = collect_stats(model, None, batches, side="narrow")["0"]
    X = torch.cat([input_rows(model[0], site.kind, b) for b in batches]).numpy()  # (N, n) rows, for numpy
    return model, site, inp, out, X


def _numpy_optimum(W, X, rank, *, center, rel_ridge, G=None, output_ridge=0.1):
    """W' and the energies, directly: C from the rows, L = chol(C + lam I), R = (G + mu I)^{1/2}, SVD of R W L."""
    mu = X.mean(0)
    Xc = X - mu if center else X
    C = Xc.T @ Xc
    lam = rel_ridge * np.mean(np.diag(C))
    L = np.linalg.cholesky(C + lam * np.eye(C.shape[0]))
    R = Rinv = np.eye(W.shape[0])
    if G is not None:
        e, V = np.linalg.eigh(G + output_ridge * np.mean(np.diag(G)) * np.eye(G.shape[0]))
        R, Rinv = (V * np.sqrt(e)) @ V.T, (V / np.sqrt(e)) @ V.T
    U, S, _ = np.linalg.svd(R @ W @ L)  # Eckart-Young on the whitened matrix
    Ur = U[:, :rank]
    return Rinv @ Ur @ Ur.T @ R @ W, S**2


@pytest.mark.parametrize("kind", list(LAYERS))
@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("center", [False, True])
def test_output_side_matches_numpy_and_input_side(kind, weighted, center):
    model, site, inp, out, X = _collect(kind)
    W = matrix_of(model[0], site.kind).detach()
    m = W.shape[0]
    G = None
    if weighted:
        A = torch.randn(m, m + 2, dtype=torch.float64, generator=torch.Generator().manual_seed(3))
        G = A @ A.T  # a PSD output Gram matrix
    for ridge in (None, 1e-2):
        rel = ridge if ridge is not None else (1e-2 if X.shape[0] < X.shape[1] else 1e-6)  # the documented default
        a = decompose_aware(W, inp, output_gram=G, center=center, ridge=ridge)
        b = decompose_aware(W, out, output_gram=G, center=center, ridge=ridge)
        for r in (1, m // 2, m - 1):
            ref, energies = _numpy_optimum(W.numpy(), X, r, center=center, rel_ridge=rel,
                                           G=None if G is None else G.numpy())
            Bf, Af = b.factors(r)
            np.testing.assert_allclose((Bf @ Af).numpy(), ref, rtol=1e-6, atol=1e-8 * np.abs(ref).max())
            Bi, Ai = a.factors(r)
            np.testing.assert_allclose((Bf @ Af).numpy(), (Bi @ Ai).numpy(), rtol=1e-6,
                                       atol=1e-8 * np.abs(ref).max())
            if center:
                np.testing.assert_allclose(b.bias_shift(r).numpy(), a.bias_shift(r).numpy(), rtol=1e-6, atol=1e-9)
        np.testing.assert_allclose(b.energies(), energies[:m], rtol=1e-7, atol=1e-9 * energies.max())
        np.testing.assert_allclose(b.total_energy, a.total_energy, rtol=1e-9)
        # errors are sqrt(total - kept): at full rank a rounding-level difference under the square root
        np.testing.assert_allclose(b.errors(), a.errors(), rtol=1e-6, atol=1e-6 * np.sqrt(a.total_energy))


@pytest.mark.parametrize("kind", ["linear", "conv2d"])
def test_scale_method_energies_match(kind):
    """ASVD scaling (Yuan et al. 2023) chooses U from the scaled weight; its energies u^T W C W^T u are the same
    from either side."""
    model, site, inp, out, _ = _collect(kind)
    W = matrix_of(model[0], site.kind).detach()
    a = decompose_aware(W, inp, method="scale")
    b = decompose_aware(W, out, method="scale")
    np.testing.assert_allclose(b.energies(), a.energies(), rtol=1e-7, atol=1e-9 * a.total_energy)
    np.testing.assert_allclose((b.U[:, :2] * b.S[:2]) @ b.Vh[:2], (a.U[:, :2] * a.S[:2]) @ a.Vh[:2], atol=1e-9)


def _model():
    torch.manual_seed(0)
    return nn.Sequential(nn.Conv1d(8, 6, 5, padding=2), nn.ReLU(), nn.Flatten(), nn.Linear(6 * 16, 10), nn.ReLU(),
                         nn.Linear(10, 30)).double()


def test_chosen_ranks_match():
    """The allocation reads only the energies, so both sides choose the same ranks at every budget."""
    model = _model()
    batches = [torch.randn(16, 8, 16, dtype=torch.float64) for _ in range(3)]
    sites = walk(model).sites
    spectra = {side: aware_spectra(model, sites, collect_stats(model, None, batches, side=side), center=True)
               for side in ("input", "narrow")}
    sides = collect_stats(model, None, batches, side="narrow")
    assert {n: s.side for n, s in sides.items()} == {"0": "output", "3": "output", "5": "input"}
    for budget in (0.3, 0.5, 0.7):
        plans = [choose_ranks(sites, spectra[s], Policy(budget=budget)) for s in ("input", "narrow")]
        for name, e in plans[0]["sites"].items():
            f = plans[1]["sites"][name]
            assert (e["action"], e.get("rank")) == (f["action"], f.get("rank"))
            assert e.get("energy_kept", 0) == pytest.approx(f.get("energy_kept", 0), rel=1e-9)


@pytest.mark.filterwarnings("ignore:Using padding='same' with even kernel")
def test_wide_conv_statistics_fit_where_the_input_side_is_refused():
    """The issue's layer: 1024 channels x 64 taps in (n = 65,536), 128 out. The input side (3 n x n float64
    matrices, 103 GB) is refused before anything is allocated; the output side fits in well under 1 GB."""
    torch.manual_seed(0)
    model = nn.Sequential(nn.Conv1d(1024, 128, 64, padding="same"))
    site = walk(model).sites[0]
    assert stats_bytes(site, "input") > 100 * 10**9
    assert stats_bytes(site, "narrow") < 2**30
    x = torch.randn(2, 1024, 40)
    with pytest.raises(FactorizeError, match="would need"):
        collect_stats(model, None, [x], side="input", memory_limit=2**30)
    st = collect_stats(model, None, [x], side="narrow", memory_limit=2**30)["0"]
    assert st.side == "output" and st.second_moment is None and tuple(st.output_moment.shape) == (128, 128)
    with torch.no_grad():
        y = model[0](x).double() - model[0].bias.double()[:, None]  # the layer's pre-bias outputs, by torch's conv
    Y = y.transpose(1, 2).reshape(-1, 128)
    np.testing.assert_allclose(st.output_moment.numpy(), (Y.T @ Y).numpy(), rtol=1e-4, atol=1e-3)  # float32 conv
    assert st.count == 80
    with pytest.raises(FactorizeError, match="output side"):
        st.moment()


def test_other_weight_is_refused():
    model, site, _, out, _ = _collect("linear")
    W = matrix_of(model[0], site.kind).detach().clone()
    W[0, 0] += 1.0
    with pytest.raises(FactorizeError, match="another weight"):
        decompose_aware(W, out)


def test_sequential_uses_output_side_beyond_the_limit(monkeypatch):
    """Past INPUT_SIDE_LIMIT the sequential mode fits from output-side statistics (no least-squares refit): its
    first layer, which sees the original inputs, gets exactly the per-layer factors."""
    monkeypatch.setattr(stats_module, "INPUT_SIDE_LIMIT", 8)
    model = _model()
    batches = [torch.randn(16, 8, 16, dtype=torch.float64) for _ in range(2)]
    sites = walk(model).sites
    plan = choose_ranks(sites, aware_spectra(model, sites, collect_stats(model, None, batches)), Policy(budget=0.5))
    _, seq = compress_sequential(model, plan, batches, center=True)
    per_layer = aware_spectra(model, sites, collect_stats(model, None, batches, side="narrow"), center=True)
    first = next(n for n in ("0", "3", "5") if n in seq)  # the first factored layer sees the original inputs
    r = plan["sites"][first]["rank"]
    assert first in ("0", "3") and seq[first].residual == 0.0  # an output-side layer: no least-squares residual
    np.testing.assert_allclose((seq[first].U[:, :r] * seq[first].S[:r]) @ seq[first].Vh[:r],
                               (per_layer[first].U[:, :r] * per_layer[first].S[:r]) @ per_layer[first].Vh[:r],
                               atol=1e-10)


def test_compress_with_output_side_layers(monkeypatch):
    """The default calibrated call and a byte budget both run when layers hold output-side statistics (a byte
    budget then rounds those layers with the diagonal of C)."""
    monkeypatch.setattr(stats_module, "INPUT_SIDE_LIMIT", 8)
    model = _model().float()
    batches = [torch.randn(16, 8, 16) for _ in range(2)]
    res = factorize.compress(model, budget=0.5, calibration=batches)
    assert res.stats["0"]["side"] == "output" and res.stats["5"]["side"] == "input"
    x = batches[0]
    res_bytes = factorize.compress(model, budget=0.5, cost="bytes", calibration=batches)
    assert res_bytes.stats["0"]["side"] == "output"
    with torch.no_grad():
        assert float((res.model(x) - model(x)).norm() / model(x).norm()) < 1.0
        assert torch.isfinite(res_bytes.model(x)).all()
