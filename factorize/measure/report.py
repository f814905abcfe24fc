"""The report: one object holding what compression saved and what it cost, and its three renderings.

* :func:`render_rich` -- tables for people on a terminal (the console is injected, so tests capture it exactly);
* :meth:`Report.to_json` -- a plain JSON-serialisable dict for scripts;
* :meth:`Report.to_markdown` -- a Markdown section to paste into a review.

Every rendering carries :data:`CAUTION`. Computation never prints; everything a person sees goes through here.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Any

from rich.console import Console
from rich.panel import Panel
from rich.table import Table

from .alternatives import COLUMNS as ALTERNATIVE_COLUMNS
from .alternatives import Alternative, verdict
from .alternatives import rows as alternative_rows
from .layout import print_table, print_words

REPORT_FORMAT = "factorize.report"
REPORT_VERSION = 1

CAUTION = (
    "Drift was measured on the sample inputs only. It is no guarantee of how the compressed model behaves on "
    "other inputs. Where the model is used in a safety-relevant setting, validate the compressed model again "
    "under the rules that govern that setting before deploying it."
)


@dataclass
class LayerReport:
    """One factorizable layer: its rank, what it stores and computes before/after, and its weight error."""

    name: str  # qualified module name
    kind: str  # linear, conv1d, conv2d, embedding, transposed
    shape: tuple[int, int]  # matrix view (out m, in n)
    rank: int | None  # None: kept dense
    params: int  # weight numbers before (m * n)
    params_after: int  # r (m + n) when factored
    macs: int | None = None  # multiply-accumulates per sample before (None: layer not measured)
    macs_after: int | None = None
    weight_error: float | None = None  # measured ||W - BA||_F / ||W||_F
    predicted_error: float | None = None  # from the plan (Eckart-Young tail or output-space estimate)
    reason: str = ""  # why this rank (from the plan)
    form: str = ""  # the plan's form: "factor", "dense" or "corrected" ("" without a plan)
    precision: str | None = None  # stored precision of the weight or factors (plans with cost="bytes")
    bytes: int | None = None  # stored bytes of the weight before (plans that record them)
    bytes_after: int | None = None  # stored bytes after: factors, rounded weight, or weight plus correction
    correction_rank: int | None = None  # the corrected form's rank


@dataclass
class Report:
    """Everything one evaluation measured. Optional fields are None when not measured."""

    title: str = "factorize report"
    model: str = ""  # what was compressed (a name or a path)
    params_before: int = 0  # whole model, shared tensors counted once
    params_after: int = 0
    bytes_before: int = 0  # parameters and buffers, shared tensors counted once
    bytes_after: int = 0
    layers: list[LayerReport] = field(default_factory=list)
    drift: dict[str, float] | None = None  # see factorize.measure.drift.output_drift
    accuracy_before: float | None = None
    accuracy_after: float | None = None
    latency_ms_before: float | None = None  # median over latency_repeats forward passes of one batch
    latency_ms_after: float | None = None
    latency_repeats: int = 0
    latency_batch: int = 0  # samples in the timed batch
    latency_iqr_before: list[float] | None = None  # [first quartile, third quartile] of the timed passes, ms
    latency_iqr_after: list[float] | None = None
    latency_range_before: list[float] | None = None  # [fastest, slowest] timed pass, ms
    latency_range_after: list[float] | None = None
    latency_threads: int | None = None  # torch.get_num_threads() while timing
    samples: int = 0  # sample inputs the drift was measured on
    inputs: str = ""  # where the sample inputs came from
    policy: dict | None = None  # the plan's rank policy
    calibrated: bool | None = None  # whether the plan was fitted to calibration inputs (None: unknown)
    method: str = ""  # the plan's decomposition method
    recipe: str = ""  # the recipe the policy came from, if any
    calibration_batches: int | None = None  # calibration batches the plan was fitted to
    calibration_fit: str = ""  # "sequential refit" or "per-layer factors" (calibrated plans that say which)
    sites_kept: float | None = None  # fraction of the plan's sites' parameters kept
    versions: dict = field(default_factory=dict)  # factorize, torch, and the thread count the run used
    perplexity_before: float | None = None  # causal language models: exp(mean next-token loss) on the inputs
    perplexity_after: float | None = None
    notes: list[str] = field(default_factory=list)  # warnings worth showing (e.g. random inputs)
    caution: str = CAUTION
    # MACs per sample over every factorizable layer of the original (measure.evaluate.count_macs): {"before",
    # "after", "layers", "counted"}; None: the totals are those of the layers in the table
    mac_totals: dict | None = None
    stored_bytes_before: int | None = None  # stored bytes of the plan's layers (plans that record bytes)
    stored_bytes_after: int | None = None
    alternatives: list[Alternative] = field(default_factory=list)  # the plain ways at the chosen size
    # how the model was judged (measure.evaluate.judgement): "embeddings", "language model", "logits", "scores" or
    # "features" ("" when not said); the words shown, and how the user changes it
    judged_kind: str = ""
    judged_as: str = ""
    judged_hint: str = ""

    def alternatives_verdict(self) -> str | None:
        """The sentence saying which of the alternatives is best (:func:`factorize.measure.alternatives.verdict`)."""
        return verdict(self.alternatives) if self.alternatives else None

    @property
    def stored(self) -> list[LayerReport]:
        """The layers whose plan row records a stored precision (plans with ``cost="bytes"``)."""
        return [layer for layer in self.layers if layer.precision is not None]

    # --- derived numbers ----------------------------------------------------------------------------------------

    @property
    def kept_fraction(self) -> float:
        return self.params_after / self.params_before if self.params_before else 1.0

    @property
    def factored(self) -> list[LayerReport]:
        return [layer for layer in self.layers if layer.rank is not None]

    @property
    def macs_before(self) -> int | None:
        """Multiply-accumulates per sample before: over :attr:`mac_totals`' layers (every factorizable layer of
        the original, as every command counts them) when measured so, else over every layer in the table
        (factored or kept dense); the same set of layers as :attr:`macs_after`, so the two compare (None when
        not measured)."""
        if self.mac_totals is not None:
            return self.mac_totals["before"]
        values = [layer.macs for layer in self.layers]
        return sum(values) if values and None not in values else None

    @property
    def macs_after(self) -> int | None:
        if self.mac_totals is not None:
            return self.mac_totals["after"]
        values = [layer.macs_after for layer in self.layers]
        return sum(values) if values and None not in values else None

    def setup(self) -> str:
        """One line saying how the result was made and measured, so a pasted report describes itself."""
        parts = []
        if self.policy:
            rule = ", ".join(f"{k}={v}" for k, v in self.policy.items() if k in ("budget", "rank", "energy", "keep"))
            parts.append(f"policy {rule or 'given'}" + (f" (recipe {self.recipe})" if self.recipe else ""))
        if self.sites_kept is not None:
            parts.append(f"kept {self.sites_kept:.3f} of the factorizable layers' parameters")
        if self.method:
            parts.append(f"method {self.method}")
        if self.calibrated is not None:
            fit = f" ({self.calibration_fit})" if self.calibration_fit else ""
            parts.append(f"calibrated on {self.calibration_batches} batches{fit}" if self.calibrated
                         else "no calibration")
        if self.samples:
            parts.append(f"measured on {self.samples} samples")
        if self.versions:
            parts.append(", ".join(f"{k} {v}" for k, v in self.versions.items()))
        return "; ".join(parts)

    def __str__(self) -> str:
        return self.to_markdown()

    @property
    def perplexity_ratio(self) -> float | None:
        if self.perplexity_before and self.perplexity_after is not None:
            return self.perplexity_after / self.perplexity_before
        return None

    def advice(self) -> list[str]:
        """Plain-words warnings when the measured drift is high, each naming the next step (empty when it is not).

        The thresholds are judgement calls, not published constants: a mean cosine under 0.95 (for an encoder's
        embeddings also a worst sample under 0.80), a relative L2 error over 0.2, top-1 agreement under 95% (not
        for language models, judged by perplexity), an accuracy loss over 1 point, or a perplexity ratio over 1.10
        is a change a user should look at before shipping.
        """
        d = self.drift or {}
        if any(isinstance(v, float) and not math.isfinite(v) for v in d.values()):
            return ["Non-finite drift: NaN or Inf in the outputs, so no drift number here can be trusted. Next step: "
                    "look for NaN/Inf in the weights (the warning names them) and in the sample inputs."]
        found = []
        if self.judged_kind == "embeddings":  # what encoder users look at: the direction of each embedding
            if d.get("cosine_mean") is not None and d["cosine_mean"] < 0.95:
                found.append(f"mean cosine similarity to the original is {d['cosine_mean']:.3f}")
            if d.get("cosine_min") is not None and d["cosine_min"] < 0.80:
                found.append(f"the worst sample's cosine similarity is {d['cosine_min']:.3f}")
        elif d.get("cosine_mean") is not None and "top1_agreement" not in d and d["cosine_mean"] < 0.95:
            found.append(f"mean cosine similarity to the original is {d['cosine_mean']:.3f}")
        elif d.get("relative_l2") is not None and "top1_agreement" not in d and not d["relative_l2"] <= 0.2:
            found.append(f"relative L2 error of the outputs is {d['relative_l2']:.3g}")
        if d.get("top1_agreement") is not None and d["top1_agreement"] < 0.95 \
                and self.judged_kind != "language model":
            found.append(f"top-1 agreement with the original is {100 * d['top1_agreement']:.1f}%")
        if self.accuracy_before is not None and self.accuracy_after is not None \
                and self.accuracy_after < self.accuracy_before - 0.01:
            found.append(f"accuracy fell by {100 * (self.accuracy_before - self.accuracy_after):.2f} points")
        ratio = self.perplexity_ratio
        if ratio is not None and not ratio <= 1.10:
            found.append(f"perplexity rose to {ratio:.3f}x the original's")
        if not found:
            return []
        if self.calibrated is False:
            step = ("compress with calibration inputs (Python: calibration=batches; terminal: --calibration FILE), "
                    "which fits factors and ranks to what the layers see; then, if still too high, raise the budget "
                    "or heal the model")
        else:
            step = ("raise the budget, exclude the most sensitive layers, or heal the compressed model on unlabelled "
                    "inputs (factorize.heal; terminal: --heal)")
        return [f"High drift: {'; '.join(found)}. Next step: {step}."]

    @property
    def latency_conclusive(self) -> bool | None:
        """False when the two interquartile ranges of the timed passes overlap: the medians then differ by less
        than the run-to-run spread, and the latency change cannot be told from noise (a judgement call, stricter
        than comparing medians alone). None when no spread was measured."""
        if not self.latency_iqr_before or not self.latency_iqr_after:
            return None
        (a1, a3), (b1, b3) = self.latency_iqr_before, self.latency_iqr_after
        return a3 < b1 or b3 < a1

    def latency_note(self) -> str | None:
        """A sentence when the latency change is inside the noise (see :attr:`latency_conclusive`)."""
        if self.latency_conclusive is not False:
            return None
        threads = f" with {_threads(self.latency_threads)}" if self.latency_threads else ""
        return (f"Latency is inconclusive: the interquartile ranges of the {self.latency_repeats} timed passes "
                f"overlap{threads}, so the change is within this machine's run-to-run noise. Time again with more "
                "repeats (--repeats), on an idle machine, or with a fixed thread count.")

    @property
    def worst_weight_error(self) -> float | None:
        errors = [layer.weight_error for layer in self.factored if layer.weight_error is not None]
        return max(errors) if errors else None

    # --- renderings ---------------------------------------------------------------------------------------------

    def to_json(self) -> dict[str, Any]:
        """A plain dict (JSON-serialisable; non-finite floats become None)."""
        data = asdict(self)
        for layer in data["layers"]:
            layer["shape"] = list(layer["shape"])
        data["alternatives"] = [a.to_json() for a in self.alternatives]
        data.update(
            alternatives_verdict=self.alternatives_verdict(),
            format=REPORT_FORMAT,
            version=REPORT_VERSION,
            kept_fraction=self.kept_fraction,
            macs_before=self.macs_before,
            macs_after=self.macs_after,
            worst_weight_error=self.worst_weight_error,
            factored_layers=len(self.factored),
            perplexity_ratio=self.perplexity_ratio,
            latency_conclusive=self.latency_conclusive,
            latency_note=self.latency_note(),
            setup=self.setup(),
            advice=self.advice(),
        )
        return _finite(data)

    def to_markdown(self) -> str:
        """A Markdown section for a review."""
        lines = [f"## {self.title}", ""]
        if self.model:
            lines += [f"Model: `{self.model}`", ""]
        if self.setup():
            lines += [f"Setup: {self.setup()}.", ""]
        lines += ["| quantity | before | after | change |", "| --- | ---: | ---: | ---: |"]
        lines += [f"| {q} | {b} | {a} | {c} |" for q, b, a, c in self.summary_rows()]
        if self.mac_totals is not None:
            lines += ["", f"MACs/sample counted over {self.mac_totals['counted']}."]
        if self.drift is not None:
            lines += ["", f"Output drift on {self.samples} sample inputs ({self.inputs or 'given inputs'}):", ""]
            lines += ["| measure | value |", "| --- | ---: |"]
            lines += [f"| {k} | {v} |" for k, v in self.drift_rows()]
            if self.judged_line():
                lines += ["", f"{self.judged_line()}."]
        if self.layers:
            lines += ["", "| layer | kind | shape | rank | params | params after | weight error | MACs/sample after |",
                      "| --- | --- | --- | ---: | ---: | ---: | ---: | ---: |"]
            for layer in self.layers:
                lines.append("| " + " | ".join(_layer_cells(layer)) + " |")
        if self.stored:
            lines += ["", "Stored forms:", "", "| layer | form | rank | precision | bytes | bytes after |",
                      "| --- | --- | ---: | --- | ---: | ---: |"]
            lines += ["| " + " | ".join(_stored_cells(layer)) + " |" for layer in self.stored]
        if self.alternatives:
            lines += ["", f"Plain alternatives at the chosen size, on the same {self.samples} sample inputs:", "",
                      "| " + " | ".join(ALTERNATIVE_COLUMNS) + " |", "| --- | ---: | ---: | ---: | --- |"]
            lines += ["| " + " | ".join(row) + " |" for row in alternative_rows(self.alternatives)]
            if self.alternatives_verdict():
                lines += ["", f"**{self.alternatives_verdict()}**"]
        for note in self.notes + ([self.latency_note()] if self.latency_note() else []):
            lines += ["", f"Note: {note}"]
        for line in self.advice():
            lines += ["", f"**{line}**"]
        lines += ["", f"> **Caution.** {self.caution}", ""]
        return "\n".join(lines)

    def summary_rows(self) -> list[tuple[str, str, str, str]]:
        """(quantity, before, after, change) rows shared by the rich and Markdown renderings."""
        rows = [
            ("parameters", _int(self.params_before), _int(self.params_after),
             _change(self.params_before, self.params_after)),
            ("bytes", _bytes(self.bytes_before), _bytes(self.bytes_after),
             _change(self.bytes_before, self.bytes_after)),
        ]
        if self.stored_bytes_before is not None and self.stored_bytes_after is not None:
            rows.append(("stored bytes, layers in the plan", _bytes(self.stored_bytes_before),
                         _bytes(self.stored_bytes_after), _change(self.stored_bytes_before, self.stored_bytes_after)))
        if self.macs_before is not None:
            counted = "layers in the table" if self.mac_totals is None else \
                f"all {self.mac_totals['layers']} factorizable layers"
            rows.append((f"MACs/sample, {counted}", _int(self.macs_before), _int(self.macs_after),
                         _change(self.macs_before, self.macs_after)))
        if self.accuracy_before is not None:
            rows.append(("accuracy", _pct(self.accuracy_before), _pct(self.accuracy_after),
                         _points(self.accuracy_before, self.accuracy_after)))
        if self.perplexity_before is not None:
            rows.append(("perplexity (next token)", f"{self.perplexity_before:.4g}", f"{self.perplexity_after:.4g}",
                         _change(self.perplexity_before, self.perplexity_after)))
        if self.latency_ms_before is not None:
            threads = f", {_threads(self.latency_threads)}" if self.latency_threads else ""
            rows.append((f"latency, median of {self.latency_repeats} (batch {self.latency_batch}{threads})",
                         f"{self.latency_ms_before:.3f} ms", f"{self.latency_ms_after:.3f} ms",
                         _change(self.latency_ms_before, self.latency_ms_after)))
            if self.latency_iqr_before and self.latency_iqr_after:
                rows.append(("latency, interquartile range", _ms_range(self.latency_iqr_before),
                             _ms_range(self.latency_iqr_after),
                             "overlap: inconclusive" if self.latency_conclusive is False else "apart"))
        return rows

    def drift_rows(self) -> list[tuple[str, str]]:
        """(measure, value) rows; the headline's spread over samples (5th percentile and worst beside the mean) is
        per-sample cosine for embeddings and features, per-sample relative L2 for the others."""
        d = self.drift or {}
        cosine_headline = self.judged_kind in ("embeddings", "features") or (
            not self.judged_kind and "top1_agreement" not in d)
        agreement = "next-token agreement" if self.judged_kind == "language model" else "top-1 agreement"
        names = {
            "relative_l2": "relative L2 error",
            **({} if cosine_headline else {"sample_l2_mean": "relative L2 per sample, mean",
                                           "sample_l2_p95": "relative L2 per sample, 95th percentile",
                                           "sample_l2_max": "relative L2 per sample, worst sample"}),
            "cosine_mean": "cosine similarity, mean",
            **({"cosine_p5": "cosine similarity, 5th percentile"} if cosine_headline else {}),
            "cosine_min": "cosine similarity, worst sample",
            "neighbour_agreement": f"nearest-neighbour agreement ({d.get('neighbour_samples', 0):g} inputs)",
            "similarity_spearman": "rank correlation of pairwise similarities (Spearman)",
            "top1_agreement": agreement,
            "kl": "KL divergence (nats)",
        }
        rows = []
        for key, label in names.items():
            if key in d and d[key] is not None:
                value = _drift_value(key, d[key])
                if key == "cosine_mean" and cosine_headline and d.get("cosine_mean_ci95") is not None:
                    value += f" +- {d['cosine_mean_ci95']:.2g}"  # how precise the mean is on this many inputs
                    label += f" (95% interval over {d.get('samples', 0):g} inputs)"
                rows.append((label, value))
        return rows

    def judged_line(self) -> str | None:
        """One sentence saying which kind of model the drift was judged as, and how to change that."""
        return f"judged as: {self.judged_as}; {self.judged_hint}" if self.judged_as else None


# ---------------------------------------------------------------------------------------------------------------
# rich rendering


def render_rich(report: Report, console: Console, *, caution: bool = True) -> None:
    """Print ``report`` as tables on ``console``. ``caution=False`` leaves the caution to the caller, for a page
    that shows several reports and closes with the caution once."""
    summary = Table(title=report.title + (f": {report.model}" if report.model else ""), title_justify="left")
    summary.add_column("quantity")
    for name in ("before", "after", "change"):
        summary.add_column(name, justify="right")
    for row in report.summary_rows():
        summary.add_row(*row)
    print_table(console, summary)  # whole when it fits, else one record per row (measure/layout.py)
    if report.setup():
        print_words(console, f"setup: {report.setup()}")
    if report.drift is not None:
        drift = Table(title=f"output drift on {report.samples} sample inputs ({report.inputs or 'given inputs'})",
                      title_justify="left")
        drift.add_column("measure")
        drift.add_column("value", justify="right")
        for row in report.drift_rows():
            drift.add_row(*row)
        print_table(console, drift)
        if report.judged_line():
            print_words(console, report.judged_line())
    if report.layers:
        layers = Table(title="layers", title_justify="left")
        for name, justify in (("layer", "left"), ("kind", "left"), ("shape", "left"), ("rank", "right"),
                              ("params", "right"), ("params after", "right"), ("weight error", "right"),
                              ("MACs after", "right")):
            layers.add_column(name, justify=justify)  # type: ignore[arg-type]
        for layer in report.layers:
            layers.add_row(*_layer_cells(layer))
        print_table(console, layers)  # full names: never wrapped inside, never cut
    if report.stored:
        stored = Table(title="stored forms", title_justify="left")
        for name, justify in (("layer", "left"), ("form", "left"), ("rank", "right"), ("precision", "left"),
                              ("bytes", "right"), ("bytes after", "right")):
            stored.add_column(name, justify=justify)  # type: ignore[arg-type]
        for layer in report.stored:
            stored.add_row(*_stored_cells(layer))
        print_table(console, stored)
    if report.alternatives:
        alt = Table(title=f"plain alternatives at the chosen size, on the same {report.samples} sample inputs",
                    title_justify="left")
        for name in ALTERNATIVE_COLUMNS:
            alt.add_column(name, justify="left" if name in ("alternative", "note") else "right")
        for row in alternative_rows(report.alternatives):
            alt.add_row(*row)
        print_table(console, alt)
        if report.alternatives_verdict():
            print_words(console, report.alternatives_verdict(), style="bold")
    for note in report.notes + ([report.latency_note()] if report.latency_note() else []):
        print_words(console, note, prefix="Note: ", prefix_style="yellow")
    for line in report.advice():
        print_words(console, line, style="bold red")
    if caution:
        console.print(Panel(report.caution, title="caution", title_align="left", border_style="yellow"))


# ---------------------------------------------------------------------------------------------------------------
# formatting helpers


def _layer_cells(layer: LayerReport) -> list[str]:
    m, n = layer.shape
    return [
        layer.name,
        layer.kind,
        f"{m}x{n}",
        "dense" if layer.rank is None else str(layer.rank),
        _int(layer.params),
        _int(layer.params_after),
        "-" if layer.weight_error is None else f"{layer.weight_error:.4f}",
        "-" if layer.macs_after is None else _int(layer.macs_after),
    ]


def _stored_cells(layer: LayerReport) -> list[str]:
    rank = layer.rank if layer.form == "factor" else layer.correction_rank
    return [
        layer.name,
        layer.form or ("factor" if layer.rank is not None else "dense"),
        "-" if rank is None else str(rank),
        layer.precision or "-",
        _int(layer.bytes),
        _int(layer.bytes_after),
    ]


def _drift_value(key: str, v: float) -> str:
    if key in ("top1_agreement", "neighbour_agreement"):
        return _pct(v)
    if key.startswith("cosine") or key == "similarity_spearman":
        return f"{v:.6f}"
    return f"{v:.4g}"


def _ms_range(v: list[float]) -> str:
    return f"{v[0]:.3f}-{v[1]:.3f} ms"


def _threads(n: int) -> str:
    return f"{n} thread" if n == 1 else f"{n} threads"


def _int(v: int | None) -> str:
    return "-" if v is None else f"{v:,}"


def _bytes(v: int) -> str:
    for unit, size in (("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if v >= size:
            return f"{v / size:.2f} {unit}"
    return f"{v} B"


def _pct(v: float | None) -> str:
    return "-" if v is None else f"{100 * v:.2f}%"


def _change(before: float | None, after: float | None) -> str:
    if not before or after is None:
        return "-"
    return f"{100 * (after / before - 1):+.1f}%"


def _points(before: float | None, after: float | None) -> str:
    if before is None or after is None:
        return "-"
    return f"{100 * (after - before):+.2f} pts"


def _finite(value: Any) -> Any:
    """Replace NaN/Inf by None so the result is strict JSON."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_finite(v) for v in value]
    return value
