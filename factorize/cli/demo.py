"""``factorize demo``: the whole job on the embedded digits classifier, writing nothing to disk."""

from __future__ import annotations

import tempfile
import warnings
from pathlib import Path

import torch
from rich.table import Table

from factorize.calibrated.search import Calibration, compress_from
from factorize.checkpoints import files
from factorize.default import DigitsMLP, load_default, load_digits_split
from factorize.measure.evaluate import evaluate
from factorize.measure.report import CAUTION, render_rich
from factorize.model.sites import walk
from factorize.pipeline import compress
from factorize.plan.policy import Policy
from factorize.spectra.sites import decompose_sites

from .parser import SCAN_ENERGY
from .render import UI, g4, opt, pct, spectrum_sketch
from .scan import scan_row

NEXT_STEPS = ("next steps: look at your own model's spectra with factorize scan --model mypkg.models:build "
              "--weights model.safetensors; pick a budget with factorize sweep ... --inputs samples.npz; then "
              "factorize shrink ... --calibration calib.npz --inputs samples.npz --report review.md")


def run(args, ui: UI) -> dict:
    model = load_default()
    x, y = load_digits_split("test")  # held out: never used in training or calibration (factorize/default/README.md)
    batches = list(x.split(180))
    calibration = list(load_digits_split("calibration")[0].split(64))
    found = walk(model)
    spectra = decompose_sites(model, found.sites, progress=ui.progress)
    scan = [scan_row(s, spectra[s.name], SCAN_ENERGY, 1) for s in found.sites]
    with warnings.catch_warnings():  # said once, plainly, below: the split is smaller than two layers' widths
        warnings.filterwarnings("ignore", message="too few calibration samples")
        calib = Calibration(model, calibration, progress=ui.progress)  # the recommended call's statistics, once
    short = [n for n, st in calib.stats.items() if st.count < st.width]  # what the filtered warning would list
    if short:
        ui.note(f"calibration: {sum(len(b) for b in calibration)} digits, fewer than the inputs of "
                f"{', '.join(short)}, so a small ridge stands in for the input directions they do not show")
    runs, plain = [], []
    for budget in sorted(set(args.budgets), reverse=True):
        runs.append(_measured(model, compress_from(calib, Policy(budget=budget)), budget, "calibrated", x, y,
                              batches, args.repeats))
        plain.append(_measured(model, compress(model, budget=budget, spectra=spectra, example=batches[0]), budget,
                               "plain SVD", x, y, batches, args.repeats))
    strip = lambda rows: [{k: v for k, v in r.items() if k != "_report"} for r in rows]  # noqa: E731
    result = {"command": "demo", "model": "embedded digits classifier (factorize.default:load_default)",
              "data": "held-out split of the UCI handwritten digits (Alpaydin & Kaynak), as bundled with scikit-learn; "
              "calibration: the separate 256-sample calibration split",
              "scan": scan, "runs": strip(runs), "plain": strip(plain), "caution": CAUTION}
    if not ui.json_mode:
        render(result, runs, ui, plain)
    return result


def _measured(model, result, budget: float, method: str, x, y, batches, repeats: int) -> dict:
    """Evaluate one compressed model on the held-out digits, save it to a temporary file and reload it."""
    report = evaluate(model, result.model, batches, labels=y, plan=result.plan, latency_repeats=repeats,
                      title=f"factorize demo: budget {budget:g}, {method}", model_name="embedded digits classifier",
                      inputs=f"held-out digits, {len(y)} samples")
    with tempfile.TemporaryDirectory(prefix="factorize-demo-") as d:  # save, reload, check: nothing stays
        path = files.save(result.model, Path(d) / "digits.factorized.safetensors", plan=result.plan)
        size = path.stat().st_size
        reloaded = files.load(DigitsMLP(), path).eval()
        with torch.no_grad():
            identical = bool(torch.equal(reloaded(x), result.model(x)))
    return {"budget": budget, "method": method, "report": report.to_json(), "file_bytes": size,
            "reloaded_outputs_identical": identical, "_report": report}


def render(result: dict, runs: list[dict], ui: UI, plain: list[dict] = ()) -> None:
    ui.line(f"factorize demo: {result['model']}\ndata: {result['data']}")
    table = Table(title="1. scan: what the spectra allow", title_justify="left")
    for name in ("layer", "shape", "params", "r@90%", "r@99%", "break-even", "spectrum"):
        table.add_column(name, justify="left" if name in ("layer", "shape", "spectrum") else "right")
    for r in result["scan"]:
        m, n = r["shape"]
        table.add_row(r["name"], f"{m}x{n}", f"{r['params']:,}", opt(r["rank_90"]), opt(r["rank_99"]),
                      str(r["break_even"]), spectrum_sketch(r["spectrum"]))
    ui.table(table)
    summary = Table(title="2. shrink: mild and strong budgets, calibrated (the recommended call) and plain SVD for "
                    "comparison, measured on the held-out digits; each saved to a temporary file and reloaded",
                    title_justify="left")
    for name in ("budget", "method", "params", "kept", "acc. before", "acc. after", "top-1 agree", "relative L2",
                 "file", "reload"):
        summary.add_column(name, justify="left" if name in ("budget", "method") else "right")
    for r in sorted([*runs, *plain], key=lambda r: (-r["budget"], r["method"] != "calibrated")):
        rep = r["_report"]
        summary.add_row(f"{r['budget']:g}", r["method"], f"{rep.params_after:,}", pct(rep.kept_fraction),
                        pct(rep.accuracy_before), pct(rep.accuracy_after), pct(rep.drift["top1_agreement"]),
                        g4(rep.drift["relative_l2"]), f"{r['file_bytes'] / 1e3:.1f} kB",
                        "exact" if r["reloaded_outputs_identical"] else "DIFFERS")
    ui.table(summary)
    ui.line(f"\n3. the full report at the strongest budget ({runs[-1]['budget']:g}), calibrated:")
    render_rich(runs[-1]["_report"], ui.out, caution=False)  # the caution closes the demo, once
    ui.caution(result["caution"])
    ui.steps(NEXT_STEPS)
