"""The weights-only shrink's per-matrix tasks, run by an engine (this process or cluster workers).

A task gets the shard path and tensor name, reads the tensor itself (memory-mapped), decomposes it and writes what
is large (the factors) to the work directory, returning only small metadata. The single-process run goes through
the same functions (:class:`~factorize.cluster.LocalEngine`), so there is one code path and the client writes the
same bytes whichever engine ran the tasks.

:func:`values_task` is a budget's first pass (singular values only); :func:`factors_task` gives the factors at the
plan's rank (or the per-layer rule's), stored as ``<key>.factors.safetensors`` keyed like the spectrum cache
(content + options), so a result already in the work directory is reused (resume). Each task start appends a line
to ``<hash>.attempts`` (removed when the result is stored): a task rescheduled after its worker died knows it is a
second attempt, and the run reports it as redone.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os
import socket
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import torch
from torch import nn

from factorize.errors import FactorizeError
from factorize.measure.factors import relative_error
from factorize.model.sites import Site
from factorize.plan.entries import DENSE, entry_form, is_factored_entry
from factorize.plan.forms import native_precision, price_site
from factorize.plan.policy import Policy
from factorize.plan.ranks import PLAN_FORMAT, PRECISION_PLAN_VERSION, choose_ranks
from factorize.rewrite.apply import apply_plan
from factorize.spectra.cache import SpectrumCache
from factorize.spectra.decompose import Spectrum, decompose
from factorize.spectra.sites import cached_leading, cached_values
from factorize.storage import read_header, read_tensor, remove_quietly, write_atomic, write_safetensors


def spectrum_for(W: torch.Tensor, site: Site, method: str, k: int | None, seed: int, precision: str | None,
                 cache: SpectrumCache | None) -> Spectrum:
    """The full spectrum of one weight, through the cache when one is given."""
    if cache is not None:
        return cache.get_or_compute(W, method, rank=k, seed=seed, precision=precision, name=site.name)
    return decompose(W, method=method, rank=k, seed=seed, precision=precision, name=site.name)


RESULT_SUFFIX = ".factors.safetensors"  # a factor task's result in the work directory: <key>.factors.safetensors
ATTEMPTS_SUFFIX = ".attempts"  # one line per start of a task, removed when its result is stored


@dataclass(frozen=True)
class MatrixTask:
    """One matrix's work: what to read, how to decompose it, where results go."""

    kind: str  # "values" (budget pass 1: singular values only) or "factors" (the factors at the layer's rank)
    shard: str  # the safetensors file holding the tensor, on storage every worker can read
    name: str  # the tensor's name in the shard
    site: Site
    method: str
    k: int | None
    seed: int
    precision: str | None
    work_dir: str  # results and attempt markers (the spectrum cache directory when one is given)
    cache_dir: str | None  # the spectrum cache, when one is given
    entry: dict | None = None  # the budget plan's entry for this layer (factors pass); None: decide here
    policy: Policy | None = None  # per-layer policies decide the rank from the layer's own spectrum
    fault: Callable | None = None  # tests only: called with (task, attempt) after the attempt is recorded
    values: Spectrum | None = None  # values-first budget route: pass 1's singular values, for leading() in pass 2
    values_first: bool = False  # the values-first route (factorize.plan.policy.values_first): Gram values in pass 1
    bias_shard: str | None = None  # the layer's bias (cost="bytes": the stored forms carry it), when it has one
    bias_name: str | None = None

    def marker(self) -> Path:
        desc = json.dumps([self.kind, self.shard, self.name, self.method, self.k, self.seed, self.precision,
                           self.entry, self.policy.to_dict() if self.policy is not None else None],
                          sort_keys=True, default=str)
        return Path(self.work_dir) / (hashlib.blake2b(desc.encode(), digest_size=16).hexdigest() + ATTEMPTS_SUFFIX)


def start_attempt(task: MatrixTask) -> int:
    """Record that ``task`` starts here; returns which attempt this is (1 the first time). A task whose worker
    died left its line behind, so a rescheduled run of it (or a rerun after a failed run) counts 2 or more."""
    path = task.marker()
    try:
        with open(path, "a", encoding="utf-8") as f:
            f.write(f"{socket.gethostname()} {os.getpid()}\n")
            f.flush()
            os.fsync(f.fileno())
        with open(path, encoding="utf-8") as f:
            return sum(1 for _ in f)
    except OSError as e:
        raise FactorizeError(f"{task.work_dir}: the work directory is not writable from worker "
                             f"{socket.gethostname()} ({e.strerror or e})",
                             fix="put the cache/work directory on storage every worker can write (a shared file "
                                 "system), at the same path") from None


