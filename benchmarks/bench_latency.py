"""End-to-end CPU latency of a 50%-parameter MLP-heavy model vs the dense original, side by side in one run.

Model: 4 residual MLP blocks, each Linear(1024 -> 4096) -> GELU -> Linear(4096 -> 1024) (the feed-forward shape
of a 1024-wide transformer); random weights (latency does not depend on the values). Compressed with
``budget=0.5`` (half the factorizable parameters, hence half the multiply-accumulates) and ranks rounded to a
multiple of 64. Forward passes of both models are timed interleaved (median of many), at batch 32 and batch 1.

    python benchmarks/bench_latency.py [--threads N] [--repeats N]
"""

from __future__ import annotations

import argparse

import torch
from torch import nn

import factorize
from factorize.measure.timing import paired_ms


class Block(nn.Module):
    def __init__(self, width: int) -> None:
        super().__init__()
        self.up = nn.Linear(width, 4 * width)
        self.down = nn.Linear(4 * width, width)

    def forward(self, x):
        return x + self.down(torch.nn.functional.gelu(self.up(x)))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--threads", type=int, default=None, help="torch threads (default: torch's choice)")
    ap.add_argument("--repeats", type=int, default=50)
    ap.add_argument("--width", type=int, default=1024)
    args = ap.parse_args()
    if args.threads:
        torch.set_num_threads(args.threads)
    torch.manual_seed(0)
    model = nn.Sequential(*[Block(args.width) for _ in range(4)]).eval()
    result = factorize.compress(model, budget=0.5, multiple=64)
    small = result.model.eval()
    macs_dense = sum(s.params for s in result.sites)
    macs_fact = sum(e["params_after"] for e in result.plan["sites"].values())
    ratio = macs_dense / macs_fact
    ranks = sorted({e["rank"] for e in result.plan["sites"].values()})
    print(f"torch {torch.__version__}, threads {torch.get_num_threads()}, ranks {ranks}")
    print(f"multiply-accumulate reduction: {ratio:.3f}x  (params kept {result.kept_fraction:.3f})")
    print("| batch | dense (ms) | factored (ms) | speed-up | share of MAC reduction |")
    print("| ---: | ---: | ---: | ---: | ---: |")
    for batch in (32, 1):
        x = torch.randn(batch, args.width)
        d, f = paired_ms(lambda: model(x), lambda: small(x), repeats=args.repeats, warmup=5)  # noqa: B023 - timed now
        print(f"| {batch} | {d:.3f} | {f:.3f} | {d / f:.2f}x | {(d / f) / ratio:.0%} |")


if __name__ == "__main__":
    main()
