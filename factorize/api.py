"""The one-call Python API and the apply step.

``compress`` runs walk -> decompose -> choose ranks -> apply; each step is also usable on its own
(:func:`factorize.walk.walk`, :func:`decompose_sites`, :func:`factorize.ranks.choose_ranks`, :func:`apply_plan`).
"""

from __future__ import annotations

import copy
import dataclasses
from collections.abc import Iterable, Mapping
from concurrent.futures import ThreadPoolExecutor, as_completed
from dataclasses import dataclass, field

import torch
from torch import nn
from tqdm.auto import tqdm

from factorize.count import count_parameters
from factorize.decompose import METHODS, Spectrum, decompose
from factorize.errors import FactorizeError
from factorize.layers import Factored, build_factored, factor_module, factored_layers, to_dense
from factorize.ranks import PLAN_FORMAT, Override, Policy, choose_ranks, plan_summary
from factorize.walk import Site, WalkResult, get_module, matrix_of, set_module, walk


@dataclass
class CompressResult:
    """What :func:`compress` returns."""

    model: nn.Module  # the compressed model (a copy unless inplace=True)
    plan: dict  # JSON-serialisable plan: site -> rank or dense, with reasons
    sites: WalkResult  # what the walker found
    spectra: dict[str, Spectrum] = field(default_factory=dict, repr=False)  # name -> spectrum (reusable)
    params_before: int = 0  # whole-model parameters, shared tensors counted once
    params_after: int = 0
    timings: list[dict] = field(default_factory=list)  # per-layer dense vs factored timings (speed_check=True)

    @property
    def kept_fraction(self) -> float:
        return self.params_after / self.params_before if self.params_before else 1.0

    def summary(self) -> dict:
        return {
            "params_before": self.params_before,
            "params_after": self.params_after,
            "kept_fraction": self.kept_fraction,
            **{f"sites_{k}": v for k, v in plan_summary(self.plan).items()},
        }


