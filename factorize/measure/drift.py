"""Output drift: how far a compressed model's outputs are from its original's on the same inputs, judged by the
kind of output (class scores, embeddings, other features), with the spread over samples beside the mean."""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import torch

from factorize.choices import OUTPUT_KINDS
from factorize.errors import FactorizeError
from factorize.measure.interval import mean_half_width
from factorize.measure.similarity import embedding_agreement
from factorize.model.feed import primary_output

# what an output holds; None: decide from its shape. "embeddings": one vector per sample, used by its direction
# (an encoder's pooled output): judged by cosine and by which inputs stay alike, never by an argmax over dimensions
DRIFT_KINDS = OUTPUT_KINDS
TAIL_PERCENTILE = 5  # the low tail shown beside the mean: the 5th percentile of the per-sample measure


def as_batches(outputs: Any) -> list[torch.Tensor]:
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


def output_drift(
    reference: Any, candidate: Any, *, kind: str | None = None, masks: Sequence[torch.Tensor | None] | None = None
) -> dict[str, float]:
    """How far ``candidate`` outputs are from ``reference`` outputs on the same inputs.

    Args:
        reference / candidate: a tensor, a list of per-batch tensors (as :func:`run_model` returns), or a model
            output (its ``logits`` / ``last_hidden_state`` / first tensor is used). Shapes must match batch by
            batch.
        kind: ``"logits"`` (top-1 agreement and KL divergence over the last dimension), ``"scores"`` (top-1
            agreement only), ``"features"`` (neither), ``"embeddings"`` (one vector per sample: nearest-neighbour
            agreement and rank correlation of pairwise similarities, no argmax), or None: ``"logits"`` for a 2-D
            output with more than one column, ``"features"`` otherwise.
        masks: optional per-batch (B, T) token masks (a tokenizer's ``attention_mask``); for outputs of shape
            (B, T, ...) only the unmasked positions count, so padding does not dilute or inflate the drift.

    Returns:
        ``relative_l2``: ||a - b||_2 / ||a||_2 over all outputs (Frobenius norm, a = reference);
        ``cosine_mean`` / ``cosine_min``: cosine similarity per sample, each sample's output flattened;
        ``cosine_mean_ci95``: half-width of the 95% t interval for the mean cosine over inputs of the kind
        measured (:mod:`factorize.measure.interval`; two samples or more): how precise ``cosine_mean`` is;
        ``cosine_p5``: the 5th percentile of the per-sample cosines (linear interpolation, numpy's default);
        ``sample_l2_mean`` / ``sample_l2_p95`` / ``sample_l2_max``: relative L2 error per sample
        (||a_i - b_i|| / ||a_i||): mean, 95th percentile (the worst 5%) and worst;
        ``neighbour_agreement`` / ``similarity_spearman`` / ``neighbour_samples`` (``"embeddings"``, 3 samples
        or more): see :func:`factorize.measure.similarity.embedding_agreement`;
        ``top1_agreement``: fraction of rows (samples, or tokens for (B, T, C) logits) whose argmax agrees;
        ``kl``: mean KL(softmax(a) || softmax(b)) per row, in nats (Kullback & Leibler 1951);
        ``samples``: how many samples were compared.
    """
    refs, cands = as_batches(reference), as_batches(candidate)
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
    sample_l2: list[torch.Tensor] = []
    flat: list[tuple[torch.Tensor, torch.Tensor]] = []
    agree = rows = 0
    kl_sum = 0.0
    for i, (a, b) in enumerate(zip(refs, cands)):
        a64, b64 = a.detach().to(torch.float64), b.detach().to(torch.float64)
        keep = _positions_mask(masks[i] if masks is not None and i < len(masks) else None, a64)  # (B, T) or None
        if keep is not None:
            a64, b64 = a64 * keep[..., None], b64 * keep[..., None]  # padded positions contribute nothing
        diff_sq += float(((a64 - b64) ** 2).sum())
        ref_sq += float((a64**2).sum())
        fa, fb = a64.reshape(a64.shape[0], -1), b64.reshape(b64.shape[0], -1)  # (B, features)
        cosines.append(_cosine_rows(fa, fb))
        sample_l2.append(_relative_rows(fa, fb))
        if kind == "embeddings":
            flat.append((fa, fb))
        if kind in ("logits", "scores") and a64.dim() >= 2 and keep is not None:
            a64, b64 = a64[keep.bool()], b64[keep.bool()]  # (tokens, C): only real positions are rows
        if kind in ("logits", "scores") and a64.dim() >= 2:
            agree += int((a64.argmax(-1) == b64.argmax(-1)).sum())
            rows += a64.numel() // a64.shape[-1]
        if kind == "logits" and a64.dim() >= 2:
            kl_sum += _kl_sum(a64.reshape(-1, a64.shape[-1]), b64.reshape(-1, b64.shape[-1]))
    cos = torch.cat(cosines)
    result = {
        "relative_l2": safe_ratio(math.sqrt(diff_sq), math.sqrt(ref_sq)),
        "cosine_mean": float(cos.mean()),
        "cosine_min": float(cos.min()),
        "cosine_p5": float(torch.quantile(cos, TAIL_PERCENTILE / 100)),
        "samples": int(cos.numel()),
    }
    half = mean_half_width(cos)
    if half is not None:
        result["cosine_mean_ci95"] = half
    per_sample = torch.cat(sample_l2)
    big = torch.finfo(torch.float64).max  # an inf (a sample changed from all-zero) stays inf in the percentile
    p95 = float(torch.quantile(per_sample.clamp_max(big), 1 - TAIL_PERCENTILE / 100))
    result.update(sample_l2_mean=float(per_sample.mean()), sample_l2_p95=math.inf if p95 >= big else p95,
                  sample_l2_max=float(per_sample.max()))
    if kind == "embeddings":
        result.update(embedding_agreement(torch.cat([a for a, _ in flat]), torch.cat([b for _, b in flat])))
    if rows:
        result["top1_agreement"] = agree / rows
        if kind == "logits":
            result["kl"] = kl_sum / rows
    return result


