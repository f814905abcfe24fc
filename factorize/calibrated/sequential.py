"""The sequential refit: layers factored one at a time in forward order, each from the inputs it sees in the
partly compressed model, so later layers absorb the error of earlier ones.

Each layer needs the pair statistics of its inputs in the original and in the partly compressed model
(:func:`factorize.calibrated.stats.collect_pair_stats`), which costs a pass of both models over the calibration
batches up to that layer. On MiniLM (36 linear layers in 6 blocks, 272 sentences) those passes took 45 of the
66 s of the sequential build, because each pass starts again at the embeddings.

**Block inputs.** Layers inside one block of a stack of repeated blocks (an ``nn.ModuleList`` of two or more
modules of one class, each called once per forward: the blocks of every transformer) see only what the block
computes from its own inputs, and those inputs change only when a layer *before* the block is refitted. So when
the fit enters a block, one pass of each model stops at the block and keeps its inputs (positional and keyword
arguments, per batch), and every layer of the block is then fed by running that block alone on them
(:class:`BlockFeeds`). What keeps it exact:

* arguments that are neither tensors nor plain values (a key/value cache object) are passed as None: in a fresh
  forward the cache holds nothing for this block yet, and the layers' inputs do not depend on it;
* tensors are cloned for every run, so a block that writes into its inputs cannot change the next run;
* the first layer fed this way is also collected by full passes and the two compared (relative difference of
  every moment <= 1e-6); any difference, or an error, turns block inputs off for the rest of the call;
* both models' inputs of one block are held at a time, and not at all when they would take more than a quarter
  of the memory available.

Layers outside any such block (embeddings, a pooler, an output head) and models without one get full passes, as
before.
"""

from __future__ import annotations

import copy
import dataclasses
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

import torch
from torch import nn
from tqdm.auto import tqdm

from factorize.calibrated.aware import AwareFit, AwareSpectrum, center_for, decompose_fitted
from factorize.calibrated.memory import available_memory
from factorize.calibrated.stats import (
    InputStats,
    StopForward,
    as_batch_list,
    collect_pair_stats,
    eval_no_grad,
    forward_order,
    resolve_sites,
    statistics_side,
    stats_bytes,
)
from factorize.errors import FactorizeError
from factorize.execution import Execution
from factorize.model.count import count_bytes
from factorize.model.feed import feed
from factorize.model.hooks import forward_pre_hooks
from factorize.model.sites import get_module, matrix_of, set_module
from factorize.plan.entries import factored_names

CACHE_SHARE = 0.25  # both models' inputs of one block may take at most this share of the memory available
AGREEMENT = 1e-6  # relative difference allowed between block-fed and full-pass statistics of the checked layer
PLAIN = (torch.Tensor, type(None), bool, int, float, str)


