"""A group's input statistics summed over the slices of the block-by-block shrink, and saved for its factor tasks.

Each slice task (:func:`factorize.outofcore.block_tasks.block_slice_task`) writes the partial sums of its own
hidden states; the sums are added in slice order (the order fixes the bytes), a block of rows or values at a time so
no second copy of a moment is held.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from pathlib import Path

import torch
from safetensors import safe_open

from factorize.calibrated.stats import InputStats
from factorize.outofcore.block_tasks import packed_upper, save_work_file, unpacked_upper

SUM_ROWS = 256  # rows of a partial moment added at a time when summing the slices
SUM_VALUES = 1 << 20  # values of a packed partial moment (or of a vector) added at a time
MOMENT_PARTS = ("moment", "total", "abs_total")
PAIR_PARTS = (*MOMENT_PARTS, "reference_moment", "reference_total", "cross")  # the sequential refit's


def summed_slices(leader: str, files: Sequence[str], batches: int,
            parts: tuple[str, ...] = MOMENT_PARTS) -> tuple[InputStats, torch.Tensor | None]:
    """One group's statistics summed over the slices, in slice order (the order fixes the bytes), and the summed
    moment's upper triangle when every slice stored its own (:func:`packed_upper`): the triangles are summed as
    they are, the same additions as on the whole matrices, and unpacked once."""
    acc: dict[str, torch.Tensor] = {}
    count = 0
    rel = _relative(leader)
    for path in files:
        with safe_open(path, framework="pt", device="cpu") as f:
            count += int(json.loads(f.metadata()["counts"])[rel])
            for part in parts:
                key = f"{rel}.{part}"
                if part == "moment" and f"{key}.upper" in f.keys():  # noqa: SIM118 - a safe_open handle
                    part, key = "moment.upper", f"{key}.upper"
                    if "moment" in acc:  # an earlier slice stored its moment whole (not exactly symmetric)
                        acc["moment"] += unpacked_upper(f.get_tensor(key), int(acc["moment"].shape[0]))
                        continue
                elif part == "moment" and "moment.upper" in acc:
                    width = int(f.get_slice(key).get_shape()[0])
                    acc["moment"] = unpacked_upper(acc.pop("moment.upper"), width)
                if part not in acc:
                    acc[part] = f.get_tensor(key)
                    continue
                rows = f.get_slice(key)
                n = int(acc[part].shape[0])
                step = SUM_ROWS if acc[part].dim() > 1 else SUM_VALUES
                for lo in range(0, n, step):  # row blocks, or blocks of values: no second copy in memory
                    acc[part][lo:lo + step] += rows[lo:lo + step]
    upper = acc.pop("moment.upper", None)
    n = int(acc["total"].shape[0])
    moment = unpacked_upper(upper, n) if upper is not None else acc["moment"]
    st = InputStats(leader, "linear", n, count=count, second_moment=moment, total=acc["total"],
                    abs_total=acc["abs_total"], batches=batches)
    if "cross" in acc:
        st.cross, st.reference_moment, st.reference_total = acc["cross"], acc["reference_moment"], \
            acc["reference_total"]
    return st, upper


def save_stats(st: InputStats, path: Path, upper: torch.Tensor | None = None) -> None:
    """A group's summed statistics for the factor tasks (:func:`factorize.outofcore.block_tasks.read_stats`)."""
    if upper is None:
        upper = packed_upper(st.second_moment)  # C = X^T X summed in slice order: symmetric, half the bytes suffice
    tensors = {"moment" if upper is None else "moment.upper": st.second_moment if upper is None else upper,
               "total": st.total, "abs_total": st.abs_total}
    if st.cross is not None:
        tensors.update(cross=st.cross, reference_moment=st.reference_moment, reference_total=st.reference_total)
    save_work_file(tensors, str(path), {"count": str(st.count), "batches": str(st.batches)})


def _relative(name: str) -> str:
    """``model.layers.3.self_attn.q_proj`` -> ``self_attn.q_proj`` (the name inside the block)."""
    parts = name.split(".")
    for k, p in enumerate(parts):
        if p.isdigit():
            return ".".join(parts[k + 1:])
    return name
