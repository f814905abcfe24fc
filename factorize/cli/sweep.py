"""``factorize sweep``: a grid of budgets from one decomposition pass, tabulated (and as CSV and a plot)."""

from __future__ import annotations

import copy
import csv
import io
import warnings
from pathlib import Path

from rich.table import Table

from factorize.alternatives import int8_alternative, plan_bytes, same_size_alternative
from factorize.calibrated.search import Calibration, compress_from
from factorize.choices import DEFAULT_METHOD
from factorize.errors import FactorizeError, StatisticsMemoryError, UnverifiedModelWarning
from factorize.measure.evaluate import evaluate
from factorize.measure.inputs import random_subset
from factorize.measure.report import CAUTION
from factorize.model.feed import batch_size
from factorize.outofcore.candidates import checkpoint_spectra
from factorize.pipeline import compress, sweep_spectra
from factorize.plan.defaults import held_note
from factorize.plan.entries import factored_entries
from factorize.plan.ranks import choose_ranks, plan_summary
from factorize.storage import write_atomic

from .common import (
    Options,
    calibration_inputs,
    check_no_clobber,
    check_outputs,
    drop_builtin_calibration,
    execution,
    load,
    optional_path,
    options,
    quality_keywords,
    repeats,
    sample_inputs,
    weights_file,
    weights_only_checks,
    write_text,
)
from .render import UI, g4, pct

PLOT_EXTRA = 'pip install ".[plot]" (in a checkout of factorize)'
# every headline metric a report can carry, whichever kind it judged the model as (encoders: cosine, its tail,
# neighbours and rank correlation; language models: perplexity ratio and next-token agreement; others: L2, cosine)
DRIFT_KEYS = ("relative_l2", "sample_l2_p95", "cosine_mean", "cosine_mean_ci95", "cosine_p5", "cosine_min",
              "neighbour_agreement", "similarity_spearman", "top1_agreement", "kl")
REPORT_KEYS = ("perplexity_ratio", "accuracy_before", "accuracy_after", "worst_weight_error", "macs_before",
               "macs_after", "latency_ms_before", "latency_ms_after")
BYTES_KEYS = ("bytes_before", "bytes_after", "bytes_fraction", "rank_only_bytes_fraction", "rank_only_relative_l2")
CSV_COLUMNS = ("budget", "params_before", "params_after", "kept_fraction", "factored_layers", *DRIFT_KEYS, *REPORT_KEYS,
               *BYTES_KEYS)


def run(args, ui: UI) -> dict:
    csv_path, plot_path = optional_path(args.csv), optional_path(args.plot)
    if plot_path is not None:
        _matplotlib()  # fail before any work when the plot cannot be drawn
    check_no_clobber(args, {"--csv": csv_path, "--plot": plot_path, "--cache": optional_path(args.cache)})
    check_outputs([csv_path, plot_path], args.force)
    opts = options(args, ui, default_budget=None)  # the grid gives the budgets; a recipe's rule is not used
    if args.drift_samples is not None and args.drift_samples < 2:
        raise FactorizeError(f"--drift-samples must be at least 2 (an interval needs two samples), got "
                             f"{args.drift_samples}", fix="e.g. --drift-samples 32, or leave it out to measure "
                             "every sample input")
    loaded = load(args, ui)
    budgets = sorted(set(args.budgets), reverse=True)
    references: dict = {}
    if loaded.weights_only:
        if args.drift_samples is not None:
            raise FactorizeError("--drift-samples needs a model to run, and weights-only mode (a bare safetensors "
                                 "file) measures no drift", fix="drop --drift-samples, or pass --model "
                                 "package.module:callable --weights FILE")
        if opts.cost == "bytes":
            raise FactorizeError("--cost bytes needs a model to run, and weights-only mode (a bare safetensors file) "
                                 "has none", fix="pass --model package.module:callable --weights FILE")
        rows, inputs_source = _sweep_weights_only(args, loaded, budgets, opts, ui), None
    else:
        rows, inputs_source = _sweep_model(args, loaded, budgets, opts, ui, references)
    result = {"command": "sweep", "model": loaded.source, "inputs": inputs_source, "rows": rows, "caution": CAUTION}
    if "drift_samples" in references:  # not a reference point: how many samples every row's drift is measured on
        result["drift_samples"] = references.pop("drift_samples")
    if references:
        result["references"] = references
    if csv_path is not None:
        write_text(csv_path, _csv_text(rows), args.force)
    if plot_path is not None:
        _plot(rows, plot_path, loaded.source, args.force, references)
    result.update(csv=str(csv_path) if csv_path else None, plot=str(plot_path) if plot_path else None)
    if not ui.json_mode:
        render(result, ui)
    return result