def compress_sequential(
    model: nn.Module,
    plan: Mapping,
    batches: Iterable,
    fit: AwareFit | None = None,
    *,
    refit: bool = True,
    output_grams: Mapping[str, torch.Tensor] | None = None,
    execution: Execution | None = None,
    block_inputs: bool = True,
    **keywords: Any,
) -> tuple[nn.Module, dict[str, AwareSpectrum]]:
    """Factor the plan's sites one at a time in forward order, each from the inputs it sees in the partly
    compressed model, so later layers absorb the error of earlier ones.

    Args:
        model: the original model; not modified (a deep copy is compressed).
        plan: ranks per site (e.g. from :func:`factorize.plan.ranks.choose_ranks`); dense sites stay as they are.
        batches: calibration batches (batch contract); every site costs one pass of each model over them (the
            passes stop after the site when each site runs once per forward), or, inside a stack of repeated
            blocks, one run of its block (see the module notes).
        fit: :class:`AwareFit`, or its fields as keywords: ``method`` ``"whiten"`` (with ``refit``) or
            ``"scale"`` (``refit`` is then off); ``center`` as for :func:`aware_spectra`; ``refit_ridge``,
            ``ridge``, ``output_ridge`` as for :func:`decompose_aware`. The solver is always the Gram one.
        refit: fit the original layer's outputs from the compressed model's inputs (reduced-rank regression
            with a least-squares step, Izenman 1975); False only re-whitens with the new inputs. The refit needs
            the n x n moments: a layer wider than ``INPUT_SIDE_LIMIT`` at its input and narrower at its output is
            re-whitened from output-side statistics instead (:func:`factorize.calibrated.stats.statistics_side`).
            Embeddings are fitted from their token counts, which compression does not change.
        output_grams: see :func:`decompose_aware` (output weights are those of the original model).
        execution: :class:`~factorize.execution.Execution` (precision, progress bars on stderr), or its fields
            as keywords.
        block_inputs: run a block alone on its kept inputs instead of both whole models (False: full passes
            for every layer; the statistics agree to rounding either way).

    Returns:
        (compressed copy, name -> spectrum used for each factored site).
    """
    from factorize.rewrite.layers import factor_module

    fit, execution = AwareFit.from_keywords(fit, execution, keywords)
    fit = dataclasses.replace(fit, solver="gram")  # as before solvers were named: the refit's own eigensolve
    batch_list = as_batch_list(batches)
    names = factored_names(plan)
    sites = {s.name: s for s in resolve_sites(model, names)}
    order, calls = forward_order(model, list(sites.values()), batch_list[0])
    never = [n for n in order if calls[n] == 0]
    if never:
        raise FactorizeError("the calibration batches never reached some layers the plan factors", never,
                             fix="give sample inputs that run through these layers, or keep them dense")
    target = copy.deepcopy(model)
    feeds = BlockFeeds(model, target, batch_list, order, calls, enabled=block_inputs)
    spectra: dict[str, AwareSpectrum] = {}
    for name in tqdm(order, desc="sequential", unit="layer", disable=not execution.progress, leave=False):
        site = sites[name]
        side = statistics_side(site, prefer_input=True)  # the least-squares refit needs the n x n moments
        pair = feeds.pair_stats(site, side, stop_early=calls[name] == 1)
        if not refit or fit.method != "whiten":
            pair.cross = None
        W = matrix_of(get_module(model, name), site.kind)
        one_fit = dataclasses.replace(fit, center=center_for(site, fit.center))
        spec = decompose_fitted(W, pair, one_fit, (output_grams or {}).get(name), None, execution.seed,
                                execution.precision, name)
        r = min(int(plan["sites"][name]["rank"]), spec.computed_rank)
        B, A = spec.factors(r)
        layer = factor_module(get_module(target, name), site.kind, B, A)
        shift = spec.bias_shift(r)
        if shift is not None and layer.second.bias is not None:
            with torch.no_grad():
                layer.second.bias.add_(shift.to(layer.second.bias.dtype))
        set_module(target, name, layer)
        spectra[name] = spec
    return target, spectra


def refit_memory(model: nn.Module, sites: Iterable) -> int:
    """Bytes the sequential refit adds, roughly: the copy of the model it compresses, plus its widest layer's pair
    statistics (three n x n moments, or the output-side ones; see :func:`compress_sequential`). Block inputs are
    bounded on their own (CACHE_SHARE)."""
    widest = 0
    for site in sites:
        side = statistics_side(site, prefer_input=True)
        widest = max(widest, stats_bytes(site, side) * (3 if side == "input" and site.kind != "embedding" else 1))
    return count_bytes(model) + widest


def stacked_blocks(model: nn.Module, names: Iterable[str]) -> dict[str, str]:
    """Site name -> the block holding it: an element of an ``nn.ModuleList`` of two or more modules of one class
    (the outermost such element, e.g. ``encoder.layer.3``). Sites in no such block are left out; so is a site that
    is itself an element of the list."""
    lists = [name for name, m in model.named_modules()
             if isinstance(m, nn.ModuleList) and len(m) >= 2 and len({type(c) for c in m}) == 1]
    found = {}
    for site in names:
        for lst in lists:
            prefix = f"{lst}." if lst else ""
            rest = site[len(prefix):].split(".") if site.startswith(prefix) else []
            if len(rest) >= 2 and rest[0].isdigit():
                block = prefix + rest[0]
                if site not in found or len(block) < len(found[site]):
                    found[site] = block
    return found