def _read_in_task(task: MatrixTask) -> torch.Tensor:
    try:
        return read_tensor(task.shard, task.name)
    except Exception as e:  # noqa: BLE001 - missing, unreadable or damaged: all named the same way
        raise FactorizeError(f"{task.shard}: worker {socket.gethostname()} (process {os.getpid()}) cannot read this "
                             f"shard for {task.name} ({type(e).__name__}: {e})",
                             fix="put the checkpoint on storage every worker can read, at the same path (a shared "
                                 "file system), then rerun") from None


def _task_cache(task: MatrixTask) -> SpectrumCache | None:
    return SpectrumCache(task.cache_dir) if task.cache_dir is not None else None


def _cache_counts(cache: SpectrumCache | None) -> dict:
    if cache is None:
        return {}
    return {"hits": cache.hits, "misses": cache.misses, "stored": cache.stored, "corrupt": cache.corrupt}


def _begin(task: MatrixTask) -> tuple[int, torch.Tensor]:
    """Every matrix task's start: count the attempt (and run the test fault hook), then read the weight."""
    attempt = start_attempt(task)
    if task.fault is not None:
        task.fault(task, attempt)
    return attempt, _read_in_task(task)


def _store_result(path: Path, key: str, tensors: dict, meta: dict) -> tuple[dict, float]:
    """Write a task's result file atomically and read it back as :func:`stored_result` does."""
    write_atomic(path, lambda tmp: write_safetensors(tmp, tensors, meta), force=True)
    found = stored_result(path, key)
    if found is None:
        raise FactorizeError(f"{path}: the result just written cannot be read back",
                             fix="check the work directory's storage")
    return found


def kept_as_is(entry: dict, dtype: torch.dtype) -> bool:
    """The plan keeps this layer dense in the checkpoint's own precision: no file to write."""
    return entry_form(entry) == DENSE and entry.get("precision") in (None, native_precision(dtype))


def values_task(task: MatrixTask) -> dict:
    """Budget pass 1: the singular values of one matrix (k floats; the cache, if any, keeps the whole spectrum)."""
    attempt, W = _begin(task)  # W: (out, in)
    cache = _task_cache(task)
    if task.values_first:  # as compress(): every singular value without vectors, from the Gram matrix
        values = cached_values(W, cache, precision=task.precision, name=task.site.name)
    else:
        values = spectrum_for(W, task.site, task.method, task.k, task.seed, task.precision, cache).without_vectors()
    remove_quietly(task.marker())
    return {"values": values, "attempts": attempt, "cache": _cache_counts(cache)}


def factors_task(task: MatrixTask) -> dict:
    """Pass 2 (or the only pass of a per-layer policy): the factors of one matrix at its rank, stored in the work
    directory as ``<key>.factors.safetensors`` (``first`` = A (r, in), ``second`` = B (out, r), in the weight's
    dtype) with the plan entry and the measured relative error in its metadata. A result already there (same
    content, same options) is reused."""
    attempt, W = _begin(task)  # W: (out, in)
    decide = {"entry": task.entry} if task.entry is not None else \
        {"policy": task.policy.to_dict(), "module": task.site.name}  # per-layer rules may name the layer
    if task.values is not None:
        decide["route"] = "values first"
    key = SpectrumCache.key(W, task.method, extra=json.dumps({"result": "factors", **decide}, sort_keys=True),
                            rank=task.k, seed=task.seed, precision=task.precision)
    path = Path(task.work_dir) / f"{key}{RESULT_SUFFIX}"
    cache = _task_cache(task)
    found = stored_result(path, key)
    if found is None:
        entry = task.entry
        if entry is not None and not is_factored_entry(entry):
            spec = None  # kept dense by the plan: no decomposition needed
        elif task.values is not None and entry is not None:
            spec = cached_leading(W, int(entry["rank"]), task.values, cache, seed=task.seed,  # as compress() does
                                  precision=task.precision, name=task.site.name)
        else:
            spec = spectrum_for(W, task.site, task.method, task.k, task.seed, task.precision, cache)
        if entry is None:  # per-layer policy: decided from this layer's own spectrum
            plan = choose_ranks([task.site], {task.site.name: spec}, task.policy, method=task.method)
            entry = plan["sites"][task.site.name]
        tensors, error = {}, 0.0
        if is_factored_entry(entry):
            B, A = spec.factors(entry["rank"])  # (out, r), (r, in)
            B, A = B.to(W.dtype).contiguous(), A.to(W.dtype).contiguous()
            tensors, error = {"first": A, "second": B}, relative_error(W, B, A)
        meta = {"factorize.key": key, "factorize.entry": json.dumps(entry, sort_keys=True),
                "factorize.relative_error": float(error).hex()}
        found = _store_result(path, key, tensors, meta)
        cached = False
    else:
        cached = True
    remove_quietly(task.marker())
    entry, error = found
    return {"entry": entry, "relative_error": error, "file": str(path) if is_factored_entry(entry) else None,
            "attempts": attempt, "cached": cached, "cache": _cache_counts(cache)}