def _sweep_model(args, loaded, budgets, opts: Options, ui: UI, references: dict):
    inputs = sample_inputs(args, loaded, ui)
    if inputs is None:
        ui.warn("no sample inputs given: only parameters and weight errors are shown; pass --inputs FILE for drift")
    elif args.drift_samples is not None:
        inputs = _drift_subset(inputs, args.drift_samples, args.seed, ui, references)
    calibration = calibration_inputs(args, loaded, ui, opts)
    quality = quality_keywords(args, calibration, inputs, opts)
    calib = None
    if calibration is not None:  # one set of statistics and spectra for every budget, as compress would use them
        try:
            calib = Calibration(loaded.model, calibration.batches, opts.policy(budget=budgets[0]),
                                sensitivity=args.sensitivity, progress=ui.progress)
        except StatisticsMemoryError as err:
            drop_builtin_calibration(err, calibration, ui, "every budget uses plain truncated SVD instead")
            calibration = None
            quality = quality_keywords(args, calibration, inputs, opts)
    rows, spectra, memo = [], None, {}  # memo: the original's outputs, computed once for every budget
    if calib is None:  # singular values once, every budget's plan, then each layer's vectors once at its top rank
        spectra = sweep_spectra(loaded.model, [opts.policy(budget=b) for b in budgets], cache=quality["cache"],
                                execution=execution(args, ui))
    for budget in budgets:
        policy = opts.policy(budget=budget)
        if calib is not None:
            result = compress_from(calib, policy, sequential=bool(args.sequential))
            if budget == budgets[0] and args.sequential is None and calib.sequential_for(result.plan)[0]:
                ui.note("every budget uses per-layer factors; shrink refits them sequentially by default, which "
                        "drifts less and takes about twice as long per budget (--sequential sweeps that way)")
        else:
            result = _budget_result(loaded.model, policy, spectra, inputs, quality, ui)
            spectra = result.spectra  # one decomposition pass: later budgets reuse every spectrum
        summary = plan_summary(result.plan)
        if budget == budgets[0] and held_note(result.plan):
            ui.note(held_note(result.plan))
        row = {"budget": budget, "params_before": result.params_before, "params_after": result.params_after,
               "kept_fraction": result.kept_fraction, "factored_layers": summary["factored"]}
        if inputs is not None:
            rep = _evaluated(loaded, result, inputs, args, memo, budget)
            row.update({k: rep.drift.get(k) for k in DRIFT_KEYS})
            row.update({k: getattr(rep, k) for k in REPORT_KEYS})
        else:
            row["worst_weight_error"] = _worst_predicted_error(result.plan)
        if opts.cost == "bytes":
            row.update(_bytes_row(args, loaded.model, result.plan, inputs, calib, spectra, memo))
        rows.append(row)
    if opts.cost == "bytes" and inputs is not None:  # the int8 point: the same layers for every budget
        int8 = int8_alternative(loaded.model, result.plan, inputs.batches, calibration=calib, memo=memo,
                                pooling=getattr(args, "pooling", None), kind=getattr(args, "output_kind", None))
        references["int8"] = int8.to_json()
    return rows, None if inputs is None else inputs.source


