"""Weights-only mode: shrink a bare safetensors checkpoint without the model's code.

Every selected 2-D floating tensor ``<module>.weight`` of shape (out, in) is treated as the weight of a linear
layer. Where the plan factors it, the output holds ``<module>.first.weight`` (r, in) = A and
``<module>.second.weight`` (out, r) = B, and ``<module>.bias`` becomes ``<module>.second.bias`` -- exactly the
state-dict keys of :class:`factorize.rewrite.layers.Factored` -- so ``factorize.checkpoints.files.load(model, output)`` loads the result
into the user's architecture (the plan in the metadata says kind ``"linear"`` and the shape). Every other tensor
is copied unchanged. Layers that are not ``nn.Linear`` in the user's model (embeddings, GPT-2's transposed
``Conv1D``) must be excluded, or the load reports the mismatch.

Memory: tensors are streamed one at a time from the memory-mapped input (``safetensors.safe_open``, opened per
tensor so no mapping outlives its tensor) and written straight to the output file, whose header is filled in
last (into space reserved at the start of the file, padded with spaces as the safetensors spec allows). Peak
memory is about one tensor's decomposition working set, not the checkpoint's size.

Policies: ``rank``, ``keep`` and ``energy`` decide each layer from its own spectrum, so one pass suffices. A
``budget`` compares all layers, so it needs every spectrum before any rank is known: the first pass keeps only
the singular values (k floats per layer) and the second decomposes again to get the factors. That second
decomposition is the price of bounded memory; with ``cache_dir`` the first pass stores each spectrum on disk
and the second pass reads it back instead (disk for time: see :mod:`factorize.cache`).

Tasks: the per-matrix work of both passes runs as tasks on an engine (:mod:`factorize.cluster`): this process by
default, or a Dask cluster (``cluster=``). A task reads its tensor from the shard itself, decomposes it and writes
the factors to a work directory (``cache_dir`` if given, else a temporary folder beside the output, removed at the
end), returning small metadata; this process then streams those files into the output, one tensor at a time, in
the same order whatever ran the tasks, so the output is byte-identical across engines. The work directory holds
every factor until the output is written: disk use is about the output's size again (checked up front).

Sharded checkpoints (``*.safetensors.index.json`` with a ``weight_map``) give a sharded output in a directory:
one output shard per input shard (same file names), then the index, written last. Every file is written to a
temporary name first; only when all are complete are they renamed into place, so a failure leaves nothing.
"""

from __future__ import annotations

import fnmatch
import hashlib
import json
import math
import os
import shutil
import socket
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import torch
from safetensors import safe_open
from tqdm.auto import tqdm

from factorize.checkpoints.files import (
    FORMAT_NAME,
    FORMAT_VERSION,
    KEY_FORMAT,
    KEY_LIBRARY,
    KEY_PLAN_IN,
    KEY_VERSION,
    Checkpoint,
    checkpoint_metadata,
    open_checkpoint,
)
from factorize.cluster import Engine, TasksFailed, open_engine, parse_cluster
from factorize.errors import FactorizeError
from factorize.measure.report import LayerReport, Report
from factorize.model.sites import Site
from factorize.plan.policy import Policy, rank_needed, resolve_policy
from factorize.plan.ranks import (
    PLAN_FORMAT,
    PLAN_VERSION,
    choose_ranks,
)
from factorize.spectra.cache import SpectrumCache, as_cache
from factorize.spectra.decompose import (
    METHODS,
    Spectrum,
    decompose,
    values_only,
)
from factorize.spectra.sites import cached_leading, cached_values
from factorize.storage import (
    DTYPE_NAMES,
    TEMP_SUFFIX,
    Header,
    TensorInfo,
    check_free_space,
    check_output_path,
    create_temp,
    create_temp_dir,
    publish,
    read_header,
    remove_quietly,
    safetensors_header,
    write_atomic,
    write_safetensors,
)

FLOAT_DTYPES = ("F64", "F32", "F16", "BF16")
ERROR_BLOCK_ROWS = 1024  # rows per block when measuring ||W - BA||_F, bounding the extra memory


@dataclass
class _Candidate:
    """A tensor treated as a linear layer's weight."""

    module: str
    weight: TensorInfo
    weight_file: Header
    bias: TensorInfo | None
    bias_file: Header | None

    @property
    def site(self) -> Site:
        m, n = self.weight.shape
        return Site(name=self.module, kind="linear", shape=(m, n), params=m * n, has_bias=self.bias is not None,
                    dtype=str(self.weight.torch_dtype).removeprefix("torch."))


def _as_list(value: str | Iterable[str] | None) -> list[str] | None:
    if value is None:
        return None
    return [value] if isinstance(value, str) else list(value)


def _matches(names: tuple[str, str], patterns: list[str] | None) -> bool:
    return any(fnmatch.fnmatchcase(n, p) for p in patterns or () for n in names)


