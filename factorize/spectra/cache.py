"""An on-disk cache of spectra, so a second run on the same weights skips the decomposition.

An entry is keyed by the content of the matrix and by everything that changes the result:

    key = blake2b-256( JSON{cache format, shape, dtype, method, options} || raw little-endian matrix bytes )

where ``options`` are the decomposition options that matter for the method (``exact`` and ``gram``: the compute
precision; ``randomized`` and ``auto``: rank, oversampling, power iterations, seed and precision). The layer's name is
not part of the key: two layers with identical weights share an entry. blake2b is RFC 7693.

Each entry is one safetensors file ``<key>.safetensors`` holding ``U``, ``S``, ``Vh`` exactly as
:func:`factorize.spectra.decompose.decompose` returned them (so a cache hit gives bit-identical factors), with metadata:
the key, the method, ``exact``, ``total_energy`` (as a float hex string, exact) and a blake2b checksum of the
three tensors. Entries are written atomically (temporary file, then rename), so concurrent runs never see half
an entry.

Behaviour on trouble (what a user who asked for a cache expects):

* a cache directory that cannot be created or written is a :class:`FactorizeError` at construction -- silently
  running without the cache would make every later run slow with no word why;
* an entry that is unreadable, truncated, for another matrix or fails its checksum is ignored with a
  :class:`CacheWarning` (``warnings.warn``; nothing is printed) and recomputed, and the fresh result replaces it;
* a failed write of a new entry (disk full) is a :class:`CacheWarning`; the run continues without storing it.

Values first (:func:`factorize.spectra.sites.values_sites` and :func:`~factorize.spectra.sites.leading_sites`, the
budget route): the singular values alone are stored under the ``gram`` key with ``extra="values"`` (U and Vh of
width 0: k floats), and the values plus the leading r vector pairs under ``extra`` naming the rank, the guarded
ranks and the seed. A run at another budget thus reuses the values and recomputes only the vectors.

Disk use: an exact entry holds all of U (m x k) and Vh (k x n), k = min(m, n), i.e. between one and two times the
matrix; a randomized entry only the leading k triplets. Delete the directory (or call :meth:`SpectrumCache.clear`)
to reclaim the space.
"""

from __future__ import annotations

import hashlib
import json
import os
import threading
import warnings
from collections.abc import Callable, Mapping
from pathlib import Path

import torch
from safetensors import safe_open

from factorize.errors import FactorizeError, caller_stacklevel
from factorize.spectra.decompose import METHODS, Spectrum, compute_dtype_for, decompose
from factorize.storage import (
    create_temp,
    read_header,
    remove_quietly,
    write_atomic,
    write_safetensors,
)

CACHE_FORMAT = "factorize.spectrum"
CACHE_VERSION = 1
_RANDOMIZED_DEFAULTS = {"oversample": 10, "power_iters": 2, "seed": 0}  # decompose()'s defaults


class CacheWarning(UserWarning):
    """A cache entry was ignored (corrupt) or could not be stored; the result is computed as usual."""


def _raw_bytes(t: torch.Tensor) -> memoryview:
    """The tensor's bytes in row-major order (the safetensors layout), without another copy where possible."""
    t = t.detach().contiguous().cpu()
    return memoryview(t.reshape(-1).view(torch.uint8).numpy())


def _checksum(*tensors: torch.Tensor) -> str:
    h = hashlib.blake2b(digest_size=16)
    for t in tensors:
        h.update(_raw_bytes(t))
    return h.hexdigest()


def normalise_options(matrix: torch.Tensor, method: str, options: Mapping) -> dict:
    """The options that change ``decompose``'s result for ``method`` (defaults filled in, ``name`` dropped)."""
    if method not in METHODS:
        raise FactorizeError(f"unknown method {method!r}", fix=f"use one of {', '.join(METHODS)}")
    precision = str(compute_dtype_for(matrix, options.get("precision"))).removeprefix("torch.")
    if method in ("exact", "gram"):
        return {"method": method, "precision": precision}  # decompose ignores rank, sketch and seed here
    if options.get("rank") is None:
        return {"method": "gram", "precision": precision}  # auto / randomized without a rank fall back to gram
    opts = {k: options.get(k, v) for k, v in _RANDOMIZED_DEFAULTS.items()}
    return {"method": method, "precision": precision, "rank": int(options["rank"]),
            **{k: int(v) for k, v in opts.items()}}


