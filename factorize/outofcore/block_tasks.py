"""The block-by-block shrink's tasks (module level, picklable items; inputs and outputs in the work directory).

:func:`block_slice_task` runs one slice of hidden states through one block, accumulating every selected linear's
input second moment C = X^T X in float64 (q/k/v share one input and gate/up another: each distinct input is
accumulated once) and writing the block's outputs for the next block. :func:`factor_task` gives one linear's
factors at its planned rank from its weight and its group's summed moment (with a budget in bytes: the layer in
its planned stored form, factored, rounded or rounded plus a correction). Each task pins torch's thread count
(:func:`factorize.threads.torch_threads`), so the arithmetic is the same on every engine.
"""

from __future__ import annotations

import functools
import json
import os
from dataclasses import dataclass

import torch
from safetensors import safe_open

from factorize.calibrated.aware import decompose_aware
from factorize.calibrated.reduced import factors_from_reduction
from factorize.calibrated.stats import InputStats, accumulate, check_finite, input_rows
from factorize.model.hooks import forward_pre_hooks
from factorize.outofcore.architecture import Architecture, architecture, kind_of, materialise_block
from factorize.outofcore.stem import decode_extras
from factorize.outofcore.tasks import FORMS_KEY, layer_holding, stored_error, stored_state
from factorize.plan.entries import is_factored_entry
from factorize.spectra.tridiagonal import Reduction
from factorize.spectra.whiten import sqrt_factor
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
    extras: str  # the blocks' extra inputs for this slice (masks, position embeddings; see outofcore.stem)


def save_work_file(tensors: dict, path: str, metadata: dict | None = None) -> None:
    """A work file, written tensor by tensor (no serialised copy of the whole dict in memory), then renamed."""
    tmp = f"{path}.{os.getpid()}.part"
    write_safetensors(tmp, tensors, metadata)
    os.replace(tmp, path)


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
            kind = kind_of(arch, rel[name])
            rows = input_rows(module, kind, x.detach(), state["mask"])  # padded positions left out
            check_finite(rows, rel[name], state["pass"])
            if name not in stats:
                stats[name] = InputStats(rel[name], kind, int(x.shape[-1]))
            accumulate(stats[name], rows)

        return hook

    with forward_pre_hooks(block, {r: hook_for(r) for r in rel}, with_kwargs=True), torch.no_grad():
        outputs = _forward_slice(arch, block, task, state, live)
    del block
    save_work_file(outputs, task.outputs)
    del outputs
    tensors, counts = {}, {}
    for name, st in stats.items():
        upper = packed_upper(st.second_moment, symmetric=True)  # by construction (stats.add_gram): half the bytes
        tensors[f"{name}.moment" if upper is None else f"{name}.moment.upper"] = \
            st.second_moment if upper is None else upper
        st.second_moment = None
        tensors[f"{name}.total"] = st.total
        tensors[f"{name}.abs_total"] = st.abs_total
        counts[name] = st.count
    save_work_file(tensors, task.stats, {"counts": json.dumps(counts), "groups": json.dumps(groups)})
    return {"groups": {rel[k]: rel[v] for k, v in groups.items()}, "counts": {rel[k]: c for k, c in counts.items()}}


def _forward_slice(arch: Architecture, block: torch.nn.Module, task: BlockTask, state: dict, live: dict) -> dict:
    """The block's outputs for every pass of the slice (the embedding stage cut the slice into passes of at most
    ``tokens_per_pass`` tokens; the hooks collect the inputs as the passes run)."""
    outputs: dict[str, torch.Tensor] = {}
    with safe_open(task.inputs, framework="pt", device="cpu") as f, \
            safe_open(task.extras, framework="pt", device="cpu") as x:
        described = json.loads(x.metadata()["extras"])
        stored = set(f.keys())
        for k in sorted({key.split(".", 1)[1] for key in stored}, key=int):
            h = f.get_tensor(f"h.{k}")  # (b, T, hidden) float32
            m = f.get_tensor(f"m.{k}") if f"m.{k}" in stored else None
            args, kwargs = decode_extras(described[k], task.block, x)
            state["mask"] = m
            live.clear()
            outputs[f"h.{k}"] = run_block(block, h, args, kwargs)
            if m is not None:
                outputs[f"m.{k}"] = m
            state["pass"] += 1
            live.clear()
            del h
    return outputs