def _drift_subset(inputs, n: int, seed: int, ui: UI, references: dict):
    """``n`` of the sample inputs drawn at random for every budget's drift (paired: the same draw for each)."""
    total = sum(batch_size(b) for b in inputs.batches)
    subset, _ = random_subset(inputs, n, seed)
    if subset is inputs:  # n is not smaller than the number of sample inputs
        ui.note(f"--drift-samples {n}: there are {total} sample inputs, so every one is measured")
        return inputs
    references["drift_samples"] = {"measured": n, "of": total, "seed": seed}
    ui.note(f"drift measured on {n} of the {total} sample inputs, drawn at random (--seed {seed}), the same {n} "
            f"for every budget; 'cosine mean' shows +- the half-width of its 95% t interval; the worst and 5th "
            f"percentile are of the {n} measured only; shrink measures all {total}")
    return subset


def _budget_result(model, policy, spectra, inputs, quality: dict, ui: UI):
    """One budget's compressed copy. With sample inputs and a parameter budget its check run is the drift
    measurement's own compressed pass (:func:`_evaluated`), not a second forward pass on the first batch: that
    repeated pass was a third of a sweep's time. A MAC budget counts its MACs on the first batch, so it keeps it."""
    own_check = inputs is not None and policy.cost == "params"
    with warnings.catch_warnings():
        if own_check:
            warnings.simplefilter("ignore", UnverifiedModelWarning)  # checked by _evaluated below
        return compress(sharing_copy(model), policy, inplace=True, spectra=spectra,
                        progress=ui.progress and spectra is None, cache=quality["cache"], workers=quality["workers"],
                        example=None if inputs is None or own_check else inputs.batches[0])


def _evaluated(loaded, result, inputs, args, memo: dict, budget: float):
    """The drift report of one budget; a compressed copy that fails its forward pass is reported as compress()
    reports it (the reference pass already ran on these inputs when they were checked)."""
    try:
        return evaluate(loaded.model, result.model, inputs.batches, labels=inputs.labels, plan=result.plan,
                        latency_repeats=repeats(args, 0), model_name=loaded.source, inputs=inputs.source,
                        memo=memo, pooling=getattr(args, "pooling", None), kind=getattr(args, "output_kind", None))
    except FactorizeError:
        raise
    except Exception as err:  # the user's forward (or a layer kind) failing on the compressed copy
        raise FactorizeError(f"the compressed model for budget {budget} could not be run "
                             f"on the sample inputs: {err}",
                             fix="exclude the layer kinds that break it (--exclude), or report the model "
                                 "and layer") from err


def _bytes_row(args, model, plan, inputs, calib, spectra, memo) -> dict:
    """Stored bytes of the plan's layers, and rank alone at the same bytes (a reference curve) when there are
    inputs to measure it on."""
    before, after = plan_bytes(model, plan)
    row = {"bytes_before": before, "bytes_after": after, "bytes_fraction": after / before if before else 1.0}
    if inputs is not None:
        rank = same_size_alternative(model, plan, inputs.batches, "rank", row["bytes_fraction"], calibration=calib,
                                     spectra=spectra, memo=memo, pooling=getattr(args, "pooling", None),
                                     kind=getattr(args, "output_kind", None))
        row["rank_only_bytes_fraction"] = rank.fraction if rank.value is not None else None
        row["rank_only_relative_l2"] = rank.value
    return row


def sharing_copy(model):
    """A copy of ``model``'s module tree that shares its parameter and buffer tensors: what a sweep rewrites for one
    budget, measures and drops. Rewriting swaps modules in the copy and never writes into a shared tensor, so the
    original is untouched, while copying its weights for every budget (``compress(inplace=False)``) is skipped.
    Not for results that outlive the sweep: training such a copy would train the original."""
    memo = {id(t): t for t in (*model.parameters(), *model.buffers())}
    return copy.deepcopy(model, memo)


