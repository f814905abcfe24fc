"""Peak resident memory of the weights-only shrink, run after run, on a random Llama-shaped checkpoint.

Writes (once, into ``--ckpt``) a random Llama-layout checkpoint of about 247 M parameters in bfloat16 with
``benchmarks/llama_checkpoint.py`` (hidden 1024, MLP 2816, 19 layers, vocabulary 16000, 500 MB shards), then runs
the same one-process shrink (``shrink_checkpoint(index, out, budget=0.5, exclude='*embed_tokens*', threads=1)``)
several times, each in a fresh subprocess whose peak is read from the OS (``VmHWM`` in /proc/self/status), with the
variants interleaved run by run (A, B, A, B, ...) so that machine load falls on every variant alike:

* ``shipped``: as the library runs today, no environment variable;
* ``env``: with ``MALLOC_MMAP_THRESHOLD_=1048576`` in the environment (the setting issue 23 measured against);
* ``no-mallopt``: ``return_freed_memory`` disabled (what a run did before the library set glibc's thresholds);
* ``two-threads``: as shipped, with two torch threads per task (glibc gives each thread an arena of its own).

Target (issue 23): peak <= 0.5 x checkpoint size + 300 MB, run after run. One torch thread per run (two in the
``two-threads`` variant).

    flock /work/bench.lock python benchmarks/bench_weights_only_peak.py [--runs 3] [--variants shipped env] \
        [--ckpt /tmp/factorize-peak-ckpt] [--trace]

``--trace`` also samples the resident size every 10 ms in the child and prints the phase (values pass, factors
pass, writing) and the tensor in flight at the peak.
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
MB = 2**20
SCALE = {"hidden_size": 1024, "intermediate_size": 2816, "num_hidden_layers": 19, "num_attention_heads": 16,
         "num_key_value_heads": 4, "vocab_size": 16000, "max_position_embeddings": 2048}

CHILD = r"""
import json, sys, threading, time
variant, src, dst, trace = sys.argv[1], sys.argv[2], sys.argv[3], sys.argv[4] == "1"
import torch
threads = 2 if variant == "two-threads" else 1
torch.set_num_threads(threads)
from factorize.outofcore import weights_only, tasks, writer
if variant == "no-mallopt":
    weights_only.return_freed_memory = lambda: False
state = {"phase": "start", "tensor": None, "peak": 0, "at": None}
def rss():
    with open("/proc/self/status") as f:
        return next(int(l.split()[1]) for l in f if l.startswith("VmRSS:")) * 1024
if trace:
    def label(kind, fn):
        def inner(task, *a, **k):
            state["phase"], state["tensor"] = kind, task.name
            return fn(task, *a, **k)
        return inner
    tasks_values, tasks_factors = tasks.values_task, tasks.factors_task
    weights_only.values_task = label("values", tasks_values)
    weights_only.factors_task = label("factors", tasks_factors)
    write_layer = writer.CheckpointWriter._write_layer
    def traced(self, c, w):
        state["phase"], state["tensor"] = "write", c.weight.name
        return write_layer(self, c, w)
    writer.CheckpointWriter._write_layer = traced
    def sample():
        while True:
            r = rss()
            if r > state["peak"]:
                state["peak"], state["at"] = r, (state["phase"], state["tensor"])
            time.sleep(0.01)
    threading.Thread(target=sample, daemon=True).start()
t0 = time.perf_counter()
weights_only.shrink_checkpoint(src, dst, budget=0.5, exclude="*embed_tokens*", threads=threads)
seconds = time.perf_counter() - t0
hwm = next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith("VmHWM:")) * 1024
print(json.dumps({"variant": variant, "peak": hwm, "seconds": seconds, "traced_peak": state["peak"],
                  "at": state["at"]}))
"""


def checkpoint(path: Path) -> tuple[Path, int]:
    index = path / "model.safetensors.index.json"
    if not index.exists():
        spec = importlib.util.spec_from_file_location("llama_checkpoint", ROOT / "benchmarks" / "llama_checkpoint.py")
        mod = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(mod)
        mod.SCALES["peak"] = SCALE
        mod.write_llama_checkpoint(path, scale="peak", shard_mb=500, seed=0)
    size = sum(p.stat().st_size for p in path.glob("*.safetensors"))
    return index, size


def run(variant: str, index: Path, work: Path, trace: bool) -> dict:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    env.pop("MALLOC_MMAP_THRESHOLD_", None)
    if variant == "env":
        env["MALLOC_MMAP_THRESHOLD_"] = "1048576"
    out = work / "out"
    done = subprocess.run([sys.executable, "-c", CHILD, variant, str(index), str(out), "1" if trace else "0"],
                          capture_output=True, text=True, env=env, check=False)
    shutil.rmtree(out, ignore_errors=True)
    if done.returncode != 0:
        raise SystemExit(done.stderr[-3000:])
    return json.loads(done.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=3)
    ap.add_argument("--variants", nargs="+", default=["shipped", "env"],
                    choices=["shipped", "env", "no-mallopt", "two-threads"])
    ap.add_argument("--ckpt", type=Path, default=Path("/tmp/factorize-peak-ckpt"))
    ap.add_argument("--trace", action="store_true")
    args = ap.parse_args()
    index, size = checkpoint(args.ckpt)
    target = 0.5 * size + 300 * MB
    layers = json.loads((args.ckpt / "config.json").read_text())["num_hidden_layers"]  # also for a --ckpt of ours
    print(f"checkpoint {size / MB:.0f} MB (bfloat16, {layers} layers); target 0.5 x size + "
          f"300 MB = {target / MB:.0f} MB; one torch thread")
    peaks: dict[str, list[float]] = {v: [] for v in args.variants}
    with tempfile.TemporaryDirectory(prefix="factorize-peak-", dir="/tmp") as d:
        for i in range(args.runs):
            for v in args.variants:
                r = run(v, index, Path(d), args.trace)
                peaks[v].append(r["peak"] / MB)
                where = f"; traced peak {r['traced_peak'] / MB:.0f} MB in {r['at']}" if args.trace else ""
                print(f"run {i + 1} {v}: peak {r['peak'] / MB:.0f} MB, {r['seconds']:.1f} s{where}", flush=True)
    print("\n| variant | peaks, run by run (MiB) | max | target met |\n| --- | --- | ---: | --- |")
    for v, p in peaks.items():
        print(f"| {v} | {', '.join(f'{x:.0f}' for x in p)} | {max(p):.0f} | "
              f"{'yes' if max(p) <= target / MB else 'no'} |")


if __name__ == "__main__":
    main()
