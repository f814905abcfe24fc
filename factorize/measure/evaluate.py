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
guarantee of behaviour on other inputs (see :data:`factorize.measure.report.CAUTION`).
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from typing import Any

import torch
from torch import nn
from tqdm.auto import tqdm

from factorize._version import __version__
from factorize.errors import FactorizeError
from factorize.measure.drift import as_batches, output_drift, safe_ratio
from factorize.measure.perplexity import is_causal_lm, token_ids
from factorize.measure.perplexity import perplexity as perplexity_of
from factorize.measure.pooling import pool
from factorize.measure.report import LayerReport, Report
from factorize.measure.timing import latency_spread
from factorize.model.count import count_bytes, count_parameters
from factorize.model.feed import batch_size, primary_output, run_model, token_mask
from factorize.model.hooks import forward_hooks
from factorize.model.sites import Site, get_module, matrix_of, walk
from factorize.plan.ranks import plan_summary
from factorize.rewrite.layers import Factored, factored_layers

# ---------------------------------------------------------------------------------------------------------------
# running a model


# ---------------------------------------------------------------------------------------------------------------
# drift


# ---------------------------------------------------------------------------------------------------------------
# the full evaluation


@dataclasses.dataclass(frozen=True)
class EvaluateOptions:
    """What :func:`evaluate` measures and how it labels the report, apart from the models and the data (each
    field is one of its keywords, see its Args); :meth:`from_keywords` builds one from those keywords."""

    latency_repeats: int = 7
    sites: Iterable[str] | None = None
    kind: str | None = None
    title: str = "factorize report"
    model_name: str = ""
    inputs: str = ""
    notes: Iterable[str] = ()
    progress: bool = False
    perplexity: bool | None = None
    pooling: str | None = None
    clock: Callable[[], float] = time.perf_counter

    @classmethod
    def from_keywords(cls, options: EvaluateOptions | None = None, **keywords: Any) -> EvaluateOptions:
        """``options`` as given, or the options its keywords name; an unknown keyword, or options together with
        keywords, is an error saying which."""
        names = [f.name for f in dataclasses.fields(cls)]
        unknown = [k for k in keywords if k not in names]
        if unknown:
            raise FactorizeError(
                f"evaluate() got unknown keyword{'s' if len(unknown) > 1 else ''}: {', '.join(unknown)}",
                fix="accepted: options, labels, plan, memo, " + ", ".join(names))
        if options is not None and keywords:
            raise FactorizeError(
                "EvaluateOptions and evaluation keywords were both given", [f"{k}=" for k in keywords],
                fix="put them into the options (dataclasses.replace(options, ...)) or pass keywords only",
            )
        return options if options is not None else cls(**keywords)