def select(ckpt: Checkpoint, include=None, exclude=None) -> tuple[list[_Candidate], dict[str, str]]:
    """The tensors to factor, and the 2-D floating tensors passed over with the reason.

    A pattern matches either the module name (``encoder.fc1``) or the tensor name (``encoder.fc1.weight``).
    Default: every 2-D floating tensor named ``<module>.weight``.
    """
    inc, exc = _as_list(include), _as_list(exclude)
    where = ckpt.locate()
    chosen: list[_Candidate] = []
    passed: dict[str, str] = {}
    for name, h in where.items():
        info = h.tensors[name]
        if len(info.shape) != 2 or info.dtype not in FLOAT_DTYPES:
            continue
        module = name[: -len(".weight")] if name.endswith(".weight") else None
        names = (module or name, name)
        if inc is not None and not _matches(names, inc):
            continue
        if _matches(names, exc):
            passed[name] = "excluded by pattern"
            continue
        if module is None:
            passed[name] = "not named <module>.weight, so there is no layer to rewrite; copied"
            continue
        if min(info.shape) == 0:
            passed[name] = f"shape {list(info.shape)} has no element to factor; copied"
            continue
        bias_name = module + ".bias"
        bias = where[bias_name].tensors[bias_name] if bias_name in where else None
        if bias is not None and bias.shape != (info.shape[0],):
            passed[name] = f"{bias_name} has shape {list(bias.shape)}, not ({info.shape[0]},): not a linear layer; copied"
            continue
        if any(f"{module}.{part}.weight" in where for part in ("first", "second")):
            passed[name] = "the checkpoint already holds factored keys for this module; copied"
            continue
        chosen.append(_Candidate(module, info, h, bias, where[bias_name] if bias is not None else None))
    return chosen, passed


def _read(h: Header, name: str) -> torch.Tensor:
    """One tensor from its file; the memory map is released when this returns."""
    return _read_path(h.path, name)


def _read_path(path: str | os.PathLike, name: str) -> torch.Tensor:
    with safe_open(str(path), framework="pt", device="cpu") as f:
        return f.get_tensor(name)


class _StreamWriter:
    """Write a safetensors file tensor by tensor, header last.

    Data starts after ``reserve`` bytes; at the end the header (8-byte little-endian length, JSON) is written
    into that space, padded with spaces -- the safetensors spec allows trailing whitespace in the header. If the
    header turns out larger than the reserve, the data is copied behind a fresh header instead.
    """

    def __init__(self, final: Path, reserve: int) -> None:
        self.final = final
        self.reserve = _align8(max(reserve, 64))
        self.tmp, fd = create_temp(final)
        self.f = os.fdopen(fd, "wb")
        self.f.seek(self.reserve)
        self.entries: dict[str, dict] = {}
        self.offset = 0

    def add(self, name: str, t: torch.Tensor) -> None:
        t = t.detach().contiguous().cpu()
        n = t.numel() * t.element_size()
        if n:
            self.f.write(memoryview(t.reshape(-1).view(torch.uint8).numpy()))
        self.entries[name] = {"dtype": DTYPE_NAMES[t.dtype], "shape": list(t.shape),
                              "data_offsets": [self.offset, self.offset + n]}
        self.offset += n

    def finish(self, metadata: Mapping[str, str]) -> int:
        """Write the header, flush and fsync; returns the file size."""
        header = safetensors_header(self.entries, metadata)
        if len(header) <= self.reserve:
            self.f.seek(0)
            self.f.write(safetensors_header(self.entries, metadata, pad_to=self.reserve))
        else:
            self._rewrite_with(header)
        self.f.flush()
        os.fsync(self.f.fileno())
        self.f.close()
        return self.tmp.stat().st_size

    def _rewrite_with(self, header: bytes) -> None:
        old, old_f = self.tmp, self.f
        old_f.flush()
        self.tmp, fd = create_temp(self.final)
        self.f = os.fdopen(fd, "wb")
        self.f.write(header)
        with open(old, "rb") as src:
            src.seek(self.reserve)
            shutil.copyfileobj(src, self.f, 16 * 2**20)
        old_f.close()
        remove_quietly(old)

    def abort(self) -> None:
        if not self.f.closed:
            try:
                self.f.close()  # flushing what is buffered can fail again (a full disk, a size limit)
            except OSError:
                pass
        remove_quietly(self.tmp)


def _align8(n: int) -> int:
    return (n + 7) // 8 * 8


def _entry_bound(name: str, ndim: int) -> int:
    """Upper bound on one header entry's JSON length (numbers at 20 digits, the longest dtype name)."""
    big = 10**19
    return len(json.dumps({name: {"dtype": "F8_E4M3", "shape": [big] * ndim, "data_offsets": [big, big]}},
                          separators=(",", ":"))) + 2


