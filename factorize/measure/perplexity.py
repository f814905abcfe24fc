"""Perplexity of a causal language model on token inputs: exp of the mean next-token loss.

For tokens x_1..x_T the model's logits at position t score x_{t+1}; the loss is the cross-entropy averaged over
every predicted token (positions whose attention mask is 0 are left out), and perplexity = exp(mean loss). This
is the quantity transformers computes as ``model(input_ids, labels=input_ids).loss`` (labels shifted inside the
model, padding marked -100), so the two agree on the same tokens (checked in tests/measure/test_perplexity.py).

A ratio of perplexities (compressed / original) is the usual way to report what compressing a language model cost
(common practice): 1.00x means no change in next-token prediction on these tokens.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from typing import Any

import torch
from torch import nn

from factorize.errors import FactorizeError
from factorize.model.feed import feed, primary_output

CAUSAL_SUFFIXES = ("ForCausalLM", "LMHeadModel")  # transformers' naming of next-token models (common practice)


def is_causal_lm(model: nn.Module) -> bool:
    """Whether ``model`` predicts the next token: a transformers causal LM class, or a config marked as decoder."""
    name = type(model).__name__
    config = getattr(model, "config", None)
    return name.endswith(CAUSAL_SUFFIXES) or bool(getattr(config, "is_decoder", False) and "Encoder" not in name)


def token_ids(batch: Any) -> torch.Tensor | None:
    """The (B, T) token ids of a batch: ``input_ids`` of a dict, or an integer tensor itself."""
    ids = batch.get("input_ids") if isinstance(batch, Mapping) else batch
    if isinstance(ids, torch.Tensor) and ids.dim() == 2 and not ids.is_floating_point():
        return ids
    return None


def batch_next_token_loss(logits: torch.Tensor, batch: Any, index: int = 0) -> tuple[float, int]:
    """Summed next-token cross-entropy (nats) of one batch's (B, T, V) ``logits`` and the count of predicted
    tokens (positions whose attention mask is 0 are left out). ``index`` names the batch in errors."""
    ids = token_ids(batch)
    if ids is None:
        raise FactorizeError(
            f"batch {index} holds no token ids: perplexity needs integer input_ids of shape (batch, tokens)",
            fix="give tokenizer output (a dict with input_ids) or a (batch, tokens) integer tensor",
        )
    if logits.dim() != 3 or logits.shape[:2] != ids.shape:
        raise FactorizeError(
            f"batch {index}: the model returned {tuple(logits.shape)} for tokens {tuple(ids.shape)}",
            fix="perplexity needs a causal language model returning logits of shape (batch, tokens, vocab)",
        )
    pred, target = logits[:, :-1].float(), ids[:, 1:].to(logits.device)  # position t predicts token t+1
    keep = torch.ones_like(target, dtype=torch.bool)
    mask = batch.get("attention_mask") if isinstance(batch, Mapping) else None
    if isinstance(mask, torch.Tensor):
        keep = mask[:, 1:].to(target.device).bool()
    loss = nn.functional.cross_entropy(pred.reshape(-1, pred.shape[-1]), target.reshape(-1),
                                       reduction="none").reshape(target.shape)  # (B, T-1)
    return float(loss[keep].double().sum()), int(keep.sum())


@torch.no_grad()
def next_token_loss(model: nn.Module, batches: Iterable[Any]) -> tuple[float, int]:
    """Mean next-token cross-entropy (nats) over every predicted token of ``batches``, and the token count."""
    total, count = 0.0, 0
    was_training = model.training
    model.eval()
    try:
        for i, batch in enumerate(batches):
            if token_ids(batch) is None:
                batch_next_token_loss(torch.empty(0), batch, i)  # raises: no token ids
            summed, n = batch_next_token_loss(primary_output(feed(model, batch)), batch, i)
            total += summed
            count += n
    finally:
        model.train(was_training)
    if count == 0:
        raise FactorizeError("no token to predict in the inputs", fix="give sequences of at least two tokens")
    return total / count, count


def perplexity(model: nn.Module, batches: Iterable[Any]) -> float:
    """exp of :func:`next_token_loss`: the model's perplexity on these tokens."""
    loss, _ = next_token_loss(model, batches)
    return math.exp(loss)
