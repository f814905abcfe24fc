"""The batch contract: how a batch is fed to a model (tensor, tuple or list, dict), which output tensor stands for the
model's output, and running a model over batches without gradients."""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from typing import Any

import torch
from torch import nn

from factorize.errors import FactorizeError

PRIMARY_KEYS = ("logits", "last_hidden_state")  # taken from model outputs, in this order


def feed(model: nn.Module, batch: Any) -> Any:
    """Call ``model`` on one batch under the batch contract (tensor, tuple/list, dict)."""
    if isinstance(batch, Mapping):
        return model(**batch)
    if isinstance(batch, (tuple, list)):
        return model(*batch)
    return model(batch)


def primary_output(output: Any) -> torch.Tensor:
    """The tensor that stands for a model's output: the tensor itself, ``logits``, ``last_hidden_state``, or the
    first tensor of a tuple/list (searched depth-first)."""
    if isinstance(output, torch.Tensor):
        return output
    for key in PRIMARY_KEYS:
        value = output.get(key) if isinstance(output, Mapping) else getattr(output, key, None)
        if isinstance(value, torch.Tensor):
            return value
    if isinstance(output, Mapping):
        items: Iterable = output.values()
    elif isinstance(output, (tuple, list)):
        items = output
    elif hasattr(output, "to_tuple"):  # transformers ModelOutput without logits/last_hidden_state
        items = output.to_tuple()
    else:
        items = ()
    for item in items:
        try:
            return primary_output(item)
        except FactorizeError:
            continue
    raise FactorizeError(
        f"the model returned {type(output).__name__}, which holds no tensor to compare",
        fix="make the model return a tensor, a tuple whose first item is a tensor, or an object with .logits or "
        ".last_hidden_state",
    )


def batch_size(batch: Any) -> int:
    """Number of samples in a batch: the first dimension of its first tensor."""
    if isinstance(batch, torch.Tensor):
        return int(batch.shape[0]) if batch.dim() else 1
    values = batch.values() if isinstance(batch, Mapping) else batch if isinstance(batch, (tuple, list)) else ()
    for v in values:
        if isinstance(v, torch.Tensor):
            return batch_size(v)
    return 1


def run_model(model: nn.Module, batches: Iterable[Any]) -> list[torch.Tensor]:
    """Run ``model`` on every batch and return the primary output tensor of each (detached, on the CPU).

    Runs under ``torch.no_grad()`` in eval mode; the model's training flag is restored afterwards.
    """
    was_training = model.training
    model.eval()
    outputs: list[torch.Tensor] = []
    try:
        with torch.no_grad():
            for batch in batches:
                outputs.append(primary_output(feed(model, batch)).detach().cpu())
    finally:
        model.train(was_training)
    return outputs


def token_mask(batch: Any) -> torch.Tensor | None:
    """A batch's ``attention_mask`` (tokenizer output), if it has one."""
    if isinstance(batch, Mapping) and isinstance(batch.get("attention_mask"), torch.Tensor):
        return batch["attention_mask"]
    return None