def evaluate(
    original: nn.Module,
    compressed: nn.Module,
    batches: Iterable[Any],
    options: EvaluateOptions | None = None,
    *,
    labels: torch.Tensor | Sequence[torch.Tensor] | None = None,
    plan: Mapping | None = None,
    memo: dict | None = None,
    **keywords: Any,
) -> Report:
    """Measure what compression saved and what it cost, on sample inputs.

    Args:
        original / compressed: the two models (neither is modified; their training flags are restored).
        batches: sample-input batches under the batch contract; iterated several times, so a list is best.
        options: an :class:`EvaluateOptions` holding the keywords from ``latency_repeats`` on below; or, instead,
            those keywords.
        labels: class labels for accuracy, one per sample in batch order (a tensor, or one tensor per batch).
        plan: the compression plan; when given, dense sites appear in the per-layer table with their reason.
        memo: a dict shared by calls that evaluate several compressed versions of the same original on the same
            batches (a sweep): the original's outputs and the layers' output positions are computed once.
        latency_repeats: timed forward passes per model on the first batch (0 skips timing).
        sites: restrict the per-layer table to these qualified names.
        kind: what the outputs hold, see :func:`output_drift`.
        title / model_name / inputs / notes: labels carried into the report.
        progress: progress bars on stderr.
        pooling: judge per-token outputs by one pooled vector per sample, ``"mean"`` (over the attention mask),
            ``"cls"`` or ``"last"`` (see :mod:`factorize.measure.pooling`); None compares the outputs as they are.
        perplexity: measure next-token perplexity (:mod:`factorize.measure.perplexity`); None (default) does so
            for a causal language model (a transformers ``...ForCausalLM``/``...LMHeadModel``) given token ids.
        clock: the latency clock in seconds (default :func:`time.perf_counter`; tests pass a fake one).

    Returns:
        A :class:`factorize.measure.report.Report`.
    """
    o = EvaluateOptions.from_keywords(options, **keywords)
    batches = list(batches)
    sites = None if o.sites is None else list(o.sites)  # read twice: for the reference pass and the per-layer table
    if not batches:
        raise FactorizeError("no sample inputs to evaluate on", fix="give at least one batch of sample inputs")
    bar = _progress(o.progress)
    memo = {} if memo is None else memo
    mac_names = [site.name for site in walk(original).sites]  # every command's MAC totals: count_macs
    if "reference" not in memo:  # the per-layer table's output positions are counted in the same pass
        wanted = dict.fromkeys([*_report_names(compressed, plan, sites), *mac_names])
        counted = [n for n in wanted if n not in memo.get("positions", {})]
        memo["reference"], positions = _reference_run(original, batches, counted, bar)
        memo["positions"] = {**memo.get("positions", {}), **positions}
    ref = memo["reference"]
    cand = run_model(compressed, bar(batches, "compressed"))
    masks = [token_mask(b) for b in batches]
    kind = o.kind
    if o.pooling is not None:  # one vector per sample on both sides; the mask has been used by the pooling
        ref = [pool(out, b, o.pooling) for out, b in zip(ref, batches)]
        cand = [pool(out, b, o.pooling) for out, b in zip(cand, batches)]
        masks = [None] * len(batches)
        kind = "embeddings" if kind is None else kind  # an encoder's pooled vectors: no argmax over dimensions
    lm = o.perplexity or (o.perplexity is None and is_causal_lm(original) and token_ids(batches[0]) is not None)
    if lm and kind is None and ref[0].dim() == 3:
        kind = "logits"  # next-token scores: top-1 is next-token agreement, over the unmasked positions
    report = Report(
        title=o.title,
        model=o.model_name,
        params_before=count_parameters(original),
        params_after=count_parameters(compressed),
        bytes_before=count_bytes(original),
        bytes_after=count_bytes(compressed),
        layers=layer_reports(original, compressed, plan=plan, batch=batches[0], sites=sites, memo=memo),
        drift=output_drift(ref, cand, kind=kind, masks=masks),
        samples=sum(int(out.shape[0]) for out in ref),
        inputs=o.inputs,
        policy=dict(plan["policy"]) if plan and "policy" in plan else None,
        calibrated=None if plan is None else "calibration" in plan,
        notes=list(o.notes) + nonfinite_notes(ref, cand),
        versions=versions(),
    )
    report.mac_totals = count_macs(original, compressed, memo["positions"], mac_names)
    if plan:
        _describe_plan(report, plan)
    if lm:
        if "perplexity" not in memo:
            memo["perplexity"] = perplexity_of(original, batches)
        report.perplexity_before, report.perplexity_after = memo["perplexity"], perplexity_of(compressed, batches)
    report.judged_kind, report.judged_as, report.judged_hint = judgement(kind, o.pooling, bool(lm), ref[0])
    if labels is not None:
        report.accuracy_before = accuracy(ref, labels)
        report.accuracy_after = accuracy(cand, labels)
    if o.latency_repeats > 0:
        before, after = latency_spread(original, compressed, batches[0], repeats=o.latency_repeats, clock=o.clock)
        report.latency_ms_before, report.latency_ms_after = before.median, after.median
        report.latency_iqr_before, report.latency_iqr_after = [before.q1, before.q3], [after.q1, after.q3]
        report.latency_range_before, report.latency_range_after = [before.low, before.high], [after.low, after.high]
        report.latency_repeats, report.latency_batch = o.latency_repeats, batch_size(batches[0])
        report.latency_threads = torch.get_num_threads()
    return report


