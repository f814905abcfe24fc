"""Calibration: what each factorizable layer actually sees, as the second moment of its inputs.

For a site with matrix view W (m x n) and inputs x_1..x_N (the rows of X, N x n), forward hooks accumulate,
streamed over the sample batches and in float64:

* ``second_moment``  C = X^T X = sum_i x_i x_i^T  (n x n)
* ``total``          sum_i x_i                    (n,)   -- the mean, for centring and bias correction
* ``abs_total``      sum_i |x_i|                  (n,)   -- per-channel activation magnitude (ASVD scaling)
* ``count``          N

The output error of any replacement W' on these inputs is then known without keeping X:
||(W - W') X^T||_F^2 = trace((W - W') C (W - W')^T) (common practice; the basis of reduced-rank regression,
Izenman 1975, and of SVD-LLM's truncation-aware whitening, Wang et al. 2024).

What a "row" is depends on the kind, so that C matches the site's matrix view (see :mod:`factorize.walk`):

* linear / transposed projection: the input flattened over every leading dimension (tokens, positions);
* conv_transpose1d / 2d: each input position's channel vector (the matrix view is applied per position);
* conv1d / conv2d / conv3d: the unfolded input patches (``torch.nn.functional.unfold`` with the layer's kernel, stride,
  padding and dilation), so rows have length in_channels * prod(kernel), the conv's matrix view;
* embedding: the token ids; the input is one-hot, so C is diagonal and holds the token counts. Only the
  diagonal is kept (``diagonal``), never a V x V matrix.

Batches follow the batch contract of :func:`factorize.model.feed.feed` (tensor -> ``model(x)``, tuple/list ->
``model(*x)``, dict -> ``model(**x)``). When a dict batch carries an ``attention_mask`` whose shape matches the
leading dimensions of a layer's input (B, T), padded positions are left out: they never reach the outputs that
matter and would only pollute the statistics.

Memory: one n x n float64 matrix per site. ``per_site=True`` runs the batches once per site with only that
site's hook installed, so only one such matrix is being filled at a time (and the forward pass stops right
after the site where that is safe).
"""

from __future__ import annotations

import os
import warnings
from collections.abc import Iterable, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any

import torch
import torch.nn.functional as F
from torch import nn
from tqdm.auto import tqdm

from factorize.errors import FactorizeError, caller_stacklevel, printable
from factorize.model.feed import feed, token_mask
from factorize.model.hooks import forward_pre_hooks
from factorize.model.sites import Site, walk
from factorize.storage import human_bytes, proc_field

ROW_CHUNK = 16384  # rows converted to float64 at a time, so a big conv batch never doubles in memory at once
MEMORY_SHARE = 0.5  # statistics may take at most this share of the memory available when collection starts
WORK_COPIES = 3  # the whitening step holds about this many n x n float64 matrices per layer at once (C, L, L^-1)


@dataclass
class InputStats:
    """Streamed statistics of one site's inputs (float64, on the device the activations came from).

    ``second_moment`` is None for embeddings, whose (diagonal) second moment is ``diagonal`` (token counts).
    The ``reference_*`` and ``cross`` fields are only filled by :func:`collect_pair_stats` (sequential mode):
    there X holds the inputs seen in the partly compressed model and X_ref those seen in the original, row by row.
    """

    name: str
    kind: str
    width: int  # n, the length of one input row
    count: int = 0  # N, rows seen
    second_moment: torch.Tensor | None = None  # (n, n) sum x x^T
    diagonal: torch.Tensor | None = None  # (n,) embedding: token counts (the diagonal of C)
    total: torch.Tensor | None = None  # (n,) sum x
    abs_total: torch.Tensor | None = None  # (n,) sum |x|
    cross: torch.Tensor | None = None  # (n, n) sum x_ref x^T (sequential mode)
    reference_moment: torch.Tensor | None = None  # (n, n) sum x_ref x_ref^T (sequential mode)
    reference_total: torch.Tensor | None = None  # (n,) sum x_ref (sequential mode)
    batches: int = 0  # batches that reached this site

    @property
    def mean(self) -> torch.Tensor:
        """Mean input row (n,)."""
        return self.total / max(self.count, 1)

    @property
    def abs_mean(self) -> torch.Tensor:
        """Mean absolute value per input channel (n,)."""
        return self.abs_total / max(self.count, 1)

    @property
    def is_diagonal(self) -> bool:
        return self.second_moment is None

    def moment(self) -> torch.Tensor:
        """C = X^T X as a dense (n, n) matrix (built from the diagonal for an embedding)."""
        return torch.diag(self.diagonal) if self.second_moment is None else self.second_moment

    def covariance(self) -> torch.Tensor:
        """Centred second moment sum (x - mean)(x - mean)^T = C - N mean mean^T (n, n)."""
        mu = self.mean
        return self.moment() - self.count * torch.outer(mu, mu)

    def to_dict(self) -> dict:
        return {"name": self.name, "kind": self.kind, "width": self.width, "samples": self.count,
                "batches": self.batches}