def _plan_bound(sites: list[Site], policy: Policy) -> int:
    """Generous bound on the plan's JSON length (fixed keys, reasons and numbers per site)."""
    patterns = sum(len(o.pattern) for o in policy.overrides)
    return 4096 + sum(1024 + 2 * len(s.name) + patterns for s in sites)


def _spectrum_for(W: torch.Tensor, site: Site, method: str, k: int | None, seed: int, precision: str | None,
                  cache: SpectrumCache | None) -> Spectrum:
    if cache is not None:
        return cache.get_or_compute(W, method, rank=k, seed=seed, precision=precision, name=site.name)
    return decompose(W, method=method, rank=k, seed=seed, precision=precision, name=site.name)


def _values_only(spec: Spectrum) -> Spectrum:
    """The spectrum without its singular vectors: enough to choose ranks, k floats instead of k(m + n)."""
    m, n = spec.shape
    return Spectrum(spec.U.new_empty(m, 0), spec.S.clone(), spec.Vh.new_empty(0, n), spec.total_energy,
                    spec.method, spec.exact)


@torch.no_grad()
def _relative_error(W: torch.Tensor, B: torch.Tensor, A: torch.Tensor) -> float:
    """||W - BA||_F / ||W||_F of the factors as stored, in float64 accumulation, one row block at a time."""
    num = den = 0.0
    Af = A.float()
    for i in range(0, W.shape[0], ERROR_BLOCK_ROWS):
        w = W[i : i + ERROR_BLOCK_ROWS].float()  # (b, n)
        d = w - B[i : i + ERROR_BLOCK_ROWS].float() @ Af
        num += float(d.double().pow(2).sum())
        den += float(w.double().pow(2).sum())
    return math.sqrt(num / den) if den > 0 else 0.0


# -- tasks: the per-matrix work of both passes, run by an engine (this process or cluster workers)
#
# A task gets the shard path and tensor name, reads the tensor itself (memory-mapped), decomposes it and writes
# what is large (the factors) to the work directory, returning only small metadata. The single-process run goes
# through the same functions (LocalEngine), so there is one code path and the client writes the same bytes
# whichever engine ran the tasks.

RESULT_SUFFIX = ".factors.safetensors"  # a factor task's result in the work directory: <key>.factors.safetensors
ATTEMPTS_SUFFIX = ".attempts"  # one line per start of a task, removed when its result is stored


@dataclass(frozen=True)
class _Task:
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

    def marker(self) -> Path:
        desc = json.dumps([self.kind, self.shard, self.name, self.method, self.k, self.seed, self.precision,
                           self.entry, self.policy.to_dict() if self.policy is not None else None],
                          sort_keys=True, default=str)
        return Path(self.work_dir) / (hashlib.blake2b(desc.encode(), digest_size=16).hexdigest() + ATTEMPTS_SUFFIX)


def _start_attempt(task: _Task) -> int:
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


def _read_in_task(task: _Task) -> torch.Tensor:
    try:
        return _read_path(task.shard, task.name)
    except Exception as e:  # noqa: BLE001 - missing, unreadable or damaged: all named the same way
        raise FactorizeError(f"{task.shard}: worker {socket.gethostname()} (process {os.getpid()}) cannot read this "
                             f"shard for {task.name} ({type(e).__name__}: {e})",
                             fix="put the checkpoint on storage every worker can read, at the same path (a shared "
                                 "file system), then rerun") from None


def _task_cache(task: _Task) -> SpectrumCache | None:
    return SpectrumCache(task.cache_dir) if task.cache_dir is not None else None


def _cache_counts(cache: SpectrumCache | None) -> dict:
    if cache is None:
        return {}
    return {"hits": cache.hits, "misses": cache.misses, "stored": cache.stored, "corrupt": cache.corrupt}


def _values_task(task: _Task) -> dict:
    """Budget pass 1: the singular values of one matrix (k floats; the cache, if any, keeps the whole spectrum)."""
    attempt = _start_attempt(task)
    if task.fault is not None:
        task.fault(task, attempt)
    W = _read_in_task(task)  # (out, in)
    cache = _task_cache(task)
    if _values_first(task):  # as compress(): every singular value without vectors, from the Gram matrix
        values = cached_values(W, cache, precision=task.precision, name=task.site.name)
    else:
        values = _values_only(_spectrum_for(W, task.site, task.method, task.k, task.seed, task.precision, cache))
    remove_quietly(task.marker())
    return {"values": values, "attempts": attempt, "cache": _cache_counts(cache)}


