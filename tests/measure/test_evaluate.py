"""Tests for factorize/evaluate.py: running models, output drift, and the full evaluation."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy.spatial.distance import cosine as scipy_cosine_distance
from scipy.special import softmax as scipy_softmax
from scipy.stats import entropy as scipy_entropy
from torch import nn

from factorize.errors import FactorizeError
from factorize.measure.drift import output_drift
from factorize.model.feed import primary_output, run_model
from tests.measure.fakeclock import Costly, FakeClock


class _Tupled(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.fc = nn.Linear(4, 3)

    def forward(self, x, scale=1.0):
        return (self.fc(x) * scale, "extra")


class _Keyword(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.fc = nn.Linear(4, 3)

    def forward(self, input_ids, attention_mask=None):
        out = self.fc(input_ids)
        return {"last_hidden_state": out * attention_mask[..., None], "pooler": out.sum(-1)}


# --- run_model -------------------------------------------------------------------------------------------------


def test_run_model_feeds_each_batch_by_contract_and_restores_train_mode() -> None:
    torch.manual_seed(0)
    tupled, keyword = _Tupled().train(), _Keyword()
    x = torch.randn(5, 4)
    outs = run_model(tupled, [x, (x, 2.0), [x]])
    assert [tuple(o.shape) for o in outs] == [(5, 3)] * 3
    torch.testing.assert_close(outs[1], 2.0 * outs[0])
    assert tupled.training, "the training flag must be restored"
    assert not outs[0].requires_grad  # computed under no_grad
    mask = torch.ones(5, dtype=torch.float32)
    (out,) = run_model(keyword, [{"input_ids": x, "attention_mask": mask}])
    torch.testing.assert_close(out, keyword.fc(x).detach())


def test_primary_output_prefers_logits_then_hidden_state() -> None:
    transformers = pytest.importorskip("transformers")
    a, b = torch.ones(2, 3), torch.zeros(2, 3, 4)
    out = transformers.modeling_outputs.SequenceClassifierOutput(logits=a)
    assert primary_output(out) is a
    out = transformers.modeling_outputs.BaseModelOutputWithPooling(last_hidden_state=b, pooler_output=a)
    assert primary_output(out) is b
    assert primary_output(((b,), a)) is b  # first tensor, depth first
    with pytest.raises(FactorizeError, match="holds no tensor"):
        primary_output(("text", None))


# --- output_drift, checked against scipy -----------------------------------------------------------------------


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_output_drift_matches_scipy_on_logits(dtype) -> None:
    gen = torch.Generator().manual_seed(1)
    a = torch.randn(40, 7, generator=gen, dtype=dtype)
    b = a + 0.3 * torch.randn(40, 7, generator=gen, dtype=dtype)
    d = output_drift([a[:25], a[25:]], [b[:25], b[25:]])  # two batches, as run_model returns
    A, B = a.double().numpy(), b.double().numpy()
    # relative L2 error, Frobenius norm (numpy reference)
    assert d["relative_l2"] == pytest.approx(np.linalg.norm(A - B) / np.linalg.norm(A), rel=1e-9)
    # cosine per sample (scipy.spatial.distance.cosine = 1 - cosine similarity)
    cos = np.array([1 - scipy_cosine_distance(A[i], B[i]) for i in range(40)])
    assert d["cosine_mean"] == pytest.approx(cos.mean(), rel=1e-9)
    assert d["cosine_min"] == pytest.approx(cos.min(), rel=1e-9)
    # top-1 agreement and KL(p || q) of the softmax (scipy.stats.entropy(p, q) is KL in nats)
    assert d["top1_agreement"] == pytest.approx(np.mean(A.argmax(1) == B.argmax(1)))
    kl = np.mean([scipy_entropy(scipy_softmax(A[i]), scipy_softmax(B[i])) for i in range(40)])
    assert d["kl"] == pytest.approx(kl, rel=1e-6)
    assert d["samples"] == 40


def test_output_drift_of_identical_outputs_is_zero() -> None:
    a = torch.randn(8, 5)
    d = output_drift(a, a.clone())
    assert d["relative_l2"] == 0.0 and d["top1_agreement"] == 1.0
    assert d["cosine_min"] == pytest.approx(1.0) and d["kl"] == pytest.approx(0.0, abs=1e-12)


def test_output_drift_features_flatten_all_but_batch_and_skip_class_metrics() -> None:
    gen = torch.Generator().manual_seed(2)
    a = torch.randn(6, 4, 5, generator=gen)  # (B, T, C) hidden states
    b = a + 0.1 * torch.randn(6, 4, 5, generator=gen)
    d = output_drift(a, b)
    assert "top1_agreement" not in d and "kl" not in d
    A, B = a.reshape(6, -1).double().numpy(), b.reshape(6, -1).double().numpy()
    cos = [1 - scipy_cosine_distance(A[i], B[i]) for i in range(6)]  # scipy reference, as above
    assert d["cosine_min"] == pytest.approx(min(cos), rel=1e-9)
    # kind="logits" on (B, T, V): per-token top-1 and KL over the last dimension
    d = output_drift(a, b, kind="logits")
    assert d["top1_agreement"] == pytest.approx(float((a.argmax(-1) == b.argmax(-1)).double().mean()))
    assert "kl" in d and "kl" not in output_drift(a, b, kind="scores")


def test_output_drift_rejects_mismatched_outputs() -> None:
    with pytest.raises(FactorizeError, match="differ in shape") as err:
        output_drift([torch.zeros(2, 3), torch.zeros(2, 3)], [torch.zeros(2, 3), torch.zeros(2, 4)])
    assert "batch 1" in str(err.value)
    with pytest.raises(FactorizeError, match="unknown output kind"):
        output_drift(torch.ones(2, 3), torch.ones(2, 3), kind="probabilities")


# --- evaluate ----------------------------------------------------------------------------------------------------


def test_evaluate_counts_macs_with_hooks_on_a_cnn(cnn) -> None:
    import factorize
    from factorize.measure.evaluate import evaluate

    result = factorize.compress(cnn, rank=4)
    x = torch.randn(3, 3, 10, 10, generator=torch.Generator().manual_seed(0))
    report = evaluate(cnn, result.model, [x], plan=result.plan, latency_repeats=2)
    rows = {r.name: r for r in report.layers}
    # Hand count (common practice: mn MACs per output position dense, r(m+n) factored).
    # c1: 3->16, 3x3, padding 1 on 10x10 -> 10x10 = 100 positions; m=16, n=27.
    assert rows["c1"].macs == 16 * 27 * 100
    # c2: stride 2, padding 2, dilation 2 on 10x10: out = floor((10 + 4 - 2*2 - 1)/2) + 1 = 5 -> 25 positions
    assert rows["c2"].macs == 24 * 16 * 9 * 25
    assert rows["c2"].rank == 4  # factored at the asked rank (24x144 at rank 4 saves), so macs_after applies
    assert rows["c2"].macs_after == 4 * (24 + 144) * 25
    # c3 (Conv1d over the flattened 5x5 map, length 25, padding 2 -> 25 positions), fc: one position
    assert rows["c3"].macs == 20 * 24 * 5 * 25
    assert rows["fc"].macs == 7 * 20
    factored = [r for r in report.layers if r.rank is not None]
    assert report.macs_before == sum(r.macs for r in factored)
    assert report.macs_after == sum(r.macs_after for r in factored)


def test_evaluate_weight_error_and_accuracy_against_references(mlp) -> None:
    from sklearn.metrics import accuracy_score

    import factorize
    from factorize.measure.evaluate import evaluate

    result = factorize.compress(mlp, rank=5, method="exact")  # exact SVD: Eckart-Young applies exactly
    gen = torch.Generator().manual_seed(3)
    batches = [torch.randn(16, 24, generator=gen) for _ in range(3)]
    labels = torch.randint(0, 10, (48,), generator=gen)
    report = evaluate(mlp, result.model, batches, labels=labels, plan=result.plan, latency_repeats=3)
    # weight error against numpy's SVD: the best rank-5 approximation's relative Frobenius error (Eckart-Young)
    W = mlp.fc2.weight.detach().double().numpy()
    s = np.linalg.svd(W, compute_uv=False)
    fc2 = next(r for r in report.layers if r.name == "fc2")
    assert fc2.rank == 5
    assert fc2.weight_error == pytest.approx(np.sqrt((s[5:] ** 2).sum() / (s**2).sum()), rel=1e-4)
    assert fc2.weight_error == pytest.approx(fc2.predicted_error, rel=1e-4)
    # accuracy against scikit-learn's accuracy_score
    preds_before = np.concatenate([mlp(b).argmax(1).numpy() for b in batches])
    preds_after = np.concatenate([result.model(b).argmax(1).numpy() for b in batches])
    assert report.accuracy_before == pytest.approx(accuracy_score(labels.numpy(), preds_before))
    assert report.accuracy_after == pytest.approx(accuracy_score(labels.numpy(), preds_after))
    # parameters: the model's own count before and after
    assert report.params_before == sum(p.numel() for p in mlp.parameters())
    assert report.params_after == sum(p.numel() for p in result.model.parameters())
    assert report.samples == 48 and report.latency_batch == 16
    assert report.latency_ms_before > 0 and report.latency_ms_after > 0
    assert report.drift["relative_l2"] > 0
    assert mlp.training is False and result.model.training is False


def test_evaluate_counts_tied_weights_once_and_embedding_macs(tied_lm) -> None:
    import factorize
    from factorize.measure.evaluate import evaluate

    result = factorize.compress(tied_lm, rank=4)
    ids = torch.randint(0, 50, (2, 6), generator=torch.Generator().manual_seed(0))
    report = evaluate(tied_lm, result.model, [ids], plan=result.plan, latency_repeats=0)
    # embed (50x16) and head share one tensor: counted once (800), plus mix (16x16 + 16)
    assert report.params_before == 50 * 16 + 16 * 16 + 16
    assert report.latency_ms_before is None
    rows = {r.name: r for r in report.layers}
    assert rows["embed"].rank is None  # tied: kept dense, see factorize.ranks
    assert rows["mix"].macs == 16 * 16 * 6  # 6 tokens per sample
    assert rows["mix"].macs_after == 4 * 32 * 6


def test_evaluate_runs_the_original_once_per_batch_and_once_per_memo(tied_lm) -> None:
    # The output positions of the per-layer table come from the same pass as the original's outputs (hooks on the
    # first batch), and a memo shared by several evaluations (a sweep) runs the original only for the first one.
    import factorize
    from factorize.measure.evaluate import evaluate

    gen = torch.Generator().manual_seed(0)
    batches = [torch.randint(0, 50, (2, 6), generator=gen), torch.randint(0, 50, (3, 6), generator=gen)]
    compressed = [factorize.compress(tied_lm, rank=r).model for r in (4, 2)]
    calls = []
    handle = tied_lm.register_forward_hook(lambda module, args, output: calls.append(args[0].shape[0]))
    try:
        memo: dict = {}
        reports = [evaluate(tied_lm, c, batches, latency_repeats=0, memo=memo) for c in compressed]
    finally:
        handle.remove()
    assert calls == [2, 3]  # one forward pass of the original per batch, for both evaluations together
    for report, r in zip(reports, (4, 2)):
        mix = next(row for row in report.layers if row.name == "mix")
        assert mix.macs == 16 * 16 * 6 and mix.macs_after == r * 32 * 6  # per sample: 6 tokens (common practice)
    alone = evaluate(tied_lm, factorize.compress(tied_lm, rank=2).model, batches, latency_repeats=0)
    assert alone.drift == reports[1].drift and alone.to_json()["layers"] == reports[1].to_json()["layers"]


def test_evaluate_rejects_bad_labels_and_empty_inputs(mlp) -> None:
    import factorize
    from factorize.measure.evaluate import evaluate

    result = factorize.compress(mlp, rank=5)
    with pytest.raises(FactorizeError, match="3 labels for 8 predictions"):
        evaluate(mlp, result.model, [torch.randn(8, 24)], labels=torch.tensor([1, 2, 3]), latency_repeats=0)
    with pytest.raises(FactorizeError, match="no sample inputs"):
        evaluate(mlp, result.model, [], latency_repeats=0)


def test_output_drift_ignores_padded_positions_when_given_the_attention_mask() -> None:
    gen = torch.Generator().manual_seed(4)
    a = torch.randn(2, 5, 6, generator=gen)  # (B, T, C)
    b = a + 0.1 * torch.randn(2, 5, 6, generator=gen)
    mask = torch.tensor([[1, 1, 1, 0, 0], [1, 1, 1, 1, 1]])
    b_junk = b.clone()
    b_junk[0, 3:] = 1e3  # garbage at padded positions must not matter
    masked = output_drift([a], [b_junk], masks=[mask], kind="logits")
    real = mask.bool()
    A, B = a[real].double().numpy(), b[real].double().numpy()  # (tokens, C) of real positions only
    # references: numpy's Frobenius norm for the relative L2 error, numpy argmax for top-1
    assert masked["relative_l2"] == pytest.approx(np.linalg.norm(A - B) / np.linalg.norm(A), rel=1e-9)
    assert masked["top1_agreement"] == pytest.approx(np.mean(A.argmax(1) == B.argmax(1)))
    assert output_drift([a], [b_junk])["relative_l2"] > 10  # unmasked, the padding dominates


def test_evaluate_latency_is_the_median_of_interleaved_passes_on_the_clock_given() -> None:
    from factorize.measure.evaluate import evaluate

    clock = FakeClock()
    slow, fast = Costly(clock, 2.0, "slow"), Costly(clock, 1.0, "fast")
    x = torch.randn(6, 4, generator=torch.Generator().manual_seed(5))
    report = evaluate(slow, fast, [x, x[:2]], latency_repeats=5, clock=clock)
    assert report.latency_ms_before == pytest.approx(2.0, abs=1e-9)
    assert report.latency_ms_after == pytest.approx(1.0, abs=1e-9)  # a 2.0x ratio, exactly
    assert report.latency_repeats == 5 and report.latency_batch == 6  # timed on the first batch
    assert clock.log[-30:] == ["read", "slow", "read", "read", "fast", "read"] * 5


def test_evaluate_options_whole_or_as_keywords(mlp) -> None:
    # The options object and the keyword form measure the same; the drift is checked against numpy's norm.
    import factorize
    from factorize.measure.evaluate import EvaluateOptions, evaluate

    result = factorize.compress(mlp, rank=4, method="exact")
    batches = [torch.randn(8, 24, generator=torch.Generator().manual_seed(5))]
    a = evaluate(mlp, result.model, batches, latency_repeats=0, title="t", notes=["n"])
    b = evaluate(mlp, result.model, batches, EvaluateOptions(latency_repeats=0, title="t", notes=("n",)))
    assert a.drift == b.drift and a.title == b.title == "t" and a.notes == b.notes
    ref, out = mlp(batches[0]).detach().numpy(), result.model(batches[0]).detach().numpy()
    assert a.drift["relative_l2"] == pytest.approx(np.linalg.norm(out - ref) / np.linalg.norm(ref), rel=1e-5)
    with pytest.raises(FactorizeError, match="both given"):
        evaluate(mlp, result.model, batches, EvaluateOptions(), latency_repeats=0)
    with pytest.raises(FactorizeError, match="unknown keyword: repeats"):
        evaluate(mlp, result.model, batches, repeats=0)