def _rank_needed(site: Site, policy: Policy) -> int:
    """How many leading singular triplets a policy can use for ``site`` (for partial decompositions)."""
    if not policy.overrides:  # a per-pattern rule may ask for more than the policy: then the bound below
        if policy.rank is not None:
            return min(-(-policy.rank // policy.multiple) * policy.multiple, site.max_rank)  # rounded up
        if policy.keep is not None:
            return max(1, min(site.max_rank, int(policy.keep * site.params / sum(site.shape))))
    # energy / budget / overrides: anything past break-even keeps the layer dense, so no more is needed
    return max(1, min(site.max_rank, site.break_even + policy.multiple))


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
    directory or :class:`factorize.cache.SpectrumCache`) reads and fills an on-disk cache of spectra.
    """
    from factorize.cache import as_cache  # cache imports io, which imports this module

    sites = list(sites)
    store = as_cache(cache)

    def one(site: Site) -> Spectrum:
        W = matrix_of(get_module(model, site.name), site.kind)  # (m, n)
        k = (ranks or {}).get(site.name)
        if store is not None:
            return store.get_or_compute(W, method, rank=k, seed=seed, precision=precision, name=site.name, **options)
        return decompose(W, method=method, rank=k, seed=seed, precision=precision, name=site.name, **options)

    bar = tqdm(total=len(sites), desc="decompose", unit="layer", disable=not progress, leave=False)
    out: dict[str, Spectrum] = {}
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


def _policy_from(rank, energy, keep, budget, multiple, overrides, cost) -> Policy:
    ov = tuple(o if isinstance(o, Override) else Override(**o) for o in (overrides or ()))
    return Policy(rank=rank, energy=energy, keep=keep, budget=budget, multiple=multiple, overrides=ov, cost=cost)


def compress(
    model: nn.Module,
    *,
    budget: float | None = None,
    rank: int | None = None,
    energy: float | None = None,
    keep: float | None = None,
    include: str | Iterable[str] | None = None,
    exclude: str | Iterable[str] | None = None,
    method: str = "auto",
    multiple: int = 1,
    overrides: Iterable[Override | Mapping] | None = None,
    cost: str = "params",
    inplace: bool = False,
    seed: int = 0,
    precision: str | None = None,
    progress: bool = False,
    spectra: Mapping[str, Spectrum] | None = None,
    workers: int = 1,
    cache=None,
    speed_check: bool = False,
    speed_example=None,
    calibration: Iterable | None = None,
    calibrate: Iterable | None = None,
    aware_method: str | None = None,
    sequential: bool = False,
    sensitivity: bool | str = False,
    max_drift: float | None = None,
    heldout: Iterable | None = None,
    drift_metric: str = "relative_l2",
    output_fn=None,
) -> CompressResult:
    """Factor the dense layers of ``model`` at ranks chosen from their singular spectra.

    Args:
        model: a trained ``nn.Module``; not modified unless ``inplace=True``.
        budget / rank / energy / keep: the rank policy (exactly one); see :mod:`factorize.ranks`.
        include / exclude: glob patterns on qualified module names.
        method: ``"auto"`` (default: randomized SVD where the rank needed is small and an a-posteriori estimate
            puts it within 1% of optimal, else the Gram eigensolve), ``"exact"`` (LAPACK SVD), ``"gram"`` or ``"randomized"`` (Halko,
            Martinsson & Tropp 2011); see :mod:`factorize.decompose`.
        multiple: round ranks to this multiple (8 or 16 suit fast kernels).
        overrides: per-pattern exceptions (``Override`` or dicts with pattern and rank/energy/keep/dense).
        cost: what ``budget`` counts, ``"params"`` or ``"macs"``.
        inplace: rewrite ``model`` itself instead of a deep copy.
        seed: seed for randomized decompositions.
        precision: ``"float32"`` or ``"float64"`` compute dtype for the SVD.
        progress: show a progress bar on stderr.
        spectra: spectra from an earlier call (``result.spectra``) to reuse instead of decomposing again.
        workers: decompose this many layers concurrently (threads); results equal a serial run's.
        cache: a directory (or :class:`factorize.cache.SpectrumCache`) of spectra keyed by weight content, so a
            second run on the same weights skips the decomposition.
        speed_check: time each factored layer against its dense form on this machine (batch 1 and 32) and keep
            dense those that are slower; under ``budget=`` the freed budget is re-allocated to the others.
        speed_example: one sample batch to learn layer input shapes for the timing (needed for convolutions).
        calibration: sample-input batches (``calibrate=`` is an alias): activation-aware factors that keep each
            layer's outputs on these inputs (see :mod:`factorize.aware` and :func:`factorize.search.compress_calibrated`).
        aware_method: ``"whiten"`` (default with calibration) or ``"scale"``; ``method="whiten"``/``"scale"`` too.
        sequential: with calibration, factor layers in forward order so later layers absorb earlier errors.
        sensitivity: with calibration, allocate ranks by measured final-output sensitivity: True or ``"both"``
            (gradients, then probes), ``"gradients"`` or ``"probes"`` alone.
        max_drift: with calibration, the smallest budget whose drift on ``heldout`` stays under this
            (``drift_metric`` ``"relative_l2"`` or ``"cosine"``); raises ``DriftLimitExceeded`` when unreachable.
        output_fn: ``output_fn(output, batch) -> tensor`` compared for sensitivity and drift (default: the
            primary output).

    Returns:
        :class:`CompressResult` with ``.model`` and ``.plan`` (a ``CalibratedResult`` with calibration).
    """
    if (calibration is not None or calibrate is not None or aware_method is not None or method in ("whiten", "scale")
            or sequential or sensitivity or max_drift is not None):
        from factorize.search import compress_from_api  # the calibrated path lives in factorize.search

        return compress_from_api(
            model, calibration=calibration, calibrate=calibrate, aware_method=aware_method, method=method,
            sequential=sequential, sensitivity=sensitivity, max_drift=max_drift, heldout=heldout,
            drift_metric=drift_metric, output_fn=output_fn, budget=budget, rank=rank, energy=energy, keep=keep,
            include=include, exclude=exclude, multiple=multiple, overrides=overrides, cost=cost, inplace=inplace,
            precision=precision, progress=progress, spectra=spectra, speed_check=speed_check,
        )
    if not isinstance(model, nn.Module):
        raise FactorizeError(f"expected a torch.nn.Module, got {type(model).__name__}", fix="pass the model object")
    if method not in METHODS:
        raise FactorizeError(f"unknown method {method!r}", fix=f"use one of {', '.join(METHODS)}")
    policy = _policy_from(rank, energy, keep, budget, multiple, overrides, cost)
    found = walk(model, include=include, exclude=exclude)
    if not found.sites:
        raise FactorizeError(
            "no factorizable layer found" + (" matching the include/exclude patterns" if include or exclude else ""),
            [f"{s.name}: {s.reason}" for s in found.skipped],
            fix="factorize handles nn.Linear, nn.Conv1d/2d (groups=1), nn.Embedding and transposed projections; "
            "check the include/exclude globs against model.named_modules()",
        )
    todo = [s for s in found.sites if not s.tied_with]
    have = dict(spectra or {})
    need = [s for s in todo if s.name not in have]
    ranks = {s.name: _rank_needed(s, policy) for s in need} if method in ("auto", "randomized") else None
    have.update(
        decompose_sites(
            model, need, method=method, ranks=ranks, seed=seed, precision=precision, progress=progress,
            workers=workers, cache=cache,
        )
    )
    plan = choose_ranks(found.sites, have, policy, method=method)
    params_before = count_parameters(model)
    target = copy.deepcopy(model) if (speed_check or not inplace) else model
    apply_plan(target, plan, spectra=have, inplace=True)
    timings = []
    if speed_check:
        from factorize.speed import keep_fast  # speed imports evaluate, which needs this module loaded first

        slow, timings = keep_fast(model, target, example=speed_example)
        if slow:
            policy = dataclasses.replace(policy, overrides=policy.overrides + tuple(Override(n, dense=True) for n in slow))
            try:
                plan = choose_ranks(found.sites, have, policy, method=method)
            except FactorizeError as err:
                raise FactorizeError(
                    "the speed check kept layers dense that the budget cannot afford",
                    [*slow.values(), str(err).splitlines()[0]],
                    fix="raise the budget, or compress without the speed check and accept the measured slow-down",
                ) from None
            for name, reason in slow.items():
                plan["sites"][name]["reason"] = reason
        target = model if inplace else copy.deepcopy(model)
        apply_plan(target, plan, spectra=have, inplace=True)
    return CompressResult(
        model=target,
        plan=plan,
        sites=found,
        spectra=have,
        params_before=params_before,
        params_after=count_parameters(target),
        timings=[t.to_dict() for t in timings],
    )


def validate_plan(model: nn.Module, plan: Mapping) -> dict[str, Site]:
    """Check that ``plan`` fits ``model``: every factored site exists with the same kind and shape.

    Returns the model's sites by name. Raises one :class:`FactorizeError` listing every mismatch.
    """
    if not isinstance(plan, Mapping) or plan.get("format") != PLAN_FORMAT or not isinstance(plan.get("sites"), Mapping):
        raise FactorizeError(
            "not a factorize plan", fix=f"pass the .plan of a compress() result (format {PLAN_FORMAT!r})"
        )
    sites = walk(model).by_name()
    problems = []
    for name, e in plan["sites"].items():
        if e.get("action") != "factor":
            continue
        site = sites.get(name)
        if site is None:
            problems.append(f"{name}: the plan factors it but the model has no such factorizable layer")
        elif site.kind != e.get("kind") or list(site.shape) != list(e.get("shape", [])):
            problems.append(f"{name}: plan says {e.get('kind')} {e.get('shape')}, model has {site.kind} {list(site.shape)}")
        elif not isinstance(e.get("rank"), int) or not 1 <= e["rank"] <= site.max_rank:
            problems.append(f"{name}: rank {e.get('rank')!r} is not in 1..{site.max_rank}")
    if problems:
        raise FactorizeError(
            "the plan does not fit this model", problems,
            fix="apply the plan to the architecture it was made for, or edit the listed entries",
        )
    return sites


def apply_plan(
    model: nn.Module,
    plan: Mapping,
    *,
    spectra: Mapping[str, Spectrum] | None = None,
    inplace: bool = False,
    weights: bool = True,
    method: str = "exact",
    seed: int = 0,
) -> nn.Module:
    """Rewrite the layers a plan factors. All replacements are built first and swapped in last, so a failure
    leaves the model as it was.

    Args:
        model: the architecture the plan was made for (a fresh instance works).
        plan: a plan from :func:`compress` or :func:`factorize.ranks.choose_ranks`, possibly loaded from JSON.
        spectra: spectra to take the factors from; missing ones are computed from the model's own weights.
        inplace: rewrite ``model`` itself instead of a deep copy.
        weights: False builds the factored structure only (uninitialised factors), e.g. to load a checkpoint.
    """
    sites = validate_plan(model, plan)
    target = model if inplace else copy.deepcopy(model)
    replacements: dict[str, Factored] = {}
    for name, e in plan["sites"].items():
        if e.get("action") != "factor":
            continue
        module, r, kind = get_module(target, name), e["rank"], sites[name].kind
        if not weights:
            replacements[name] = build_factored(module, kind, r)
            continue
        spec = (spectra or {}).get(name)
        if spec is None or spec.computed_rank < r:
            spec = decompose(matrix_of(module, kind), method=method, rank=r, seed=seed, name=name)
        B, A = spec.factors(r)  # (m, r), (r, n)
        replacements[name] = factor_module(module, kind, B, A)
    for name, layer in replacements.items():
        set_module(target, name, layer)
    return target


@torch.no_grad()
def merge(model: nn.Module, *, inplace: bool = False) -> nn.Module:
    """Merge every factored layer back into a dense layer computing the same function."""
    target = model if inplace else copy.deepcopy(model)
    for name, layer in factored_layers(target).items():
        set_module(target, name, to_dense(layer))
    return target
