"""Train the embedded default (factorize/default) and write its two safetensors files.

Data: scikit-learn's bundled 8x8 handwritten digits (Alpaydin & Kaynak, "Optical Recognition of Handwritten
Digits", UCI Machine Learning Repository, 1998), 1797 samples. They are shuffled with a fixed seed; 540 are held
out as the test split and never used in training; the other 1257 train the model, and the first 256 of those
form the calibration split. Only the calibration and test splits are shipped; the training part is rebuilt
from scikit-learn here.

Run from the repository root: ``python scripts/train_default.py`` (CPU, well under a minute).
"""

from __future__ import annotations

import os
import sys
import tempfile
from pathlib import Path

import numpy as np
import torch
from safetensors.torch import save_file
from sklearn.datasets import load_digits
from torch import nn

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from factorize.default.digits import DATA_FILE, PIXEL_MAX, WEIGHTS_FILE, DigitsMLP

SPLIT_SEED = 20240611  # fixes the shuffle that decides the splits
TORCH_SEED = 0  # fixes initial weights and batch order
N_TEST = 540
N_CALIBRATION = 256
EPOCHS = 40
BATCH = 64
LR = 1e-3
WEIGHT_DECAY = 1e-4  # plain L2 via Adam's weight_decay; nothing that pushes weights towards low rank


def split_digits() -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Return uint8 (pixels (N, 64), labels (N,)) for the train, calibration and test splits."""
    pixels, labels = load_digits(return_X_y=True)  # (1797, 64) floats 0..16, (1797,)
    pixels, labels = pixels.astype(np.uint8), labels.astype(np.uint8)
    order = np.random.default_rng(SPLIT_SEED).permutation(len(labels))
    test, train = order[:N_TEST], order[N_TEST:]
    calibration = train[:N_CALIBRATION]
    return {name: (pixels[idx], labels[idx]) for name, idx in
            (("train", train), ("calibration", calibration), ("test", test))}


def _as_tensors(pixels: np.ndarray, labels: np.ndarray) -> tuple[torch.Tensor, torch.Tensor]:
    return torch.from_numpy(pixels).float() / PIXEL_MAX, torch.from_numpy(labels).long()


def train(x: torch.Tensor, y: torch.Tensor) -> DigitsMLP:
    """Adam on cross-entropy, shuffled mini-batches, fixed seed."""
    torch.manual_seed(TORCH_SEED)
    model = DigitsMLP()
    opt = torch.optim.Adam(model.parameters(), lr=LR, weight_decay=WEIGHT_DECAY)
    loss_fn = nn.CrossEntropyLoss()
    model.train()
    for _ in range(EPOCHS):
        for idx in torch.randperm(len(y)).split(BATCH):
            opt.zero_grad()
            loss_fn(model(x[idx]), y[idx]).backward()
            opt.step()
    return model.eval()


@torch.no_grad()
def accuracy(model: nn.Module, x: torch.Tensor, y: torch.Tensor) -> float:
    return (model(x).argmax(dim=1) == y).float().mean().item()


def save_atomically(tensors: dict[str, torch.Tensor], path: Path, about: str) -> None:
    """Write to a temporary file in the same folder, then rename it over ``path``.

    The metadata holds a single key: safetensors writes several keys in no fixed order, which would make
    two runs' files differ byte for byte.
    """
    metadata = {"about": about}
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    os.close(fd)
    try:
        save_file(tensors, tmp, metadata=metadata)
        os.chmod(tmp, 0o644)  # mkstemp makes the file private; the package files are meant to be readable
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def main() -> None:
    torch.use_deterministic_algorithms(True)
    splits = split_digits()
    x_train, y_train = _as_tensors(*splits["train"])
    x_test, y_test = _as_tensors(*splits["test"])
    model = train(x_train, y_train)
    source = "Alpaydin & Kaynak, Optical Recognition of Handwritten Digits, UCI 1998 (sklearn load_digits)"
    data = {}
    for name in ("calibration", "test"):
        pixels, labels = splits[name]
        data[f"{name}.pixels"] = torch.from_numpy(pixels).contiguous()
        data[f"{name}.labels"] = torch.from_numpy(labels).contiguous()
    save_atomically(data, DATA_FILE, f"{source}; split seed {SPLIT_SEED}; pixels are counts 0..16, divide by 16")
    weights = {k: v.detach().contiguous() for k, v in model.state_dict().items()}
    save_atomically(weights, WEIGHTS_FILE, f"DigitsMLP trained by scripts/train_default.py on {source}")
    print(f"train accuracy {accuracy(model, x_train, y_train):.4f} on {len(y_train)} samples")
    print(f"test accuracy  {accuracy(model, x_test, y_test):.4f} on {len(y_test)} held-out samples")
    print(f"wrote {WEIGHTS_FILE} and {DATA_FILE}")


if __name__ == "__main__":
    main()
