"""safetensors files: the header, parsed and checked, and a deterministic writer.

The layout (the open safetensors format): an 8-byte little-endian header length, a UTF-8 JSON header mapping each
tensor name to its dtype, shape and byte offsets (plus optional string ``__metadata__``), then the data.
:func:`read_header` checks every entry before any tensor is read, so a truncated or corrupt file is named with
what is wrong instead of failing deep inside a reader; :func:`write_safetensors` and :func:`safetensors_header`
write the same bytes for the same tensors; :func:`read_tensor` reads one tensor through a memory map that is
released when it returns.
"""

from __future__ import annotations

import json
import os
import struct
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

import torch

from factorize.errors import FactorizeError, printable

# safetensors dtype names (the open format's spec) -> torch dtype
DTYPES: dict[str, torch.dtype] = {
    "F64": torch.float64, "F32": torch.float32, "F16": torch.float16, "BF16": torch.bfloat16,
    "I64": torch.int64, "I32": torch.int32, "I16": torch.int16, "I8": torch.int8, "U8": torch.uint8,
    "BOOL": torch.bool,
}


for _name, _attr in (("U16", "uint16"), ("U32", "uint32"), ("U64", "uint64"), ("F8_E4M3", "float8_e4m3fn"),
                     ("F8_E5M2", "float8_e5m2")):
    if hasattr(torch, _attr):
        DTYPES[_name] = getattr(torch, _attr)
DTYPE_NAMES: dict[torch.dtype, str] = {v: k for k, v in DTYPES.items()}


MAX_HEADER_BYTES = 100_000_000  # the reference reader's own limit on the JSON header


@dataclass(frozen=True)
class TensorInfo:
    """One tensor entry of a safetensors header."""

    name: str
    dtype: str  # safetensors name, e.g. "F32"
    shape: tuple[int, ...]
    start: int  # byte offsets within the data section
    end: int

    @property
    def nbytes(self) -> int:
        return self.end - self.start

    @property
    def torch_dtype(self) -> torch.dtype | None:
        return DTYPES.get(self.dtype)


@dataclass
class Header:
    """A parsed safetensors header: tensors (in header order), string metadata, where the data starts."""

    path: Path
    tensors: dict[str, TensorInfo] = field(default_factory=dict)
    metadata: dict[str, str] = field(default_factory=dict)
    data_start: int = 0
    file_size: int = 0


def read_header(path: str | os.PathLike) -> Header:
    """Parse and check the header of a safetensors file without reading tensor data.

    Layout checked (safetensors format spec): 8-byte little-endian unsigned header length N; N bytes of UTF-8 JSON
    whose top level is an object; every entry has ``dtype``, ``shape`` and ``data_offsets`` [start, end) with
    ``end - start = numel * itemsize``; the largest ``end`` fits in the file. Raises :class:`FactorizeError`
    naming the file and what is wrong (missing, not safetensors, truncated, header past the end of the file).
    """
    p = Path(path)
    check_readable_file(p)
    size = p.stat().st_size
    with open(p, "rb") as f:
        head = f.read(8)
        if len(head) < 8:
            raise FactorizeError(
                f"{p}: not a safetensors file ({size} bytes, too short to hold the 8-byte header length)",
                fix="pass a .safetensors file; a download or copy may have been cut off",
            )
        (n,) = struct.unpack("<Q", head)
        if n > MAX_HEADER_BYTES or n < 2:
            raise FactorizeError(
                f"{p}: not a safetensors file (the first 8 bytes give a header length of {n})"
                + _format_hint(head),
                fix="pass a .safetensors file (pickled .pt/.bin checkpoints must be converted first)",
            )
        if 8 + n > size:
            raise FactorizeError(
                f"{p}: the header claims {n} bytes but the file holds only {size - 8} after the length field: "
                "the file is truncated or not a safetensors file",
                fix="re-download or re-copy the file",
            )
        raw = f.read(n)
    try:
        header = json.loads(raw.decode("utf-8"), parse_constant=_no_constant)
    except (UnicodeDecodeError, json.JSONDecodeError, ValueError) as e:
        raise FactorizeError(
            f"{p}: not a safetensors file (the header is not valid UTF-8 JSON: {e})" + _format_hint(head),
            fix="pass a .safetensors file",
        ) from None
    except RecursionError:
        raise FactorizeError(f"{p}: corrupt safetensors header (JSON nested too deeply)",
                             fix="re-create the file") from None
    if not isinstance(header, dict):
        raise FactorizeError(f"{p}: not a safetensors file (the header is not a JSON object)")
    return _parse_entries(p, header, 8 + n, size)