def _worst_predicted_error(plan: dict) -> float:
    errors = [e.predicted_error or 0.0 for e in factored_entries(plan)]
    return max(errors) if errors else 0.0


def _sweep_weights_only(args, loaded, budgets, opts: Options, ui: UI) -> list[dict]:
    weights_only_checks(args)
    with weights_file(loaded) as path:
        sites, spectra, _ = checkpoint_spectra(path, include=opts.include, exclude=opts.exclude,
                                               method=opts.method or DEFAULT_METHOD, seed=opts.seed,
                                               progress=ui.progress)
    rows = []
    for budget in budgets:
        plan = choose_ranks(sites, spectra, opts.policy(budget=budget))
        s = plan_summary(plan)
        rows.append({"budget": budget, "params_before": s["params_before"], "params_after": s["params_after"],
                     "kept_fraction": s["kept_fraction"], "factored_layers": s["factored"],
                     "worst_weight_error": _worst_predicted_error(plan)})
    ui.note("weights-only mode: parameters are the factored weights only; errors are predicted weight errors "
            "(Eckart-Young), no drift")
    return rows


def _csv_text(rows: list[dict]) -> str:
    buf = io.StringIO()
    columns = [c for c in CSV_COLUMNS if any(r.get(c) is not None for r in rows)]
    writer = csv.DictWriter(buf, fieldnames=columns, extrasaction="ignore", lineterminator="\n")
    writer.writeheader()
    for r in rows:
        writer.writerow({c: "" if r.get(c) is None else r[c] for c in columns})
    return buf.getvalue()


def _matplotlib():
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        raise FactorizeError("--plot needs matplotlib, which is not installed",
                             fix=f"install the plot extra: {PLOT_EXTRA} (or drop --plot)") from None
    return plt