# ---------------------------------------------------------------------------------------------------------------
# rows: each kind's input as a matrix whose rows match the site's matrix view


def _conv_patches(module: nn.Module, x: torch.Tensor, kind: str) -> torch.Tensor:
    """Unfolded patches (rows, in * prod(kernel)) of a conv input, in the layout of ``weight.reshape(out, -1)``."""
    if kind == "conv1d":
        if x.dim() == 2:
            x = x.unsqueeze(0)  # unbatched (C, L)
        pad = module._reversed_padding_repeated_twice  # (left, right); also covers padding="same"
        if any(pad):
            x = F.pad(x, pad, mode="constant" if module.padding_mode == "zeros" else module.padding_mode)
        x4 = x.unsqueeze(2)  # (B, C, 1, L)
        cols = F.unfold(x4, (1, module.kernel_size[0]), dilation=(1, module.dilation[0]), stride=(1, module.stride[0]))
    elif kind == "conv3d":
        return _patches_3d(module, x)
    else:
        if x.dim() == 3:
            x = x.unsqueeze(0)  # unbatched (C, H, W)
        pad = module._reversed_padding_repeated_twice
        if any(pad):
            x = F.pad(x, pad, mode="constant" if module.padding_mode == "zeros" else module.padding_mode)
        cols = F.unfold(x, module.kernel_size, dilation=module.dilation, stride=module.stride)  # (B, C*kh*kw, L)
    return cols.transpose(1, 2).reshape(-1, cols.shape[1])  # (B*L, C*k)


def _patches_3d(module: nn.Module, x: torch.Tensor) -> torch.Tensor:
    """Conv3d patches (rows, in * kd * kh * kw) via ``Tensor.unfold`` per spatial axis (``F.unfold`` is 2-D only);
    a dilated window is unfolded whole, then every ``dilation``-th element kept."""
    if x.dim() == 4:
        x = x.unsqueeze(0)  # unbatched (C, D, H, W)
    pad = module._reversed_padding_repeated_twice
    if any(pad):
        x = F.pad(x, pad, mode="constant" if module.padding_mode == "zeros" else module.padding_mode)
    for axis, (k, s, d) in enumerate(zip(module.kernel_size, module.stride, module.dilation)):
        x = x.unfold(2 + axis, (k - 1) * d + 1, s)[..., ::d]  # (B, C, ..., windows, k) appended per axis
    b, _, od, oh, ow = x.shape[:5]
    return x.permute(0, 2, 3, 4, 1, 5, 6, 7).reshape(b * od * oh * ow, -1)  # (B*L, C*kd*kh*kw)