def price_task(task: MatrixTask) -> dict:
    """Pass 1 of a budget in bytes (``task.policy.cost == "bytes"``): one matrix's candidate forms -- dense, factored
    and corrected at each allowed precision, priced in stored bytes with their predicted errors
    (:func:`factorize.plan.forms.price_site`, the plain error measure: there is no calibration here) -- and its
    spectrum without vectors (what the plan rows read). As :func:`factorize.compress` prices a layer."""
    attempt, W = _begin(task)  # W: (out, in)
    cache = _task_cache(task)
    spec = spectrum_for(W, task.site, task.method, None, task.seed, task.precision, cache)
    candidates, scale, notes = price_site(task.site, W, spec, task.policy)
    remove_quietly(task.marker())
    return {"candidates": candidates, "scale": scale, "notes": notes, "values": spec.without_vectors(),
            "attempts": attempt, "cache": _cache_counts(cache)}


FORMS_KEY = "factorize.state"  # a stored-forms result's metadata: the layer's state-dict suffixes, in order


def forms_task(task: MatrixTask) -> dict:
    """Pass 2 of a budget in bytes: the plan entry's form of one layer (factored, rounded, or rounded plus a
    correction), built by :func:`factorize.rewrite.apply.apply_plan` on a one-layer model holding the weight and
    bias -- the code :func:`factorize.compress` runs -- and stored in the work directory as the layer's state dict
    (suffixes such as ``first.stored_weight.q``; their order in the metadata), with the relative weight error of
    the stored form. A layer the plan keeps dense in its own precision needs no file. A result already there is
    reused."""
    attempt, W = _begin(task)  # W: (out, in)
    bias = None
    if task.bias_name is not None:
        bias = _read_in_task(dataclasses.replace(task, shard=task.bias_shard, name=task.bias_name))
    extra = {"result": "forms", "entry": task.entry,
             "bias": None if bias is None else hashlib.blake2b(_bytes_of(bias), digest_size=16).hexdigest()}
    key = SpectrumCache.key(W, task.method, extra=json.dumps(extra, sort_keys=True), rank=None, seed=task.seed,
                            precision=task.precision)
    path = Path(task.work_dir) / f"{key}{RESULT_SUFFIX}"
    cache = _task_cache(task)
    found = stored_result(path, key)
    cached = found is not None
    if found is None:
        tensors, error = _stored_forms(W, bias, task, cache)
        meta = {"factorize.key": key, "factorize.entry": json.dumps(task.entry, sort_keys=True),
                "factorize.relative_error": float(error).hex(), FORMS_KEY: json.dumps(list(tensors))}
        found = _store_result(path, key, tensors, meta)
    remove_quietly(task.marker())
    entry, error = found
    kept = kept_as_is(entry, W.dtype)
    return {"entry": entry, "relative_error": error, "file": None if kept else str(path), "attempts": attempt,
            "cached": cached, "cache": _cache_counts(cache)}


def _bytes_of(t: torch.Tensor) -> bytes:
    return t.detach().contiguous().reshape(-1).view(torch.uint8).numpy().tobytes()


