"""Load a compressed checkpoint for inference in a fresh process.

What it shows:
  * ``factorize.checkpoints.files.save(model, path, plan=result.plan)`` writes one safetensors file holding the
    compressed weights and, in its metadata, the plan (which layers are factored, at which rank);
  * a new Python process that never saw the compressed model builds a plain, fresh ``DigitsMLP`` and calls
    ``factorize.checkpoints.files.load(model, path)``: the factored structure is rebuilt from the plan and the weights
    are loaded; no pickle, no original model needed;
  * the outputs of the reloaded model match the in-memory compressed model exactly, and its test accuracy is
    printed.

Run:  python examples/load_for_inference.py
(FACTORIZE_SMOKE=1 changes nothing here; the example is already small.)
"""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
from pathlib import Path

import torch

import factorize
from factorize.default import load_default, load_digits_split
from factorize.plan.entries import factored_ranks

REPO = Path(__file__).resolve().parents[1]


def child(checkpoint: str, outputs: str) -> None:
    """Runs in the fresh process: load the checkpoint into a new architecture and predict."""
    from factorize.default import DigitsMLP

    model = factorize.load(DigitsMLP(), checkpoint).eval()
    x_test, y_test = load_digits_split("test")
    with torch.no_grad():
        logits = model(x_test)  # (540, 10)
    torch.save(logits, outputs)
    plan = factorize.read_plan(checkpoint)
    ranks = factored_ranks(plan)
    accuracy = (logits.argmax(dim=1) == y_test).float().mean().item()
    print(f"[fresh process] loaded {Path(checkpoint).name}: factored ranks {ranks}; test accuracy {accuracy:.2%}")


def main() -> None:
    result = factorize.compress(load_default(), budget=0.3)
    x_test, _ = load_digits_split("test")
    with tempfile.TemporaryDirectory() as tmp:
        checkpoint = Path(tmp) / "digits_30.safetensors"
        outputs = Path(tmp) / "logits.pt"
        factorize.save(result.model, checkpoint, plan=result.plan)
        print(f"saved {checkpoint.name} ({checkpoint.stat().st_size:,} bytes, "
              f"{result.params_after:,} of {result.params_before:,} parameters)")
        env = {**os.environ, "PYTHONPATH": os.pathsep.join(filter(None, [str(REPO), os.environ.get("PYTHONPATH")]))}
        subprocess.run([sys.executable, __file__, "--child", str(checkpoint), str(outputs)], check=True, env=env)
        reloaded = torch.load(outputs)
    with torch.no_grad():
        expected = result.model(x_test)
    same = torch.equal(reloaded, expected)
    print(f"outputs of the reloaded model {'match' if same else 'DO NOT match'} the compressed model exactly")
    if not same:
        sys.exit(1)


if __name__ == "__main__":
    if len(sys.argv) == 4 and sys.argv[1] == "--child":
        child(sys.argv[2], sys.argv[3])
    else:
        main()
