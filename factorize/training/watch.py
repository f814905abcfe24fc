"""What healing watches on the held-out inputs: the measure a model's users judge it by.

``metric="auto"`` (the default of :func:`factorize.training.heal.heal`) picks it from the original model and its
output on the first held-out batch:

* a causal language model (:func:`factorize.measure.perplexity.is_causal_lm`) fed token ids: ``"perplexity"``,
  the compressed model's perplexity on the held-out tokens (lower is better; the original's perplexity and the
  ratio of the two are in each check's metrics);
* an encoder -- the output holds a ``last_hidden_state`` and no ``logits``, or ``pooling`` was given:
  ``"cosine_mean"`` of the pooled outputs (:func:`factorize.measure.pooling.pool`; ``"mean"`` unless ``pooling``
  says otherwise, the sentence embedding of Sentence-BERT, Reimers & Gurevych 2019), the mean cosine between the
  two models' pooled vectors (higher is better); each check also holds the worst sample, the 5th percentile and
  nearest-neighbour agreement (:func:`factorize.measure.drift.output_drift` with ``kind="embeddings"``);
* anything else: ``"relative_l2"`` of the outputs, ||a - b|| / ||a||.

An explicit metric is used as given; with ``pooling`` it is measured on the pooled outputs.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import torch
from torch import nn

from factorize.measure.drift import output_drift
from factorize.measure.perplexity import batch_next_token_loss, is_causal_lm, token_ids
from factorize.measure.pooling import pool
from factorize.model.feed import primary_output


def _has(output: Any, field: str) -> bool:
    value = output.get(field) if isinstance(output, Mapping) else getattr(output, field, None)
    return isinstance(value, torch.Tensor)


def resolve_metric(metric: str, pooling: str | None, teacher: nn.Module, output: Any,
                   batch: Any) -> tuple[str, str | None]:
    """(metric, pooling) to watch: the module docstring's rule for ``"auto"``, else ``metric`` as given.

    ``output`` is the teacher's raw output on ``batch``, the first held-out batch."""
    if metric != "auto":
        return metric, pooling
    states = primary_output(output)
    if pooling is None and is_causal_lm(teacher) and token_ids(batch) is not None and states.dim() == 3:
        return "perplexity", None
    encoder = _has(output, "last_hidden_state") and not _has(output, "logits")
    if pooling is not None or (encoder and states.dim() == 3):
        return "cosine_mean", pooling or "mean"
    return "relative_l2", None


def mean_next_token_loss(logits: Sequence[torch.Tensor], batches: Sequence[Any]) -> float:
    """Mean next-token cross-entropy (nats) of per-batch (B, T, V) ``logits`` on the token ids of ``batches``."""
    total, count = 0.0, 0
    for i, (out, batch) in enumerate(zip(logits, batches)):
        summed, n = batch_next_token_loss(out, batch, i)
        total, count = total + summed, count + n
    return total / max(count, 1)


def measure(metric: str, pooling: str | None, references: Sequence[torch.Tensor], outputs: Sequence[torch.Tensor],
            batches: Sequence[Any], reference_loss: float | None = None) -> dict[str, float]:
    """Every held-out metric of the compressed model's ``outputs`` against the original's ``references`` (primary
    outputs, batch by batch, on ``batches``). ``reference_loss``: the original's mean next-token loss (perplexity
    only; computed when None)."""
    if pooling is not None:
        references = [pool(r, b, pooling) for r, b in zip(references, batches)]
        outputs = [pool(o, b, pooling) for o, b in zip(outputs, batches)]
        return output_drift(references, outputs, kind="embeddings")
    metrics = output_drift(references, outputs)
    if metric == "perplexity":
        ref = mean_next_token_loss(references, batches) if reference_loss is None else reference_loss
        loss = mean_next_token_loss(outputs, batches)
        metrics.update(perplexity=math.exp(min(loss, 700.0)), perplexity_original=math.exp(min(ref, 700.0)),
                       perplexity_ratio=math.exp(min(loss - ref, 700.0)))
    return metrics


def label(metric: str, pooling: str | None) -> str:
    """How the progress line names the watched metric."""
    if metric == "cosine_mean":
        return "held-out cosine" + (f" ({pooling}-pooled)" if pooling else "")
    return f"held-out {metric}" + (f" ({pooling}-pooled)" if pooling else "")
