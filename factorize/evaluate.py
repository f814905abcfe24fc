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
from collections.abc import Callable, Iterable, Mapping, Sequence
from typing import Any

import torch
from torch import nn
from tqdm.auto import tqdm

from factorize.count import count_bytes, count_parameters
from factorize.errors import FactorizeError
from factorize.layers import Factored, factored_layers
from factorize.report import LayerReport, Report
from factorize.walk import get_module, matrix_of

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


def output_drift(
    reference: Any, candidate: Any, *, kind: str | None = None, masks: Sequence[torch.Tensor | None] | None = None
) -> dict[str, float]:
    """How far ``candidate`` outputs are from ``reference`` outputs on the same inputs.

    Args:
        reference / candidate: a tensor, a list of per-batch tensors (as :func:`run_model` returns), or a model
            output (its ``logits`` / ``last_hidden_state`` / first tensor is used). Shapes must match batch by
            batch.
        kind: ``"logits"`` (top-1 agreement and KL divergence over the last dimension), ``"scores"`` (top-1
            agreement only), ``"features"`` (neither), or None: ``"logits"`` for a 2-D output with more than
            one column, ``"features"`` otherwise.
        masks: optional per-batch (B, T) token masks (a tokenizer's ``attention_mask``); for outputs of shape
            (B, T, ...) only the unmasked positions count, so padding does not dilute or inflate the drift.

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
    for i, (a, b) in enumerate(zip(refs, cands)):
        a64, b64 = a.detach().to(torch.float64), b.detach().to(torch.float64)
        keep = _positions_mask(masks[i] if masks is not None and i < len(masks) else None, a64)  # (B, T) or None
        if keep is not None:
            a64, b64 = a64 * keep[..., None], b64 * keep[..., None]  # padded positions contribute nothing
        diff_sq += float(((a64 - b64) ** 2).sum())
        ref_sq += float((a64**2).sum())
        fa, fb = a64.reshape(a64.shape[0], -1), b64.reshape(b64.shape[0], -1)  # (B, features)
        cosines.append(_cosine_rows(fa, fb))
        if kind in ("logits", "scores") and a64.dim() >= 2 and keep is not None:
            a64, b64 = a64[keep.bool()], b64[keep.bool()]  # (tokens, C): only real positions are rows
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


def _positions_mask(mask: torch.Tensor | None, out: torch.Tensor) -> torch.Tensor | None:
    """The (B, T) mask as float64 when it lines up with an output of shape (B, T, ...), else None."""
    if mask is None or out.dim() < 3 or tuple(mask.shape) != tuple(out.shape[:2]):
        return None
    return mask.detach().cpu().to(torch.float64)


def token_mask(batch: Any) -> torch.Tensor | None:
    """A batch's ``attention_mask`` (tokenizer output), if it has one."""
    if isinstance(batch, Mapping) and isinstance(batch.get("attention_mask"), torch.Tensor):
        return batch["attention_mask"]
    return None


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


# ---------------------------------------------------------------------------------------------------------------
# the full evaluation


