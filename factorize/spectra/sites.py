"""Decompose the sites of a model: whole spectra (`decompose_sites`), or singular values first (`values_sites`)
and then only the vectors that are kept (`leading_sites`)."""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor, as_completed
from typing import TypeVar

from torch import nn
from tqdm.auto import tqdm

from factorize.errors import FactorizeError
from factorize.execution import EXECUTION_KEYWORDS, Execution, resolve_execution
from factorize.model.sites import (
    Site,
    get_module,
    matrix_of,
)
from factorize.spectra.cache import as_cache
from factorize.spectra.decompose import (
    Spectrum,
    decompose,
    lapack_threads,
    leading,
    values_only,
)
from factorize.threads import torch_threads

T = TypeVar("T")


def decompose_sites(
    model: nn.Module,
    sites: Iterable[Site],
    *,
    method: str = "auto",
    ranks: Mapping[str, int] | None = None,
    execution: Execution | None = None,
    cache=None,
    **options,
) -> dict[str, Spectrum]:
    """Spectrum of every site's matrix view. ``ranks`` bounds the triplets a partial method computes.

    ``execution`` (:class:`~factorize.execution.Execution`; or its fields as keywords: ``precision``, ``workers``,
    ``seed``, ``progress``) says how it runs: ``workers > 1`` decomposes independent layers concurrently in
    threads (LAPACK and BLAS release the GIL); every layer gets the same seed and the same arithmetic, so results
    equal a serial run's. ``cache`` (a directory or :class:`factorize.spectra.cache.SpectrumCache`) reads and
    fills an on-disk cache of spectra. Other ``options`` go to :func:`decompose` (``oversample``, ...).
    """
    run, options = resolve_execution(execution, options)
    sites = list(sites)
    store = as_cache(cache)

    def one(site: Site) -> Spectrum:
        W = matrix_of(get_module(model, site.name), site.kind)  # (m, n)
        k = (ranks or {}).get(site.name)
        if store is not None:
            return store.get_or_compute(W, method, rank=k, seed=run.seed, precision=run.precision, name=site.name,
                                        **options)
        return decompose(W, method=method, rank=k, seed=run.seed, precision=run.precision, name=site.name, **options)

    return per_site(one, sites, workers=run.workers, progress=run.progress)


def per_site(one: Callable[[Site], T], sites: Sequence[Site], *, workers: int = 1, progress: bool = False,
             desc: str = "decompose") -> dict[str, T]:
    """``{site.name: one(site)}`` in module order; ``workers > 1`` runs that many sites at once in threads
    (LAPACK and BLAS release the GIL), each on one torch thread.

    A serial run also decomposes every layer up to order 2048 on one thread (LAPACK already ran on one
    thread there, see :func:`factorize.spectra.decompose.lapack_threads`; the products follow), so it gives a
    parallel run's bits. Wider layers keep all threads in a serial run, where the last bits of a product may then
    differ from a parallel run's.
    """
    bar = tqdm(total=len(sites), desc=desc, unit="layer", disable=not progress, leave=False)
    out: dict[str, T] = {}
    try:
        if workers <= 1 or len(sites) <= 1:
            for site in sites:
                with lapack_threads(min(site.shape)):
                    out[site.name] = one(site)
                bar.update()
        else:
            # torch's thread count is process-wide: one thread for the whole pool (the workers are the
            # parallelism), so no worker's products run at a count another worker set for its own solve
            with torch_threads(1), ThreadPoolExecutor(max_workers=workers) as pool:
                futures = {pool.submit(one, site): site.name for site in sites}
                for fut in as_completed(futures):
                    out[futures[fut]] = fut.result()
                    bar.update()
    finally:
        bar.close()
    return {site.name: out[site.name] for site in sites}  # module order, whatever the finishing order


def cached_values(W, store, *, precision: str | None = None, keep_gram: bool = False,
                  name: str = "matrix") -> Spectrum:
    """:func:`values_only` of one matrix through the spectrum cache ``store`` (None: computed), under the one key
    every caller shares: the ``gram`` entry with ``extra="values"``."""
    def compute() -> Spectrum:
        return values_only(W, precision=precision, keep_gram=keep_gram, name=name)

    if store is None:
        return compute()
    return store.get_or_compute(W, "gram", compute=compute, extra="values", precision=precision)


