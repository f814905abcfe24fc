"""Tests for factorize/report.py: the three renderings carry the numbers and the caution."""

from __future__ import annotations

import io
import json

from rich.console import Console

from factorize.measure.report import CAUTION, LayerReport, Report, render_rich


def _report(**over) -> Report:
    values = dict(
        title="shrink",
        model="digits.safetensors",
        params_before=1000,
        params_after=400,
        bytes_before=4000,
        bytes_after=1600,
        layers=[
            LayerReport("fc1", "linear", (20, 30), 6, 600, 300, macs=600, macs_after=300, weight_error=0.125,
                        predicted_error=0.125),
            LayerReport("head", "linear", (10, 20), None, 200, 200, macs=200, macs_after=200, weight_error=0.0),
        ],
        drift={"relative_l2": 0.0312, "cosine_mean": 0.999, "cosine_min": 0.98, "top1_agreement": 0.975,
               "kl": float("nan"), "samples": 40},
        accuracy_before=0.9,
        accuracy_after=0.875,
        latency_ms_before=2.0,
        latency_ms_after=1.0,
        latency_repeats=5,
        latency_batch=8,
        samples=40,
        inputs="x.npy",
        notes=["random inputs say little"],
    )
    values.update(over)
    return Report(**values)


def test_derived_numbers() -> None:
    r = _report()
    assert r.kept_fraction == 0.4
    assert r.macs_before == 800 and r.macs_after == 500  # every layer in the table, dense ones too, both sides
    assert r.worst_weight_error == 0.125
    assert [layer.name for layer in r.factored] == ["fc1"]
    assert _report(layers=[]).macs_before is None


def test_json_is_plain_strict_and_complete() -> None:
    data = _report().to_json()
    text = json.dumps(data, allow_nan=False)  # NaN became None, so strict JSON works
    back = json.loads(text)
    assert back["format"] == "factorize.report" and back["version"] == 1
    assert back["params_after"] == 400 and back["kept_fraction"] == 0.4
    assert back["drift"]["kl"] is None and back["drift"]["relative_l2"] == 0.0312
    assert back["layers"][0]["shape"] == [20, 30] and back["layers"][1]["rank"] is None
    assert back["caution"] == CAUTION


def test_markdown_has_tables_numbers_and_caution() -> None:
    md = _report().to_markdown()
    assert md.startswith("## shrink")
    assert "| parameters | 1,000 | 400 | -60.0% |" in md
    assert "| accuracy | 90.00% | 87.50% | -2.50 pts |" in md
    assert "| top-1 agreement | 97.50% |" in md
    assert "| fc1 | linear | 20x30 | 6 | 600 | 300 | 0.1250 | 300 |" in md
    assert "| head | linear | 10x20 | dense |" in md
    assert "Note: random inputs say little" in md
    assert CAUTION in md


def test_rich_rendering_goes_to_the_injected_console() -> None:
    buf = io.StringIO()
    render_rich(_report(), Console(file=buf, width=140, color_system=None))
    out = buf.getvalue()
    for text in ("parameters", "1,000", "-60.0%", "relative L2 error", "0.0312", "97.50%", "fc1", "dense",
                 "random inputs say little", "no guarantee", "safety-relevant"):
        assert text in out, text
    # a report without drift (weights-only mode) still renders, caution included
    buf = io.StringIO()
    render_rich(_report(drift=None, accuracy_before=None, latency_ms_before=None), Console(file=buf, width=140))
    assert "relative L2" not in buf.getvalue() and "no guarantee" in buf.getvalue()


def test_report_describes_how_it_was_made() -> None:
    r = _report(policy={"budget": 0.5}, recipe="bert-encoder.toml", method="auto", calibrated=True,
                calibration_batches=4, sites_kept=0.4987,
                versions={"factorize": "0.1.0", "torch": "2.13.0", "threads": 1})
    line = r.setup()
    for part in ("budget=0.5", "recipe bert-encoder.toml", "kept 0.499", "method auto", "calibrated on 4 batches",
                 "measured on 40 samples", "torch 2.13.0", "threads 1"):
        assert part in line
    assert line in r.to_markdown() and r.to_json()["setup"] == line
    assert str(r) == r.to_markdown()  # print(report) is readable, not a dataclass dump


def test_encoder_verdict_uses_mean_and_worst_cosine_and_never_top1() -> None:
    # the thresholds (mean 0.95, worst 0.80) are the report's judgement calls, documented in Report.advice
    drift = {"relative_l2": 0.1, "cosine_mean": 0.97, "cosine_min": 0.6, "cosine_p5": 0.7, "samples": 40,
             "neighbour_agreement": 0.8, "similarity_spearman": 0.9, "neighbour_samples": 40}
    rep = _report(drift=drift, accuracy_before=None, accuracy_after=None, judged_kind="embeddings",
                  judged_as="sentence encoder (--pooling mean)", judged_hint="drop --pooling to compare tokens")
    (line,) = rep.advice()
    assert "worst sample's cosine similarity is 0.600" in line and "mean cosine" not in line and "top-1" not in line
    md = rep.to_markdown()
    assert "| cosine similarity, 5th percentile | 0.700000 |" in md
    assert "| nearest-neighbour agreement (40 inputs) | 80.00% |" in md and "relative L2 per sample" not in md
    assert "judged as: sentence encoder (--pooling mean); drop --pooling to compare tokens." in md
    assert rep.to_json()["judged_kind"] == "embeddings"
    assert _report(drift={**drift, "cosine_min": 0.85}, accuracy_before=None, judged_kind="embeddings").advice() == []


def test_classifier_and_language_model_show_the_per_sample_l2_tail() -> None:
    tail = {"sample_l2_mean": 0.03, "sample_l2_p95": 0.08, "sample_l2_max": 0.2, "cosine_p5": 0.99}
    rep = _report(drift={**_report().drift, **tail}, judged_kind="logits")
    rows = dict(rep.drift_rows())
    assert rows["relative L2 per sample, 95th percentile"] == "0.08" and "cosine similarity, 5th percentile" not in rows
    lm = _report(drift={**_report().drift, **tail, "top1_agreement": 0.6, "kl": 0.01}, accuracy_before=None,
                 perplexity_before=10.0, perplexity_after=10.5, judged_kind="language model")
    assert "next-token agreement" in dict(lm.drift_rows())
    assert lm.advice() == []  # judged by the perplexity ratio (1.05), not by next-token argmax agreement