def evaluate(
    original: nn.Module,
    compressed: nn.Module,
    batches: Iterable[Any],
    *,
    labels: torch.Tensor | Sequence[torch.Tensor] | None = None,
    plan: Mapping | None = None,
    latency_repeats: int = 7,
    sites: Iterable[str] | None = None,
    kind: str | None = None,
    title: str = "factorize report",
    model_name: str = "",
    inputs: str = "",
    notes: Iterable[str] = (),
    progress: bool = False,
    memo: dict | None = None,
) -> Report:
    """Measure what compression saved and what it cost, on sample inputs.

    Args:
        original / compressed: the two models (neither is modified; their training flags are restored).
        batches: sample-input batches under the batch contract; iterated several times, so a list is best.
        labels: class labels for accuracy, one per sample in batch order (a tensor, or one tensor per batch).
        plan: the compression plan; when given, dense sites appear in the per-layer table with their reason.
        latency_repeats: timed forward passes per model on the first batch (0 skips timing).
        sites: restrict the per-layer table to these qualified names.
        kind: what the outputs hold, see :func:`output_drift`.
        title / model_name / inputs / notes: labels carried into the report.
        progress: progress bars on stderr.
        memo: a dict shared by calls that evaluate several compressed versions of the same original on the same
            batches (a sweep): the original's outputs and the layers' output positions are computed once.

    Returns:
        A :class:`factorize.report.Report`.
    """
    batches = list(batches)
    if not batches:
        raise FactorizeError("no sample inputs to evaluate on", fix="give at least one batch of sample inputs")
    bar = _progress(progress)
    memo = {} if memo is None else memo
    if "reference" not in memo:
        memo["reference"] = run_model(original, bar(batches, "original"))
    ref = memo["reference"]
    cand = run_model(compressed, bar(batches, "compressed"))
    report = Report(
        title=title,
        model=model_name,
        params_before=count_parameters(original),
        params_after=count_parameters(compressed),
        bytes_before=count_bytes(original),
        bytes_after=count_bytes(compressed),
        layers=layer_reports(original, compressed, plan=plan, batch=batches[0], sites=sites, memo=memo),
        drift=output_drift(ref, cand, kind=kind, masks=[token_mask(b) for b in batches]),
        samples=sum(int(o.shape[0]) for o in ref),
        inputs=inputs,
        policy=dict(plan["policy"]) if plan and "policy" in plan else None,
        notes=list(notes),
    )
    if labels is not None:
        report.accuracy_before = accuracy(ref, labels)
        report.accuracy_after = accuracy(cand, labels)
    if latency_repeats > 0:
        report.latency_ms_before, report.latency_ms_after = median_latency(
            original, compressed, batches[0], repeats=latency_repeats
        )
        report.latency_repeats, report.latency_batch = latency_repeats, batch_size(batches[0])
    return report


def _progress(enabled: bool):
    def wrap(items: list, desc: str):
        return tqdm(items, desc=desc, unit="batch", disable=not enabled, leave=False)

    return wrap


def accuracy(outputs: Sequence[torch.Tensor] | torch.Tensor, labels: torch.Tensor | Sequence[torch.Tensor]) -> float:
    """Fraction of samples whose argmax over the last dimension equals the label."""
    preds = torch.cat([o.argmax(-1).reshape(-1) for o in _as_batches(outputs)])  # (N,)
    truth = labels if isinstance(labels, torch.Tensor) else torch.cat([torch.as_tensor(t).reshape(-1) for t in labels])
    truth = truth.reshape(-1).to(torch.int64)
    if preds.numel() != truth.numel():
        raise FactorizeError(
            f"{truth.numel()} labels for {preds.numel()} predictions",
            fix="give one class label per sample (labels of shape (N,)), in the order of the inputs",
        )
    return float((preds == truth).double().mean())


def median_latency(a: nn.Module, b: nn.Module, batch: Any, *, repeats: int = 7) -> tuple[float, float]:
    """Median wall time in milliseconds of one forward pass of each model on ``batch``.

    The two models are timed alternately (a, b, a, b, ...) after warm-up passes, so a slow spell of a shared
    machine hits both alike. Fewer multiply-accumulates do not always mean lower latency (common practice),
    which is why this is measured rather than derived.
    """
    flags = (a.training, b.training)
    a.eval(), b.eval()
    try:
        return paired_ms(lambda: (feed(a, batch), _sync(a)), lambda: (feed(b, batch), _sync(b)), repeats=repeats)
    finally:
        a.train(flags[0]), b.train(flags[1])


def paired_ms(a: Callable[[], Any], b: Callable[[], Any], *, repeats: int = 20, warmup: int = 3) -> tuple[float, float]:
    """Median times in milliseconds of ``a()`` and ``b()``, measured interleaved after ``warmup`` calls of each
    (the first calls pay for lazy initialisation and cold caches, and would otherwise count)."""
    times: tuple[list[float], list[float]] = ([], [])
    with torch.inference_mode():
        for _ in range(warmup):
            a(), b()
        for _ in range(repeats):
            for fn, acc in ((a, times[0]), (b, times[1])):
                start = time.perf_counter()
                fn()
                acc.append(1000.0 * (time.perf_counter() - start))
    return statistics.median(times[0]), statistics.median(times[1])


def _sync(model: nn.Module) -> None:
    p = next(model.parameters(), None)
    if p is not None and p.device.type == "cuda":
        torch.cuda.synchronize(p.device)


# ---------------------------------------------------------------------------------------------------------------
# per-layer numbers


