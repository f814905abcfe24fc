"""TODO docstring."""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor, as_completed
from typing import TypeVar

from torch import nn
from tqdm.auto import tqdm

from factorize.model.sites import (
    Site,
    get_module,
    matrix_of,
)
from factorize.spectra.decompose import Spectrum, decompose

T = TypeVar("T")


def decompose_sites(
    model: nn.Module,
    sites: Iterable[Site],
    *,
    method: str = "auto",
    ranks: Mapping[str, int] | None = None,
    seed: int = 0,
    precision: str | None = None,
    progress: bool = False,
    workers: int = 1,
    cache=None,
    **options,
) -> dict[str, Spectrum]:
    """Spectrum of every site's matrix view. ``ranks`` bounds the triplets a partial method computes.

    ``workers > 1`` decomposes independent layers concurrently in threads (LAPACK and BLAS release the GIL);
    every layer gets the same seed and the same arithmetic, so results equal a serial run's. ``cache`` (a
    directory or :class:`factorize.spectra.cache.SpectrumCache`) reads and fills an on-disk cache of spectra.
    """
    from factorize.spectra.cache import (
        as_cache,  # cache imports io, which imports this module
    )

    sites = list(sites)
    store = as_cache(cache)

    def one(site: Site) -> Spectrum:
        W = matrix_of(get_module(model, site.name), site.kind)  # (m, n)
        k = (ranks or {}).get(site.name)
        if store is not None:
            return store.get_or_compute(W, method, rank=k, seed=seed, precision=precision, name=site.name, **options)
        return decompose(W, method=method, rank=k, seed=seed, precision=precision, name=site.name, **options)

    return per_site(one, sites, workers=workers, progress=progress)


def per_site(one: Callable[[Site], T], sites: Sequence[Site], *, workers: int = 1, progress: bool = False,
             desc: str = "decompose") -> dict[str, T]:
    """``{site.name: one(site)}`` in module order; ``workers > 1`` runs that many sites at once in threads
    (LAPACK and BLAS release the GIL), so a per-site function that is deterministic gives a serial run's results."""
    bar = tqdm(total=len(sites), desc=desc, unit="layer", disable=not progress, leave=False)
    out: dict[str, T] = {}
    try:
        if workers <= 1 or len(sites) <= 1:
            for site in sites:
                out[site.name] = one(site)
                bar.update()
        else:
            with ThreadPoolExecutor(max_workers=workers) as pool:
                futures = {pool.submit(one, site): site.name for site in sites}
                for fut in as_completed(futures):
                    out[futures[fut]] = fut.result()
                    bar.update()
    finally:
        bar.close()
    return {site.name: out[site.name] for site in sites}  # module order, whatever the finishing order