def _stored_forms(W: torch.Tensor, bias: torch.Tensor | None, task: MatrixTask,
                  cache: SpectrumCache | None) -> tuple[dict[str, torch.Tensor], float]:
    """(the layer's state dict in its planned form, ||W - W_stored||_F / ||W||_F); nothing for a layer kept as it
    is. The spectrum is the one pass 1 priced (same method, seed and precision; from the cache when given)."""
    entry = task.entry
    if kept_as_is(entry, W.dtype):
        return {}, 0.0
    spectrum = None
    if is_factored_entry(entry):
        spectrum = spectrum_for(W, task.site, task.method, None, task.seed, task.precision, cache)
    state, built = stored_state(layer_holding(W, bias), entry, spectrum=spectrum, method=task.method)
    return state, stored_error(W, built)


def layer_holding(W: torch.Tensor, bias: torch.Tensor | None, transposed: bool = False) -> nn.Module:
    """A stand-alone layer of the projection's own class holding ``W`` ((out, in) view) and ``bias``: an
    ``nn.Linear``, or transformers' ``Conv1D`` (weight stored (in, out)) for a transposed projection."""
    m, n = W.shape
    if transposed:
        from transformers.pytorch_utils import Conv1D

        layer, target = Conv1D(m, n).to(W.dtype), W.t()
    else:
        layer, target = nn.Linear(n, m, bias=bias is not None, dtype=W.dtype), W
    with torch.no_grad():
        layer.weight.copy_(target)
        if bias is not None:
            layer.bias.copy_(bias)
    return layer


def stored_state(layer: nn.Module, entry: dict, *, spectrum: Spectrum | None = None,
                 hessian: torch.Tensor | None = None, method: str = "exact") -> tuple[dict[str, torch.Tensor],
                                                                                      nn.Module]:
    """``layer`` (holding its original weight and bias) rebuilt in the plan ``entry``'s stored form by
    :func:`factorize.rewrite.apply.apply_plan` on a one-layer model -- the code :func:`factorize.compress` runs --
    with the factors from ``spectrum`` (a factored entry) and error-feedback rounding on ``hessian`` (the input
    second moment, when known): (the built layer's state dict, the built layer)."""
    holder = nn.Module()
    holder.add_module("layer", layer)
    plan = {"format": PLAN_FORMAT, "version": PRECISION_PLAN_VERSION, "method": method, "policy": {},
            "sites": {"layer": entry}}
    apply_plan(holder, plan, spectra={"layer": spectrum} if spectrum is not None else {}, inplace=True,
               hessians={"layer": hessian} if hessian is not None else None)
    built = holder.layer
    return {k: v.detach().contiguous() for k, v in built.state_dict().items()}, built


def stored_error(W: torch.Tensor, layer) -> float:
    """||W - W_stored||_F / ||W||_F of a linear layer in any stored form (factored: B A from the decoded thin
    weights; rounded: the decoded weight; corrected: the decoded base plus B A), float64 accumulation."""
    if hasattr(layer, "first") and hasattr(layer, "second") and not hasattr(layer, "base"):
        return relative_error(W, layer.second.weight.detach(), layer.first.weight.detach())
    with torch.no_grad():
        if hasattr(layer, "base"):  # the decoded parts, summed in float64 (not the layer's own rounded sum)
            B, A = (t.weight.detach().to(torch.float64) for t in (layer.second, layer.first))
            Wd = layer.base.weight.detach().to(torch.float64) + B @ A
        else:
            Wd = layer.weight.detach().to(torch.float64)
    W64 = W.detach().to(torch.float64)
    den = float(W64.pow(2).sum())
    return float((W64 - Wd).pow(2).sum() / den) ** 0.5 if den > 0 else 0.0


def stored_result(path: Path, key: str) -> tuple[dict, float] | None:
    """(plan entry, relative error) of a stored factor result, or None when there is none (or it is unusable)."""
    if not path.exists():
        return None
    try:
        meta = read_header(path).metadata
        if meta.get("factorize.key") != key:
            return None
        return json.loads(meta["factorize.entry"]), float.fromhex(meta["factorize.relative_error"])
    except Exception:  # noqa: BLE001 - a damaged result is recomputed and replaced
        return None


class ExitOnFirstAttempt:
    """FAULT INJECTION FOR TESTS ONLY: ends the worker process (``os._exit``) at the first attempt of the given
    task kind for one tensor, as a crashed or killed worker would. Never use it with the local engine: it would
    end the calling process."""

    def __init__(self, tensor: str, kind: str = "factors") -> None:
        self.tensor, self.kind = tensor, kind

    def __call__(self, task: MatrixTask, attempt: int) -> None:
        if task.name == self.tensor and task.kind == self.kind and attempt == 1:
            os._exit(71)