def output_positions(model: nn.Module, names: Iterable[str], batch: Any) -> dict[str, int]:
    """Output positions per sample of each named layer, measured with forward hooks on one batch.

    A linear layer applied to (B, T, n) has T positions per sample; a conv has one per output pixel. A layer the
    forward pass never calls gets 0.
    """
    n_samples = max(batch_size(batch), 1)
    counts: dict[str, int] = {}
    handles = []

    def hook_for(name: str):
        def hook(module, args, output):
            out = primary_output(output)
            m = _out_channels(module)
            counts[name] = counts.get(name, 0) + out.numel() // (n_samples * m)

        return hook

    for name in names:
        module = get_module(model, name)
        handles.append(module.register_forward_hook(hook_for(name)))
    try:
        run_model(model, [batch])
    finally:
        for h in handles:
            h.remove()
    return {name: counts.get(name, 0) for name in names}


def _out_channels(module: nn.Module) -> int:
    if isinstance(module, Factored):
        return int(module.factor_b().shape[0])
    if isinstance(module, nn.Embedding):
        return module.embedding_dim
    if isinstance(module, nn.modules.conv._ConvNd):
        return module.out_channels
    if isinstance(module, nn.Linear):
        return module.out_features
    return int(module.weight.shape[-1])  # transposed projection: weight (in, out)


def _macs(kind: str, shape: Sequence[int], rank: int | None, positions: int) -> int:
    """Multiply-accumulates per sample: mn per position dense, r(m + n) factored (common practice). A dense
    embedding is a lookup (0 MACs); factored, each looked-up row of r numbers is mapped to m outputs (rm)."""
    m, n = shape
    if kind == "embedding":
        return 0 if rank is None else rank * m * positions
    return (m * n if rank is None else rank * (m + n)) * positions


@torch.no_grad()
def weight_error(original: torch.Tensor, approximation: torch.Tensor) -> float:
    """``||W - W'||_F / ||W||_F`` in float64 (0 for an all-zero W that is matched exactly)."""
    W, V = original.detach().to(torch.float64).cpu(), approximation.detach().to(torch.float64).cpu()
    return _ratio(float(torch.linalg.matrix_norm(W - V)), float(torch.linalg.matrix_norm(W)))


def layer_reports(
    original: nn.Module,
    compressed: nn.Module,
    *,
    plan: Mapping | None = None,
    batch: Any = None,
    sites: Iterable[str] | None = None,
    memo: dict | None = None,
) -> list[LayerReport]:
    """One :class:`LayerReport` per site of the plan (or per factored layer of ``compressed`` without a plan):
    rank, parameters, measured weight error, and, when a batch is given, MACs per sample from hooks (measured
    once per ``memo``)."""
    factored = factored_layers(compressed)
    entries: dict[str, dict] = dict(plan["sites"]) if plan else {
        name: {"kind": layer.kind, "shape": list(layer.product().shape), "rank": layer.rank} for name, layer in factored.items()
    }
    if sites is not None:
        wanted = set(sites)
        entries = {k: v for k, v in entries.items() if k in wanted}
    memo = {} if memo is None else memo
    if batch is not None and entries and not set(entries) <= set(memo.get("positions", {})):
        memo["positions"] = {**memo.get("positions", {}), **output_positions(original, list(entries), batch)}
    positions = memo.get("positions", {}) if batch is not None else {}
    rows = []
    for name, e in entries.items():
        kind, shape = e["kind"], tuple(int(s) for s in e["shape"])
        layer = factored.get(name)
        rank = layer.rank if layer is not None else None
        W = matrix_of(get_module(original, name), kind)
        after = layer.product() if layer is not None else matrix_of(get_module(compressed, name), kind)
        pos = positions.get(name)
        m, n = shape
        rows.append(LayerReport(
            name=name,
            kind=kind,
            shape=shape,
            rank=rank,
            params=m * n,
            params_after=m * n if rank is None else rank * (m + n),
            macs=None if pos is None else _macs(kind, shape, None, pos),
            macs_after=None if pos is None else _macs(kind, shape, rank, pos),
            weight_error=weight_error(W, after),
            predicted_error=e.get("predicted_error"),
            reason=e.get("reason", ""),
        ))
    return rows