class BlockFeeds:
    """Pair statistics for the sequential refit, fed from each block's kept inputs where that is exact (see the
    module notes); full passes of both models otherwise."""

    def __init__(self, reference: nn.Module, current: nn.Module, batches: Sequence[Any], order: Sequence[str],
                 calls: Mapping[str, int], *, enabled: bool = True) -> None:
        self.reference, self.current, self.batches = reference, current, list(batches)
        self.block_of: dict[str, str] = {}
        self.checked = False
        self._block: str | None = None
        self._inputs: tuple[list, list] | None = None
        if enabled:
            candidates = {n: b for n, b in stacked_blocks(reference, order).items() if calls[n] == 1}
            _, block_calls = forward_order(reference, sorted(set(candidates.values())), self.batches[0])
            self.block_of = {n: b for n, b in candidates.items() if block_calls[b] == 1}

    def off(self) -> None:
        self.block_of, self._block, self._inputs = {}, None, None

    def pair_stats(self, site, side: str, *, stop_early: bool) -> InputStats:
        """:func:`collect_pair_stats` for ``site``, from its block's inputs where possible."""
        def full() -> InputStats:
            return collect_pair_stats(self.reference, self.current, site, self.batches, stop_early=stop_early,
                                      side=side)

        runners = self._runners(site.name) if site.kind != "embedding" and side == "input" else None
        if runners is None:
            return full()
        try:
            fed = collect_pair_stats(self.reference, self.current, site, self.batches, stop_early=stop_early,
                                     side=side, runners=runners)
        except FactorizeError:
            if self.checked:
                raise
            self.off()
            return full()
        if not self.checked:
            self.checked = True
            reference = full()
            if not agree(fed, reference):
                self.off()
                return reference
        return fed

    def _runners(self, name: str):
        block = self.block_of.get(name)
        if block is None:
            return None
        if block != self._block:
            self._block, self._inputs = block, None
            kept = _capture(self.reference, block, self.batches)
            kept_current = _capture(self.current, block, self.batches) if kept is not None else None
            if kept_current is None:
                self.off()
                return None
            self._inputs = (kept, kept_current)
        kept, kept_current = self._inputs
        return _runner(self.reference, block, kept), _runner(self.current, block, kept_current)


def agree(a: InputStats, b: InputStats, tol: float = AGREEMENT) -> bool:
    """Whether two pair statistics of one site agree: same counts, every moment within ``tol`` relative."""
    if a.count != b.count:
        return False
    for key in ("second_moment", "cross", "reference_moment", "total", "reference_total", "abs_total"):
        x, y = getattr(a, key), getattr(b, key)
        if (x is None) != (y is None):
            return False
        if x is not None and float((x - y).norm()) > tol * max(float(y.norm()), 1e-30):
            return False
    return True


def _mapped(value, tensor, other=lambda v: v):
    """``value`` (a block argument) with ``tensor`` applied to every tensor in it and ``other`` to every other leaf,
    tuples, lists and dicts rebuilt around them."""
    if isinstance(value, torch.Tensor):
        return tensor(value)
    if isinstance(value, (tuple, list)):
        return type(value)(_mapped(v, tensor, other) for v in value)
    if isinstance(value, dict):
        return {k: _mapped(v, tensor, other) for k, v in value.items()}
    return other(value)


def _kept(value):
    """A block argument as kept: tensors detached, anything neither tensor nor plain value (a cache object) None."""
    return _mapped(value, torch.Tensor.detach, lambda v: v if isinstance(v, PLAIN) else None)


def _nbytes(value) -> int:
    sizes: list[int] = []
    _mapped(value, lambda t: sizes.append(t.numel() * t.element_size()))
    return sum(sizes)


def _capture(model: nn.Module, block: str, batches: Sequence[Any]) -> list | None:
    """Per batch, the (args, kwargs) ``block`` is called with in ``model``; None where a batch never reaches it or
    both models' copies would take more than CACHE_SHARE of the memory available."""
    kept: list = []
    budget = CACHE_SHARE * available_memory() / 2

    def hook(module, args, kwargs):
        kept.append((_kept(args), _kept(kwargs)))
        raise StopForward

    with forward_pre_hooks(model, {block: hook}, with_kwargs=True), eval_no_grad(model):
        for i, batch in enumerate(batches):
            try:
                feed(model, batch)
            except StopForward:
                pass
            except Exception:  # noqa: BLE001 -- the full passes that follow report the failure with its batch
                return None
            if len(kept) != i + 1:
                return None  # finished without reaching the block (or failed there: full passes will say why)
            if i == 0 and _nbytes(kept[0]) * len(batches) > budget:
                return None
    return kept


def _runner(model: nn.Module, block: str, kept: list):
    module = get_module(model, block)

    def run(i: int, batch: Any) -> None:
        args, kwargs = kept[i]
        module(*_mapped(args, torch.Tensor.clone), **_mapped(kwargs, torch.Tensor.clone))

    return run
