"""Weights-only mode: shrink a bare safetensors checkpoint without the model's code.

Every selected 2-D floating tensor ``<module>.weight`` of shape (out, in) is treated as the weight of a linear
layer. Where the plan factors it, the output holds ``<module>.first.weight`` (r, in) = A and
``<module>.second.weight`` (out, r) = B, and ``<module>.bias`` becomes ``<module>.second.bias`` -- exactly the
state-dict keys of :class:`factorize.rewrite.layers.Factored` -- so ``factorize.checkpoints.files.load(model, output)``
loads the result into the user's architecture (the plan in the metadata says kind ``"linear"`` and the shape).
Every other tensor is copied unchanged. Layers that are not ``nn.Linear`` in the user's model (embeddings, GPT-2's
transposed ``Conv1D``) must be excluded, or the load reports the mismatch.

Memory: tensors are streamed one at a time from the memory-mapped input (``safetensors.safe_open``, opened per
tensor so no mapping outlives its tensor) and written straight to the output file, whose header is filled in
last (into space reserved at the start of the file, padded with spaces as the safetensors spec allows). Peak
memory is about one tensor's decomposition working set, not the checkpoint's size.

A budget in bytes (``cost="bytes"``): the first pass prices every matrix's candidate forms (dense, factored,
rounded plus a correction, at each allowed stored precision) in a task, the joint planner of
:mod:`factorize.plan.forms` picks one per layer, and the second pass builds each layer's form in a task with
:func:`factorize.rewrite.apply.apply_plan` on a one-layer model -- so the plan and the stored tensors are those of
``compress(model, cost="bytes")``.

Policies: ``rank``, ``keep`` and ``energy`` decide each layer from its own spectrum, so one pass suffices. A
``budget`` compares all layers, so it needs every spectrum before any rank is known: the first pass keeps only
the singular values (k floats per layer) and the second decomposes again to get the factors. That second
decomposition is the price of bounded memory; with ``cache_dir`` the first pass stores each spectrum on disk
and the second pass reads it back instead (disk for time: see :mod:`factorize.spectra.cache`).

Tasks: the per-matrix work of both passes runs as tasks (:mod:`factorize.outofcore.tasks`) on an engine
(:mod:`factorize.cluster`): this process by
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

import math
import os
import shutil
from collections.abc import Callable
from pathlib import Path
from typing import Any

from factorize.checkpoints.directories import extra_files
from factorize.checkpoints.files import Checkpoint, open_checkpoint
from factorize.cluster import Engine, TasksFailed, open_engine, parse_cluster
from factorize.errors import FactorizeError
from factorize.outofcore.candidates import Candidate, select
from factorize.outofcore.options import StreamOptions, split_keywords
from factorize.outofcore.results import CheckpointShrink
from factorize.outofcore.tasks import MatrixTask, factors_task, forms_task, price_task, values_task
from factorize.outofcore.writer import CheckpointWriter, plan_bound
from factorize.plan.entries import is_factored_entry
from factorize.plan.forms import Priced, joint_plan, layer_budget, native_precision
from factorize.plan.policy import Policy, rank_needed, resolve_policy, values_first
from factorize.plan.ranks import PLAN_FORMAT, PLAN_VERSION, choose_ranks
from factorize.spectra.cache import SpectrumCache, as_cache
from factorize.spectra.decompose import METHODS, Spectrum
from factorize.storage import TEMP_SUFFIX, check_free_space, check_output_path, create_temp_dir
from factorize.storage.proc import return_freed_memory


def shrink_checkpoint(
    src: str | os.PathLike,
    dst: str | os.PathLike,
    policy: Policy | None = None,
    options: StreamOptions | None = None,
    *,
    _fault: Callable | None = None,
    **keywords: Any,
) -> CheckpointShrink:
    """Factor the linear-layer weights of a safetensors checkpoint, streaming, without the model's code.

    Args:
        src: a ``.safetensors`` file, a ``*.safetensors.index.json``, or a directory holding one of them.
        dst: the output file (single-file input) or directory (sharded input); refused if it exists unless
            ``force``, and never the input itself.
        policy: a :class:`~factorize.plan.policy.Policy`, or its keywords as in :func:`factorize.compress`
            (budget / rank / energy / keep, multiple, overrides, seed); include / exclude match module names
            (``layers.*.mlp.*``) or tensor names; method ``"auto"`` (default), ``"exact"``, ``"gram"`` or
            ``"randomized"``. ``cost="bytes"`` (with ``budget`` and optionally ``precisions``) chooses rank and
            stored precision together, as :func:`factorize.compress` does with the plain error measure, and writes
            each layer's stored form (docs/precision.md, "Out of core"). ``cost="macs"`` / ``"latency"`` and the
            activation-aware methods are refused: there is no model to run here.
        options: a :class:`~factorize.outofcore.options.StreamOptions`, or its fields as keywords:
            ``precision`` (as in :func:`factorize.spectra.decompose.decompose`); ``force``; ``cache_dir`` (a
            spectrum cache directory or :class:`~factorize.spectra.cache.SpectrumCache` to reuse decompositions
            across runs); ``metadata`` (extra string entries for the output's metadata); ``progress`` (a bar on
            stderr); ``cluster`` (where the per-matrix tasks run, :func:`factorize.cluster.open_engine`: None, this
            process; ``N`` or ``"local:N"``, a Dask local cluster of N worker processes; ``"tcp://host:port"``, a
            running Dask scheduler; a ``distributed.Client`` or an :class:`~factorize.cluster.Engine`; the
            checkpoint and the work directory (``cache_dir`` if given, else a temporary folder beside ``dst``) must
            be at the same path on every worker; the output is byte-identical whichever engine ran the tasks);
            ``threads`` (torch threads per task, pinned in every engine so the arithmetic is the same everywhere;
            None leaves torch's setting alone).

    Returns:
        a :class:`~factorize.outofcore.results.CheckpointShrink`: the plan, one row per selected tensor
        (``relative_error`` measured on the stored factors: ||W - BA||_F / ||W||_F), the tensors passed over, the
        files, sizes and passes, the cache's counts, where the tasks ran and which were redone.
    """
    options, keywords = split_keywords(StreamOptions, options, keywords)
    policy = resolve_policy(policy, keywords)
    if policy.method not in METHODS:
        raise FactorizeError(f"unknown method {policy.method!r} for a checkpoint without its model (activation-aware "
                             "methods need the model and calibration inputs)", fix=f"use one of {', '.join(METHODS)}")
    if policy.cost == "macs":
        raise FactorizeError("cost='macs' needs the model to count multiply-accumulates; a checkpoint alone has none",
                             fix="use cost='params', or load the model and call factorize.compress(cost='macs', "
                                 "example=batch)")
    if policy.cost not in ("params", "bytes"):
        raise FactorizeError(f"cost={policy.cost!r} measures the model running, and a checkpoint alone has none",
                             fix=f"use cost='params' or cost='bytes', or load the model and call factorize.compress("
                                 f"cost={policy.cost!r})")
    return_freed_memory()  # freed blocks go back to the system: peaks stay flat run after run (storage.proc)
    ckpt = open_checkpoint(src)
    as_directory = ckpt.index is not None or Path(src).is_dir()  # a directory in (or an index): a directory out
    out_dir, finals = _outputs(ckpt, Path(dst), options.force, as_directory=as_directory)
    side = side_files(ckpt, finals[0].parent if as_directory else None)
    chosen, passed = select(ckpt, policy.include, policy.exclude)
    if not chosen:
        raise FactorizeError(
            f"{src}: no 2-D floating tensor named <module>.weight matches the include/exclude patterns",
            [f"{k}: {v}" for k, v in passed.items()],
            fix="check the patterns against the tensor names (safetensors.safe_open(path).keys())",
        )
    threads, cluster = options.threads, options.cluster
    if threads is not None and (isinstance(threads, bool) or not isinstance(threads, int) or threads < 1):
        raise FactorizeError(f"threads={threads!r} is not a positive whole number", fix="pass threads=1 (or None)")
    parse_cluster(cluster)  # a malformed value is refused before a cluster is started or anything written
    engine = open_engine(cluster, threads=threads)
    try:
        cache = as_cache(options.cache_dir)
        work, temporary = _work_directory(cache, finals[0].parent if as_directory else finals[0])
        try:
            job = _Job(ckpt, chosen, policy, options, cache, engine=engine, work_dir=work, fault=_fault)
            written, passes = _run(job, ckpt, out_dir, work, finals, side, options)
        finally:
            if temporary:
                shutil.rmtree(work, ignore_errors=True)
        where = engine.describe()
    finally:
        if not isinstance(cluster, Engine):
            engine.close()
    return CheckpointShrink(
        plan=job.plan, tensors=job.writer.report, passed_over=passed, files=[str(p) for p in written],
        bytes_before=ckpt.nbytes, bytes_after=sum(p.stat().st_size for p in written),
        params_before=job.writer.params_before, params_after=job.writer.params_after, passes=passes,
        cache={**cache.stats(), "results_reused": job.reused} if cache is not None else None, engine=where,
        redone=sorted(job.redone))


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


def _run(job: _Job, ckpt: Checkpoint, out_dir: Path, work: Path, finals: list[Path], side: list[tuple[Path, Path]],
         options: StreamOptions):
    """Both passes and the write; returns (files written, passes)."""
    metadata, force = options.metadata, options.force
    passes = 1
    if job.policy.budget is not None:
        job.plan_globally()
        passes = 2
    bound = sum(h.file_size for h in ckpt.files) + sum(job.writer.reserve_for(h) for h in ckpt.files)
    output = bound if job.plan is None else job.writer.planned_bytes(job.entries)
    output += sum(src.stat().st_size for src, _ in side)
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
        written = job.writer.write_all(finals, job.final_plan(), metadata, force=force, side=side)
    except BaseException:
        if created_dir:
            shutil.rmtree(target_dir, ignore_errors=True)
        raise
    return written, passes


def _outputs(ckpt: Checkpoint, dst: Path, force: bool, *, as_directory: bool = False) -> tuple[Path, list[Path]]:
    """Output directory and final file paths (one per input file, then the index for sharded input). A directory
    given as the input gives a directory as the output, even when it holds a single file (under the same name)."""
    inputs = {h.path.resolve() for h in ckpt.files} | ({ckpt.index.resolve()} if ckpt.index else set())
    if ckpt.index is None and as_directory:  # a directory holding one file
        if dst.resolve() == ckpt.files[0].path.parent.resolve():
            raise FactorizeError(f"{dst}: is the input checkpoint's directory; its files are never overwritten",
                                 fix="choose another output directory")
        check_output_path(dst, force=force, directory=True)
        return (dst if dst.exists() else dst.parent), [dst / ckpt.files[0].path.name]
    if ckpt.index is None:
        if dst.resolve() in inputs:
            raise FactorizeError(f"{dst}: is the input checkpoint; it is never overwritten",
                                 fix="choose another output path")
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


def side_files(ckpt: Checkpoint, out_dir: Path | None) -> list[tuple[Path, Path]]:
    """(source, destination) of the files a directory output ``out_dir`` takes over from the input's directory, so
    that :func:`factorize.checkpoints.directories.load_directory` rebuilds the model from it: ``config.json`` and
    every file :func:`~factorize.checkpoints.directories.extra_files` names (generation config, tokenizer, module
    configs, README; never the original weights). Nothing for a single-file output (``out_dir`` None), or when
    the input's directory holds no ``config.json`` (not a transformers directory: its other files are not the
    model's)."""
    source = (ckpt.index or ckpt.files[0].path).parent
    if out_dir is None or not (source / "config.json").is_file():
        return []
    return [(source / rel, out_dir / rel) for rel in [Path("config.json"), *extra_files(source)]]


class _Job:
    """One shrink: the plan (built globally or per layer), the tasks on the engine, and the writer."""

    def __init__(self, ckpt: Checkpoint, chosen: list[Candidate], policy: Policy, options: StreamOptions,
                 cache: SpectrumCache | None, *, engine: Engine, work_dir: Path, fault: Callable | None = None) -> None:
        self.ckpt, self.policy, self.method = ckpt, policy, policy.method
        self.precision, self.cache, self.progress = options.precision, cache, options.progress
        self.engine, self.work_dir, self.fault = engine, work_dir, fault
        self.results: dict[str, dict] = {}  # tensor name -> its factor task's metadata
        self.values: dict[str, Spectrum] = {}  # values-first budget route: module -> its singular values
        self.redone: set[str] = set()
        self.reused = 0  # factor results found in the work directory (an earlier run's), not recomputed
        self.chosen = {c.weight.name: c for c in chosen}
        self.sites = [c.site for c in chosen]
        partial = self.method in ("auto", "randomized")
        self.k = {s.name: (rank_needed(s, policy) if partial else None) for s in self.sites}  # as compress()
        self.bytes = policy.cost == "bytes"  # rank and stored precision chosen together (plan.forms)
        if self.bytes:  # as compress() prices a layer: every vector pair, from the Gram route under "auto"
            self.k = dict.fromkeys(self.k)
        self.task_method = "gram" if self.bytes and self.method == "auto" else self.method
        self.plan: dict | None = None
        self.entries: dict[str, dict] = {}
        self.writer = CheckpointWriter(ckpt, chosen, self._factors_of, plan_reserve=plan_bound(self.sites, policy),
                                       progress=options.progress, stored_forms=self.bytes)

    def _factors_of(self, c: Candidate, entry: dict) -> tuple[str | None, float]:
        done = self.results[c.weight.name]
        return done["file"], done["relative_error"]

    def _task(self, kind: str, c: Candidate) -> MatrixTask:
        s = c.site
        per_layer = kind == "factors" and self.plan is None
        return MatrixTask(kind=kind, shard=str(c.weight_file.path), name=c.weight.name, site=s,
                          method=self.task_method, k=self.k[s.name], seed=self.policy.seed, precision=self.precision,
                          work_dir=str(self.work_dir),
                          cache_dir=str(self.cache.directory) if self.cache is not None else None,
                          entry=self.entries.get(c.module) if kind in ("factors", "forms") and not per_layer else None,
                          policy=self.policy if per_layer or kind == "price" else None, fault=self.fault,
                          values=self.values.get(c.module) if kind == "factors" else None,
                          values_first=kind == "values" and values_first(self.policy),
                          bias_shard=str(c.bias_file.path) if kind == "forms" and c.bias is not None else None,
                          bias_name=c.bias.name if kind == "forms" and c.bias is not None else None)

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
                self.cache.add_counts(**r["cache"])
        return results

    def plan_globally(self) -> None:
        """First pass (budget): every spectrum's singular values, then one plan for all layers."""
        if self.bytes:
            self._plan_bytes()
            return
        results = self._map(values_task, "values", "spectra")
        values = {c.module: r["values"] for c, r in zip(self.chosen.values(), results)}
        if values_first(self.policy):  # pass 2 computes only the kept vectors, guarded by these values
            self.values = values
        self.plan = choose_ranks(self.sites, values, self.policy, method=self.method)
        self.entries = dict(self.plan["sites"])

    def _plan_bytes(self) -> None:
        """A budget in bytes: every matrix's candidate forms priced in a task (the plain error measure: no
        calibration here), then the joint plan of rank and stored precision, as :func:`factorize.compress` makes
        it (:func:`factorize.plan.forms.joint_plan`)."""
        results = self._map(price_task, "price", "price")
        names = [c.module for c in self.chosen.values()]
        priced = Priced(candidates={n: r["candidates"] for n, r in zip(names, results)},
                        natives={c.module: native_precision(c.weight.torch_dtype) for c in self.chosen.values()},
                        scales={n: r["scale"] for n, r in zip(names, results)},
                        notes={n: r["notes"] for n, r in zip(names, results) if r["notes"]})
        values = {n: r["values"] for n, r in zip(names, results)}
        self.plan = joint_plan(self.sites, priced, values, layer_budget(self.sites, priced, self.policy),
                               policy=self.policy.to_dict(), method=self.method)
        self.entries = dict(self.plan["sites"])

    def factor_all(self) -> None:
        """The factors of every chosen matrix into the work directory (the plan's ranks, or per layer); with a
        budget in bytes, each layer's planned stored form."""
        if self.bytes:
            results = self._map(forms_task, "forms", "forms")
        else:
            results = self._map(factors_task, "factors", "factors")
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
            elif "bytes_after" in e:  # a bytes plan: the stored form (its bias beside it)
                total += int(e["bytes_after"]) + (c.bias.nbytes if c.bias is not None else 0)
            elif is_factored_entry(e):
                total += e["rank"] * sum(c.weight.shape) * item
        return total + 4096 * len(self.chosen)

    def final_plan(self) -> dict:
        """The plan: the budget's, or (per-layer rules) one assembled from the entries the tasks chose."""
        if self.plan is None:
            self.plan = {"format": PLAN_FORMAT, "version": PLAN_VERSION, "method": self.method,
                         "policy": self.policy.to_dict(),
                         "sites": {s.name: self.entries[s.name] for s in self.sites}}
        return self.plan