def _factors_task(task: _Task) -> dict:
    """Pass 2 (or the only pass of a per-layer policy): the factors of one matrix at its rank, stored in the work
    directory as ``<key>.factors.safetensors`` (``first`` = A (r, in), ``second`` = B (out, r), in the weight's
    dtype) with the plan entry and the measured relative error in its metadata. A result already there (same
    content, same options) is reused."""
    attempt = _start_attempt(task)
    if task.fault is not None:
        task.fault(task, attempt)
    W = _read_in_task(task)  # (out, in)
    decide = {"entry": task.entry} if task.entry is not None else \
        {"policy": task.policy.to_dict(), "module": task.site.name}  # per-layer rules may name the layer
    if task.values is not None:
        decide["route"] = "values first"
    key = SpectrumCache.key(W, task.method, extra=json.dumps({"result": "factors", **decide}, sort_keys=True),
                            rank=task.k, seed=task.seed, precision=task.precision)
    path = Path(task.work_dir) / f"{key}{RESULT_SUFFIX}"
    cache = _task_cache(task)
    found = _stored_result(path, key)
    if found is None:
        entry = task.entry
        if entry is not None and entry["action"] != "factor":
            spec = None  # kept dense by the plan: no decomposition needed
        elif task.values is not None and entry is not None:
            spec = cached_leading(W, int(entry["rank"]), task.values, cache, seed=task.seed,  # as compress() does
                                  precision=task.precision, name=task.site.name)
        else:
            spec = _spectrum_for(W, task.site, task.method, task.k, task.seed, task.precision, cache)
        if entry is None:  # per-layer policy: decided from this layer's own spectrum
            entry = choose_ranks([task.site], {task.site.name: spec}, task.policy, method=task.method)["sites"][task.site.name]
        tensors, error = {}, 0.0
        if entry["action"] == "factor":
            B, A = spec.factors(entry["rank"])  # (out, r), (r, in)
            B, A = B.to(W.dtype).contiguous(), A.to(W.dtype).contiguous()
            tensors, error = {"first": A, "second": B}, _relative_error(W, B, A)
        meta = {"factorize.key": key, "factorize.entry": json.dumps(entry, sort_keys=True),
                "factorize.relative_error": float(error).hex()}
        write_atomic(path, lambda tmp: write_safetensors(tmp, tensors, meta), force=True)
        found = _stored_result(path, key)
        if found is None:
            raise FactorizeError(f"{path}: the result just written cannot be read back",
                                 fix="check the work directory's storage")
        cached = False
    else:
        cached = True
    remove_quietly(task.marker())
    entry, error = found
    return {"entry": entry, "relative_error": error, "file": str(path) if entry["action"] == "factor" else None,
            "attempts": attempt, "cached": cached, "cache": _cache_counts(cache)}


def _values_first(task: _Task) -> bool:
    """The values-first budget route, exactly as :func:`factorize.pipeline.values_first` decides it for compress()."""
    return task.kind == "values" and task.method == "auto"


def _stored_result(path: Path, key: str) -> tuple[dict, float] | None:
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


class _ExitOnFirstAttempt:
    """FAULT INJECTION FOR TESTS ONLY: ends the worker process (``os._exit``) at the first attempt of the given
    task kind for one tensor, as a crashed or killed worker would. Never use it with the local engine: it would
    end the calling process."""

    def __init__(self, tensor: str, kind: str = "factors") -> None:
        self.tensor, self.kind = tensor, kind

    def __call__(self, task: _Task, attempt: int) -> None:
        if task.name == self.tensor and task.kind == self.kind and attempt == 1:
            os._exit(71)


