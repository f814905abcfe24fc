"""The block-by-block shrink's tasks (module level, picklable items; inputs and outputs in the work directory).

:func:`block_slice_task` runs one slice of hidden states through one block, accumulating every selected linear's
input second moment C = X^T X in float64 (q/k/v share one input and gate/up another: each distinct input is
accumulated once) and writing the block's outputs for the next block. :func:`factor_task` gives one linear's
factors at its planned rank from its weight and its group's summed moment. Each task pins torch's thread count
(:func:`factorize.threads.torch_threads`), so the arithmetic is the same on every engine.
"""

from __future__ import annotations

import inspect
import json
import os
from dataclasses import dataclass

import torch
from safetensors import safe_open

from factorize.calibrated.aware import decompose_aware
from factorize.calibrated.stats import InputStats, accumulate, check_finite, input_rows
from factorize.model.hooks import forward_pre_hooks
from factorize.outofcore.architecture import Architecture, architecture, materialise_block
from factorize.storage import read_tensor, write_safetensors
from factorize.threads import torch_threads


@dataclass(frozen=True)
class BlockTask:
    """One slice through one block: where its hidden states come from and go, and what to collect."""

    source: str  # checkpoint directory (resolved)
    block: int
    piece: int  # slice index
    inputs: str  # hidden states entering the block
    outputs: str  # the block's outputs (the next block's inputs)
    stats: str  # partial moments of this slice
    names: tuple[str, ...]  # qualified names of the linears to collect statistics for
    threads: int
    tokens_per_pass: int


def save_work_file(tensors: dict, path: str, metadata: dict | None = None) -> None:
    """A work file, written tensor by tensor (no serialised copy of the whole dict in memory), then renamed."""
    tmp = f"{path}.{os.getpid()}.part"
    write_safetensors(tmp, tensors, metadata)
    os.replace(tmp, path)


def _causal_mask(arch: Architecture, h: torch.Tensor, mask: torch.Tensor | None, pos: torch.Tensor):
    """The attention mask exactly as the model's forward builds it (transformers' ``create_causal_mask``)."""
    from transformers.masking_utils import create_causal_mask

    params = inspect.signature(create_causal_mask).parameters
    cache = {"cache": None} if "cache" in params else {"past_key_values": None}
    extra = {"cache_position": pos[0]} if "cache_position" in params else {}
    embeds = "inputs_embeds" if "inputs_embeds" in params else "input_embeds"
    return create_causal_mask(config=arch.config, **{embeds: h}, attention_mask=mask, position_ids=pos,
                              **cache, **extra)


def block_slice_task(task: BlockTask) -> dict:
    """Run one slice through block ``task.block``: its outputs and partial input moments go to the work dir.

    Tasks run concurrently in one process (a threaded engine) must share one thread count: the engine's own, as
    every engine pins it (:func:`factorize.cluster.open_engine`), so pinning here changes nothing under it."""
    with torch_threads(task.threads):
        return _slice_through_block(task)


def _slice_through_block(task: BlockTask) -> dict:
    arch = architecture(task.source)
    block = materialise_block(arch, task.block)
    prefix = f"{arch.prefix}.{task.block}."
    rel = {n[len(prefix):]: n for n in task.names if n.startswith(prefix)}
    groups: dict[str, str] = {}  # linear (relative) -> the linear whose input it shares (the group's name)
    stats: dict[str, InputStats] = {}
    live: dict[int, tuple[torch.Tensor, str]] = {}  # id(input) -> (input, group), within one forward pass
    state = {"mask": None, "pass": 0}

    def hook_for(name: str):
        def hook(module, args, kwargs):
            x = args[0] if args else next(iter(kwargs.values()))
            if name not in groups:
                seen = live.get(id(x))
                groups[name] = seen[1] if seen is not None and seen[0] is x else name
            live[id(x)] = (x, groups[name])
            if groups[name] != name:
                return  # the same input was accumulated for its group
            rows = input_rows(module, "linear", x.detach(), state["mask"])  # padded positions left out
            check_finite(rows, rel[name], state["pass"])
            if name not in stats:
                stats[name] = InputStats(rel[name], "linear", int(x.shape[-1]))
            accumulate(stats[name], rows)

        return hook

    with forward_pre_hooks(block, {r: hook_for(r) for r in rel}, with_kwargs=True), torch.no_grad():
        outputs = _forward_slice(arch, block, task, state, live)
    del block
    save_work_file(outputs, task.outputs)
    del outputs
    tensors, counts = {}, {}
    for name, st in stats.items():
        tensors[f"{name}.moment"] = st.second_moment
        tensors[f"{name}.total"] = st.total
        tensors[f"{name}.abs_total"] = st.abs_total
        counts[name] = st.count
    save_work_file(tensors, task.stats, {"counts": json.dumps(counts), "groups": json.dumps(groups)})
    return {"groups": {rel[k]: rel[v] for k, v in groups.items()}, "counts": {rel[k]: c for k, c in counts.items()}}


