"""Writing a shrunk checkpoint tensor by tensor: the streamed safetensors writer and the checkpoint writer.

:class:`ShardWriter` writes one safetensors file tensor by tensor, header last (into space reserved at the start,
padded with spaces as the safetensors spec allows), so no tensor is held longer than it takes to write it.
:class:`CheckpointWriter` writes a whole checkpoint: every input file becomes an output file of the same tensor
order, a factored layer's weight replaced by ``<module>.first.weight`` (r, in) = A and
``<module>.second.weight`` (out, r) = B (its bias becoming ``<module>.second.bias``) -- the state-dict keys of
:class:`factorize.rewrite.layers.Factored` -- read from a factor file (keys ``first`` and ``second``). A sharded
input gives a sharded output with the index (and the plan) written last. Every file goes to a temporary name;
only when all are complete are they renamed into place, so a failure leaves nothing.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import shutil
from collections.abc import Callable, Mapping
from pathlib import Path

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
)
from factorize.errors import FactorizeError, printable
from factorize.model.sites import Site
from factorize.outofcore.candidates import Candidate
from factorize.outofcore.tasks import FORMS_KEY
from factorize.plan.entries import entry_form, is_factored_entry
from factorize.plan.policy import Policy
from factorize.storage import (
    DTYPE_NAMES,
    Header,
    create_temp,
    publish,
    read_header,
    read_tensor,
    remove_quietly,
    safetensors_header,
)


class ShardWriter:
    """Write a safetensors file tensor by tensor, header last.

    Data starts after ``reserve`` bytes; at the end the header (8-byte little-endian length, JSON) is written
    into that space, padded with spaces -- the safetensors spec allows trailing whitespace in the header. If the
    header turns out larger than the reserve, the data is copied behind a fresh header instead.
    """

    def __init__(self, final: Path, reserve: int) -> None:
        self.final = final
        self.reserve = align8(max(reserve, 64))
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
            with contextlib.suppress(OSError):
                self.f.close()  # flushing what is buffered can fail again (a full disk, a size limit)
        remove_quietly(self.tmp)


def align8(n: int) -> int:
    """``n`` rounded up to a multiple of 8 (safetensors aligns the data section to 8 bytes)."""
    return (n + 7) // 8 * 8


def entry_bound(name: str, ndim: int) -> int:
    """Upper bound on one header entry's JSON length (numbers at 20 digits, the longest dtype name)."""
    big = 10**19
    return len(json.dumps({name: {"dtype": "F8_E4M3", "shape": [big] * ndim, "data_offsets": [big, big]}},
                          separators=(",", ":"))) + 2


def plan_bound(sites: list[Site], policy: Policy) -> int:
    """Generous bound on the plan's JSON length (fixed keys, reasons and numbers per site)."""
    patterns = sum(len(o.pattern) for o in policy.overrides)
    return 4096 + sum(1024 + 2 * len(s.name) + patterns for s in sites)


STORED_KEYS = 8  # most tensors a layer's stored form holds (corrected: base q, scale, bias; first and second q)
STORED_ROW_KEYS = ("precision", "bytes", "bytes_after", "correction_rank")  # copied from a bytes plan's entry
FactorsOf = Callable[[Candidate, dict], tuple[str | None, float]]  # (layer, plan entry) -> (factor file, error)