def cached_leading(W, rank: int, values: Spectrum, store, *, guard: list[int] | None = None, seed: int = 0,
                   precision: str | None = None, name: str = "matrix") -> Spectrum:
    """:func:`leading` of one matrix through the spectrum cache ``store`` (None: computed), under the one key
    every caller shares (rank, guard ranks and seed in ``extra``)."""
    g = list(guard or [])

    def compute() -> Spectrum:
        return leading(W, rank, values=values, guard_ranks=g, seed=seed, precision=precision, name=name)

    if store is None:
        return compute()
    return store.get_or_compute(W, "gram", compute=compute, extra=f"leading rank={rank} guard={g} seed={seed}",
                                precision=precision)


def values_sites(
    model: nn.Module,
    sites: Iterable[Site],
    *,
    keep_gram: bool = False,
    execution: Execution | None = None,
    cache=None,
    **keywords,
) -> dict[str, Spectrum]:
    """Every site's singular values without vectors (:func:`values_only`): what rank allocation needs.

    ``cache`` keeps them under the ``gram`` key with ``extra="values"`` (k floats per entry). ``keep_gram`` keeps
    each computed Gram matrix on its spectrum for :func:`leading_sites` (which drops it); at most the size of the
    weights in all. ``execution`` (or its fields as keywords): precision, workers, progress.
    """
    run = _execution(execution, keywords)
    store = as_cache(cache)

    def one(site: Site) -> Spectrum:
        W = matrix_of(get_module(model, site.name), site.kind)  # (m, n)
        return cached_values(W, store, precision=run.precision, keep_gram=keep_gram, name=site.name)

    return per_site(one, list(sites), workers=run.workers, progress=run.progress, desc="singular values")


def leading_sites(
    model: nn.Module,
    sites: Iterable[Site],
    ranks: Mapping[str, int],
    spectra: Mapping[str, Spectrum],
    *,
    guard_ranks: Mapping[str, Iterable[int]] | None = None,
    execution: Execution | None = None,
    cache=None,
    **keywords,
) -> dict[str, Spectrum]:
    """``spectra`` with vectors up to ``ranks[name]`` for every named site (:func:`leading`, within 1% of the
    optimal error at that rank and at each of ``guard_ranks[name]``). Sites whose spectrum already holds enough
    vector pairs, or that have no rank, are passed through unchanged; the others must hold every singular value
    (e.g. from :func:`values_sites`). Returns a new dict; ``spectra`` is not modified, except that the Gram
    matrices ``values_sites(keep_gram=True)`` left on them are dropped once used. ``execution`` (or its fields as
    keywords): seed, precision, workers, progress.
    """
    run = _execution(execution, keywords)
    store = as_cache(cache)
    guard = {name: sorted({int(r) for r in rs}) for name, rs in (guard_ranks or {}).items()}
    todo = [s for s in sites if ranks.get(s.name) is not None and spectra[s.name].vector_rank < ranks[s.name]]

    def one(site: Site) -> Spectrum:
        W = matrix_of(get_module(model, site.name), site.kind)  # (m, n)
        return cached_leading(W, int(ranks[site.name]), spectra[site.name], store, guard=guard.get(site.name, []),
                              seed=run.seed, precision=run.precision, name=site.name)

    out = dict(spectra)
    out.update(per_site(one, todo, workers=run.workers, progress=run.progress, desc="leading vectors"))
    for spec in spectra.values():
        spec.gram = None  # a kept Gram matrix served leading() above; the values alone stay
    return out


def _execution(execution: Execution | None, keywords: Mapping) -> Execution:
    """The Execution of a call that takes no other loose keywords (an unknown one is an error naming it)."""
    run, rest = resolve_execution(execution, keywords)
    if rest:
        raise FactorizeError(f"unknown keyword{'s' if len(rest) > 1 else ''}: {', '.join(rest)}",
                             fix="accepted: execution, " + ", ".join(EXECUTION_KEYWORDS))
    return run