def input_rows(module: nn.Module, kind: str, x: torch.Tensor, mask: torch.Tensor | None = None) -> torch.Tensor:
    """One site's input as rows matching its matrix view (embedding: the flat token ids).

    ``mask`` (B, T) drops padded positions of linear / transposed / embedding inputs whose leading dimensions
    are (B, T); it is ignored where the shapes do not line up (convolutions, pooled inputs).
    """
    if kind in ("conv1d", "conv2d", "conv3d"):
        return _conv_patches(module, x, kind)
    if kind.startswith("conv_transpose"):  # the 1x1 first factor sees each position's channel vector
        batched = x.dim() == (3 if kind == "conv_transpose1d" else 4)
        return (x.movedim(1, -1) if batched else x.movedim(0, -1)).reshape(-1, x.shape[1 if batched else 0])
    lead = x.shape if kind == "embedding" else x.shape[:-1]
    if mask is not None and tuple(mask.shape) == tuple(lead):
        keep = mask.to(x.device).bool()
        return x[keep]  # (rows, n) or (rows,) ids
    return x.reshape(-1) if kind == "embedding" else x.reshape(-1, x.shape[-1])


# ---------------------------------------------------------------------------------------------------------------
# accumulation


class _StopForward(Exception):
    """Raised by a hook to end a forward pass early once everything needed was captured."""


@dataclass
class _State:
    batch: int = 0  # index of the batch being fed
    mask: torch.Tensor | None = None  # its attention mask, if any
    stop_after: set = field(default_factory=set)  # sites whose capture ends the forward pass (early stop)
    seen: set = field(default_factory=set)  # sites already counted for the current batch


def check_finite(rows: torch.Tensor, name: str, batch: int) -> None:
    if rows.is_floating_point() and not bool(torch.isfinite(rows).all()):
        bad = int((~torch.isfinite(rows)).sum())
        raise FactorizeError(
            f"layer {name}: {bad} non-finite activation value(s) (NaN or Inf) in its input on calibration batch "
            f"{batch}",
            fix="check that batch's inputs and the layers before this one (a NaN upstream spreads), or exclude the "
            "layer with exclude=[...]",
        )


def accumulate(stats: InputStats, rows: torch.Tensor) -> None:
    """Add rows (N, n) -- or token ids (N,) for an embedding -- to ``stats``, in float64."""
    if stats.kind == "embedding":
        ids = rows.reshape(-1).to(torch.int64)
        counts = torch.bincount(ids, minlength=stats.width).to(torch.float64)  # (V,)
        if counts.shape[0] > stats.width:
            raise FactorizeError(f"layer {stats.name}: token id {int(ids.max())} is outside the table of {stats.width}")
        for attr in ("diagonal", "total", "abs_total"):  # one-hot rows: x x^T diagonal = x = |x| = counts
            cur = getattr(stats, attr)
            setattr(stats, attr, counts.clone() if cur is None else cur + counts.to(cur.device))
        stats.count += int(ids.numel())
        return
    n = stats.width
    if stats.second_moment is None:
        dev = rows.device
        stats.second_moment = torch.zeros(n, n, dtype=torch.float64, device=dev)
        stats.total = torch.zeros(n, dtype=torch.float64, device=dev)
        stats.abs_total = torch.zeros(n, dtype=torch.float64, device=dev)
    for start in range(0, rows.shape[0], ROW_CHUNK):
        chunk = rows[start:start + ROW_CHUNK].to(device=stats.second_moment.device, dtype=torch.float64)  # (c, n)
        stats.second_moment.addmm_(chunk.T, chunk)  # C += X^T X
        stats.total += chunk.sum(0)
        stats.abs_total += chunk.abs().sum(0)
    stats.count += int(rows.shape[0])


def _first_tensor(args: tuple, kwargs: dict) -> torch.Tensor | None:
    for v in (*args, *kwargs.values()):
        if isinstance(v, torch.Tensor):
            return v
    return None


def _make_hook(site: Site, stats: InputStats, state: _State, sink=None):
    """A forward pre-hook that turns the site's input into rows and accumulates them (or hands them to ``sink``)."""

    def hook(module, args, kwargs):
        x = _first_tensor(args, kwargs)
        if x is None:
            return None
        with torch.no_grad():
            rows = input_rows(module, site.kind, x.detach(), state.mask)
            check_finite(rows, site.name, state.batch)
            if sink is not None:
                sink(rows)
            else:
                accumulate(stats, rows)
        if site.name not in state.seen:
            state.seen.add(site.name)
            stats.batches += 1
        if site.name in state.stop_after:
            raise _StopForward
        return None

    return hook