def shrink_checkpoint(
    src: str | os.PathLike,
    dst: str | os.PathLike,
    policy: Policy | None = None,
    *,
    precision: str | None = None,
    force: bool = False,
    cache_dir: str | os.PathLike | SpectrumCache | None = None,
    metadata: Mapping[str, str] | None = None,
    progress: bool = False,
    cluster: Any = None,
    threads: int | None = 1,
    _fault: Callable | None = None,
    **keywords: Any,
) -> dict:
    """Factor the linear-layer weights of a safetensors checkpoint, streaming, without the model's code.

    Args:
        src: a ``.safetensors`` file, a ``*.safetensors.index.json``, or a directory holding one of them.
        dst: the output file (single-file input) or directory (sharded input); refused if it exists unless
            ``force``, and never the input itself.
        policy: a :class:`~factorize.plan.policy.Policy`, or its keywords as in :func:`factorize.compress`
            (budget / rank / energy / keep, multiple, overrides, seed); include / exclude match module names
            (``layers.*.mlp.*``) or tensor names; method ``"auto"`` (default), ``"exact"``, ``"gram"`` or
            ``"randomized"``. ``cost="macs"`` and the activation-aware methods are refused: there is no model to
            run here.
        precision: as in :func:`factorize.spectra.decompose.decompose`.
        cache_dir: a spectrum cache directory (or :class:`SpectrumCache`) to reuse decompositions across runs.
        metadata: extra string entries for the output's metadata.
        progress: progress bar on stderr.
        cluster: where the per-matrix tasks run (:func:`factorize.cluster.open_engine`): None, this process;
            ``N`` or ``"local:N"``, a Dask local cluster of N worker processes; ``"tcp://host:port"``, a running
            Dask scheduler; a ``distributed.Client`` or an :class:`~factorize.cluster.Engine`. The checkpoint and
            the work directory (``cache_dir`` if given, else a temporary folder beside ``dst``) must be at the
            same path on every worker. The output is byte-identical whichever engine ran the tasks.
        threads: torch threads per task (pinned in every engine so the arithmetic is the same everywhere;
            None leaves torch's setting alone).

    Returns:
        ``{"plan", "tensors": {name: {shape, action, rank, predicted_error, relative_error}}, "passed_over",
        "files", "bytes_before", "bytes_after", "params_before", "params_after", "passes", "cache", "engine",
        "redone"}``. ``relative_error`` is measured on the stored factors: ||W - BA||_F / ||W||_F; ``engine``
        says where the tasks ran (:meth:`~factorize.cluster.Engine.describe`); ``redone`` lists the tensors
        whose task ran again after a worker died (or after an earlier run stopped part way).
    """
    policy = resolve_policy(policy, keywords)
    if policy.method not in METHODS:
        raise FactorizeError(f"unknown method {policy.method!r} for a checkpoint without its model (activation-aware "
                             "methods need the model and calibration inputs)", fix=f"use one of {', '.join(METHODS)}")
    if policy.cost != "params":
        raise FactorizeError("cost='macs' needs the model to count multiply-accumulates; a checkpoint alone has none",
                             fix="use cost='params', or load the model and call factorize.compress(cost='macs', "
                                 "example=batch)")
    include, exclude, method, seed = policy.include, policy.exclude, policy.method, policy.seed
    ckpt = open_checkpoint(src)
    out_dir, finals = _outputs(ckpt, Path(dst), force)
    chosen, passed = select(ckpt, include, exclude)
    if not chosen:
        raise FactorizeError(
            f"{src}: no 2-D floating tensor named <module>.weight matches the include/exclude patterns",
            [f"{k}: {v}" for k, v in passed.items()],
            fix="check the patterns against the tensor names (safetensors.safe_open(path).keys())",
        )
    if threads is not None and (isinstance(threads, bool) or not isinstance(threads, int) or threads < 1):
        raise FactorizeError(f"threads={threads!r} is not a positive whole number", fix="pass threads=1 (or None)")
    parse_cluster(cluster)  # a malformed value is refused before a cluster is started or anything written
    engine = open_engine(cluster, threads=threads)
    try:
        cache = as_cache(cache_dir)
        work, temporary = _work_directory(cache, finals[0].parent if ckpt.index is not None else finals[0])
        try:
            job = _Job(ckpt, chosen, policy, method, seed, precision, cache, progress, engine=engine, work_dir=work,
                       fault=_fault)
            written, passes = _run(job, ckpt, out_dir, work, finals, metadata, force)
        finally:
            if temporary:
                shutil.rmtree(work, ignore_errors=True)
        where = engine.describe()
    finally:
        if not isinstance(cluster, Engine):
            engine.close()
    return {
        "plan": job.plan,
        "tensors": job.report,
        "passed_over": passed,
        "files": [str(p) for p in written],
        "bytes_before": ckpt.nbytes,
        "bytes_after": sum(p.stat().st_size for p in written),
        "params_before": job.params_before,
        "params_after": job.params_after,
        "passes": passes,
        "cache": {**cache.stats(), "results_reused": job.reused} if cache is not None else None,
        "engine": where,
        "redone": sorted(job.redone),
    }


def _work_directory(cache: SpectrumCache | None, beside: Path) -> tuple[Path, bool]:
    """Where tasks put their results: the spectrum cache directory (kept, so a rerun resumes), else a new
    temporary folder beside the output, named like the project's temporary files (removed at the end)."""
    if cache is not None:
        return cache.directory, False
    return create_temp_dir(beside, f".work{TEMP_SUFFIX}"), True


def _same_disk(a: Path, b: Path) -> bool:
    try:
        return os.stat(a).st_dev == os.stat(b).st_dev
    except OSError:
        return True


def _run(job: _Job, ckpt: Checkpoint, out_dir: Path, work: Path, finals: list[Path], metadata, force: bool):
    """Both passes and the write; returns (files written, passes)."""
    passes = 1
    if job.policy.budget is not None:
        job.plan_globally()
        passes = 2
    bound = sum(h.file_size for h in ckpt.files) + sum(job.reserve_for(h) for h in ckpt.files)
    output = bound if job.plan is None else job.planned_bytes()
    factors = job.factor_bytes()
    if _same_disk(out_dir, work):
        check_free_space(out_dir, output + factors, "the shrunk checkpoint and the factors in the work directory")
    else:
        check_free_space(out_dir, output, "the shrunk checkpoint")
        check_free_space(work, factors, "the factors in the work directory")
    job.factor_all()
    target_dir = finals[0].parent
    created_dir = not target_dir.exists()
    if created_dir:
        target_dir.mkdir(parents=False)
    try:
        written = job.write_all(finals, metadata, force=force)
    except BaseException:
        if created_dir:
            shutil.rmtree(target_dir, ignore_errors=True)
        raise
    return written, passes


