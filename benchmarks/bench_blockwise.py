"""Peak memory of the block-by-block calibrated shrink against its bound, and (small scales) against today's
in-memory calibrated ``compress()``.

The checkpoint is a Llama-shaped sharded bfloat16 checkpoint with decaying spectra from
``benchmarks/llama_checkpoint.py`` (generated into a temporary directory, or reused with ``--checkpoint DIR``).
Calibration: ``--sequences`` random token sequences of ``--length`` tokens (seeded; random tokens say nothing about
quality on real text, they exercise memory and time). Each job runs in its own subprocess so that its peak resident
set size (``VmHWM`` of /proc/self/status) is its own:

* ``baseline``:  importing torch, transformers and factorize and building the model on the meta device;
* ``blockwise``: ``factorize.shrink_blockwise`` (block by block; the report's in-call peak is printed too);
* ``in-memory``: ``LlamaForCausalLM.from_pretrained`` in float32 + ``factorize.compress(calibration=...)``
  (skipped at ``--scale 1b`` unless ``--in-memory`` is given: it holds the whole model and every statistic).

Bound (issue 15): peak <= 2 blocks + activations + 1 GB, with a block counted in float32 (its compute copy) and
the activations as all calibration tokens' hidden states in float32. Threads: ``--threads`` (default 1, so that
ratios are algorithmic on a shared machine). Usage::

    python benchmarks/bench_blockwise.py --scale tiny
    python benchmarks/bench_blockwise.py --scale mid --sequences 16 --length 128
    python benchmarks/bench_blockwise.py --scale 1b --sequences 16 --length 256 [--checkpoint DIR]

Other families: write the checkpoint with ``benchmarks/family_checkpoint.py`` and pass it with ``--checkpoint DIR
--scale 1b`` (``--scale 1b`` skips the Llama-only drift check and in-memory run)::

    python benchmarks/family_checkpoint.py /tmp/gpt2xl --family gpt2-xl
    python benchmarks/bench_blockwise.py --scale 1b --checkpoint /tmp/gpt2xl --sequences 16 --length 256
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

ROOT = Path(__file__).resolve().parents[1]
MB = 2**20

CHILD = r"""
import json, sys, time
t0 = time.perf_counter()
import torch
mode, src, dst, budget, seqs, length, threads = sys.argv[1:8]
torch.set_num_threads(int(threads))
cfg = json.load(open(src + "/config.json"))
g = torch.Generator().manual_seed(0)
ids = torch.randint(0, cfg["vocab_size"], (int(seqs), int(length)), generator=g)
batches = list(ids.split(4))
out = {}
if mode == "baseline":
    import transformers, factorize
    from factorize.outofcore.architecture import architecture
    architecture(src)
elif mode == "blockwise":
    import factorize
    done = factorize.shrink_blockwise(src, dst, budget=float(budget), calibration=batches, threads=int(threads))
    out = {k: getattr(done, k) for k in ("peak_rss_bytes", "peak_reset", "block_bytes", "activation_bytes",
                                "bound_bytes", "bound_met", "kept_fraction", "bytes_after", "tokens")}
    out["seconds_call"] = done.seconds
    out["peak_before_drift"] = next(int(l.split()[1]) for l in open("/proc/self/status")
                                    if l.startswith("VmHWM:")) * 1024
    if int(sys.argv[8]):  # logits drift on held-out random tokens (needs the whole model: small scales only)
        import transformers
        ref = transformers.LlamaForCausalLM.from_pretrained(src, dtype=torch.float32).eval()
        new = factorize.load_directory(dst).float()
        held = torch.randint(0, cfg["vocab_size"], (4, int(length)), generator=g)
        with torch.no_grad():
            a, b = ref(held).logits, new(held).logits
        out["drift"] = float((b - a).norm() / a.norm())
elif mode == "in-memory":
    import transformers, factorize
    model = transformers.LlamaForCausalLM.from_pretrained(src, dtype=torch.float32).eval()
    res = factorize.compress(model, budget=float(budget), calibration=batches, include=["model.layers.*"],
                             sensitivity="none")
    out = {"kept_fraction": factorize.plan_summary(res.plan)["kept_fraction"]}