@contextmanager
def _eval_no_grad(model: nn.Module):
    was_training = model.training
    model.eval()
    try:
        with torch.no_grad():
            yield
    finally:
        model.train(was_training)


def _run(model: nn.Module, batches: Sequence[Any], state: _State, bar, start: int = 0) -> None:
    """Feed every batch, turning a failure into an error that names the batch (numbered from ``start``)."""
    for i, batch in enumerate(batches, start):
        state.batch, state.mask = i, token_mask(batch)
        state.seen = set()
        try:
            feed(model, batch)
        except _StopForward:
            pass
        except FactorizeError:
            raise
        except Exception as err:  # any failure of the user's model on a batch is reported as such
            raise FactorizeError(
                f"calibration batch {i} did not run through the model: {type(err).__name__}: {err}",
                fix="give batches the model accepts: a tensor is fed as model(x), a tuple or list as model(*x), a "
                "dict (e.g. tokenizer output) as model(**x)",
            ) from err
        bar.update()


# ---------------------------------------------------------------------------------------------------------------
# public


def resolve_sites(model: nn.Module, sites: Iterable[Site | str] | None) -> list[Site]:
    """Sites from :func:`factorize.model.sites.walk`, qualified names, or None (every site of the model)."""
    found = walk(model)
    if sites is None:
        return list(found.sites)
    by_name = found.by_name()
    out, missing = [], []
    for s in sites:
        name = s.name if isinstance(s, Site) else s
        if name in by_name:
            out.append(by_name[name])
        else:
            missing.append(str(name))
    if missing:
        raise FactorizeError("no factorizable layer of that name in the model", missing,
                             fix="use names from factorize.walk(model).sites")
    return out


def as_batch_list(batches: Any) -> list:
    if isinstance(batches, (torch.Tensor, Mapping)):
        return [batches]  # one batch given on its own
    items = list(batches)
    if not items:
        raise FactorizeError("no calibration batches", fix="give at least one batch of sample inputs")
    return items


def forward_order(model: nn.Module, sites: Sequence[Site], batch: Any) -> tuple[list[str], dict[str, int]]:
    """The order in which a forward pass on ``batch`` first calls each site, and how often each is called.

    Sites never called come last, in module order, with a count of 0.
    """
    order: list[str] = []
    calls = {s.name: 0 for s in sites}

    def hook_for(name):
        def hook(module, args):
            if calls[name] == 0:
                order.append(name)
            calls[name] += 1

        return hook

    with forward_pre_hooks(model, {s.name: hook_for(s.name) for s in sites}), _eval_no_grad(model):
        _run(model, [batch], _State(), _NoBar())
    order += [s.name for s in sites if calls[s.name] == 0]
    return order, calls


class _NoBar:
    def update(self, n: int = 1) -> None:
        pass

    def close(self) -> None:
        pass


def available_memory() -> int:
    """Bytes of memory available to this process now (MemAvailable on Linux; else the free physical pages)."""
    value = proc_field("/proc/meminfo", "MemAvailable")  # in kB
    if value is not None:
        return int(value) * 1024
    try:
        return os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (ValueError, OSError, AttributeError):
        return 2**63 - 1  # unknown: do not refuse