def judgement(kind: str | None, pooling: str | None, perplexity: bool,
              output: torch.Tensor) -> tuple[str, str, str]:
    """What kind of model the report judged (how its users judge it) and how to change that: (kind, label, hint),
    the kind one of ``"embeddings"``, ``"language model"``, ``"logits"``, ``"scores"``, ``"features"``.

    Given: the output kind passed to :func:`output_drift` (None: from the shape), the pooling, whether perplexity
    was measured, and the first batch of the original's (pooled) outputs."""
    if kind == "embeddings" and pooling is not None:
        return ("embeddings", f"sentence encoder (--pooling {pooling})",
                "judged by the cosine of the pooled embeddings and which inputs stay nearest; other poolings: "
                "--pooling mean / cls / last; drop --pooling to compare the per-token outputs as they are "
                "(Python: pooling=)")
    if kind == "embeddings":
        return ("embeddings", "embedding model (--output-kind embeddings)",
                "judged by cosine and which inputs stay nearest; --output-kind chooses another kind (Python: kind=)")
    if perplexity:
        return ("language model", "language model (next-token perplexity)",
                "judged by the perplexity ratio and next-token agreement; to judge one vector per sequence instead, "
                "--pooling last (Python: pooling='last', perplexity=False)")
    decided = kind is None
    kind = kind or ("logits" if output.dim() == 2 and output.shape[1] > 1 else "features")
    how = f"a 2-D output with {output.shape[1]} columns read as class scores" if decided and kind == "logits" else \
        ("by its output's shape" if decided else f"--output-kind {kind}")
    label = {"logits": "classifier", "scores": "scorer (top-1 only)",
             "features": "regressor or other outputs (relative L2 and cosine)"}[kind]
    return (kind, f"{label} ({how})",
            "--output-kind logits / scores / features / embeddings chooses another kind (Python: kind=); per-token "
            "encoder outputs: --pooling mean")


def _reference_run(original: nn.Module, batches: list, names: list[str], bar) -> tuple[list[torch.Tensor], dict]:
    """The original's outputs on every batch (as :func:`run_model`) and, from the same pass, the output positions
    of the named layers on the first batch (as :func:`output_positions`, which would run it a second time)."""
    outputs: list[torch.Tensor] = []
    positions: dict[str, int] = {}
    for i, batch in enumerate(bar(batches, "original")):
        if i == 0 and names:
            with _counting_positions(original, names, batch) as counts:
                outputs += run_model(original, [batch])
            positions = {name: counts.get(name, 0) for name in names}
        else:
            outputs += run_model(original, [batch])
    return outputs, positions


def nonfinite_notes(reference: Sequence[torch.Tensor], candidate: Sequence[torch.Tensor]) -> list[str]:
    """A note for each model whose outputs hold NaN or Inf: then drift and top-1 agreement mean nothing (the
    argmax of NaN scores agrees trivially), and a reader must be told instead of seeing "100%"."""
    notes = []
    for who, outputs in (("original", reference), ("compressed", candidate)):
        bad = sum(int((~torch.isfinite(o)).sum()) for o in outputs if o.is_floating_point())
        if bad:
            notes.append(f"NON-FINITE OUTPUTS: the {who} model gave {bad} NaN or Inf output value(s) on these inputs; "
                         "the drift and agreement numbers are not meaningful (check the weights and the inputs)")
    return notes


def versions() -> dict:
    """The library and torch versions and the thread count in force: what a reader needs to rerun a result."""
    return {"factorize": __version__, "torch": torch.__version__.split("+")[0], "threads": torch.get_num_threads()}