def _format_hint(head: bytes) -> str:
    if head.startswith(b"PK\x03\x04"):
        return "; it looks like a zip archive, e.g. a torch.save checkpoint"
    if head[:1] == b"\x80":
        return "; it looks like a Python pickle"
    return ""


def check_readable_file(p: Path) -> None:
    if not p.exists():
        raise FactorizeError(f"{p}: no such file", fix="check the path")
    if p.is_dir():
        raise FactorizeError(f"{p}: is a directory, expected a .safetensors file", fix="pass the file inside it")
    if not os.access(p, os.R_OK):
        raise FactorizeError(f"{p}: not readable (permission denied)", fix="fix the file's permissions")


def _parse_entries(p: Path, header: dict, data_start: int, size: int) -> Header:
    out = Header(path=p, data_start=data_start, file_size=size)
    meta = header.get("__metadata__", {}) or {}
    if not isinstance(meta, dict) or not all(isinstance(k, str) and isinstance(v, str) for k, v in meta.items()):
        raise FactorizeError(f"{p}: corrupt safetensors header (__metadata__ must map strings to strings)")
    out.metadata = dict(meta)
    problems = []
    data_len = size - data_start
    for name, e in header.items():
        if name == "__metadata__":
            continue
        try:
            dtype, shape, (start, end) = e["dtype"], e["shape"], e["data_offsets"]
        except (KeyError, TypeError, ValueError):
            problems.append(f"{printable(name)}: entry is not {{dtype, shape, data_offsets}}")
            continue
        bad = _entry_problem(dtype, shape, start, end)
        if bad:
            problems.append(f"{printable(name)}: {bad}")
            continue
        info = TensorInfo(name, dtype, tuple(shape), start, end)
        td = info.torch_dtype
        if td is not None:
            numel = 1
            for d in shape:
                numel *= d
            if end - start != numel * torch.empty((), dtype=td).element_size() or start < 0:
                problems.append(f"{printable(name)}: {dtype} {list(shape)} needs {numel} elements, offsets say "
                                f"{end - start} bytes")
        if end > data_len:
            raise FactorizeError(
                f"{p}: the header claims tensor data up to byte {data_start + end} but the file has {size} bytes: "
                "the file is truncated",
                fix="re-download or re-copy the file",
            )
        out.tensors[name] = info
    if problems:
        raise FactorizeError(f"{p}: corrupt safetensors header", problems, fix="re-create the file")
    shared = _overlaps(out.tensors.values())
    if shared:
        raise FactorizeError(
            f"{p}: corrupt safetensors header: tensors share bytes in the file", shared,
            fix="the file is damaged or was not written by a safetensors writer; save it again from the model "
            "(safetensors.torch.save_file) or copy it again",
        )
    return out


def _overlaps(tensors) -> list[str]:
    """Pairs of tensors whose byte ranges in the data section overlap (safetensors refuses such files)."""
    found, last = [], None
    for info in sorted(tensors, key=lambda i: (i.start, i.end)):
        if info.start == info.end:  # an empty tensor holds no bytes
            continue
        if last is not None and info.start < last.end:
            found.append(f"{printable(last.name)} [{last.start}, {last.end}) and {printable(info.name)} "
                         f"[{info.start}, {info.end}) overlap")
        if last is None or info.end > last.end:
            last = info
    return found


MAX_DIM = 2**40  # no real tensor has a dimension this long; larger values are corrupt headers
MAX_ELEMENTS = 2**45  # 32 T elements: beyond any checkpoint this library can process


def _no_constant(name: str):
    raise ValueError(f"{name} is not allowed in a safetensors header")


def _is_int(v) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _entry_problem(dtype, shape, start, end) -> str:
    """What is wrong with one header entry's fields, or '' (types, ranges, and a known dtype)."""
    if not isinstance(dtype, str) or dtype not in DTYPES:
        return (f"dtype {printable(str(dtype))} is not supported (supported: {', '.join(sorted(DTYPES))})")
    if not isinstance(shape, list) or not all(_is_int(d) and 0 <= d <= MAX_DIM for d in shape):
        return f"shape {printable(str(shape))[:80]} is not a list of integers in 0..2^40"
    if not (_is_int(start) and _is_int(end) and 0 <= start <= end):
        offsets = f"[{printable(str(start))[:40]}, {printable(str(end))[:40]}]"
        return f"data_offsets {offsets} are not integers with 0 <= start <= end"
    numel = 1
    for d in shape:
        numel *= d
    if numel > MAX_ELEMENTS:
        return f"shape {shape} holds {numel} elements, more than any checkpoint could"
    return ""