def check_memory(needs: dict[str, int], what: str, *, limit: int | None = None) -> None:
    """Refuse, before anything is allocated, statistics whose matrices would not fit in memory.

    ``needs``: bytes per layer. ``limit``: the bytes allowed (default: MEMORY_SHARE of the memory available now).
    The error names every layer that alone exceeds the limit, with its bytes, and the way out.
    """
    source = "the limit given" if limit is not None else "half of the memory available now"
    limit = int(MEMORY_SHARE * available_memory()) if limit is None else limit
    total = sum(needs.values())
    if total <= limit:
        return
    big = sorted(((b, n) for n, b in needs.items() if b > limit / 4), reverse=True) or \
        sorted(((b, n) for n, b in needs.items()), reverse=True)[:5]
    raise FactorizeError(
        f"the {what} of {len(needs)} layers would need {human_bytes(total)}, more than the {human_bytes(limit)} "
        f"allowed ({source})",
        [f"{name}: {human_bytes(b)}" for b, name in big],
        fix="leave the widest layers out of calibration (exclude=[...] / --exclude, or compress them without "
        "calibration in a second call), compress fewer layers per call (include=...), or free memory",
    )


def stats_bytes(site: Site) -> int:
    """Bytes the input statistics of ``site`` take while whitening (embeddings keep a diagonal only)."""
    n = site.shape[1]
    return 8 * n * (4 if site.kind == "embedding" else WORK_COPIES * n)


def collect_stats(
    model: nn.Module,
    sites: Iterable[Site | str] | None,
    batches: Iterable[Any],
    *,
    progress: bool = False,
    per_site: bool = False,
    memory_limit: int | None = None,
) -> dict[str, InputStats]:
    """Input second moment of every site, streamed over the calibration batches.

    Args:
        model: the model to run (not modified; it runs in eval mode under ``torch.no_grad()``, and its training
            flag is restored).
        sites: :class:`~factorize.model.sites.Site` objects, qualified names, or None for every site.
        batches: sample-input batches under the batch contract; iterated once (``per_site=False``) or once per
            site, so a generator is materialised into a list first.
        progress: a progress bar on stderr.
        per_site: collect one site at a time (one n x n matrix held while collecting, one pass per site) instead
            of all sites in one pass.
        memory_limit: bytes the statistics may take (default: half of the memory available now); checked
            before anything is allocated.

    Returns:
        name -> :class:`InputStats`, in site order. A site the batches never reach has ``count == 0``.

    Raises:
        FactorizeError: a batch fails in the model (its index and the error are named), or non-finite
            activations reach a site (the layer is named).

    Warns:
        When a site saw fewer rows than its input width: its second moment is then singular and the
        activation-aware decomposition adds a ridge (see :mod:`factorize.calibrated.aware`).
    """
    site_list = resolve_sites(model, sites)
    check_memory({s.name: stats_bytes(s) for s in site_list}, "input statistics", limit=memory_limit)
    batch_list = as_batch_list(batches)
    stats = {s.name: InputStats(s.name, s.kind, s.shape[1]) for s in site_list}
    if per_site:
        _, calls = forward_order(model, site_list, batch_list[0])
        once = all(c == 1 for c in calls.values())
        bar = tqdm(total=len(batch_list) * len(site_list), desc="calibrate", unit="batch", disable=not progress,
                   leave=False)
        try:
            for s in site_list:
                _collect(model, [s], batch_list, stats, bar, stop_early=once)
        finally:
            bar.close()
    else:
        bar = tqdm(total=len(batch_list), desc="calibrate", unit="batch", disable=not progress, leave=False)
        try:
            _collect(model, site_list, batch_list, stats, bar, stop_early=False)
        finally:
            bar.close()
    _warn_few_samples(stats.values())
    return stats


def _collect(model, sites, batches, stats, bar, *, stop_early: bool) -> None:
    state = _State(stop_after={s.name for s in sites} if stop_early and len(sites) == 1 else set())
    hooks = {s.name: _make_hook(s, stats[s.name], state) for s in sites}
    with forward_pre_hooks(model, hooks, with_kwargs=True), _eval_no_grad(model):
        _run(model, batches, state, bar)


def _warn_few_samples(stats: Iterable[InputStats]) -> None:
    few = [f"{s.name}: {s.count} samples for input width {s.width}" for s in stats
           if 0 < s.count < s.width and s.kind != "embedding"]
    if few:
        warnings.warn(
            "too few calibration samples for some layers; their input second moment is singular, so the "
            "activation-aware decomposition adds a ridge there (more sample inputs fix this):\n  "
            + "\n  ".join(few),
            stacklevel=caller_stacklevel(),  # the user's line, however deep the call inside factorize
        )