def _describe_plan(report: Report, plan: Mapping) -> None:
    entries = plan.get("sites") or {}
    if entries and all(isinstance(e, Mapping) and {"params", "params_after", "action"} <= set(e)
                       for e in entries.values()):  # a hand-edited plan may lack the counts: then none is shown
        report.sites_kept = plan_summary(plan)["kept_fraction"]
    report.method = str(plan.get("method", ""))
    for name, e in entries.items():  # precisions refused for a layer (float16 overflow ...), with the reason
        if isinstance(e, Mapping) and isinstance(e.get("notes"), list):
            report.notes += [f"{name}: {note}" for note in e["notes"] if isinstance(note, str)]
    rows = [e for e in entries.values() if isinstance(e, Mapping)]
    if rows and all(isinstance(e.get("bytes"), int) and isinstance(e.get("bytes_after"), int) for e in rows):
        report.stored_bytes_before = sum(e["bytes"] for e in rows)
        report.stored_bytes_after = sum(e["bytes_after"] for e in rows)
    calibration = plan.get("calibration")
    if isinstance(calibration, Mapping):
        report.calibration_batches = calibration.get("batches")
        if isinstance(calibration.get("sequential"), bool):
            report.calibration_fit = "sequential refit" if calibration["sequential"] else "per-layer factors"
        if calibration.get("sequential_failed") and isinstance(calibration.get("sequential_note"), str):
            report.notes.append(calibration["sequential_note"])


def _progress(enabled: bool):
    def wrap(items: list, desc: str):
        return tqdm(items, desc=desc, unit="batch", disable=not enabled, leave=False)

    return wrap


def accuracy(outputs: Sequence[torch.Tensor] | torch.Tensor, labels: torch.Tensor | Sequence[torch.Tensor]) -> float:
    """Fraction of samples whose argmax over the last dimension equals the label."""
    preds = torch.cat([o.argmax(-1).reshape(-1) for o in as_batches(outputs)])  # (N,)
    truth = labels if isinstance(labels, torch.Tensor) else torch.cat([torch.as_tensor(t).reshape(-1) for t in labels])
    truth = truth.reshape(-1).to(torch.int64)
    if preds.numel() != truth.numel():
        raise FactorizeError(
            f"{truth.numel()} labels for {preds.numel()} predictions",
            fix="give one class label per sample (labels of shape (N,)), in the order of the inputs",
        )
    return float((preds == truth).double().mean())


# ---------------------------------------------------------------------------------------------------------------
# per-layer numbers


def output_positions(model: nn.Module, names: Iterable[str], batch: Any) -> dict[str, int]:
    """Output positions per sample of each named layer, measured with forward hooks on one batch.

    A linear layer applied to (B, T, n) has T positions per sample; a conv has one per output pixel. A layer the
    forward pass never calls gets 0.
    """
    names = list(names)
    with _counting_positions(model, names, batch) as counts:
        run_model(model, [batch])
    return {name: counts.get(name, 0) for name in names}


@contextmanager
def _counting_positions(model: nn.Module, names: Iterable[str], batch: Any) -> Iterator[dict[str, int]]:
    """Hooks that count, while the block runs ``model`` on ``batch``, each named layer's output positions per
    sample into the dict yielded (a layer not called stays absent)."""
    n_samples = max(batch_size(batch), 1)
    counts: dict[str, int] = {}

    def hook_for(name: str):
        def hook(module, args, output):
            out = primary_output(output)
            m = _out_channels(module)
            counts[name] = counts.get(name, 0) + out.numel() // (n_samples * m)

        return hook

    with forward_hooks(model, {name: hook_for(name) for name in names}):
        yield counts


def with_macs(model: nn.Module, sites: Sequence[Site], example: Any) -> list[Site]:
    """``sites`` with ``macs_per_sample`` measured: each site's parameters (mn) times its output positions per
    sample on ``example`` (tokens of a linear layer, output pixels of a convolution), from :func:`output_positions`.

    This is what ``cost="macs"`` budgets count (:mod:`factorize.plan.ranks`). A site the example never reaches
    would count 0 and is an error, since its cost cannot be known.
    """
    if example is None:
        raise FactorizeError("cost='macs' needs a sample input to count multiply-accumulates per sample",
                             fix="pass example=batch (or calibration=batches), or use cost='params'")
    positions = output_positions(model, [s.name for s in sites], example)
    never = [s.name for s in sites if positions[s.name] == 0]
    if never:
        raise FactorizeError("the example input never reached some layers, so their multiply-accumulates are unknown",
                             never, fix="give an example that runs through these layers, exclude them, "
                                        "or use cost='params'")
    return [dataclasses.replace(s, macs_per_sample=s.params * positions[s.name]) for s in sites]