seconds = time.perf_counter() - t0
hwm = next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith("VmHWM:"))
out.setdefault("peak_before_drift", hwm * 1024)  # the job's peak (blockwise: before the drift check loads models)
print(json.dumps({"mode": mode, "peak_bytes": out["peak_before_drift"], "seconds": seconds, **out}))
"""


def run_child(mode: str, src: Path, dst: Path, a, drift: bool = False) -> dict:
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    cmd = [sys.executable, "-c", CHILD, mode, str(src), str(dst), str(a.budget), str(a.sequences), str(a.length),
           str(a.threads), str(int(drift))]
    done = subprocess.run(cmd, capture_output=True, text=True, env=env, check=False)
    if done.returncode != 0:
        raise SystemExit(f"{mode} failed:\n{done.stderr[-3000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def _label(a, src: Path) -> str:
    """The checkpoint's family and size for the report: the scale of a generated Llama, or what a given checkpoint's
    config says (``--checkpoint`` from llama_checkpoint.py or family_checkpoint.py)."""
    if not a.checkpoint:
        return f"scale {a.scale}"
    cfg = json.loads((src / "config.json").read_text())
    blocks = cfg.get("num_hidden_layers", cfg.get("n_layer"))
    return f"{cfg.get('model_type')} ({cfg.get('architectures', ['?'])[0]}, {blocks} blocks) from {a.checkpoint}"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scale", choices=("tiny", "mid", "1b"), default="tiny")
    ap.add_argument("--checkpoint", help="reuse this checkpoint directory instead of generating one")
    ap.add_argument("--shard-mb", type=float, default=None, help="shard size when generating (default: scale's)")
    ap.add_argument("--sequences", type=int, default=16)
    ap.add_argument("--length", type=int, default=128)
    ap.add_argument("--budget", type=float, default=0.5)
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--in-memory", action="store_true", help="also run the in-memory compress at --scale 1b")
    ap.add_argument("--out", help="write the Markdown table here")
    a = ap.parse_args()
    sys.path.insert(0, str(ROOT / "benchmarks"))
    from llama_checkpoint import write_llama_checkpoint

    tmp = Path(tempfile.mkdtemp(prefix="bench-blockwise-", dir="/tmp"))
    try:
        if a.checkpoint:
            src = Path(a.checkpoint)
            gen_s = 0.0
        else:
            shard = a.shard_mb if a.shard_mb is not None else {"tiny": 0.1, "mid": 60, "1b": 500}[a.scale]
            t = time.perf_counter()
            src = write_llama_checkpoint(tmp / "src", scale=a.scale, shard_mb=shard)
            gen_s = time.perf_counter() - t
        size = sum(p.stat().st_size for p in src.glob("*.safetensors"))
        shards = len(list(src.glob("*.safetensors")))
        small = a.scale != "1b"
        rows = [run_child("baseline", src, tmp / "x", a)]
        rows.append(run_child("blockwise", src, tmp / "blockwise", a, drift=small))
        if small or a.in_memory:
            rows.append(run_child("in-memory", src, tmp / "y", a))
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    bw = rows[1]
    bound = bw["bound_bytes"]
    lines = [
        "# Block-by-block calibrated shrink: peak memory",
        "",
        (f"Date: {dt.date.today()}. Machine: {platform.machine()}, {os.cpu_count()} visible cores, torch threads "
        f"{a.threads}; shared with other jobs."),
        "",
        (f"Checkpoint: {_label(a, src)}, {size / MB:.0f} MB bfloat16 on disk in {shards} shard(s) "
         f"(generated in {gen_s:.0f} s). Calibration: {a.sequences} random sequences x {a.length} tokens; "
        f"budget {a.budget}."),
        "",
        "| job | peak RSS (MB) | wall time incl. imports (s) | kept fraction | logits drift |",
        "| --- | ---: | ---: | ---: | ---: |",
    ]
    for r in rows:
        kept = f"{r['kept_fraction']:.3f}" if "kept_fraction" in r else "-"
        drift = f"{r['drift']:.4f}" if "drift" in r else "-"
        lines.append(f"| {r['mode']} | {r['peak_bytes'] / MB:.0f} | {r['seconds']:.1f} | {kept} | {drift} |")
    lines += [
        "",
        (f"Block (float32 compute copy): {bw['block_bytes'] / MB:.1f} MB; activations (all {bw['tokens']} tokens' "
        f"hidden states, float32): {bw['activation_bytes'] / MB:.1f} MB; in-call peak of the blockwise run (VmHWM "
        f"reset at the call's start: {bw['peak_reset']}): {bw['peak_rss_bytes'] / MB:.0f} MB; the call took "
        f"{bw['seconds_call']:.1f} s. The blockwise peak above is measured before the drift check (which loads "
        "the original and the shrunk model whole)."),
        (f"Bound 2 blocks + activations + 1 GB = {bound / MB:.0f} MB. Measured process peak {bw['peak_bytes'] / MB:.0f}"
        f" MB -> {'met' if bw['peak_bytes'] <= bound else 'MISSED'} (in-call peak: "
        f"{'met' if bw['peak_rss_bytes'] <= bound else 'MISSED'})."),
    ]
    if len(rows) > 2:
        lines.append(f"In-memory compress / blockwise peak: {rows[2]['peak_bytes'] / bw['peak_bytes']:.2f}x.")
    lines += ["", ("Drift is on random held-out tokens of a random-weight model: no guarantee of behaviour on other "
              "inputs; safety-relevant uses need re-validation."), "",
              "Reproduce: `python benchmarks/bench_blockwise.py " + " ".join(sys.argv[1:]) + "`"]
    text = "\n".join(lines)
    print(text)
    if a.out:
        Path(a.out).write_text(text + "\n")


if __name__ == "__main__":
    main()
