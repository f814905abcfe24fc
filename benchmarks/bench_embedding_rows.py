"""Peak resident memory of the block-by-block shrink's embedding stage, whole token embedding against only the
calibration's rows.

Writes (once, into ``--ckpt``) a random Gemma-layout checkpoint from transformers' own class with a 262,144-token
vocabulary at hidden 1024 and one block (the table is 512 MiB in bfloat16, 1 GiB in float32; everything else is
small), then builds the embedding stage (:class:`factorize.outofcore.stem.Stem`) and runs it on 8 x 128 random
token ids, in a fresh subprocess per run whose peak is read from the OS (``ru_maxrss``), variants interleaved
run by run (whole, rows, whole, rows, ...):

* ``whole``: ``Stem(arch)``, the whole table materialised in float32 (what the stage did before);
* ``rows``: ``Stem(arch, token_ids)``, only the distinct ids' rows (what ``shrink_blockwise`` does now).

One torch thread.

    flock /work/bench.lock python benchmarks/bench_embedding_rows.py [--runs 2] [--ckpt /tmp/factorize-emb-ckpt]
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

CHILD = r"""
import resource, sys, time, torch
torch.set_num_threads(1)
from factorize.outofcore.architecture import check_source
from factorize.outofcore.stem import Stem
from pathlib import Path
arch = check_source(Path(sys.argv[1]))
ids = torch.randint(0, arch.config.vocab_size, (8, 128), generator=torch.Generator().manual_seed(0))
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
t = time.perf_counter()
stem = Stem(arch, ids if sys.argv[2] == "rows" else None)
h, _ = stem.run(ids, None)
print(before / 1024, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, time.perf_counter() - t,
      stem.model.get_input_embeddings().weight.shape[0], float(h.double().abs().sum()))
"""


def write_checkpoint(directory: Path) -> None:
    import torch
    import transformers

    config = transformers.GemmaConfig(vocab_size=262144, hidden_size=1024, intermediate_size=64, num_hidden_layers=1,
                                      num_attention_heads=4, num_key_value_heads=1, head_dim=16,
                                      max_position_embeddings=256)
    torch.manual_seed(0)
    transformers.GemmaForCausalLM(config).to(torch.bfloat16).save_pretrained(directory, safe_serialization=True)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=2)
    ap.add_argument("--ckpt", default="/tmp/factorize-emb-ckpt")
    args = ap.parse_args()
    ckpt = Path(args.ckpt)
    if not (ckpt / "config.json").exists():
        write_checkpoint(ckpt)
    env = dict(os.environ, PYTHONPATH=str(ROOT), OMP_NUM_THREADS="1")
    print(f"checkpoint {ckpt}: {sum(f.stat().st_size for f in ckpt.glob('*.safetensors')) / 2**20:.0f} MiB; "
          "one torch thread; peak RSS from ru_maxrss")
    print("variant  run  before MiB  peak MiB  stem MiB  seconds  table rows  checksum")
    for run in range(args.runs):
        for variant in ("whole", "rows"):
            out = subprocess.run([sys.executable, "-c", CHILD, str(ckpt), variant], env=env, check=True,
                                 capture_output=True, text=True).stdout.split()
            before, peak, sec, rows, checksum = float(out[0]), float(out[1]), float(out[2]), int(out[3]), out[4]
            print(f"{variant:7s}  {run:3d}  {before:10.0f}  {peak:8.0f}  {peak - before:8.0f}  {sec:7.2f}  "
                  f"{rows:10d}  {checksum}")


if __name__ == "__main__":
    main()