def _outputs(ckpt: Checkpoint, dst: Path, force: bool) -> tuple[Path, list[Path]]:
    """Output directory and final file paths (one per input file, then the index for sharded input)."""
    inputs = {h.path.resolve() for h in ckpt.files} | ({ckpt.index.resolve()} if ckpt.index else set())
    if ckpt.index is None:
        if dst.resolve() in inputs:
            raise FactorizeError(f"{dst}: is the input checkpoint; it is never overwritten", fix="choose another output path")
        check_output_path(dst, force=force)
        return dst.parent if str(dst.parent) else Path("."), [dst]
    if dst.resolve() == ckpt.index.parent.resolve():
        raise FactorizeError(f"{dst}: is the input checkpoint's directory; its shards are never overwritten",
                             fix="choose another output directory")
    check_output_path(dst, force=force, directory=True)
    names = [h.path.name for h in ckpt.files]
    if len(set(names)) < len(names):  # shards of one name in several input folders: number them, never overwrite
        names = [f"{Path(n).stem}-{i:05d}-of-{len(names):05d}.safetensors" for i, n in enumerate(names, 1)]
    finals = [dst / n for n in names] + [dst / ckpt.index.name]
    return (dst if dst.exists() else dst.parent), finals


class _Job:
    """One shrink: the plan (built globally or per layer), the streamed writes, and the report."""

    def __init__(self, ckpt, chosen, policy, method, seed, precision, cache, progress, *, engine: Engine,
                 work_dir: Path, fault: Callable | None = None) -> None:
        self.ckpt, self.policy, self.method = ckpt, policy, method
        self.seed, self.precision, self.cache, self.progress = seed, precision, cache, progress
        self.engine, self.work_dir, self.fault = engine, work_dir, fault
        self.results: dict[str, dict] = {}  # tensor name -> its factor task's metadata
        self.values: dict[str, Spectrum] = {}  # values-first budget route: module -> its singular values
        self.redone: set[str] = set()
        self.reused = 0  # factor results found in the work directory (an earlier run's), not recomputed
        self.chosen = {c.weight.name: c for c in chosen}
        self.biases = {c.bias.name: c for c in chosen if c.bias is not None}
        self.sites = [c.site for c in chosen]
        partial = method in ("auto", "randomized")
        self.k = {s.name: (rank_needed(s, policy) if partial else None) for s in self.sites}  # as compress()
        self.plan: dict | None = None
        self.entries: dict[str, dict] = {}
        self.report: dict[str, dict] = {}
        self.params_before = sum(math.prod(t.shape) for h in ckpt.files for t in h.tensors.values())
        self.params_after = 0

    def _task(self, kind: str, c: _Candidate) -> _Task:
        s = c.site
        per_layer = kind == "factors" and self.plan is None
        return _Task(kind=kind, shard=str(c.weight_file.path), name=c.weight.name, site=s, method=self.method,
                     k=self.k[s.name], seed=self.seed, precision=self.precision, work_dir=str(self.work_dir),
                     cache_dir=str(self.cache.directory) if self.cache is not None else None,
                     entry=self.entries.get(c.module) if kind == "factors" and not per_layer else None,
                     policy=self.policy if per_layer else None, fault=self.fault,
                     values=self.values.get(c.module) if kind == "factors" else None)

    def _map(self, fn, kind: str, label: str) -> list[dict]:
        """One task per chosen matrix on the engine; results in the order of the matrices."""
        chosen = list(self.chosen.values())
        try:
            results = self.engine.map(fn, [self._task(kind, c) for c in chosen], label=label, progress=self.progress)
        except TasksFailed as e:
            names = [chosen[i].weight.name for i in e.unfinished]
            resume = ("rerunning with the same cache directory resumes: finished matrices are not redone"
                      if self.cache is not None else
                      "rerun with a cache directory (cache_dir= / --cache DIR) so that a later rerun resumes from "
                      "the matrices already finished")
            raise FactorizeError(f"{e.message}; matrices not finished:", names,
                                 fix=f"check the workers' memory and logs; {resume}") from None
        for c, r in zip(chosen, results):
            if r["attempts"] > 1:
                self.redone.add(c.weight.name)
            if self.cache is not None and r["cache"]:
                self.cache._count(**r["cache"])
        return results

    def plan_globally(self) -> None:
        """First pass (budget): every spectrum's singular values, then one plan for all layers."""
        results = self._map(_values_task, "values", "spectra")
        values = {c.module: r["values"] for c, r in zip(self.chosen.values(), results)}
        if self.method == "auto":  # values first: pass 2 computes only the kept vectors, guarded by these values
            self.values = values
        self.plan = choose_ranks(self.sites, values, self.policy, method=self.method)
        self.entries = dict(self.plan["sites"])

    def factor_all(self) -> None:
        """The factors of every chosen matrix into the work directory (the plan's ranks, or per layer)."""
        results = self._map(_factors_task, "factors", "factors")
        self.results = {c.weight.name: r for c, r in zip(self.chosen.values(), results)}
        self.reused = sum(1 for r in results if r["cached"])
        for c, r in zip(self.chosen.values(), results):
            self.entries.setdefault(c.module, r["entry"])

    def factor_bytes(self) -> int:
        """Bound on the factor files the tasks write: exact with a plan, else the weights' own size."""
        total = 0
        for c in self.chosen.values():
            e = self.entries.get(c.module)
            item = c.weight.nbytes // max(math.prod(c.weight.shape), 1)
            if e is None:
                total += c.weight.nbytes
            elif e["action"] == "factor":
                total += e["rank"] * sum(c.weight.shape) * item
        return total + 4096 * len(self.chosen)

    def planned_bytes(self) -> int:
        """Exact output size once the plan is known (budget), plus the header reserves."""
        total = 0
        for h in self.ckpt.files:
            total += self.reserve_for(h)
            for name, info in h.tensors.items():
                c = self.chosen.get(name)
                e = self.entries.get(c.module) if c else None
                if e is not None and e["action"] == "factor":
                    item = info.nbytes // max(math.prod(info.shape), 1)
                    total += e["rank"] * sum(info.shape) * item
                else:
                    total += info.nbytes
        return total

    def reserve_for(self, h: Header) -> int:
        sharded = self.ckpt.index is not None
        n = 1024 if sharded else _plan_bound(self.sites, self.policy) + 1024
        for name, info in h.tensors.items():
            c = self.chosen.get(name)
            n += _entry_bound(name, len(info.shape))
            if c is not None:
                n += 2 * _entry_bound(c.module + ".second.weight", 2)
                if c.bias is not None:
                    n += 2 * _entry_bound(c.module + ".second.bias", 1)
        return n

    def write_all(self, finals: list[Path], metadata: Mapping[str, str] | None, *, force: bool) -> list[Path]:
        """Write every output file to a temporary name, then rename them all into place (index last)."""
        from factorize._version import __version__

        sharded = self.ckpt.index is not None
        temps: list[Path] = []
        writers: list[_StreamWriter] = []
        done: list[Path] = []
        weight_map: dict[str, str] = {}
        try:
            for h, final in zip(self.ckpt.files, finals):
                w = _StreamWriter(final, self.reserve_for(h))
                writers.append(w)
                self._write_file(h, w)
                weight_map.update({name: final.name for name in w.entries})
                if not sharded:
                    meta = checkpoint_metadata(self._final_plan(), None, metadata)
                else:
                    meta = {KEY_FORMAT: FORMAT_NAME, KEY_VERSION: str(FORMAT_VERSION),
                            KEY_PLAN_IN: finals[-1].name, KEY_LIBRARY: __version__}
                w.finish(meta)
                temps.append(w.tmp)
            if sharded:
                total = sum(w.offset for w in writers)
                temps.append(self._write_index(finals[-1], weight_map, total, metadata))
            for tmp, final in zip(temps, finals):
                publish(tmp, final, force=force)
                done.append(final)
        except OSError as e:
            self._cleanup(writers, temps, done)
            raise FactorizeError(f"{finals[0]}: writing the output failed ({e.strerror or e}); the input is "
                                 "untouched and nothing was left behind",
                                 fix="check free space and permissions, then retry") from e
        except BaseException:
            self._cleanup(writers, temps, done)
            raise
        return done

    @staticmethod
    def _cleanup(writers, temps, done) -> None:
        for w in writers:
            w.abort()
        for p in list(temps) + list(done):
            remove_quietly(p)

    def _final_plan(self) -> dict:
        if self.plan is None:
            self.plan = {"format": PLAN_FORMAT, "version": PLAN_VERSION, "method": self.method,
                         "policy": self.policy.to_dict(), "sites": {s.name: self.entries[s.name] for s in self.sites}}
        return self.plan

    def _write_index(self, final: Path, weight_map: dict[str, str], total: int, metadata) -> Path:
        meta = {"total_size": total, **checkpoint_metadata(self._final_plan(), None, metadata)}
        tmp, fd = create_temp(final)
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            json.dump({"metadata": meta, "weight_map": dict(sorted(weight_map.items()))}, f, indent=2)
            f.flush()
            os.fsync(f.fileno())
        return tmp

    def _write_file(self, h: Header, w: _StreamWriter) -> None:
        names = [n for n in h.tensors if n not in self.biases]  # a layer's bias travels with its weight
        for name in tqdm(names, desc=h.path.name, unit="tensor", disable=not self.progress, leave=False):
            c = self.chosen.get(name)
            if c is None:
                t = _read(h, name)
                w.add(name, t)
                self.params_after += t.numel()
            else:
                self._write_layer(c, w)

    def _write_layer(self, c: _Candidate, w: _StreamWriter) -> None:
        """One layer into the output: its factors from the task's result file, or the weight unchanged."""
        done = self.results[c.weight.name]
        entry = self.entries[c.module]
        bias = _read(c.bias_file, c.bias.name) if c.bias is not None else None
        row = {"module": c.module, "shape": list(c.weight.shape), "action": entry["action"], "rank": entry["rank"],
               "predicted_error": float(entry.get("predicted_error", 0.0)), "relative_error": done["relative_error"]}
        if entry["action"] == "factor":
            with safe_open(done["file"], framework="pt", device="cpu") as f:
                A = f.get_tensor("first")  # (r, in)
                w.add(c.module + ".first.weight", A)
                self.params_after += A.numel()
                del A
                B = f.get_tensor("second")  # (out, r)
                w.add(c.module + ".second.weight", B)
                self.params_after += B.numel()
                del B
            if bias is not None:
                w.add(c.module + ".second.bias", bias)
        else:
            W = _read(c.weight_file, c.weight.name)
            w.add(c.weight.name, W)
            self.params_after += W.numel()
            if bias is not None:
                w.add(c.bias.name, bias)
        if bias is not None:
            self.params_after += bias.numel()
        self.report[c.weight.name] = row



