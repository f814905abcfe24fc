"""Peak resident memory of weights-only shrink vs the checkpoint's size.

Generates a sharded float32 checkpoint of transformer-sized matrices (4096 x 4096 attention projections,
4096 x 11008 / 11008 x 4096 MLP matrices; >= 2 GB) in a temporary directory under /tmp, then measures, each in
its own subprocess so that the peak resident set size belongs to that job alone (``VmHWM`` from
/proc/self/status; ``resource.getrusage().ru_maxrss`` is not used because Linux carries the parent's peak
across fork + exec):

* ``baseline``: importing torch and factorize and opening the checkpoint (what any run costs);
* ``stream``:   ``factorize.outofcore.weights_only.shrink_checkpoint`` (weights-only mode, streaming);
* ``load-all``: ``safetensors.torch.load_file`` of every shard at once, the naive approach, for comparison.

Target (issue 6): peak of ``stream`` <= 0.5 x checkpoint size + 300 MB. The temporary directory is deleted at the
end. Usage::

    python benchmarks/bench_memory.py [--blocks 3] [--rank 64] [--method randomized] \
        [--out benchmarks/results/memory.md]
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import platform
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import torch
from safetensors.torch import save_file

ROOT = Path(__file__).resolve().parents[1]
MB = 2**20
HIDDEN, FFN = 4096, 11008  # shapes of a 7B-class decoder layer (common practice)

CHILD = r"""
import json, sys, time
import torch
torch.set_num_threads(2)
mode, src, dst, method, rank = sys.argv[1:6]
t0 = time.perf_counter()
if mode == "baseline":
    import factorize, factorize.outofcore.weights_only
    from factorize.checkpoints.files import open_checkpoint
    open_checkpoint(src)
elif mode == "stream":
    from factorize.outofcore.weights_only import shrink_checkpoint
    rep = shrink_checkpoint(src, dst, rank=int(rank), method=method)
elif mode == "load-all":
    from safetensors.torch import load_file
    from factorize.checkpoints.files import open_checkpoint
    held = [load_file(str(h.path)) for h in open_checkpoint(src).files]
    total = sum(float(t.sum()) for shard in held for t in shard.values())  # touch every byte
