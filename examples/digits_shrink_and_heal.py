"""Shrink the embedded digits classifier to a parameter budget, heal it, and report test accuracy.

What it shows:
  * ``factorize.compress(model, budget=...)`` on a trained classifier (the embedded default, a 64-512-512-256-10
    MLP trained on the handwritten digits of Alpaydin & Kaynak, UCI 1998, as bundled with scikit-learn);
  * ``factorize.heal(compressed, original, data, heldout=..., steps=...)``: distillation on unlabelled sample
    inputs, with held-out drift checks and the best state kept;
  * accuracy before compression, after compression and after healing, always on the test split, which neither
    training nor healing ever sees (healing uses the calibration split: 192 samples to train, 64 held out).

Run:  python examples/digits_shrink_and_heal.py [--budget 0.1] [--steps 300]
Set FACTORIZE_SMOKE=1 for a few steps only (what CI runs).

Accuracy on these samples is no guarantee of behaviour on other inputs; re-validate a compressed model before
using it anywhere safety-relevant.
"""

from __future__ import annotations

import argparse
import os

import torch

import factorize
from factorize.default import load_default, load_digits_split

SMOKE = os.environ.get("FACTORIZE_SMOKE") == "1"


def accuracy(model: torch.nn.Module, x: torch.Tensor, y: torch.Tensor) -> float:
    with torch.no_grad():
        return (model(x).argmax(dim=1) == y).float().mean().item()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--budget", type=float, default=0.1, help="fraction of the linear parameters to keep")
    parser.add_argument("--steps", type=int, default=5 if SMOKE else 300, help="healing steps")
    args = parser.parse_args()

    original = load_default()
    x_cal, _ = load_digits_split("calibration")  # (256, 64); labels are not needed for healing
    x_test, y_test = load_digits_split("test")  # (540, 64), held out from everything below

    result = factorize.compress(original, budget=args.budget)
    compressed = result.model
    print(f"parameters: {result.params_before:,} -> {result.params_after:,} ({result.kept_fraction:.1%} of the model)")
    before = accuracy(compressed, x_test, y_test)

    healed = factorize.heal(
        compressed, original, list(x_cal[:192].split(32)), heldout=[x_cal[192:]], steps=args.steps,
        progress=not SMOKE,
    )
    print(f"healing: {healed.steps_run} steps in {healed.seconds:.1f} s, kept step {healed.best_step}; {healed.reason}")
    print(f"held-out drift (relative L2 of the logits): {healed.initial_drift:.4f} -> {healed.best_drift:.4f}")
    print(f"test accuracy  original {accuracy(original, x_test, y_test):.2%}  compressed {before:.2%}  "
          f"healed {accuracy(compressed, x_test, y_test):.2%}  ({len(y_test)} held-out samples)")


if __name__ == "__main__":
    main()