def checkpoint_spectra(
    src: str | os.PathLike,
    *,
    include: str | Iterable[str] | None = None,
    exclude: str | Iterable[str] | None = None,
    method: str = "exact",
    seed: int = 0,
    progress: bool = False,
) -> tuple[list[Site], dict[str, Spectrum], dict[str, str]]:
    """The spectra of a checkpoint's linear-layer weights (as :func:`select` chooses them), one tensor at a time.

    What a weights-only scan or sweep needs: the sites, their spectra (for :func:`factorize.plan.ranks.choose_ranks`
    at any policy) and the tensors passed over with the reason. Raises when no tensor is selected. With
    ``method="auto"`` (the sweep's default) the spectra hold every singular value but no vectors
    (:func:`factorize.spectra.decompose.values_only`): planning needs nothing more.
    """
    chosen, passed = select(open_checkpoint(src), include, exclude)
    if not chosen:
        raise FactorizeError(f"{src}: no 2-D tensor named <module>.weight matches the patterns",
                             [f"{k}: {v}" for k, v in passed.items()],
                             fix="check the include/exclude patterns against the tensor names")
    def one(c: _Candidate) -> Spectrum:
        W = _read(c.weight_file, c.weight.name)  # (out, in)
        if method == "auto":  # as a budget in compress(): every singular value, no vectors (all a plan needs)
            return values_only(W, name=c.module)
        return decompose(W, name=c.module, method=method, seed=seed)

    spectra = {c.module: one(c) for c in tqdm(chosen, desc="decompose", unit="layer", disable=not progress,
                                                leave=False)}
    return [c.site for c in chosen], spectra, passed