seconds = time.perf_counter() - t0
# VmHWM: peak resident set of this process image (ru_maxrss would include the parent's peak, kept across exec)
hwm = next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith("VmHWM:"))
print(json.dumps({"mode": mode, "maxrss_kb": hwm, "seconds": seconds}))
"""


def generate(directory: Path, blocks: int) -> tuple[Path, int]:
    """One shard per block (q, k, v, o, gate, up, down + two norms); returns (index path, bytes on disk)."""
    gen = torch.Generator().manual_seed(0)
    names, weight_map = [], {}
    for b in range(blocks):
        shard = f"model-{b + 1:05d}-of-{blocks:05d}.safetensors"
        tensors = {}
        for proj in ("q", "k", "v", "o"):
            tensors[f"layers.{b}.attn.{proj}.weight"] = torch.randn(HIDDEN, HIDDEN, generator=gen) * 0.02
        tensors[f"layers.{b}.mlp.gate.weight"] = torch.randn(FFN, HIDDEN, generator=gen) * 0.02
        tensors[f"layers.{b}.mlp.up.weight"] = torch.randn(FFN, HIDDEN, generator=gen) * 0.02
        tensors[f"layers.{b}.mlp.down.weight"] = torch.randn(HIDDEN, FFN, generator=gen) * 0.02
        tensors[f"layers.{b}.norm1.weight"] = torch.ones(HIDDEN)
        tensors[f"layers.{b}.norm2.weight"] = torch.ones(HIDDEN)
        save_file(tensors, str(directory / shard))
        weight_map.update(dict.fromkeys(tensors, shard))
        names.append(shard)
        del tensors
    index = directory / "model.safetensors.index.json"
    index.write_text(json.dumps({"metadata": {}, "weight_map": weight_map}))
    return index, sum((directory / n).stat().st_size for n in names)


def run_child(mode: str, src: Path, dst: Path, method: str, rank: int) -> dict:
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    out = subprocess.run([sys.executable, "-c", CHILD, mode, str(src), str(dst), method, str(rank)],
                         capture_output=True, text=True, env=env, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--blocks", type=int, default=3, help="decoder blocks to generate (about 0.8 GB each)")
    ap.add_argument("--rank", type=int, default=64)
    ap.add_argument("--method", default="randomized", choices=["randomized", "exact"])
    ap.add_argument("--skip-load-all", action="store_true", help="skip the naive load-everything comparison")
    ap.add_argument("--out", type=Path, default=ROOT / "benchmarks" / "results" / "memory.md")
    args = ap.parse_args()
    torch.set_num_threads(2)
    work = Path(tempfile.mkdtemp(prefix="factorize-bench-memory-", dir="/tmp"))
    try:
        t0 = time.perf_counter()
        src = work / "src"
        src.mkdir()
        index, size = generate(src, args.blocks)
        gen_s = time.perf_counter() - t0
        rows = [run_child("baseline", index, work / "unused", args.method, args.rank)]
        rows.append(run_child("stream", index, work / "out", args.method, args.rank))
        out_size = sum(p.stat().st_size for p in (work / "out").iterdir())
        shutil.rmtree(work / "out")
        if not args.skip_load_all:
            rows.append(run_child("load-all", index, work / "unused", args.method, args.rank))
    finally:
        shutil.rmtree(work, ignore_errors=True)
    report(args, rows, size, out_size, gen_s)


def report(args, rows, size: int, out_size: int, gen_s: float) -> None:
    target = 0.5 * size + 300 * MB
    lines = [
        "# Peak memory: weights-only shrink vs checkpoint size",
        "",
        f"Date: {dt.date.today()}. Machine: 2-core shared CPU ({platform.machine()}, {os.cpu_count()} visible cores, "
        f"torch {torch.__version__}), other engineers' jobs running at the same time.",
        "",
        f"Checkpoint: {args.blocks} shard(s), float32, {args.blocks * 7} matrices ({HIDDEN}x{HIDDEN} and "
        f"{FFN}x{HIDDEN}/{HIDDEN}x{FFN}), {size / MB:.0f} MB on disk (generated in {gen_s:.0f} s). Shrink: "
        f"rank={args.rank}, method={args.method}; output {out_size / MB:.0f} MB.",
        "",
        "| job | peak RSS (MB) | peak / checkpoint size | wall time (s) |",
        "| --- | ---: | ---: | ---: |",
    ]
    for r in rows:
        rss = r["maxrss_kb"] * 1024
        lines.append(f"| {r['mode']} | {rss / MB:.0f} | {rss / size:.3f} | {r['seconds']:.1f} |")
    stream = next(r for r in rows if r["mode"] == "stream")["maxrss_kb"] * 1024
    verdict = "met" if stream <= target else "MISSED"
    lines += [
        "",
        f"Target: peak <= 0.5 x size + 300 MB = {target / MB:.0f} MB. Measured (stream): {stream / MB:.0f} MB "
        f"= {stream / size:.3f} x size -> target {verdict}.",
        "",
        "`baseline` is the cost of importing torch + factorize and reading the headers; `load-all` holds every "
        "tensor at once (safetensors.torch.load_file per shard), the naive way.",
        "",
        "Where the streaming peak comes from (measured separately on one 11008 x 4096 float32 tensor, 172 MB): the "
        "memory-mapped tensor's pages once touched (172 MB) plus a float64 copy of the whole matrix that "
        "`decompose` makes for ||W||_F^2 (344 MB), plus the sketches; the peak does not grow with the number of "
        "tensors or shards. Computing ||W||_F^2 block by block in decompose would remove the 344 MB.",
        "Wall times are on a machine shared with other jobs (load average about 8 on 2 cores during the run).",
        "",
        "Reproduce: `python benchmarks/bench_memory.py "
        f"--blocks {args.blocks} --rank {args.rank} --method {args.method}`",
        "",
    ]
    text = "\n".join(lines)
    print(text)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(text)


if __name__ == "__main__":
    main()