def collect_pair_stats(
    reference: nn.Module,
    current: nn.Module,
    site: Site,
    batches: Sequence[Any],
    *,
    progress: bool = False,
    stop_early: bool = True,
) -> InputStats:
    """Statistics of one site's inputs in two models fed the same batches (sequential mode).

    ``current`` is the partly compressed model, ``reference`` the original; rows line up one to one (same
    batch, same positions). Fills ``second_moment``/``total``/``abs_total`` from ``current``'s inputs X, and
    ``reference_moment``/``reference_total``/``cross`` (sum x_ref x^T) from the pairs, which is what the
    sequential refit needs to map the compressed model's inputs onto the original's outputs.
    ``stop_early`` ends each forward pass once the site has run (safe only when it runs once per pass).
    """
    if site.kind == "embedding":
        raise FactorizeError(f"{site.name}: sequential refit is not defined for embeddings (their input is token "
                             "ids, unchanged by compression)", fix="compress embeddings without sequential=")
    stats = InputStats(site.name, site.kind, site.shape[1])
    ref_stats = InputStats(site.name, site.kind, site.shape[1])
    state = _State(stop_after={site.name} if stop_early else set())
    ref_rows: list[torch.Tensor] = []
    cur_rows: list[torch.Tensor] = []
    ref_hook = {site.name: _make_hook(site, ref_stats, state, sink=ref_rows.append)}
    cur_hook = {site.name: _make_hook(site, stats, state, sink=cur_rows.append)}
    bar = tqdm(total=len(batches), desc=f"calibrate {printable(site.name)}", unit="batch", disable=not progress,
               leave=False)
    try:
        with (forward_pre_hooks(reference, ref_hook, with_kwargs=True),
              forward_pre_hooks(current, cur_hook, with_kwargs=True),
              _eval_no_grad(reference), _eval_no_grad(current)):
            for i, batch in enumerate(batches):
                ref_rows.clear(), cur_rows.clear()
                _run(reference, [batch], state, _NoBar(), start=i)
                _run(current, [batch], state, _NoBar(), start=i)
                _accumulate_pair(stats, ref_stats, torch.cat(ref_rows) if ref_rows else None,
                                 torch.cat(cur_rows) if cur_rows else None)
                bar.update()
    finally:
        bar.close()
    stats.reference_moment, stats.reference_total = ref_stats.second_moment, ref_stats.total
    stats.batches = len(batches)
    return stats


def _accumulate_pair(stats: InputStats, ref_stats: InputStats, xr: torch.Tensor | None, x: torch.Tensor | None) -> None:
    if xr is None and x is None:
        return
    if xr is None or x is None or xr.shape != x.shape:
        raise FactorizeError(
            f"layer {stats.name}: the original and the partly compressed model fed it different inputs "
            f"({None if xr is None else tuple(xr.shape)} vs {None if x is None else tuple(x.shape)})",
            fix="sequential mode needs a model whose layers see the same positions whatever the weights; "
            "compress without sequential=",
        )
    accumulate(stats, x)
    accumulate(ref_stats, xr)
    if stats.cross is None:
        stats.cross = torch.zeros(stats.width, stats.width, dtype=torch.float64, device=stats.second_moment.device)
    for start in range(0, x.shape[0], ROW_CHUNK):
        a = xr[start:start + ROW_CHUNK].to(device=stats.cross.device, dtype=torch.float64)  # (c, n)
        b = x[start:start + ROW_CHUNK].to(device=stats.cross.device, dtype=torch.float64)  # (c, n)
        stats.cross.addmm_(a.T, b)  # sum x_ref x^T


# ---------------------------------------------------------------------------------------------------------------
# output side: how much each direction of a layer's output moves the model's final output