def _forward_slice(arch: Architecture, block: torch.nn.Module, task: BlockTask, state: dict, live: dict) -> dict:
    """The block's outputs for every batch piece of the slice, ``task.tokens_per_pass`` tokens at a time (the
    hooks collect the inputs as the passes run)."""
    outputs: dict[str, torch.Tensor] = {}
    with safe_open(task.inputs, framework="pt", device="cpu") as f:
        stored = set(f.keys())
        keys = sorted({k.split(".", 1)[1] for k in stored}, key=int)
        for k in keys:
            h_all = f.get_tensor(f"h.{k}")  # (b, T, hidden) float32
            m_all = f.get_tensor(f"m.{k}") if f"m.{k}" in stored else None
            b, t = int(h_all.shape[0]), int(h_all.shape[1])
            step = max(1, task.tokens_per_pass // max(t, 1))
            parts = []
            for lo in range(0, b, step):
                h = h_all[lo:lo + step]
                m = None if m_all is None else m_all[lo:lo + step]
                pos = torch.arange(t).unsqueeze(0)
                state["mask"] = m
                live.clear()
                pe = arch.rotary(h, pos)
                out = block(h, attention_mask=_causal_mask(arch, h, m, pos), position_ids=pos,
                            position_embeddings=pe)
                parts.append((out[0] if isinstance(out, tuple) else out).contiguous())
                state["pass"] += 1
                live.clear()
            outputs[f"h.{k}"] = torch.cat(parts) if len(parts) > 1 else parts[0]
            if m_all is not None:
                outputs[f"m.{k}"] = m_all
            del h_all, parts
    return outputs


@dataclass(frozen=True)
class FactorTask:
    """One linear's factors at its planned rank, from its weight and its group's summed moment."""

    source: str
    module: str  # qualified linear name
    moment: str  # file of its group's summed moment
    rank: int
    method: str
    solver: str
    ridge: float | None
    seed: int
    precision: str | None
    output: str
    threads: int


def read_stats(path: str, name: str) -> InputStats:
    """A group's summed statistics as the client stored them."""
    with safe_open(path, framework="pt", device="cpu") as f:
        meta = f.metadata()
        C = f.get_tensor("moment")
        st = InputStats(name, "linear", int(C.shape[0]), count=int(meta["count"]), second_moment=C,
                        total=f.get_tensor("total"), abs_total=f.get_tensor("abs_total"),
                        batches=int(meta.get("batches", 0)))
    return st


def factor_task(task: FactorTask) -> str:
    """Factors of one linear at its planned rank, from its weight and its group's input moment."""
    with torch_threads(task.threads):
        return _factors_of_linear(task)


def _factors_of_linear(task: FactorTask) -> str:
    arch = architecture(task.source)
    weight = task.module + ".weight"
    W = read_tensor(arch.where[weight].path, weight)  # (out, in), stored dtype
    st = read_stats(task.moment, task.module)
    spec = decompose_aware(W, st, method=task.method, solver=task.solver, ridge=task.ridge, rank=task.rank,
                           seed=task.seed, precision=task.precision, name=task.module)
    B, A = spec.factors(min(task.rank, spec.computed_rank))  # (out, r), (r, in)
    save_work_file({"first": A.to(W.dtype).contiguous(), "second": B.to(W.dtype).contiguous()}, task.output)
    return task.output