def plot_title(source: str, limit: int = 40) -> str:
    """The model for a plot title: a path's last part (a folder or file name, not the absolute path, which the
    title's width cuts at both edges), at most ``limit`` characters, shortened in the middle."""
    name = Path(source).name or source if ("/" in source or "\\" in source) else source
    return name if len(name) <= limit else name[: limit // 2 - 1] + "..." + name[-(limit - limit // 2 - 2):]


def _plot(rows: list[dict], path: Path, title: str, force: bool, references: dict | None = None) -> None:
    plt = _matplotlib()
    fig, ax = plt.subplots(figsize=(6.4, 4.2), dpi=120)
    by_bytes = bool(rows) and rows[0].get("bytes_fraction") is not None
    x = [100 * r["bytes_fraction" if by_bytes else "kept_fraction"] for r in rows]
    key = "relative_l2" if rows and rows[0].get("relative_l2") is not None else "worst_weight_error"
    ax.plot(x, [r[key] for r in rows], marker="o", color="tab:blue",
            label="rank and precision together" if by_bytes else None)
    for r, xi in zip(rows, x):
        ax.annotate(f"{r['budget']:g}", (xi, r[key]), textcoords="offset points", xytext=(4, 4), fontsize=8)
    if by_bytes and key == "relative_l2":
        _reference_curves(ax, rows, references or {})
    ax.set_xlabel("stored bytes kept (% of the plan's layers as stored)" if by_bytes
                  else "parameters kept (% of the original model)")
    ax.set_ylabel("relative L2 output drift" if key == "relative_l2" else "worst relative weight error")
    ax.set_title(f"factorize sweep: {plot_title(title)}", fontsize=10)
    ax.grid(alpha=0.3)
    if rows and rows[0].get("accuracy_after") is not None:
        ax2 = ax.twinx()
        ax2.plot(x, [100 * r["accuracy_after"] for r in rows], marker="s", color="tab:orange", label="accuracy")
        ax2.axhline(100 * rows[0]["accuracy_before"], color="tab:orange", linestyle=":", linewidth=1)
        ax2.set_ylabel("accuracy after (%), dotted: before", color="tab:orange")
    fig.text(0.01, 0.01, "drift on sample inputs only; no guarantee on other inputs", fontsize=7, color="gray")
    fig.tight_layout()
    write_atomic(path, lambda tmp: fig.savefig(tmp, format="png"), force=force)
    plt.close(fig)


def _reference_curves(ax, rows: list[dict], references: dict) -> None:
    """Rank alone at the same bytes (a curve) and every layer rounded to int8 (a point), for a --cost bytes sweep."""
    rank = [(100 * r["rank_only_bytes_fraction"], r["rank_only_relative_l2"]) for r in rows
            if r.get("rank_only_relative_l2") is not None]
    if rank:
        ax.plot(*zip(*rank), marker="^", linestyle="--", color="tab:gray", label="rank alone")
    int8 = references.get("int8")
    if int8 and (int8.get("drift") or {}).get("relative_l2") is not None:
        ax.plot([100 * int8["bytes_fraction"]], [int8["drift"]["relative_l2"]], marker="s", linestyle="none",
                color="tab:red", label="int8 rounding alone")
    ax.legend(fontsize=8)


def render(result: dict, ui: UI) -> None:
    rows = result["rows"]
    table = Table(title=f"sweep: {result['model']}" + (f" on {result['inputs']}" if result["inputs"] else ""),
                  title_justify="left")
    columns = [("budget", "budget", lambda v: f"{v:g}"), ("params kept", "kept_fraction", pct),
               ("params", "params_after", lambda v: f"{v:,}"), ("layers factored", "factored_layers", str),
               ("relative L2", "relative_l2", g4), ("cosine mean", "cosine_mean", lambda v: f"{v:.6f}"),
               ("cosine p5", "cosine_p5", lambda v: f"{v:.6f}"), ("cosine worst", "cosine_min", lambda v: f"{v:.6f}"),
               ("neighbours agree", "neighbour_agreement", pct), ("top-1 agree", "top1_agreement", pct),
               ("perplexity ratio", "perplexity_ratio", lambda v: f"{v:.4f}"), ("accuracy", "accuracy_after", pct),
               ("worst weight err", "worst_weight_error", lambda v: f"{v:.4f}"),
               ("bytes kept", "bytes_fraction", pct), ("rank alone, same bytes: rel. L2", "rank_only_relative_l2", g4)]
    columns = [c for c in columns if any(r.get(c[1]) is not None for r in rows)]
    if any(r.get("bytes_fraction") is not None for r in rows):  # stored weights are not parameters: bytes say it
        columns = [c for c in columns if c[1] not in ("kept_fraction", "params_after")]
    for title, _, _ in columns:
        table.add_column(title, justify="left" if title == "budget" else "right")
    interval = bool(result.get("drift_samples"))  # a subset measured: the mean cosine says how precise it is

    def cell(r: dict, key: str, fmt) -> str:
        if r.get(key) is None:
            return "-"
        if interval and key == "cosine_mean" and r.get("cosine_mean_ci95") is not None:
            return f"{fmt(r[key])} +- {r['cosine_mean_ci95']:.2g}"
        return fmt(r[key])

    for r in rows:
        table.add_row(*[cell(r, key, fmt) for _, key, fmt in columns])
    ui.table(table)
    if rows and rows[0].get("accuracy_before") is not None:
        ui.line(f"accuracy of the original: {pct(rows[0]['accuracy_before'])}")
    int8 = (result.get("references") or {}).get("int8")
    if int8 and (int8.get("drift") or {}).get("relative_l2") is not None:
        ui.line(f"reference: every layer rounded to int8 and not factored keeps {pct(int8['bytes_fraction'])} of the "
                f"bytes at relative L2 {g4(int8['drift']['relative_l2'])} ({int8['note']})")
    for kind in ("csv", "plot"):
        if result.get(kind):
            ui.line(f"wrote {result[kind]}")
    ui.caution(result["caution"])