class CheckpointWriter:
    """Write a shrunk checkpoint: factors where the plan factors a layer, every other tensor copied unchanged.

    ``factors_of(candidate, entry)`` gives a factored layer's factor file (``first`` (r, in), ``second``
    (out, r), in the weight's dtype) and its measured relative error. ``plan_reserve`` is the header space kept
    for the plan in a single-file output (:func:`plan_bound`). After :meth:`write_all`, ``report`` holds one row
    per candidate and ``params_after`` the parameters written.
    """

    def __init__(self, ckpt: Checkpoint, chosen: list[Candidate], factors_of: FactorsOf, *, plan_reserve: int,
                 progress: bool = False, stored_forms: bool = False,
                 drop: frozenset[str] = frozenset()) -> None:
        self.ckpt, self.factors_of, self.plan_reserve, self.progress = ckpt, factors_of, plan_reserve, progress
        self.stored_forms = stored_forms  # a bytes plan: up to STORED_KEYS tensors a layer, with longer names
        self.drop = drop  # tensors left out of the output (ones the model does not have, e.g. legacy buffers)
        self.chosen = {c.weight.name: c for c in chosen}
        self.biases = {c.bias.name: c for c in chosen if c.bias is not None}
        self.report: dict[str, dict] = {}
        self.params_before = sum(math.prod(t.shape) for h in ckpt.files for t in h.tensors.values())
        self.params_after = 0
        self.entries: dict[str, dict] = {}

    def planned_bytes(self, entries: Mapping[str, dict]) -> int:
        """Exact output size for the plan ``entries`` (module -> entry), plus the header reserves."""
        total = 0
        for h in self.ckpt.files:
            total += self.reserve_for(h)
            for name, info in h.tensors.items():
                if name in self.drop:
                    continue
                c = self.chosen.get(name)
                e = entries.get(c.module) if c else None
                if e is not None and "bytes_after" in e:  # a bytes plan: the stored form's exact bytes
                    total += int(e["bytes_after"])
                elif is_factored_entry(e):
                    item = info.nbytes // max(math.prod(info.shape), 1)
                    total += e["rank"] * sum(info.shape) * item
                else:
                    total += info.nbytes
        return total

    def reserve_for(self, h: Header) -> int:
        """Header space to reserve for the output of input file ``h`` (every entry at its longest)."""
        n = 1024 if self.ckpt.index is not None else self.plan_reserve + 1024
        for name, info in h.tensors.items():
            c = self.chosen.get(name)
            n += entry_bound(name, len(info.shape))
            if c is not None and self.stored_forms:
                n += STORED_KEYS * entry_bound(c.module + ".second.stored_weight.scale", 2)
            elif c is not None:
                n += 2 * entry_bound(c.module + ".second.weight", 2)
                if c.bias is not None:
                    n += 2 * entry_bound(c.module + ".second.bias", 1)
        return n

    def write_all(self, finals: list[Path], plan: dict, metadata: Mapping[str, str] | None, *,
                  force: bool, side: list[tuple[Path, Path]] = ()) -> list[Path]:
        """Write every output file to a temporary name, then rename them all into place (index last). ``side``:
        (source, destination) of files copied unchanged beside them (a transformers directory's config and
        tokenizer), published before the weights."""
        self.entries = dict(plan["sites"])
        temps: list[Path] = []
        writers: list[ShardWriter] = []
        done: list[Path] = []
        try:
            for src, dst in side:
                temps.append(copy_to_temp(src, dst))
            self._write_files(finals, plan, metadata, writers, temps)
            for tmp, final in zip(temps, [dst for _, dst in side] + finals):
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
        return done[len(side):]

    def _write_files(self, finals: list[Path], plan: dict, metadata, writers: list, temps: list) -> None:
        from factorize._version import __version__

        sharded = self.ckpt.index is not None
        weight_map: dict[str, str] = {}
        for h, final in zip(self.ckpt.files, finals):
            w = ShardWriter(final, self.reserve_for(h))
            writers.append(w)
            self._write_file(h, w)
            weight_map.update(dict.fromkeys(w.entries, final.name))
            if not sharded:
                meta = checkpoint_metadata(plan, None, metadata)
            else:
                meta = {KEY_FORMAT: FORMAT_NAME, KEY_VERSION: str(FORMAT_VERSION),
                        KEY_PLAN_IN: finals[-1].name, KEY_LIBRARY: __version__}
            w.finish(meta)
            temps.append(w.tmp)
        if sharded:
            total = sum(w.offset for w in writers)
            temps.append(_write_index(finals[-1], plan, weight_map, total, metadata))

    @staticmethod
    def _cleanup(writers, temps, done) -> None:
        for w in writers:
            w.abort()
        for p in list(temps) + list(done):
            remove_quietly(p)

    def _write_file(self, h: Header, w: ShardWriter) -> None:
        names = [n for n in h.tensors if n not in self.biases and n not in self.drop]  # a bias goes with its weight
        for name in tqdm(names, desc=printable(h.path.name), unit="tensor", disable=not self.progress, leave=False):
            c = self.chosen.get(name)
            if c is None:
                t = read_tensor(h.path, name)
                w.add(name, t)
                self.params_after += t.numel()
            else:
                self._write_layer(c, w)

    def _write_layer(self, c: Candidate, w: ShardWriter) -> None:
        """One layer into the output: its factors (or stored form) from its result file, or the weight unchanged."""
        entry = self.entries[c.module]
        file, error = self.factors_of(c, entry)
        bias = c.read_bias()
        row = {"module": c.module, "shape": list(c.weight.shape), "action": entry_form(entry), "rank": entry["rank"],
               "predicted_error": float(entry.get("predicted_error", 0.0)), "relative_error": error}
        row.update({k: entry[k] for k in STORED_ROW_KEYS if k in entry})
        if file is not None and FORMS_KEY in read_header(file).metadata:  # a stored form (cost="bytes")
            self._write_stored(c, file, entry, w)  # the bias among its tensors
        elif is_factored_entry(entry):
            with safe_open(file, framework="pt", device="cpu") as f:
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
            W = c.read_weight()
            w.add(c.weight.name, W)
            self.params_after += W.numel()
            if bias is not None:
                w.add(c.bias.name, bias)
        if bias is not None:
            self.params_after += bias.numel()
        self.report[c.weight.name] = row

    def _write_stored(self, c: Candidate, file: str, entry: dict, w: ShardWriter) -> None:
        """A layer in its planned stored form: the tensors of its state dict, in the order the task recorded,
        under ``<module>.<suffix>`` (the bias among them); parameters counted as the plan counts them."""
        names = json.loads(read_header(file).metadata[FORMS_KEY])
        with safe_open(file, framework="pt", device="cpu") as f:
            for suffix in names:
                w.add(f"{c.module}.{suffix}", f.get_tensor(suffix))
        self.params_after += int(entry["params_after"])


def copy_to_temp(src: Path, final: Path) -> Path:
    """A byte-for-byte copy of ``src`` under a temporary name beside ``final`` (its folder created if needed)."""
    final.parent.mkdir(parents=True, exist_ok=True)
    tmp, fd = create_temp(final)
    with os.fdopen(fd, "wb") as f, open(src, "rb") as g:
        shutil.copyfileobj(g, f, 16 * 2**20)
        f.flush()
        os.fsync(f.fileno())
    return tmp


def _write_index(final: Path, plan: dict, weight_map: dict[str, str], total: int, metadata) -> Path:
    meta = {"total_size": total, **checkpoint_metadata(plan, None, metadata)}
    tmp, fd = create_temp(final)
    with os.fdopen(fd, "w", encoding="utf-8") as f:
        json.dump({"metadata": meta, "weight_map": dict(sorted(weight_map.items()))}, f, indent=2)
        f.flush()
        os.fsync(f.fileno())
    return tmp