def check_safetensors(path: str | os.PathLike) -> dict:
    """Validate a safetensors file's layout before loading it (:func:`read_header`: a file cut
    short, a header claiming more data than the file holds, a corrupt header) and return its metadata."""
    return read_header(path).metadata


def read_safetensors(path: str | os.PathLike) -> dict[str, torch.Tensor]:
    """All tensors of a safetensors file (validated first), with safetensors' own errors named by file."""
    from safetensors import SafetensorError
    from safetensors.torch import load_file

    check_safetensors(path)
    try:
        return load_file(str(path))
    except SafetensorError as err:
        raise FactorizeError(f"{path}: not a valid safetensors file: {err}",
                             fix="copy or download it again, or save it again from the model") from None


def safetensors_header(entries: Mapping[str, dict], metadata: Mapping[str, str] | None, *, pad_to: int = 0) -> bytes:
    """The 8-byte length plus JSON header of a safetensors file, with every key sorted (so the same tensors and
    metadata always give the same bytes) and padded with spaces to a multiple of 8 bytes, or to ``pad_to`` bytes
    when that is larger (the format allows trailing whitespace in the header)."""
    body = {"__metadata__": dict(metadata)} if metadata else {}
    body.update(entries)
    header = json.dumps(body, separators=(",", ":"), sort_keys=True).encode()
    size = max(-(-(8 + len(header)) // 8) * 8, pad_to)
    header += b" " * (size - 8 - len(header))
    return struct.pack("<Q", len(header)) + header


def write_safetensors(path: str | os.PathLike, tensors: Mapping[str, torch.Tensor],
                      metadata: Mapping[str, str] | None = None) -> None:
    """Write ``tensors`` as a safetensors file, byte for byte the same for the same input.

    The reference writer orders metadata keys differently from one run to the next; this one sorts them and
    lays the tensors out in name order. Readers see an ordinary safetensors file.
    """
    entries, blobs, offset = {}, [], 0
    for name in sorted(tensors):
        t = tensors[name].detach().contiguous().cpu()
        n = t.numel() * t.element_size()
        entries[name] = {"dtype": DTYPE_NAMES[t.dtype], "shape": list(t.shape), "data_offsets": [offset, offset + n]}
        blobs.append(t)
        offset += n
    with open(path, "wb") as f:
        f.write(safetensors_header(entries, metadata))
        for t in blobs:
            if t.numel():
                f.write(memoryview(t.reshape(-1).view(torch.uint8).numpy()))


def read_tensor(path: str | os.PathLike, name: str) -> torch.Tensor:
    """One tensor of a safetensors file, on the CPU; the memory map is released when this returns."""
    from safetensors import safe_open

    with safe_open(str(path), framework="pt", device="cpu") as f:
        return f.get_tensor(name)


ROWS_PER_READ = 4096  # rows of a table read at a time by read_rows (4096 x 2048 bfloat16: 16 MiB)


def read_rows(path: str | os.PathLike, name: str, rows: torch.Tensor) -> torch.Tensor:
    """Rows ``rows`` (sorted, distinct int64 indices) of a 2-D tensor of a safetensors file, in that order and the
    stored dtype, reading at most ``ROWS_PER_READ`` rows at a time and only the runs of rows that hold one asked
    for: a few rows of a large table (an embedding of 256k tokens) without the table in memory. The file is mapped
    anew for each run of rows, so the pages read are let go (a mapping kept open keeps every page it touched in
    the process's resident memory)."""
    from safetensors import safe_open

    parts, i = [], 0
    while i < len(rows):
        with safe_open(str(path), framework="pt", device="cpu") as f:
            sl = f.get_slice(name)
            shape = sl.get_shape()
            lo = int(rows[i]) // ROWS_PER_READ * ROWS_PER_READ
            hi = min(lo + ROWS_PER_READ, int(shape[0]))
            j = i + int(torch.searchsorted(rows[i:], hi))
            parts.append(sl[lo:hi][rows[i:j] - lo].clone())  # the clone lets the run of rows go
        i = j
    if parts:
        return torch.cat(parts)
    with safe_open(str(path), framework="pt", device="cpu") as f:
        return f.get_tensor(name)[:0].clone()
