"""Tests for factorize/cache.py: the on-disk spectrum cache.

Outside references: hashlib's blake2b (RFC 7693) for the content key; numpy's SVD for the singular values a
cache hit must return; the reference reader ``safetensors.safe_open`` for the entries.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import torch
from safetensors import safe_open
from safetensors.torch import save_file

import factorize
from factorize.errors import FactorizeError
from factorize.model.sites import walk
from factorize.outofcore import weights_only as checkpoint
from factorize.spectra import cache as cache_mod
from factorize.spectra.cache import CacheWarning, SpectrumCache
from factorize.spectra.decompose import decompose
from factorize.spectra.sites import decompose_sites


@pytest.fixture
def counted(monkeypatch):
    """Count real decompositions made through the cache."""
    calls = []
    real = cache_mod.decompose

    def counting(*a, **k):
        calls.append(k.get("name"))
        return real(*a, **k)

    monkeypatch.setattr(cache_mod, "decompose", counting)
    return calls


def _matrix(seed=0, shape=(30, 20)):
    return torch.randn(*shape, generator=torch.Generator().manual_seed(seed))


def test_key_depends_on_content_and_options_that_matter():
    W = _matrix()
    k = SpectrumCache.key(W, "exact")
    assert k == SpectrumCache.key(W.clone(), "exact")  # same content, another tensor
    assert k == SpectrumCache.key(W, "exact", seed=5, rank=3)  # exact ignores seed and rank
    W2 = W.clone()
    W2[3, 4] += 1e-6
    others = {
        SpectrumCache.key(W2, "exact"),
        SpectrumCache.key(W.double(), "exact"),
        SpectrumCache.key(W.reshape(20, 30), "exact"),
        SpectrumCache.key(W, "exact", precision="float64"),
        SpectrumCache.key(W, "randomized", rank=5),
        SpectrumCache.key(W, "randomized", rank=6),
        SpectrumCache.key(W, "randomized", rank=5, seed=1),
        SpectrumCache.key(W, "exact", extra="calibrated"),
    }
    assert k not in others and len(others) == 8
    assert SpectrumCache.key(W, "randomized", rank=5) == SpectrumCache.key(W, "randomized", rank=5, seed=0,
                                                                          oversample=10, power_iters=2)
    # decompose falls back to gram for auto / randomized without a rank, and gram ignores rank and seed
    assert SpectrumCache.key(W, "auto") == SpectrumCache.key(W, "gram") == SpectrumCache.key(W, "gram", rank=4)
    assert SpectrumCache.key(W, "gram") != k
    assert SpectrumCache.key(W, "auto", rank=5) != SpectrumCache.key(W, "randomized", rank=5)


def test_hit_skips_decomposition_and_is_bit_identical(tmp_path, counted):
    store = SpectrumCache(tmp_path / "c")
    W = _matrix()
    first = store.get_or_compute(W, "exact", name="w")
    again = store.get_or_compute(W, "exact", name="w")
    assert len(counted) == 1 and (store.hits, store.misses, store.stored) == (1, 1, 1)
    fresh = decompose(W)
    for a, b in ((again.U, fresh.U), (again.S, fresh.S), (again.Vh, fresh.Vh)):
        assert torch.equal(a, b)
    assert again.total_energy == fresh.total_energy and again.exact and first.method == "exact"
    # reference: numpy.linalg.svd
    np.testing.assert_allclose(again.S.numpy(), np.linalg.svd(W.double().numpy(), compute_uv=False), rtol=1e-5)
    with safe_open(str(store.path_for(SpectrumCache.key(W))), framework="pt") as f:  # a plain safetensors file
        assert set(f.keys()) == {"U", "S", "Vh"}


@pytest.mark.parametrize("damage", ["garbage", "truncate", "flip", "other_key"])
def test_corrupt_entry_is_ignored_said_and_recomputed(tmp_path, counted, damage):
    store = SpectrumCache(tmp_path)
    W = _matrix()
    store.get_or_compute(W, "exact")
    path = store.path_for(SpectrumCache.key(W))
    raw = bytearray(path.read_bytes())
    if damage == "garbage":
        path.write_bytes(b"not a spectrum")
    elif damage == "truncate":
        path.write_bytes(bytes(raw[: len(raw) // 2]))
    elif damage == "flip":
        raw[-5] ^= 0xFF  # one byte of Vh: only the checksum notices
        path.write_bytes(bytes(raw))
    else:  # an entry for another matrix under this name
        other = SpectrumCache(tmp_path / "o")
        other.get_or_compute(_matrix(1), "exact")
        path.write_bytes(other.path_for(SpectrumCache.key(_matrix(1))).read_bytes())
    with pytest.warns(CacheWarning, match="recomputing"):
        spec = store.get_or_compute(W, "exact")
    assert len(counted) == 2 + (damage == "other_key") and store.corrupt == 1
    assert torch.equal(spec.S, decompose(W).S)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the entry was repaired: a clean hit now
        store.get_or_compute(W, "exact")


def test_unwritable_cache_directory_is_a_clear_error(tmp_path):
    blocker = tmp_path / "file"
    blocker.write_text("x")
    with pytest.raises(FactorizeError, match="is a file"):
        SpectrumCache(blocker)
    with pytest.raises(FactorizeError, match="not writable") as e:
        SpectrumCache(blocker / "sub")  # cannot create a directory below a file
    assert "run without a cache" in str(e.value)


def test_failed_store_warns_and_continues(tmp_path, monkeypatch):
    store = SpectrumCache(tmp_path)

    def disk_full(*a, **k):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(cache_mod, "write_safetensors", disk_full)
    W = _matrix()
    with pytest.warns(CacheWarning, match="could not store"):
        spec = store.get_or_compute(W, "exact")
    assert torch.equal(spec.S, decompose(W).S) and store.stored == 0
    assert list(tmp_path.iterdir()) == []  # no half-written entry


def test_cached_decompose_sites_matches_and_feeds_compress(tmp_path, mlp, counted):
    sites = list(walk(mlp).sites)
    plain = decompose_sites(mlp, sites)
    cached = decompose_sites(mlp, sites, cache=tmp_path)
    again = decompose_sites(mlp, sites, cache=tmp_path, workers=2)
    assert len(counted) == len(sites)  # the second call (in threads) made no decomposition
    assert list(again) == [s.name for s in sites]
    for name in plain:
        assert torch.equal(plain[name].U, again[name].U) and torch.equal(plain[name].S, cached[name].S)
    a = factorize.compress(mlp, budget=0.5, method="gram")  # the whole spectra decompose_sites computed
    b = factorize.compress(mlp, budget=0.5, spectra=again)  # given whole spectra, the budget route computes nothing
    x = torch.randn(3, 24)
    with torch.no_grad():
        assert torch.equal(a.model(x), b.model(x))


def test_checkpoint_second_run_skips_decomposition(tmp_path, mlp, monkeypatch):
    from factorize.spectra import sites

    calls = []
    for fn in ("values_only", "leading"):  # the weights-only tasks reach both through factorize.spectra.sites
        real = getattr(sites, fn)
        monkeypatch.setattr(sites, fn, lambda *a, _real=real, _fn=fn, **k: calls.append(_fn) or _real(*a, **k))
    src = tmp_path / "in.safetensors"
    save_file(mlp.state_dict(), str(src))
    first = checkpoint.shrink_checkpoint(src, tmp_path / "a.safetensors", budget=0.5, cache_dir=tmp_path / "c")
    # budget, values first: pass 1 the values of all three layers, pass 2 the kept vectors of the factored ones
    factored = sum(1 for e in first.plan["sites"].values() if e["action"] == "factor")
    assert factored >= 1
    assert calls == ["values_only"] * 3 + ["leading"] * factored
    second = checkpoint.shrink_checkpoint(src, tmp_path / "b.safetensors", budget=0.5, cache_dir=tmp_path / "c")
    # pass 1 reads the three value entries; pass 2 reuses the factor results stored beside them (resume)
    assert len(calls) == 3 + factored and second.cache["hits"] == 3 and second.cache["misses"] == 0
    assert first.cache["results_reused"] == 0 and second.cache["results_reused"] == 3
    assert (tmp_path / "a.safetensors").read_bytes() == (tmp_path / "b.safetensors").read_bytes()
