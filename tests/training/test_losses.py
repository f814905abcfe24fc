"""The distillation losses and the rule that picks one (factorize/training/losses.py)."""

from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F

from factorize.errors import FactorizeError
from factorize.training.losses import distill_loss, layer_match_loss, resolve_loss


def test_kl_loss_matches_torch_kl_div_with_temperature_squared() -> None:
    # Hinton, Vinyals & Dean 2015: T^2 * KL(p_T || q_T); reference: torch.nn.functional.kl_div (batchmean).
    gen = torch.Generator().manual_seed(0)
    s, t = torch.randn(8, 5, generator=gen), torch.randn(8, 5, generator=gen)
    T = 3.0
    ref = F.kl_div(F.log_softmax(s / T, -1), F.log_softmax(t / T, -1), log_target=True, reduction="batchmean")
    assert torch.allclose(distill_loss("kl", s, t, temperature=T), ref * T * T, atol=1e-6)
    assert float(distill_loss("kl", t, t)) == pytest.approx(0.0, abs=1e-7)


def test_cosine_and_mse_losses_match_torch_references() -> None:
    gen = torch.Generator().manual_seed(0)
    s, t = torch.randn(2, 7, 4, generator=gen), torch.randn(2, 7, 4, generator=gen)
    cos = F.cosine_similarity(s, t, dim=-1)  # (2, 7)
    assert torch.allclose(distill_loss("cosine", s, t), (1 - cos).mean(), atol=1e-6)
    assert torch.allclose(distill_loss("mse", s, t), F.mse_loss(s, t), atol=1e-6)
    mask = torch.ones(2, 7)
    mask[1, 4:] = 0  # padded positions leave the loss
    expected = (1 - cos)[mask.bool()].mean()
    assert torch.allclose(distill_loss("cosine", s, t, mask=mask.reshape(-1)), expected, atol=1e-6)


def test_auto_loss_rule() -> None:
    transformers = pytest.importorskip("transformers")
    assert resolve_loss("auto", torch.zeros(4, 10)) == "kl"  # (batch, classes): logits
    assert resolve_loss("auto", torch.zeros(4, 6, 8)) == "cosine"  # per-position features
    assert resolve_loss("auto", torch.zeros(4)) == "mse"
    assert resolve_loss("auto", torch.zeros(4, 1)) == "mse"
    assert resolve_loss("auto", {"logits": torch.zeros(2, 3, 5)}) == "kl"
    hidden = transformers.modeling_outputs.BaseModelOutput(last_hidden_state=torch.zeros(2, 3, 4))
    assert resolve_loss("auto", hidden) == "cosine"
    assert resolve_loss("mse", torch.zeros(4, 10)) == "mse"


def test_layer_match_loss_is_the_mean_relative_squared_error() -> None:
    # FitNets-style hint term (Romero et al. 2015, cited from memory): ||y_s - y_t||^2 / ||y_t||^2 per layer, here
    # checked against torch.nn.functional.mse_loss with reduction="sum" (the squared Frobenius norm).
    gen = torch.Generator().manual_seed(0)
    ys = {"a": torch.randn(3, 4, generator=gen), "b": torch.randn(2, 5, generator=gen)}
    yt = {"a": torch.randn(3, 4, generator=gen), "b": torch.randn(2, 5, generator=gen)}
    rel = [F.mse_loss(ys[n], yt[n], reduction="sum") / F.mse_loss(yt[n], torch.zeros_like(yt[n]), reduction="sum")
           for n in ("a", "b")]
    cpu = torch.device("cpu")
    assert torch.allclose(layer_match_loss(ys, yt, ["a", "b"], cpu), (rel[0] + rel[1]) / 2, atol=1e-6)
    assert torch.allclose(layer_match_loss(ys, {"a": yt["a"]}, ["a", "b"], cpu), rel[0], atol=1e-6)  # b did not run
    assert float(layer_match_loss({}, {}, ["a"], cpu)) == 0.0
    with pytest.raises(FactorizeError, match="layer a gives"):
        layer_match_loss({"a": ys["a"]}, {"a": yt["b"]}, ["a"], cpu)