MACS_COUNTED = ("every factorizable layer of the original model (linear, convolution, transposed projection, "
                "embedding; a dense embedding is a lookup and counts 0), kept dense or not")


def count_macs(original: nn.Module, compressed: nn.Module, positions: Mapping[str, int],
               names: Sequence[str] | None = None) -> dict | None:
    """Multiply-accumulates per sample of the two models, counted the one way every command reports them: over
    every factorizable layer of ``original`` (``walk(original).sites``, or ``names``), each from its output
    positions per sample (``positions``, from :func:`output_positions` on the first sample batch) and its rank
    in ``compressed`` (dense: mn per position; factored: r(m + n), common practice; see :func:`_macs`). Returns
    ``{"before", "after", "layers", "counted"}`` or None when no layer was counted."""
    by_name = {site.name: site for site in walk(original).sites}
    names = [n for n in (list(by_name) if names is None else names) if n in by_name and n in positions]
    if not names:
        return None
    factored = factored_layers(compressed)
    before = after = 0
    for name in names:
        site, pos = by_name[name], positions[name]
        layer = factored.get(name)
        before += _macs(site.kind, site.shape, None, pos)
        after += _macs(site.kind, site.shape, None if layer is None else layer.rank, pos)
    return {"before": before, "after": after, "layers": len(names), "counted": MACS_COUNTED}


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
    return safe_ratio(float(torch.linalg.matrix_norm(W - V)), float(torch.linalg.matrix_norm(W)))


@torch.no_grad()
def factored_error(original: torch.Tensor, B: torch.Tensor, A: torch.Tensor, norm: float | None = None) -> float:
    """``||W - B A||_F / ||W||_F`` for factors B (m x r), A (r x n): one fused ``W - B A`` in at least float32
    and the norms summed in float64, without the float64 copies of two m x n matrices :func:`weight_error`
    makes (a sweep measures every layer once per budget). ``norm``: ``||W||_F`` when already known."""
    dt = torch.promote_types(original.dtype, torch.float32)
    W = original.detach().to(dt)
    diff = torch.addmm(W, B.detach().to(dt), A.detach().to(dt), alpha=-1)
    if norm is None:
        norm = float(torch.linalg.vector_norm(W, dtype=torch.float64))
    return safe_ratio(float(torch.linalg.vector_norm(diff, dtype=torch.float64)), norm)


def _report_names(compressed: nn.Module, plan: Mapping | None, sites: Iterable[str] | None) -> list[str]:
    """The names of the layers :func:`layer_reports` describes: the plan's sites, or without a plan the factored
    layers of ``compressed``; only those in ``sites`` when given."""
    names = list(plan["sites"]) if plan else list(factored_layers(compressed))
    if sites is not None:
        wanted = set(sites)
        names = [n for n in names if n in wanted]
    return names


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
        name: {"kind": layer.kind, "shape": list(layer.product().shape), "rank": layer.rank}
        for name, layer in factored.items()
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
        if layer is not None:  # ||W|| once per sweep: the original does not change between budgets
            norms = memo.setdefault("weight_norms", {})
            if name not in norms:
                norms[name] = float(torch.linalg.vector_norm(W.detach(), dtype=torch.float64))
            error = factored_error(W, layer.factor_b(), layer.factor_a(), norms[name])
        else:
            error = weight_error(W, matrix_of(get_module(compressed, name), kind))
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
            weight_error=error,
            predicted_error=e.get("predicted_error"),
            reason=e.get("reason", ""),
            form=str(e.get("action", "")) if plan else "",
            precision=e.get("precision"),
            bytes=e.get("bytes"),
            bytes_after=e.get("bytes_after"),
            correction_rank=e.get("correction_rank"),
        ))
    return rows
