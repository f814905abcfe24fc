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

Sharded checkpoints (``*.safetensors.index.json`` with a ``weight_map``) give a sharded output in a directory:
one output shard per input shard (same file names), then the index, written last. Every file is written to a
temporary name first; only when all are complete are they renamed into place, so a failure leaves nothing.
"""

from __future__ import annotations

import fnmatch
import json
import math
import os
import shutil
from collections.abc import Iterable, Mapping
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
from factorize.spectra.decompose import METHODS, Spectrum, decompose
from factorize.storage import (
    DTYPE_NAMES,
    Header,
    TensorInfo,
    check_free_space,
    check_output_path,
    create_temp,
    publish,
    remove_quietly,
    safetensors_header,
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
    with safe_open(str(h.path), framework="pt", device="cpu") as f:
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

    Returns:
        ``{"plan", "tensors": {name: {shape, action, rank, predicted_error, relative_error}}, "passed_over",
        "files", "bytes_before", "bytes_after", "params_before", "params_after", "passes", "cache"}``.
        ``relative_error`` is measured on the stored factors: ||W - BA||_F / ||W||_F.
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
    cache = as_cache(cache_dir)
    job = _Job(ckpt, chosen, policy, method, seed, precision, cache, progress)
    passes = 1
    if policy.budget is not None:
        job.plan_globally()
        passes = 2
    bound = sum(h.file_size for h in ckpt.files) + sum(job.reserve_for(h) for h in ckpt.files)
    check_free_space(out_dir, bound if job.plan is None else job.planned_bytes(), "the shrunk checkpoint")
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
        "cache": cache.stats() if cache is not None else None,
    }


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

    def __init__(self, ckpt, chosen, policy, method, seed, precision, cache, progress) -> None:
        self.ckpt, self.policy, self.method = ckpt, policy, method
        self.seed, self.precision, self.cache, self.progress = seed, precision, cache, progress
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

    def _spectrum(self, c: _Candidate, W: torch.Tensor) -> Spectrum:
        s = c.site
        return _spectrum_for(W, s, self.method, self.k[s.name], self.seed, self.precision, self.cache)

    def plan_globally(self) -> None:
        """First pass (budget): every spectrum's singular values, then one plan for all layers."""
        values: dict[str, Spectrum] = {}
        for c in tqdm(list(self.chosen.values()), desc="spectra", unit="tensor", disable=not self.progress, leave=False):
            W = _read(c.weight_file, c.weight.name)  # (out, in)
            values[c.module] = _values_only(self._spectrum(c, W))
            del W
        self.plan = choose_ranks(self.sites, values, self.policy, method=self.method)
        self.entries = dict(self.plan["sites"])

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
        W = _read(c.weight_file, c.weight.name)  # (out, in)
        spec = self._spectrum(c, W)
        entry = self.entries.get(c.module)
        if entry is None:  # per-layer policy: decided from this layer's own spectrum
            one = choose_ranks([c.site], {c.module: spec}, self.policy, method=self.method)
            entry = self.entries[c.module] = one["sites"][c.module]
        bias = _read(c.bias_file, c.bias.name) if c.bias is not None else None
        row = {"module": c.module, "shape": list(c.weight.shape), "action": entry["action"], "rank": entry["rank"],
               "predicted_error": float(entry.get("predicted_error", 0.0))}
        if entry["action"] == "factor":
            B, A = spec.factors(entry["rank"])  # (out, r), (r, in)
            B, A = B.to(W.dtype).contiguous(), A.to(W.dtype).contiguous()
            w.add(c.module + ".first.weight", A)
            w.add(c.module + ".second.weight", B)
            row["relative_error"] = _relative_error(W, B, A)
            self.params_after += A.numel() + B.numel()
            if bias is not None:
                w.add(c.module + ".second.bias", bias)
        else:
            w.add(c.weight.name, W)
            row["relative_error"] = 0.0
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
    at any policy) and the tensors passed over with the reason. Raises when no tensor is selected.
    """
    chosen, passed = select(open_checkpoint(src), include, exclude)
    if not chosen:
        raise FactorizeError(f"{src}: no 2-D tensor named <module>.weight matches the patterns",
                             [f"{k}: {v}" for k, v in passed.items()],
                             fix="check the include/exclude patterns against the tensor names")
    spectra = {c.module: decompose(_read(c.weight_file, c.weight.name), name=c.module, method=method, seed=seed)
               for c in tqdm(chosen, desc="decompose", unit="layer", disable=not progress, leave=False)}
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
    return Report(title="factorize shrink (weights-only)", model=source, params_before=done["params_before"],
                  params_after=done["params_after"], bytes_before=done["bytes_before"],
                  bytes_after=done["bytes_after"], layers=layers, policy=done["plan"]["policy"],
                  notes=[WEIGHTS_ONLY_NOTE])


WEIGHTS_ONLY_NOTE = ("weights-only mode: there is no architecture to run, so output drift was not measured; load the "
                     "output into your model with factorize.load(model, path) and run 'factorize compare' on real "
                     "inputs")
