"""Evaluate a compressed model against its original: what was saved and what it cost.

Three layers, each usable on its own:

* :func:`run_model` feeds batches of sample inputs to a model and collects its primary output tensor;
* :func:`output_drift` compares two sets of outputs (relative L2 error, cosine similarity per sample, top-1
  agreement and KL divergence for class scores);
* :func:`evaluate` measures everything for one report: parameters and bytes, multiply-accumulates of the
  factored layers, per-layer weight error, output drift, accuracy when labels are given, and latency.

Batch contract (the same as calibration, see DESIGN.md): a tensor is fed as ``model(x)``, a tuple or list as
``model(*x)``, a dict (e.g. tokenizer output) as ``model(**x)``. Output contract: a tensor is used as is; from a
``ModelOutput``-like object or a mapping, ``logits`` then ``last_hidden_state`` are taken; from a tuple or list,
the first tensor.

Drift measured on sample inputs says how the compressed model behaves on those inputs only; it is no
guarantee of behaviour on other inputs (see :data:`factorize.report.CAUTION`).
"""

from __future__ import annotations

import math
import statistics
import time
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

import torch
from torch import nn

from factorize.errors import FactorizeError

DRIFT_KINDS = ("logits", "scores", "features")  # what an output holds; None: decide from its shape
PRIMARY_KEYS = ("logits", "last_hidden_state")  # taken from model outputs, in this order


# ---------------------------------------------------------------------------------------------------------------
# running a model


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


# ---------------------------------------------------------------------------------------------------------------
# drift


def _as_batches(outputs: Any) -> list[torch.Tensor]:
    """A list of batch output tensors from a tensor, a list of them (as :func:`run_model` returns), or a nested
    model output."""
    if isinstance(outputs, list) and outputs and all(isinstance(o, torch.Tensor) for o in outputs):
        return outputs
    if isinstance(outputs, list) and outputs and not isinstance(outputs[0], torch.Tensor):
        return [primary_output(o) for o in outputs]
    return [primary_output(outputs)]


def _kind_of(t: torch.Tensor, kind: str | None) -> str:
    if kind is not None:
        if kind not in DRIFT_KINDS:
            raise FactorizeError(f"unknown output kind {kind!r}", fix=f"use one of {', '.join(DRIFT_KINDS)} or None")
        return kind
    # Shape rule: a 2-D output with several columns is read as class logits (one row per sample).
    return "logits" if t.dim() == 2 and t.shape[1] > 1 else "features"


def output_drift(reference: Any, candidate: Any, *, kind: str | None = None) -> dict[str, float]:
    """How far ``candidate`` outputs are from ``reference`` outputs on the same inputs.

    Args:
        reference / candidate: a tensor, a list of per-batch tensors (as :func:`run_model` returns), or a model
            output (its ``logits`` / ``last_hidden_state`` / first tensor is used). Shapes must match batch by
            batch.
        kind: ``"logits"`` (top-1 agreement and KL divergence over the last dimension), ``"scores"`` (top-1
            agreement only), ``"features"`` (neither), or None: ``"logits"`` for a 2-D output with more than
            one column, ``"features"`` otherwise.

    Returns:
        ``relative_l2``: ||a - b||_2 / ||a||_2 over all outputs (Frobenius norm, a = reference);
        ``cosine_mean`` / ``cosine_min``: cosine similarity per sample, each sample's output flattened;
        ``top1_agreement``: fraction of rows (samples, or tokens for (B, T, C) logits) whose argmax agrees;
        ``kl``: mean KL(softmax(a) || softmax(b)) per row, in nats (Kullback & Leibler 1951);
        ``samples``: how many samples were compared.
    """
    refs, cands = _as_batches(reference), _as_batches(candidate)
    if len(refs) != len(cands):
        raise FactorizeError(f"{len(refs)} reference batches but {len(cands)} candidate batches",
                             fix="run both models on the same batches")
    mismatched = [
        f"batch {i}: reference {tuple(a.shape)}, candidate {tuple(b.shape)}"
        for i, (a, b) in enumerate(zip(refs, cands)) if a.shape != b.shape
    ]
    if mismatched:
        raise FactorizeError("the two models' outputs differ in shape", mismatched,
                             fix="compare models with the same output layout on the same inputs")
    if not refs:
        raise FactorizeError("no outputs to compare", fix="give at least one batch of sample inputs")
    kind = _kind_of(refs[0], kind)
    diff_sq = ref_sq = 0.0
    cosines: list[torch.Tensor] = []
    agree = rows = 0
    kl_sum = 0.0
    for a, b in zip(refs, cands):
        a64, b64 = a.detach().to(torch.float64), b.detach().to(torch.float64)
        diff_sq += float(((a64 - b64) ** 2).sum())
        ref_sq += float((a64**2).sum())
        fa, fb = a64.reshape(a64.shape[0], -1), b64.reshape(b64.shape[0], -1)  # (B, features)
        cosines.append(_cosine_rows(fa, fb))
        if kind in ("logits", "scores") and a64.dim() >= 2:
            agree += int((a64.argmax(-1) == b64.argmax(-1)).sum())
            rows += a64.numel() // a64.shape[-1]
        if kind == "logits" and a64.dim() >= 2:
            # KL(p || q) = sum p (log p - log q), p = softmax(reference), q = softmax(candidate)
            lp, lq = torch.log_softmax(a64, -1), torch.log_softmax(b64, -1)  # (..., C)
            kl_sum += float((lp.exp() * (lp - lq)).sum())
    cos = torch.cat(cosines)
    result = {
        "relative_l2": _ratio(math.sqrt(diff_sq), math.sqrt(ref_sq)),
        "cosine_mean": float(cos.mean()),
        "cosine_min": float(cos.min()),
        "samples": int(cos.numel()),
    }
    if rows:
        result["top1_agreement"] = agree / rows
        if kind == "logits":
            result["kl"] = kl_sum / rows
    return result


def _cosine_rows(a: torch.Tensor, b: torch.Tensor) -> torch.Tensor:
    """Cosine similarity per row; two all-zero rows count as identical (1), one all-zero row as 0."""
    na, nb = a.norm(dim=1), b.norm(dim=1)  # (B,)
    cos = (a * b).sum(1) / (na * nb).clamp_min(torch.finfo(a.dtype).tiny)
    both_zero = (na == 0) & (nb == 0)
    return torch.where(both_zero, torch.ones_like(cos), cos).clamp(-1.0, 1.0)


def _ratio(num: float, den: float) -> float:
    if den > 0:
        return num / den
    return 0.0 if num == 0 else math.inf
