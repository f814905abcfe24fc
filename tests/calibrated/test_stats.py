"""Calibration statistics: each site's input second moment, checked against direct computation."""

from __future__ import annotations

import copy

import numpy as np
import pytest
import torch
from conftest import tiny_bert, tiny_gpt2
from torch import nn

from factorize.calibrated.stats import collect_pair_stats, collect_stats, forward_order
from factorize.errors import FactorizeError
from factorize.model.sites import matrix_of, walk

pytestmark = pytest.mark.filterwarnings("ignore:too few calibration samples")  # tiny inputs on purpose


def _np(t: torch.Tensor) -> np.ndarray:
    return t.detach().to(torch.float64).cpu().numpy()


def test_linear_second_moment_matches_numpy(mlp):
    torch.manual_seed(1)
    x = torch.randn(50, 24)
    stats = collect_stats(mlp, None, [x[:20], x[20:35], x[35:]])  # streamed over three batches
    h1 = torch.relu(mlp.fc1(x)).detach()
    h2 = torch.relu(mlp.fc2(h1)).detach()
    # reference: X^T X computed directly in numpy float64 (definition of the second moment)
    for name, inp in (("fc1", x), ("fc2", h1), ("head", h2)):
        X = _np(inp)
        np.testing.assert_allclose(_np(stats[name].second_moment), X.T @ X, rtol=1e-10, atol=1e-9)
        np.testing.assert_allclose(_np(stats[name].mean), X.mean(0), rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(_np(stats[name].abs_mean), np.abs(X).mean(0), rtol=1e-10, atol=1e-12)
        assert stats[name].count == 50 and stats[name].batches == 3


def test_per_site_collection_equals_one_pass(mlp):
    torch.manual_seed(2)
    batches = [torch.randn(16, 24) for _ in range(3)]
    a = collect_stats(mlp, None, batches)
    b = collect_stats(mlp, ["fc2", "head"], iter(batches), per_site=True)  # a generator is fine too
    assert list(b) == ["fc2", "head"]
    for name in b:
        torch.testing.assert_close(a[name].second_moment, b[name].second_moment, rtol=1e-12, atol=1e-10)
        assert a[name].count == b[name].count


@pytest.mark.parametrize("padding_mode", ["zeros", "reflect"])
def test_conv_patches_reproduce_the_convolution(cnn, padding_mode):
    # A conv's output at every position is its matrix view times the unfolded input patch (im2col; common
    # practice), so trace(W C W^T) must equal the squared norm of (conv output - bias) over all positions.
    model = copy.deepcopy(cnn)
    model.c1.padding_mode = padding_mode
    torch.manual_seed(3)
    x = torch.randn(4, 3, 16, 14)
    stats = collect_stats(model, ["c1", "c2", "c3"], [x[:2], x[2:]])
    outs = {}
    hooks = [getattr(model, n).register_forward_hook(lambda m, i, o, n=n: outs.setdefault(n, o.detach()))
             for n in ("c1", "c2", "c3")]
    with torch.no_grad():
        model(x)
    for h in hooks:
        h.remove()
    for name in ("c1", "c2", "c3"):
        conv = getattr(model, name)
        W = matrix_of(conv, "conv2d" if name != "c3" else "conv1d").detach().double()
        y = outs[name].double()
        if conv.bias is not None:
            y = y - conv.bias.detach().double().reshape(1, -1, *([1] * (y.dim() - 2)))
        C = stats[name].second_moment
        assert stats[name].width == W.shape[1]
        assert stats[name].count == y.shape[0] * int(np.prod(y.shape[2:]))  # one row per output position
        torch.testing.assert_close(torch.trace(W @ C @ W.T), (y**2).sum(), rtol=1e-6, atol=1e-6)
        # and position by position: the patch mean maps to the mean output
        torch.testing.assert_close(W @ stats[name].mean, y.transpose(0, 1).reshape(y.shape[1], -1).mean(1),
                                   rtol=1e-5, atol=1e-6)  # conv output is float32


def test_conv_same_padding():
    torch.manual_seed(4)
    conv = nn.Sequential(nn.Conv1d(3, 5, 4, padding="same", dilation=2))
    x = torch.randn(2, 3, 10)
    stats = collect_stats(conv, None, [x])
    W = matrix_of(conv[0], "conv1d").detach().double()
    y = (conv(x).detach().double() - conv[0].bias.detach().double()[None, :, None])
    torch.testing.assert_close(torch.trace(W @ stats["0"].second_moment @ W.T), (y**2).sum(), rtol=1e-9, atol=1e-6)


def test_embedding_counts_and_attention_mask(tied_lm):
    model = tiny_bert()  # transformers.BertModel from a tiny config (vocab 64)
    ids = torch.tensor([[1, 5, 5, 7, 0, 0], [3, 5, 9, 2, 2, 4]])
    mask = torch.tensor([[1, 1, 1, 1, 0, 0], [1, 1, 1, 1, 1, 1]])
    stats = collect_stats(model, ["embeddings.word_embeddings", "encoder.layer.0.attention.self.query"],
                          [{"input_ids": ids, "attention_mask": mask}])
    emb = stats["embeddings.word_embeddings"]
    # reference: numpy bincount of the unmasked ids (one-hot inputs: X^T X is diagonal with the counts)
    expected = np.bincount(ids[mask.bool()].numpy(), minlength=64)
    np.testing.assert_array_equal(_np(emb.diagonal), expected)
    assert emb.second_moment is None and emb.count == int(mask.sum())
    # padded positions are left out of the linear layers too
    assert stats["encoder.layer.0.attention.self.query"].count == int(mask.sum())


def test_transposed_projection_rows():
    model = tiny_gpt2()  # transformers.GPT2LMHeadModel from a tiny config: Conv1D (transposed) projections
    sites = [s for s in walk(model).sites if s.kind == "transposed"]
    assert sites
    ids = torch.randint(0, 64, (2, 7))
    stats = collect_stats(model, sites[:2], [ids])
    for s in sites[:2]:
        assert stats[s.name].count == 14 and stats[s.name].width == s.shape[1]


def test_failing_batch_is_named(mlp):
    with pytest.raises(FactorizeError, match="calibration batch 1 did not run"):
        collect_stats(mlp, None, [torch.randn(4, 24), torch.randn(4, 23)])


def test_non_finite_activation_names_the_layer(mlp):
    model = copy.deepcopy(mlp)
    with torch.no_grad():
        model.fc2.weight[0, 0] = float("inf")
    x = torch.ones(3, 24)
    with pytest.raises(FactorizeError, match=r"layer head: .*non-finite.*batch 0"):
        collect_stats(model, None, [x])


def test_too_few_samples_warns(mlp):
    with pytest.warns(UserWarning, match="too few calibration samples"):
        stats = collect_stats(mlp, ["fc2"], [torch.randn(10, 24)])
    assert stats["fc2"].count == 10


def test_forward_order_and_pair_stats(mlp):
    torch.manual_seed(5)
    sites = walk(mlp).sites
    order, calls = forward_order(mlp, sites, torch.randn(2, 24))
    assert order == ["fc1", "fc2", "head"] and set(calls.values()) == {1}
    batches = [torch.randn(8, 24), torch.randn(8, 24)]
    # with two identical models, cross = reference moment = own moment
    pair = collect_pair_stats(mlp, copy.deepcopy(mlp), sites[1], batches)
    single = collect_stats(mlp, ["fc2"], batches)["fc2"]
    for t in (pair.second_moment, pair.reference_moment, pair.cross):
        torch.testing.assert_close(t, single.second_moment, rtol=1e-12, atol=1e-10)
    assert pair.count == 16


def test_output_grams_match_exact_jacobians(mlp):
    # G = (1/N) sum_t J_t^T J_t with J_t = d model(x_t) / d layer output. The random-projection estimate is
    # unbiased (Hutchinson 1990: E[v v^T] = I); reference: exact Jacobians from torch.autograd.functional.
    from factorize.calibrated.gradients import collect_output_grams

    torch.manual_seed(6)
    x = torch.randn(12, 24)
    flags = [p.requires_grad for p in mlp.parameters()]
    for p in mlp.parameters():
        p.requires_grad_(False)  # a frozen model still works; flags are restored
    grams = collect_output_grams(mlp, ["fc1", "fc2"], [x[:6], x[6:]], projections=200, seed=1)
    assert all(not p.requires_grad for p in mlp.parameters()) and all(p.grad is None for p in mlp.parameters())
    for p, f in zip(mlp.parameters(), flags):
        p.requires_grad_(f)
    h1 = mlp.fc1(x).detach()
    h2 = mlp.fc2(torch.relu(h1)).detach()
    tail = {"fc1": lambda h: mlp.head(torch.relu(mlp.fc2(torch.relu(h)))), "fc2": lambda h: mlp.head(torch.relu(h))}
    for name, hs in (("fc1", h1), ("fc2", h2)):
        exact = torch.zeros(48, 48, dtype=torch.float64)
        for t in range(x.shape[0]):
            J = torch.autograd.functional.jacobian(tail[name], hs[t]).double()  # (10, 48)
            exact += J.T @ J
        exact /= x.shape[0]
        rel = float(torch.linalg.matrix_norm(grams[name] - exact) / torch.linalg.matrix_norm(exact))
        assert rel < 0.15, (name, rel)  # Monte-Carlo error of 200 projections x 12 rows


def test_output_grams_need_a_differentiable_model(mlp):
    from factorize.calibrated.gradients import collect_output_grams

    class Frozen(nn.Module):
        def __init__(self, inner):
            super().__init__()
            self.inner = inner

        def forward(self, x):
            with torch.no_grad():  # e.g. a model that computes its output without autograd
                return self.inner(x)

    with pytest.raises(FactorizeError, match="sensitivity='probes'"):
        collect_output_grams(Frozen(mlp), ["inner.fc1"], [torch.randn(4, 24)])


def test_statistics_that_would_not_fit_are_refused_before_allocating(monkeypatch):
    # a conv whose unfolded input is 16 x 9 x 9 = 1296 wide needs 3 x 1296^2 x 8 bytes (about 40 MB) to whiten;
    # with a 1 MB allowance the call must fail up front, naming the layer and its bytes, and never run the model
    from factorize.calibrated.memory import check_memory
    from factorize.calibrated.stats import collect_stats, stats_bytes

    model = nn.Sequential(nn.Conv2d(3, 16, 3), nn.Conv2d(16, 8, 9))
    calls = []
    model.register_forward_pre_hook(lambda *a: calls.append(1))
    sites = walk(model).sites
    assert stats_bytes(sites[1]) == 3 * 1296**2 * 8
    with pytest.raises(FactorizeError) as err:
        collect_stats(model, sites, [torch.randn(2, 3, 20, 20)], memory_limit=2**20)
    text = str(err.value)
    assert "1: 38.4 MB" in text and "exclude" in text and not calls  # 40,310,784 bytes
    check_memory({"a": 10, "b": 20}, "input statistics", limit=30)  # exactly at the limit: allowed
    with pytest.raises(FactorizeError, match="a: 21 B"):
        check_memory({"a": 21, "b": 10}, "input statistics", limit=30)


def test_conv3d_patches_reproduce_the_convolution():
    # im2col identity (common practice) in 3-D: trace(W C W^T) equals the squared norm of (conv output - bias).
    torch.manual_seed(5)
    model = nn.Sequential(nn.Conv3d(2, 4, (3, 2, 2), stride=(1, 2, 1), padding=(1, 0, 1), dilation=(2, 1, 1)))
    x = torch.randn(2, 2, 6, 5, 5, dtype=torch.float64)
    model = model.double()
    stats = collect_stats(model, None, [x])
    W = matrix_of(model[0], "conv3d").detach()
    y = model(x).detach() - model[0].bias.detach().reshape(1, -1, 1, 1, 1)
    assert stats["0"].count == y.shape[0] * int(np.prod(y.shape[2:]))
    torch.testing.assert_close(torch.trace(W @ stats["0"].second_moment @ W.T), (y**2).sum(), rtol=1e-9, atol=1e-9)
    torch.testing.assert_close(W @ stats["0"].mean, y.transpose(0, 1).reshape(4, -1).mean(1), rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize("layer,x", [
    (nn.ConvTranspose1d(3, 4, 3, stride=2, padding=1, output_padding=1, dilation=2), torch.randn(2, 3, 7)),
    (nn.ConvTranspose2d(3, 2, (3, 2), stride=(2, 3), padding=(1, 0), output_padding=(1, 2)), torch.randn(2, 3, 4, 5)),
])
def test_conv_transpose_rows_and_output_rows(layer, x):
    # A transposed conv is col2im (F.fold) of the matrix view applied to each input position (torch docs: it is
    # the gradient of a conv); the output-gradient rows must be the adjoint gather: <g, y> = <rows(g), M X>.
    from factorize.calibrated.gradients import _output_rows
    from factorize.calibrated.stats import input_rows

    torch.manual_seed(6)
    layer, x = layer.double(), x.double()
    kind = "conv_transpose1d" if isinstance(layer, nn.ConvTranspose1d) else "conv_transpose2d"
    M = matrix_of(layer, kind).detach()  # (out * k, in)
    rows = input_rows(layer, kind, x)  # (B * L, in)
    y = layer(x).detach() - layer.bias.detach().reshape(1, -1, *([1] * (x.dim() - 2)))
    contributions = rows @ M.T  # (B * L, out * k)
    g = torch.randn_like(y)
    g_rows = _output_rows(kind, g, None, layer)
    assert g_rows.shape == contributions.shape
    torch.testing.assert_close((g_rows * contributions).sum(), (g * y).sum(), rtol=1e-9, atol=1e-9)
    stats = collect_stats(nn.Sequential(layer), None, [x])
    torch.testing.assert_close(stats["0"].second_moment, rows.T @ rows, rtol=1e-9, atol=1e-9)