def run_block(block: torch.nn.Module, h: torch.Tensor, args: tuple, kwargs: dict) -> torch.Tensor:
    """One block's output hidden states for ``h``, given the extra inputs the model itself passes it."""
    out = block(h, *args, **kwargs)
    return (out[0] if isinstance(out, tuple) else out).contiguous()


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
    entry: dict | None = None  # a bytes plan's entry (cost="bytes"): the layer's stored form, not plain factors
    reduction: str = ""  # file of the values pass's kept reduction (:func:`save_reduction`), if any


ERROR_KEY = "factorize.relative_error"  # a stored form's ||W - W_stored||_F / ||W||_F (float.hex) in its metadata
PACK_ROWS = 256  # rows compared at a time by the symmetry check of :func:`packed_upper`


def packed_upper(C: torch.Tensor, symmetric: bool = False) -> torch.Tensor | None:
    """C's upper triangle, row after row (n (n + 1) / 2 values), when C is exactly symmetric, else None: the
    factor step rebuilds C bit for bit (:func:`unpacked_upper`) from half the bytes on disk. ``symmetric=True``
    skips the check, for a C symmetric by construction (:func:`factorize.calibrated.stats.add_gram`): the check
    reads C twice, a third of the statistics pass's packing and writing time at 1.1B widths."""
    n = int(C.shape[0])
    if not symmetric and not all(torch.equal(C[lo:lo + PACK_ROWS], C[:, lo:lo + PACK_ROWS].T)
                                 for lo in range(0, n, PACK_ROWS)):
        return None
    out, at = C.new_empty(n * (n + 1) // 2), 0
    for i in range(n):
        out[at:at + n - i] = C[i, i:]
        at += n - i
    return out


def unpacked_upper(packed: torch.Tensor, n: int) -> torch.Tensor:
    """The symmetric n x n matrix whose upper triangle :func:`packed_upper` stored."""
    C, at = packed.new_empty(n, n), 0
    for i in range(n):
        C[i, i:] = C[i:, i] = packed[at:at + n - i]
        at += n - i
    return C


def read_moment(path: str) -> torch.Tensor:
    """The n x n input moment of a group's statistics file (stored whole or as its upper triangle)."""
    with safe_open(path, framework="pt", device="cpu") as f:
        if "moment.upper" in f.keys():  # noqa: SIM118 - a safe_open handle, not a dict
            return unpacked_upper(f.get_tensor("moment.upper"), int(f.get_slice("total").get_shape()[0]))
        return f.get_tensor("moment")


def read_stats(path: str, name: str) -> InputStats:
    """A group's summed statistics as the client stored them (the moment possibly as its upper triangle). The
    statistics can read their moment again (``reread``), so the whitening factors it in place instead of copying
    it: a 5632-wide moment is 254 MB in float64."""
    C = read_moment(path)
    with safe_open(path, framework="pt", device="cpu") as f:
        meta = f.metadata()
        st = InputStats(name, "linear", int(C.shape[0]), count=int(meta["count"]), second_moment=C,
                        total=f.get_tensor("total"), abs_total=f.get_tensor("abs_total"),
                        batches=int(meta.get("batches", 0)), reread=functools.partial(read_moment, path))
        if "cross" in f.keys():  # noqa: SIM118 - a safe_open handle, not a dict; pair statistics of the sequential refit (outofcore.refit_tasks)
            st.cross, st.reference_moment = f.get_tensor("cross"), f.get_tensor("reference_moment")
            st.reference_total = f.get_tensor("reference_total")
    return st


def save_reduction(spectrum, path: str) -> str:
    """The tridiagonal reduction a values pass kept on ``spectrum`` (``whitened_values(..., keep_reduction=True)``),
    with what the factor step needs besides (||W L||_F^2, the ridge, the sample count; floats as hex, exact), to
    ``path``; returns ``path``. About half the bytes of the k x k Gram matrix."""
    save_work_file(spectrum.reduction.packed(), path, {"total": float(spectrum.total_energy).hex(),
                                                        "ridge": float(spectrum.ridge).hex(),
                                                        "count": str(spectrum.samples)})
    return path


def read_reduction(path: str) -> tuple[Reduction, float, float, int]:
    """(reduction, ||W L||_F^2, ridge, count) as :func:`save_reduction` stored them."""
    with safe_open(path, framework="pt", device="cpu") as f:
        meta = f.metadata()
        red = Reduction.unpacked({key: f.get_tensor(key) for key in f.keys()})  # noqa: SIM118 - a safe_open handle
    return red, float.fromhex(meta["total"]), float.fromhex(meta["ridge"]), int(meta["count"])


def factor_task(task: FactorTask) -> str:
    """Factors of one linear at its planned rank, from its weight and its group's input moment."""
    with torch_threads(task.threads):
        return _factors_of_linear(task)


def _factors_of_linear(task: FactorTask) -> str:
    arch = architecture(task.source)
    weight = task.module + ".weight"
    W = read_tensor(arch.where[weight].path, weight)  # stored dtype, (out, in) or transposed (in, out)
    transposed = kind_of(arch, task.module) == "transposed"
    if transposed:
        W = W.t()
    if task.reduction and task.entry is None:  # values first: the kept vectors from the values pass's reduction
        red, total, lam, count = read_reduction(task.reduction)
        again = functools.partial(read_moment, task.moment)  # L again, for a tall W only (an n x n Cholesky)
        spec = factors_from_reduction(W, red, total, lam, task.rank, count, lambda: sqrt_factor(again(), lam, again),
                                      precision=task.precision)
        del red
        if spec is not None:
            return _save_factors(spec, task, W)
    st = read_stats(task.moment, task.module)
    spec = None
    if task.entry is None or is_factored_entry(task.entry):  # plain factors, or a bytes plan's factored entry
        spec = decompose_aware(W, st, method=task.method, solver=task.solver, ridge=task.ridge, rank=task.rank,
                               seed=task.seed, precision=task.precision, name=task.module)
    if task.entry is not None:
        return _stored_form_of_linear(task, arch, W, st, transposed, spec)
    return _save_factors(spec, task, W)


def _save_factors(spec, task: FactorTask, W: torch.Tensor) -> str:
    B, A = spec.factors(min(task.rank, spec.computed_rank))  # (out, r), (r, in)
    save_work_file({"first": A.to(W.dtype).contiguous(), "second": B.to(W.dtype).contiguous()}, task.output)
    return task.output


def _stored_form_of_linear(task: FactorTask, arch: Architecture, W: torch.Tensor, st: InputStats,
                           transposed: bool, spectrum) -> str:
    """One linear in its bytes plan entry's stored form (:func:`factorize.outofcore.tasks.stored_state`): the
    whitened factors at the planned rank (``spectrum``, for a factored entry), rounded with error feedback on the
    group's input moment as the in-memory calibrated ``compress(cost="bytes")`` rounds; the layer's state dict (bias
    included) and its relative weight error go to ``task.output``."""
    entry = task.entry
    bias_name = task.module + ".bias"
    bias = read_tensor(arch.where[bias_name].path, bias_name) if bias_name in arch.where else None
    state, built = stored_state(layer_holding(W, bias, transposed), entry, spectrum=spectrum, hessian=st.moment(),
                                method=task.method)
    # a transposed projection kept dense stores its (in, out) weight; factors are (out, r) and (r, in) either way
    error = stored_error(W.t() if transposed and not is_factored_entry(entry) else W, built)
    save_work_file(state, task.output, {FORMS_KEY: json.dumps(list(state)), ERROR_KEY: float(error).hex()})
    return task.output

