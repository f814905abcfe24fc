"""Weights-only budget shrink of a Llama-shaped sharded bfloat16 checkpoint: one process vs a Dask local cluster.

Side by side in one run (interleaved when ``--repeat`` > 1), each in a fresh child process so that its peak memory
is its own:

* ``one process``: ``shrink_checkpoint(..., budget=B)`` with ``torch.set_num_threads(1)`` (tasks on the local engine);
* ``local cluster``: the same call with ``cluster=N`` (a ``LocalCluster`` of N worker processes, one thread each);
  the cluster is started before the clock starts (its start-up time is shown apart), and every worker's peak
  resident memory (``ru_maxrss``, read on the worker with ``client.run``) is reported.

Both write their output; every output file is hashed (SHA-256) and the two runs compared byte for byte.

The checkpoint comes from ``benchmarks/llama_checkpoint.py`` (random weights with decaying spectra; ``--scale 1b`` is
1.1 B parameters, about 2.2 GB in bfloat16), generated into a temporary directory, or reused with ``--checkpoint``.
Outputs go to a temporary directory (``--work``) removed at the end. Usage::

    python benchmarks/bench_cluster.py --scale tiny
    python benchmarks/bench_cluster.py --scale 1b --workers 2 --out benchmarks/results/cluster.md
    python benchmarks/bench_cluster.py --checkpoint /data/llama-1b --workers 2

On a machine with fewer free cores than workers the cluster cannot be faster: say what else was running.
"""

from __future__ import annotations

import argparse
import datetime as dt
import hashlib
import json
import os
import platform
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))

MB = 2**20


def _hashes(directory: Path) -> dict[str, str]:
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(directory.iterdir())}


def _worker_peak() -> int:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # KiB on Linux


def run_one(mode: str, src: str, out: str, budget: float, workers: int) -> dict:
    """One shrink in this (fresh) process; returns times, peak memories and the output's hashes."""
    import torch

    from factorize.cluster import open_engine
    from factorize.outofcore.weights_only import shrink_checkpoint
    from factorize.plan.entries import is_factored_entry

    torch.set_num_threads(1)
    started = time.perf_counter()
    engine = open_engine(workers if mode == "cluster" else None, threads=1)
    startup = time.perf_counter() - started
    try:
        if mode == "cluster":  # import torch and factorize in the workers before the clock starts, as a warm cluster
            engine.client.run(lambda: __import__("factorize.outofcore.weights_only") and None)
        t0 = time.perf_counter()
        done = shrink_checkpoint(src, out, budget=budget, exclude=["*embed_tokens*"], cluster=engine,
                                 threads=1)
        wall = time.perf_counter() - t0
        peaks = sorted(engine.client.run(_worker_peak).values()) if mode == "cluster" else []
        where = engine.describe()
    finally:
        engine.close()
    return {"mode": mode, "wall_s": wall, "startup_s": startup, "client_peak_kib": _worker_peak(),
            "worker_peaks_kib": peaks, "hashes": _hashes(Path(out)), "engine": where,
            "factored": sum(1 for r in done.tensors.values() if is_factored_entry(r)),
            "matrices": len(done.tensors), "bytes_before": done.bytes_before, "bytes_after": done.bytes_after}


