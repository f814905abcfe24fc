"""Time per matrix of the budget pass's pieces, measured at growing widths and extrapolated to a 70B layout.

What a values-first budget pass spends per weight matrix W (m x n, m <= n after transposing):
the Gram matrix W W^T (2 m^2 n flops, a matrix product) and its eigenvalues (a symmetric tridiagonal reduction,
about (4/3) m^3 flops; Golub & Van Loan, Matrix Computations, 4th ed., sec. 8.3). The full SVD the naive path
calls is shown beside them up to the width where it stays affordable here.

Measured on ONE thread (torch.set_num_threads(1)), float32, best of --repeats runs. Extrapolation: each piece's
time is scaled from the widest measured size by its flop count (m^2 n for the product, m^3 for the eigenvalues),
which holds while the kernels stay compute-bound (common practice; cache effects make real large runs somewhat
faster per flop, so the figures are conservative).

Layouts (shapes from memory of the published Llama-family configurations): 1.1B (hidden 2048, MLP 5632,
22 layers, 4 of 32 heads for keys/values), 70B (hidden 8192, MLP 28672, 80 layers, 8 of 64 heads for keys/values).

    python benchmarks/bench_scale_primitives.py [--max-width 4096] [--repeats 2]
"""

from __future__ import annotations

import argparse
import time

import torch

LAYOUTS = {
    "1.1B": {"hidden": 2048, "mlp": 5632, "layers": 22, "kv": 256},
    "70B": {"hidden": 8192, "mlp": 28672, "layers": 80, "kv": 1024},
}


def best(fn, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return min(times)


def layer_matrices(layout: dict) -> list[tuple[int, int]]:
    h, f, kv = layout["hidden"], layout["mlp"], layout["kv"]
    return [(h, h), (kv, h), (kv, h), (h, h), (f, h), (f, h), (h, f)]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--max-width", type=int, default=4096)
    ap.add_argument("--svd-up-to", type=int, default=2048)
    ap.add_argument("--repeats", type=int, default=2)
    a = ap.parse_args()
    torch.set_num_threads(1)
    gen = torch.Generator().manual_seed(0)
    print("threads: 1 (torch.set_num_threads(1)); float32; best of", a.repeats)
    print(f"{'m':>6} {'n':>6} {'gram s':>8} {'eigvalsh s':>11} {'values s':>9} {'full SVD s':>11}")
    widths = [w for w in (512, 1024, 2048, 4096, 8192) if w <= a.max_width]
    last = {}
    for m in widths:
        n = 4 * m
        w = torch.randn(m, n, generator=gen)
        t_gram = best(lambda: w @ w.T, a.repeats)  # noqa: B023
        g = w @ w.T
        t_eig = best(lambda: torch.linalg.eigvalsh(g), a.repeats)  # noqa: B023
        sq = w[:, :m].contiguous()
        t_svd = best(lambda: torch.linalg.svd(sq, full_matrices=False), 1) if m <= a.svd_up_to else float("nan")  # noqa: B023
        print(f"{m:>6} {n:>6} {t_gram:>8.3f} {t_eig:>11.3f} {t_gram + t_eig:>9.3f} {t_svd:>11.3f}  (SVD of {m}x{m})")
        last = {"m": m, "n": n, "gram": t_gram, "eig": t_eig, "svd": t_svd, "svd_m": m}

    def values_time(rows: int, cols: int) -> float:
        m, n = min(rows, cols), max(rows, cols)
        return last["gram"] * (m * m * n) / (last["m"] ** 2 * last["n"]) + last["eig"] * (m / last["m"]) ** 3

    print(f"\nextrapolated from width {last['m']} by flop count, one thread:")
    for name, layout in LAYOUTS.items():
        per_layer = sum(values_time(r, c) for r, c in layer_matrices(layout))
        biggest = max(values_time(r, c) for r, c in layer_matrices(layout))
        total = per_layer * layout["layers"]
        print(f"  {name}: largest matrix {biggest:.1f} s; per block {per_layer:.1f} s; all {layout['layers']} blocks "
              f"{total / 3600:.2f} h on one thread ({total / 3600 / 64:.2f} h over 64 single-thread workers)")


if __name__ == "__main__":
    main()
