"""Progressive compression inside a plain PyTorch training loop, then save the compressed model with its plan.

What it shows:
  * ``factorize.ProgressiveSchedule(budgets=[0.8, 0.5, 0.3], epochs=[3, 5, 7])``: at each of those epochs the model is
    compressed in place to the next, lower budget (a fraction of its original linear parameters) and a new
    optimizer of the same type and settings comes back; the epochs in between are the recovery, which is just
    the ordinary loop going on;
  * the loss and the test accuracy per epoch, so you can see each step's cost and the recovery after it;
  * ``factorize.checkpoints.files.save(model, path, plan=schedule.plan)`` at the end (see load_for_inference.py for
    loading).

The model is a fresh DigitsMLP trained from scratch on the 256-sample calibration split of the embedded digits
data (Alpaydin & Kaynak, UCI 1998); the 540-sample test split is only used to report accuracy. A small training
set keeps the example fast; it is a demonstration of the mechanics, not of the best accuracy reachable.

Run:  python examples/progressive_training.py
Set FACTORIZE_SMOKE=1 for a few epochs and steps only (what CI runs).
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

import torch
import torch.nn.functional as F

import factorize
from factorize.default import DigitsMLP, load_digits_split
from factorize.model.count import count_parameters

SMOKE = os.environ.get("FACTORIZE_SMOKE") == "1"
EPOCHS = 4 if SMOKE else 10
BATCH = 32


def accuracy(model: torch.nn.Module, x: torch.Tensor, y: torch.Tensor) -> float:
    with torch.no_grad():
        return (model(x).argmax(dim=1) == y).float().mean().item()


def train_one_epoch(model, optimizer, x, y, generator) -> float:
    model.train()
    total = 0.0
    batches = torch.randperm(len(y), generator=generator).split(BATCH)
    for idx in batches[:2] if SMOKE else batches:
        optimizer.zero_grad()
        loss = F.cross_entropy(model(x[idx]), y[idx])
        loss.backward()
        optimizer.step()
        total += loss.item()
    model.eval()
    return total / len(batches[:2] if SMOKE else batches)


def main() -> None:
    torch.manual_seed(0)
    generator = torch.Generator().manual_seed(0)
    x_train, y_train = load_digits_split("calibration")
    x_test, y_test = load_digits_split("test")
    model = DigitsMLP()
    optimizer = torch.optim.Adam(model.parameters(), lr=1e-3)
    schedule = factorize.ProgressiveSchedule(budgets=[0.8, 0.5, 0.3], epochs=[1, 2, 3] if SMOKE else [3, 5, 7])

    for epoch in range(EPOCHS):
        optimizer = schedule.step(epoch, model, optimizer)  # compresses at the scheduled epochs
        if schedule.history and schedule.history[-1]["epoch"] == epoch:
            step = schedule.history[-1]
            print(f"epoch {epoch}: compressed to budget {step['budget']:.0%}, ranks {step['ranks']}")
        loss = train_one_epoch(model, optimizer, x_train, y_train, generator)
        print(f"epoch {epoch}: loss {loss:.4f}  test accuracy {accuracy(model, x_test, y_test):.2%}  "
              f"parameters {count_parameters(model):,}")

    with tempfile.TemporaryDirectory() as tmp:
        path = factorize.save(model, Path(tmp) / "digits_progressive.safetensors", plan=schedule.plan)
        print(f"saved {path.name}: {path.stat().st_size:,} bytes with the plan in its metadata")


if __name__ == "__main__":
    main()
