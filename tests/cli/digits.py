"""The digits splits as safetensors files, for command-line tests (scikit-learn's digits, Alpaydin & Kaynak, UCI)."""

from __future__ import annotations

from pathlib import Path

from safetensors.torch import save_file

from factorize.default import load_digits_split


def write_digits_splits(d: Path) -> Path:
    """``calibration.safetensors`` and ``test.safetensors`` (inputs and labels) in ``d``; returns ``d``."""
    for split in ("calibration", "test"):
        x, y = load_digits_split(split)
        save_file({"inputs": x.contiguous(), "labels": y.contiguous()}, str(d / f"{split}.safetensors"))
    return d