def _child(mode: str, src: Path, out: Path, args) -> dict:
    cmd = [sys.executable, __file__, "--child", mode, "--checkpoint", str(src), "--child-out", str(out),
           "--budget", str(args.budget), "--workers", str(args.workers)]
    env = {**os.environ, "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1",
           "PYTHONPATH": os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")]))}
    p = subprocess.run(cmd, capture_output=True, text=True, env=env, check=False)
    if p.returncode != 0:
        raise SystemExit(f"{mode} run failed:\n{p.stderr[-4000:]}")
    return json.loads(p.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scale", default="tiny", help="llama_checkpoint.py scale: 1b, mid, small or tiny (default tiny)")
    ap.add_argument("--checkpoint", help="reuse this checkpoint (directory or index) instead of generating one")
    ap.add_argument("--shard-mb", type=float, default=None, help="shard size when generating (default: 500 for "
                    "1b, else a tenth of the checkpoint)")
    ap.add_argument("--budget", type=float, default=0.5)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--repeat", type=int, default=1, help="runs of each, interleaved")
    ap.add_argument("--work", help="directory for the generated checkpoint and outputs (default: a temp dir)")
    ap.add_argument("--out", help="also write the table as Markdown here")
    ap.add_argument("--child", choices=["local", "cluster"], help=argparse.SUPPRESS)
    ap.add_argument("--child-out", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        print(json.dumps(run_one(args.child, args.checkpoint, args.child_out, args.budget, args.workers)))
        return

    from llama_checkpoint import SCALES, tensor_shapes, write_llama_checkpoint

    work = Path(tempfile.mkdtemp(prefix="bench-cluster-", dir=args.work))
    try:
        if args.checkpoint:
            src = Path(args.checkpoint)
            label = str(src)
        else:
            if args.scale not in SCALES:
                raise SystemExit(f"--scale {args.scale}: choose one of {', '.join(SCALES)}")
            n = sum(int(__import__("math").prod(s)) for _, s in tensor_shapes(args.scale))
            shard_mb = args.shard_mb or (500 if args.scale == "1b" else max(0.05, 2 * n / MB / 10))
            t0 = time.perf_counter()
            src = write_llama_checkpoint(work / "ckpt", scale=args.scale, shard_mb=shard_mb)
            print(f"generated {args.scale} checkpoint ({n / 1e6:.1f} M parameters) in {time.perf_counter() - t0:.1f} s",
                  file=sys.stderr)
            label = (f"llama_checkpoint.py --scale {args.scale} ({n / 1e6:.1f} M parameters, bfloat16, "
                     f"{shard_mb:.1f} MB shards)")
        runs: dict[str, list[dict]] = {"local": [], "cluster": []}
        for i in range(args.repeat):
            for mode in ("local", "cluster"):
                out = work / f"out-{mode}-{i}"
                runs[mode].append(_child(mode, src, out, args))
                shutil.rmtree(out, ignore_errors=True)
                print(f"{mode} run {i + 1}: {runs[mode][-1]['wall_s']:.2f} s", file=sys.stderr)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    print(table(runs, label, args))
    if args.out:
        Path(args.out).write_text(table(runs, label, args) + "\n")


def table(runs: dict[str, list[dict]], label: str, args) -> str:
    local, cluster = runs["local"], runs["cluster"]
    same = all(r["hashes"] == local[0]["hashes"] for r in local + cluster)
    best = {m: min(r["wall_s"] for r in rs) for m, rs in runs.items()}

    def mib(kib: int) -> str:
        return f"{kib / 1024:.0f}"

    first = cluster[0]
    peaks = [max(r["worker_peaks_kib"][i] for r in cluster if len(r["worker_peaks_kib"]) > i)
             for i in range(max(len(r["worker_peaks_kib"]) for r in cluster))]
    source = f"--checkpoint {args.checkpoint}" if args.checkpoint else f"--scale {args.scale}"
    lines = [
        f"# Weights-only budget shrink: one process vs a Dask local cluster of {args.workers} workers",
        "",
        (f"Date: {dt.date.today()}. Machine: {platform.machine()}, {os.cpu_count()} visible cores, Python "
         f"{platform.python_version()}; torch set to 1 thread in the single process and in every task."),
        (f"Checkpoint: {label}. Policy: budget {args.budget}, embedding excluded (not a linear layer) "
         f"({first['factored']} of {first['matrices']} matrices factored). Runs: {args.repeat} of each, "
         "interleaved; best wall time, highest peak memory shown."),
        "",
        ("| run | wall (s) | cluster start-up (s) | peak RSS, client / single process (MiB) | "
         "peak RSS per worker (MiB) |"),
        "| --- | ---: | ---: | ---: | --- |",
        f"| one process | {best['local']:.2f} | - | {mib(max(r['client_peak_kib'] for r in local))} | - |",
        (f"| local cluster, {args.workers} workers | {best['cluster']:.2f} | {first['startup_s']:.1f} | "
         f"{mib(max(r['client_peak_kib'] for r in cluster))} | {', '.join(mib(k) for k in peaks)} |"),
        "",
        (f"Speed-up (one process / cluster): {best['local'] / best['cluster']:.2f} x. "
         f"Outputs byte-identical across all runs: {'yes' if same else 'NO'}. "
         f"Size: {local[0]['bytes_before'] / MB:.1f} MiB -> {local[0]['bytes_after'] / MB:.1f} MiB."),
        "",
        (f"Reproduce: `python benchmarks/bench_cluster.py {source} --workers {args.workers} "
         f"--budget {args.budget} --repeat {args.repeat}`"),
    ]
    return "\n".join(lines)


if __name__ == "__main__":
    main()