def stream_report(done: Mapping, source: str) -> Report:
    """A :class:`~factorize.measure.report.Report` of a :func:`shrink_checkpoint` result: sizes and predicted
    (Eckart-Young) weight errors only, since there is no architecture to run."""
    layers = []
    for row in done["tensors"].values():
        m, n = row["shape"]
        rank = row["rank"] if row["action"] == "factor" else None
        layers.append(LayerReport(name=row["module"], kind="linear", shape=(m, n), rank=rank, params=m * n,
                                  params_after=m * n if rank is None else rank * (m + n),
                                  weight_error=row.get("relative_error", 0.0 if rank is None else None),
                                  predicted_error=row.get("predicted_error")))
    notes = [WEIGHTS_ONLY_NOTE]
    where = done.get("engine") or {}
    if where.get("engine", "local") != "local":
        notes.append(f"ran as tasks on {where['engine']} at {where['address']} with {where['workers']} worker(s), "
                     f"{where['threads_per_task']} torch thread(s) per task")
    if done.get("redone"):
        notes.append("redone after a worker was lost or an earlier run stopped part way: "
                     + ", ".join(done["redone"]))
    return Report(title="factorize shrink (weights-only)", model=source, params_before=done["params_before"],
                  params_after=done["params_after"], bytes_before=done["bytes_before"],
                  bytes_after=done["bytes_after"], layers=layers, policy=done["plan"]["policy"], notes=notes)


WEIGHTS_ONLY_NOTE = ("weights-only mode: there is no architecture to run, so output drift was not measured; load the "
                     "output into your model with factorize.load(model, path) and run 'factorize compare' on real "
                     "inputs")
