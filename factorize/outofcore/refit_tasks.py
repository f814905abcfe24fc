"""The sequential refit's tasks, block by block (module level, picklable items; files in the work directory).

With ``sequential=True`` each block is refitted to what the already compressed blocks upstream feed it, as the
in-memory :func:`factorize.calibrated.sequential.compress_sequential` does layer by layer. Two streams of hidden
states travel from block to block: the *reference* (the original model's) and the *current* (the compressed
model's so far). For one group of projections sharing an input (q/k/v, gate/up, ...) of block i,
:func:`pair_task` runs one slice through the original block on the reference stream and through the partly
compressed block (the groups before it already replaced by their refitted factors) on the current stream, and
accumulates the pair statistics the refit needs: C = sum x x^T of the current inputs, C_ref = sum x_ref x_ref^T
and the cross moment sum x_ref x^T, row by row on the same positions (padded positions left out); each forward
stops once the group's input was seen. The factors then come from
:func:`factorize.calibrated.aware.decompose_aware` (reduced-rank regression of the original layer's outputs on
the current inputs, Izenman 1975) through :func:`factorize.outofcore.block_tasks.factor_task`. Once every group of
the block is refitted, the same task with ``group=""`` advances both streams to block i + 1.
"""

from __future__ import annotations

import contextlib
import copy
import json
from dataclasses import dataclass

import torch
from safetensors import safe_open

from factorize.calibrated.stats import ROW_CHUNK, InputStats, accumulate, check_finite, input_rows
from factorize.model.hooks import forward_pre_hooks
from factorize.outofcore.architecture import architecture, kind_of, materialise_block
from factorize.outofcore.block_tasks import run_block, save_work_file
from factorize.outofcore.stem import decode_extras
from factorize.rewrite.layers import factor_module
from factorize.threads import torch_threads


@dataclass(frozen=True)
class PairTask:
    """One slice through block ``block``, original and partly compressed: pair statistics of one group, or (with
    ``group == ""``) both streams' outputs for the next block."""

    source: str
    block: int
    piece: int
    reference: str  # hidden states entering the original block (the original model's)
    current: str  # hidden states entering the compressed block (the compressed model's so far)
    extras: str  # the blocks' extra inputs for this slice
    factors: tuple[tuple[str, str], ...]  # (qualified projection, factor file) already refitted in this block
    group: str  # qualified name of the group's leader whose pair statistics are collected; "" to advance
    stats: str  # where the pair statistics go (group) or ""
    outputs: tuple[str, str]  # (reference out, current out) when advancing, else ("", "")
    threads: int


class _Seen(Exception):
    """Raised by the group's hook once its input was captured: the rest of the block need not run."""


def pair_task(task: PairTask) -> dict:
    """Pair statistics of one group of one slice (or both streams advanced by one block); see the module doc."""
    with torch_threads(task.threads):
        return _pair(task)


def compressed_block(task: PairTask, original: torch.nn.Module) -> torch.nn.Module:
    """A copy of the original block with the refitted projections replaced by factored layers (the factors as the
    output will store them, computed in float32)."""
    arch = architecture(task.source)
    current = copy.deepcopy(original)
    prefix = f"{arch.prefix}.{task.block}."
    for name, path in task.factors:
        rel = name[len(prefix):]
        with safe_open(path, framework="pt", device="cpu") as f:
            A, B = f.get_tensor("first").float(), f.get_tensor("second").float()
        current.set_submodule(rel, factor_module(current.get_submodule(rel), kind_of(arch, name), B, A))
    return current.eval()


@torch.no_grad()
def _pair(task: PairTask) -> dict:
    arch = architecture(task.source)
    original = materialise_block(arch, task.block)
    current = compressed_block(task, original)
    out_ref: dict[str, torch.Tensor] = {}
    out_cur: dict[str, torch.Tensor] = {}
    rel = task.group[len(f"{arch.prefix}.{task.block}."):] if task.group else ""
    kind = kind_of(arch, task.group) if task.group else "linear"
    stats = InputStats(rel, kind, 0)
    ref = InputStats(rel, kind, 0)
    seen: dict[str, torch.Tensor] = {}

    def hook_for(side: str):
        def hook(module, args, kwargs):
            x = args[0] if args else next(iter(kwargs.values()))
            seen[side] = input_rows(module, kind, x.detach(), seen.get("mask"))
            raise _Seen

        return hook

    with safe_open(task.reference, framework="pt", device="cpu") as fr, \
            safe_open(task.current, framework="pt", device="cpu") as fc, \
            safe_open(task.extras, framework="pt", device="cpu") as fx:
        described = json.loads(fx.metadata()["extras"])
        stored = set(fr.keys())
        for k in sorted({key.split(".", 1)[1] for key in stored}, key=int):
            m = fr.get_tensor(f"m.{k}") if f"m.{k}" in stored else None
            args, kwargs = decode_extras(described[k], task.block, fx)
            h_ref, h_cur = fr.get_tensor(f"h.{k}"), fc.get_tensor(f"h.{k}")
            if not task.group:
                out_ref[f"h.{k}"] = run_block(original, h_ref, args, kwargs)
                out_cur[f"h.{k}"] = run_block(current, h_cur, args, kwargs)
                if m is not None:
                    out_ref[f"m.{k}"] = out_cur[f"m.{k}"] = m
                continue
            seen.clear()
            seen["mask"] = m
            for block, h, side in ((original, h_ref, "ref"), (current, h_cur, "cur")):
                with forward_pre_hooks(block, {rel: hook_for(side)}, with_kwargs=True), contextlib.suppress(_Seen):
                    run_block(block, h, args, kwargs)
            check_finite(seen["cur"], task.group, int(k))
            _accumulate_pair(stats, ref, seen["ref"], seen["cur"])
    if not task.group:
        save_work_file(out_ref, task.outputs[0])
        save_work_file(out_cur, task.outputs[1])
        return {}
    tensors = {f"{rel}.moment": stats.second_moment, f"{rel}.total": stats.total,
               f"{rel}.abs_total": stats.abs_total, f"{rel}.reference_moment": ref.second_moment,
               f"{rel}.reference_total": ref.total, f"{rel}.cross": stats.cross}
    save_work_file(tensors, task.stats, {"counts": json.dumps({rel: stats.count})})
    return {"count": stats.count}


def _accumulate_pair(stats: InputStats, ref: InputStats, xr: torch.Tensor, x: torch.Tensor) -> None:
    """Add one pass's rows to the current and reference statistics and to the cross moment sum x_ref x^T."""
    if stats.width == 0:
        stats.width = ref.width = int(x.shape[-1])
    accumulate(stats, x)
    accumulate(ref, xr)
    if stats.cross is None:
        stats.cross = torch.zeros(stats.width, stats.width, dtype=torch.float64)
    for start in range(0, x.shape[0], ROW_CHUNK):
        a = xr[start:start + ROW_CHUNK].to(torch.float64)  # (c, n)
        b = x[start:start + ROW_CHUNK].to(torch.float64)
        stats.cross.addmm_(a.T, b)  # sum x_ref x^T