def _kl_sum(a: torch.Tensor, b: torch.Tensor, rows: int = 1024) -> float:
    """Sum over rows of KL(softmax(a) || softmax(b)) = sum p (log p - log q), p = softmax(reference), q =
    softmax(candidate) (Kullback & Leibler 1951), a block of rows at a time so that a language model's
    (tokens, vocabulary) scores need no extra copies of their full size."""
    total = 0.0
    for i in range(0, a.shape[0], rows):
        lp, lq = torch.log_softmax(a[i:i + rows], -1), torch.log_softmax(b[i:i + rows], -1)  # (rows, C)
        total += float((lp.exp() * (lp - lq)).sum())
    return total


def _positions_mask(mask: torch.Tensor | None, out: torch.Tensor) -> torch.Tensor | None:
    """The (B, T) mask as float64 when it lines up with an output of shape (B, T, ...), else None."""
    if mask is None or out.dim() < 3 or tuple(mask.shape) != tuple(out.shape[:2]):
        return None
    return mask.detach().cpu().to(torch.float64)


def _cosine_rows(a: torch.Tensor, b: torch.Tensor) -> torch.Tensor:
    """Cosine similarity per row; two all-zero rows count as identical (1), one all-zero row as 0."""
    na, nb = a.norm(dim=1), b.norm(dim=1)  # (B,)
    cos = (a * b).sum(1) / (na * nb).clamp_min(torch.finfo(a.dtype).tiny)
    both_zero = (na == 0) & (nb == 0)
    return torch.where(both_zero, torch.ones_like(cos), cos).clamp(-1.0, 1.0)


def _relative_rows(a: torch.Tensor, b: torch.Tensor) -> torch.Tensor:
    """||a_i - b_i|| / ||a_i|| per row (0 for two all-zero rows, inf for a change to an all-zero row)."""
    num, den = (a - b).norm(dim=1), a.norm(dim=1)  # (B,)
    ratio = num / den.clamp_min(torch.finfo(a.dtype).tiny)
    return torch.where(den > 0, ratio, torch.where(num > 0, torch.full_like(num, math.inf), torch.zeros_like(num)))


def safe_ratio(num: float, den: float) -> float:
    if den > 0:
        return num / den
    return 0.0 if num == 0 else math.inf