class SpectrumCache:
    """Spectra on disk, keyed by matrix content and decomposition options.

    Counters ``hits``, ``misses``, ``stored`` and ``corrupt`` say what happened (e.g. for a report).
    """

    def __init__(self, directory: str | os.PathLike) -> None:
        d = Path(directory)
        if d.exists() and not d.is_dir():
            raise FactorizeError(f"cache directory {d} is a file", fix="pass a directory path for the cache")
        try:
            d.mkdir(parents=True, exist_ok=True)
            tmp, fd = create_temp(d / "probe")
            os.close(fd)
            remove_quietly(tmp)
        except (OSError, FactorizeError) as e:
            raise FactorizeError(
                f"cache directory {d} is not writable ({getattr(e, 'strerror', None) or e})",
                fix="choose a writable cache directory, fix its permissions, or run without a cache",
            ) from None
        self.directory = d
        self.hits = self.misses = self.stored = self.corrupt = 0
        self._lock = threading.Lock()  # counters may be bumped from worker threads

    def add_counts(self, **steps: int) -> None:
        """Add to the hit/miss/stored/corrupt counters (a task's counts, run elsewhere, join this cache's)."""
        with self._lock:
            for name, n in steps.items():
                setattr(self, name, getattr(self, name) + n)

    # -- keys and paths

    @staticmethod
    def key(matrix: torch.Tensor, method: str = "exact", *, extra: str = "", **options) -> str:
        """Content hash of ``matrix`` plus the options that matter (``extra``: any further input, e.g. stats)."""
        w = torch.as_tensor(matrix)
        desc = {
            "format": CACHE_FORMAT, "version": CACHE_VERSION, "shape": list(w.shape),
            "dtype": str(w.dtype).removeprefix("torch."), "options": normalise_options(w, method, options),
            "extra": extra,
        }
        h = hashlib.blake2b(digest_size=32)  # RFC 7693
        h.update(json.dumps(desc, sort_keys=True).encode())
        h.update(_raw_bytes(w))
        return h.hexdigest()

    def path_for(self, key: str) -> Path:
        return self.directory / f"{key}.safetensors"

    # -- get / put

    def get(self, matrix: torch.Tensor, method: str = "exact", *, key: str | None = None, **options) -> Spectrum | None:
        """The cached spectrum of ``matrix``, or None (a miss, or a corrupt entry -- with a warning)."""
        key = key or self.key(matrix, method, **options)
        path = self.path_for(key)
        if not path.exists():
            self.add_counts(misses=1)
            return None
        try:
            spec = self._read(path, key, tuple(matrix.shape))
        except Exception as e:  # noqa: BLE001 - any unreadable entry is ignored, said, and recomputed
            self.add_counts(corrupt=1, misses=1)
            warnings.warn(f"cache entry {path} is unusable ({e}); ignoring it and recomputing", CacheWarning,
                          stacklevel=caller_stacklevel())
            return None
        self.add_counts(hits=1)
        return spec

    def _read(self, path: Path, key: str, shape: tuple[int, int]) -> Spectrum:
        meta = read_header(path).metadata  # checks layout and size before any data is touched
        if (meta.get("factorize.cache_format") != CACHE_FORMAT
                or meta.get("factorize.cache_version") != str(CACHE_VERSION)):
            raise ValueError("not a spectrum entry of this cache version")
        if meta.get("factorize.key") != key:
            raise ValueError("the entry belongs to another matrix")
        with safe_open(str(path), framework="pt", device="cpu") as f:
            U, S, Vh = f.get_tensor("U"), f.get_tensor("S"), f.get_tensor("Vh")
        k, j = S.shape[0], U.shape[1] if U.dim() == 2 else -1  # j < k: values with only the leading vectors
        if S.dim() != 1 or not 0 <= j <= k or tuple(U.shape) != (shape[0], j) or tuple(Vh.shape) != (j, shape[1]):
            raise ValueError(
                f"shapes U {list(U.shape)}, S {list(S.shape)}, Vh {list(Vh.shape)} do not fit {list(shape)}")
        if _checksum(U, S, Vh) != meta.get("factorize.checksum"):
            raise ValueError("checksum mismatch")
        return Spectrum(U, S, Vh, total_energy=float.fromhex(meta["factorize.total_energy"]),
                        method=meta["factorize.method"], exact=meta["factorize.exact"] == "1")

    def put(self, matrix: torch.Tensor, spectrum: Spectrum, method: str = "exact", *, key: str | None = None,
            **options) -> bool:
        """Store ``spectrum`` for ``matrix``; False (with a warning) when the write fails."""
        key = key or self.key(matrix, method, **options)
        U, S, Vh = (t.detach().contiguous().cpu() for t in (spectrum.U, spectrum.S, spectrum.Vh))
        meta = {
            "factorize.cache_format": CACHE_FORMAT, "factorize.cache_version": str(CACHE_VERSION),
            "factorize.key": key, "factorize.method": spectrum.method,
            "factorize.exact": "1" if spectrum.exact else "0",
            "factorize.total_energy": float(spectrum.total_energy).hex(), "factorize.checksum": _checksum(U, S, Vh),
        }
        try:
            write_atomic(self.path_for(key), lambda tmp: write_safetensors(tmp, {"U": U, "S": S, "Vh": Vh}, meta),
                         force=True)
        except FactorizeError as e:
            warnings.warn(f"could not store a cache entry in {self.directory}: {e}", CacheWarning,
                          stacklevel=caller_stacklevel())
            return False
        self.add_counts(stored=1)
        return True

    def get_or_compute(
        self,
        matrix: torch.Tensor,
        method: str = "exact",
        *,
        compute: Callable[[], Spectrum] | None = None,
        extra: str = "",
        **options,
    ) -> Spectrum:
        """The cached spectrum, or ``compute()`` (default: ``decompose(matrix, method=method, **options)``),
        stored for next time."""
        opts = {k: v for k, v in options.items() if k != "name"}
        key = self.key(matrix, method, extra=extra, **opts)
        spec = self.get(matrix, method, key=key, **opts)
        if spec is not None:
            return spec
        spec = compute() if compute is not None else decompose(matrix, method=method, **options)
        self.put(matrix, spec, method, key=key, **opts)
        return spec

    def clear(self) -> int:
        """Delete every entry; returns how many were removed."""
        n = 0
        for p in self.directory.glob("*.safetensors"):
            remove_quietly(p)
            n += 1
        return n

    def stats(self) -> dict:
        return {"directory": str(self.directory), "hits": self.hits, "misses": self.misses, "stored": self.stored,
                "corrupt": self.corrupt}


def as_cache(cache: SpectrumCache | str | os.PathLike | None) -> SpectrumCache | None:
    """Accept a cache object, a directory path, or None."""
    if cache is None or isinstance(cache, SpectrumCache):
        return cache
    return SpectrumCache(cache)
