"""The embedded default: a small MLP that reads 8x8 handwritten digits.

Data: the "Optical Recognition of Handwritten Digits" set, E. Alpaydin and C. Kaynak, UCI Machine Learning
Repository, 1998 (bundled with scikit-learn as ``sklearn.datasets.load_digits``). Licence: CC BY 4.0 as
published on the UCI site (from memory). Only the calibration and test splits ship with this package, as
``digits_data.safetensors``; the trained weights ship as ``digits_mlp.safetensors``. Both files are written
by ``scripts/train_default.py``.

Nothing here imports scikit-learn, so the installed package runs its demo without it.
"""

from __future__ import annotations

from pathlib import Path

import torch
from torch import nn

from factorize.errors import FactorizeError

WEIGHTS_FILE = Path(__file__).with_name("digits_mlp.safetensors")
DATA_FILE = Path(__file__).with_name("digits_data.safetensors")
SPLITS = ("calibration", "test")  # the splits shipped in DATA_FILE
PIXEL_MAX = 16.0  # the digits pixels are counts 0..16 (Alpaydin & Kaynak, UCI, 1998)


class DigitsMLP(nn.Module):
    """64 -> 512 -> 512 -> 256 -> 10 classifier with ReLU between its four ``nn.Linear`` layers.

    Input: float32 (B, 64), pixel values scaled to [0, 1]. Output: (B, 10) logits.
    """

    def __init__(self) -> None:
        super().__init__()
        self.fc1 = nn.Linear(64, 512)
        self.fc2 = nn.Linear(512, 512)
        self.fc3 = nn.Linear(512, 256)
        self.fc4 = nn.Linear(256, 10)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = torch.relu(self.fc1(x))  # (B, 512)
        x = torch.relu(self.fc2(x))  # (B, 512)
        x = torch.relu(self.fc3(x))  # (B, 256)
        return self.fc4(x)  # (B, 10)


def load_default() -> DigitsMLP:
    """Return the trained :class:`DigitsMLP` with the committed weights, in eval mode."""
    from safetensors.torch import load_file

    model = DigitsMLP()
    model.load_state_dict(load_file(_existing(WEIGHTS_FILE)), strict=True)
    return model.eval()


def load_digits_split(name: str) -> tuple[torch.Tensor, torch.Tensor]:
    """Return ``(inputs, labels)`` of a shipped split: float32 (N, 64) in [0, 1] and int64 (N,).

    ``name`` is ``"calibration"`` (256 samples drawn from the training part) or ``"test"`` (540 held-out
    samples never used in training).
    """
    if name not in SPLITS:
        raise FactorizeError(
            f"unknown digits split {name!r}; expected one of {', '.join(SPLITS)}",
            fix="pass name='calibration' or name='test'",
        )
    from safetensors.torch import load_file

    tensors = load_file(_existing(DATA_FILE))
    pixels = tensors[f"{name}.pixels"]  # (N, 64) uint8, 0..16
    labels = tensors[f"{name}.labels"]  # (N,) uint8, 0..9
    return pixels.to(torch.float32) / PIXEL_MAX, labels.to(torch.int64)


def _existing(path: Path) -> str:
    if not path.is_file():
        raise FactorizeError(
            f"the embedded default file {path} is missing",
            fix="reinstall factorize, or rebuild the file with `python scripts/train_default.py`",
        )
    return str(path)
