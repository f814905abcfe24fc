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

What a "row" is depends on the kind, so that C matches the site's matrix view (see
:mod:`factorize.calibrated.rows`; convs: unfolded patches). For an embedding the input is one-hot, so C is
diagonal and holds the token counts: only the diagonal is kept (``diagonal``), never a V x V matrix.

Batches follow the batch contract of :func:`factorize.model.feed.feed` (tensor -> ``model(x)``, tuple/list ->
``model(*x)``, dict -> ``model(**x)``). When a dict batch carries an ``attention_mask`` whose shape matches the
leading dimensions of a layer's input (B, T), padded positions are left out: they never reach the outputs that
matter and would only pollute the statistics.

Memory: one n x n float64 matrix per site on the input side (m x m on the output side, below).
``per_site=True`` runs the batches once per site with only that site's hook installed, so only one such
matrix is being filled at a time (and the forward pass stops right after the site where that is safe).

**The narrow side.** When a layer's output is narrower than its input (m < n: a conv with 1024 input channels
and 64 taps has n = 65,536 but perhaps m = 128 outputs), everything the activation-aware optimum needs fits in
m x m: minimising ||(W - W') X^T|| over rank r gives W' = U_r U_r^T W with U_r the top eigenvectors of W C W^T
(reduced-rank regression, Izenman 1975). ``side="output"`` statistics therefore hold K = sum (W x)(W x)^T
(``output_moment``, m x m), accumulated from the input rows in chunks (a conv's batch is unfolded a few samples at
a time) so no n x n matrix and no whole unfolded batch is ever formed, plus the n-vectors ``total``,
``abs_total`` and ``square_total`` (the diagonal of C, for the ridge and the rounding scales). K depends on W:
the weight's sums are kept (``weight_check``) and a decomposition with another weight is refused.
:func:`statistics_side` picks the side per layer by shape (embeddings keep their diagonal).
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Iterable, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any

import torch
from torch import nn
from tqdm.auto import tqdm

from factorize.calibrated.memory import check_memory
from factorize.calibrated.rows import CHUNK_BYTES, input_rows, row_pieces
from factorize.errors import FactorizeError, caller_stacklevel, printable
from factorize.model.feed import feed, token_mask
from factorize.model.hooks import forward_pre_hooks
from factorize.model.sites import Site, matrix_of, walk

ROW_CHUNK = 16384  # rows converted to float64 at a time, so a big conv batch never doubles in memory at once
WORK_COPIES = 3  # the whitening step holds about this many n x n float64 matrices per layer at once (C, L, L^-1)
INPUT_SIDE_LIMIT = 16384  # prefer_input: the input side up to this width (n x n float64 = 2 GiB), else the narrow one
SIDES = ("narrow", "input", "output")


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
    side: str = "input"  # "output": output_moment holds sum (W x)(W x)^T and no n x n matrix exists
    second_moment: torch.Tensor | None = None  # (n, n) sum x x^T
    output_moment: torch.Tensor | None = None  # (m, m) sum (W x)(W x)^T = W C W^T (output side)
    square_total: torch.Tensor | None = None  # (n,) sum x * x, the diagonal of C (output side)
    weight_check: tuple[float, float] | None = None  # (sum W, sum W^2) of the weight behind output_moment
    diagonal: torch.Tensor | None = None  # (n,) embedding: token counts (the diagonal of C)
    total: torch.Tensor | None = None  # (n,) sum x
    abs_total: torch.Tensor | None = None  # (n,) sum |x|
    cross: torch.Tensor | None = None  # (n, n) sum x_ref x^T (sequential mode)
    reference_moment: torch.Tensor | None = None  # (n, n) sum x_ref x_ref^T (sequential mode)
    reference_total: torch.Tensor | None = None  # (n,) sum x_ref (sequential mode)
    batches: int = 0  # batches that reached this site
    # how to read second_moment again (it came from a file): the whitening may then overwrite the moment's memory
    # with its Cholesky factor instead of copying it (:meth:`release_moment`); moment() reads it back when asked
    reread: Callable[[], torch.Tensor] | None = field(default=None, repr=False, compare=False)
    released: bool = field(default=False, repr=False, compare=False)

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
        return self.second_moment is None and self.side == "input" and not self.released

    @property
    def is_output_side(self) -> bool:
        return self.side == "output"

    def moment_diagonal(self) -> torch.Tensor:
        """The diagonal of C (n,), on either side."""
        if self.is_output_side:
            return self.square_total
        return self.diagonal if self.is_diagonal else self.moment().diagonal()

    def moment(self) -> torch.Tensor:
        """C = X^T X as a dense (n, n) matrix (built from the diagonal for an embedding)."""
        if self.is_output_side:
            raise FactorizeError(
                f"layer {printable(self.name)}: its statistics are on the output side (m x m); the n x n input "
                f"moment (n = {self.width}) was never formed",
                fix="use moment_diagonal(), or collect with side='input' where n x n fits in memory")
        if self.released:
            self.second_moment, self.released = self.reread(), False
        return torch.diag(self.diagonal) if self.second_moment is None else self.second_moment

    def release_moment(self) -> torch.Tensor:
        """Hand the n x n moment's memory to the caller as scratch (only when :attr:`reread` can give it back): the
        caller may overwrite the returned tensor; these statistics drop it and :meth:`moment` reads it again."""
        if self.reread is None or self.second_moment is None:
            raise FactorizeError(f"layer {printable(self.name)}: no moment to release (nothing can read it again)")
        C, self.second_moment, self.released = self.second_moment, None, True
        return C

    def covariance(self) -> torch.Tensor:
        """Centred second moment sum (x - mean)(x - mean)^T = C - N mean mean^T (n, n)."""
        mu = self.mean
        return self.moment() - self.count * torch.outer(mu, mu)

    def to_dict(self) -> dict:
        return {"name": self.name, "kind": self.kind, "width": self.width, "samples": self.count,
                "batches": self.batches, "side": self.side}


# ---------------------------------------------------------------------------------------------------------------
# accumulation


class StopForward(Exception):
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


GRAM_PARTS = 4  # add_gram: column blocks of a wide input (10 of 16 block products computed)


def add_gram(C: torch.Tensor, X: torch.Tensor) -> None:
    """C += X^T X for rows X (N, n), in C's dtype, keeping C exactly symmetric (it is, from zeros).

    Only the column blocks on and below the diagonal are multiplied; each block below is added to its place and,
    transposed, to its mirror, and each diagonal block's lower triangle is mirrored, so both halves receive the same
    bits. A plain ``addmm_`` does not give an exactly symmetric sum (measured: widths 64, 2048 and 5632), which kept
    the moments from being stored as their upper triangle; this is also about a quarter faster from width 2048
    (one thread: 0.64 s against 0.86 s at 2048 x 2048 rows, 4.8 s against 6.2 s at width 5632)."""
    n = int(X.shape[1])
    parts = GRAM_PARTS if n >= 256 else 1
    edges = [n * i // parts for i in range(parts + 1)]
    for i in range(parts):
        a, b = edges[i], edges[i + 1]
        for j in range(i + 1):
            c, d = edges[j], edges[j + 1]
            blk = X[:, a:b].T @ X[:, c:d]  # (b - a, d - c)
            if i == j:
                blk.tril_()
                blk += blk.tril(-1).T
                C[a:b, a:b] += blk
            else:
                C[a:b, c:d] += blk
                C[c:d, a:b] += blk.T


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
        add_gram(stats.second_moment, chunk)  # C += X^T X, exactly symmetric
        stats.total += chunk.sum(0)
        stats.abs_total += chunk.abs().sum(0)
    stats.count += int(rows.shape[0])


def weight_sums(W: torch.Tensor) -> tuple[float, float]:
    """(sum W, sum W^2) of a float64 matrix view: the fingerprint output-side statistics are tied to."""
    return float(W.sum()), float((W * W).sum())


def accumulate_output(stats: InputStats, rows: torch.Tensor, W: torch.Tensor) -> None:
    """Add input rows (N, n) to output-side ``stats``: K += (X W^T)^T (X W^T) for the float64 matrix view ``W``
    (m, n), with the n-vectors of the rows, a chunk of at most CHUNK_BYTES of rows at a time."""
    n, m = stats.width, W.shape[0]
    if stats.output_moment is None:
        dev = W.device
        stats.output_moment = torch.zeros(m, m, dtype=torch.float64, device=dev)
        stats.total, stats.abs_total, stats.square_total = (torch.zeros(n, dtype=torch.float64, device=dev)
                                                            for _ in range(3))
        stats.weight_check = weight_sums(W)
    step = max(1, min(ROW_CHUNK, CHUNK_BYTES // (8 * n)))
    for start in range(0, rows.shape[0], step):
        chunk = rows[start:start + step].to(device=W.device, dtype=torch.float64)  # (c, n)
        y = chunk @ W.T  # (c, m): the layer's (pre-bias) outputs on these rows
        stats.output_moment.addmm_(y.T, y)  # K += Y^T Y
        stats.total += chunk.sum(0)
        stats.abs_total += chunk.abs().sum(0)
        stats.square_total += (chunk * chunk).sum(0)
    stats.count += int(rows.shape[0])


def _first_tensor(args: tuple, kwargs: dict) -> torch.Tensor | None:
    for v in (*args, *kwargs.values()):
        if isinstance(v, torch.Tensor):
            return v
    return None


def _make_hook(site: Site, stats: InputStats, state: _State, sink=None):
    """A forward pre-hook that turns the site's input into rows and accumulates them (or hands them to ``sink``)."""

    weight: list[torch.Tensor] = []  # output side: the float64 matrix view, made on the first call

    def hook(module, args, kwargs):
        x = _first_tensor(args, kwargs)
        if x is None:
            return None
        with torch.no_grad():
            if stats.is_output_side and sink is None:
                if not weight:
                    weight.append(matrix_of(module, site.kind).detach().to(device=x.device, dtype=torch.float64))
                for rows in row_pieces(module, site.kind, x.detach(), state.mask):
                    check_finite(rows, site.name, state.batch)
                    accumulate_output(stats, rows, weight[0])
            else:
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
            raise StopForward
        return None

    return hook


@contextmanager
def eval_no_grad(model: nn.Module):
    """Run ``model`` in eval mode under ``torch.no_grad()`` for the ``with`` block; its training flag is restored."""
    was_training = model.training
    model.eval()
    try:
        with torch.no_grad():
            yield
    finally:
        model.train(was_training)


def _run(model: nn.Module, batches: Sequence[Any], state: _State, bar, start: int = 0, runner=None) -> None:
    """Feed every batch, turning a failure into an error that names the batch (numbered from ``start``).
    ``runner(i, batch)``, if given, runs batch i instead of ``model`` (a block fed its kept inputs)."""
    for i, batch in enumerate(batches, start):
        state.batch, state.mask = i, token_mask(batch)
        state.seen = set()
        try:
            runner(i, batch) if runner is not None else feed(model, batch)
        except StopForward:
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


def forward_order(model: nn.Module, sites: Sequence[Site | str], batch: Any) -> tuple[list[str], dict[str, int]]:
    """The order in which a forward pass on ``batch`` first calls each site (or named module), and how often each
    is called.

    Sites never called come last, in the order given, with a count of 0.
    """
    names = [s if isinstance(s, str) else s.name for s in sites]
    order: list[str] = []
    calls = dict.fromkeys(names, 0)

    def hook_for(name):
        def hook(module, args):
            if calls[name] == 0:
                order.append(name)
            calls[name] += 1

        return hook

    with forward_pre_hooks(model, {n: hook_for(n) for n in names}), eval_no_grad(model):
        _run(model, [batch], _State(), _NoBar())
    order += [n for n in names if calls[n] == 0]
    return order, calls


class _NoBar:
    def update(self, n: int = 1) -> None:
        pass

    def close(self) -> None:
        pass


def statistics_side(site: Site, side: str = "narrow", *, prefer_input: bool = False) -> str:
    """``"input"`` or ``"output"``: where ``site``'s statistics live. ``"narrow"``: the output side when the output
    is narrower than the input (m < n), else the input side; embeddings always keep their input diagonal.
    ``prefer_input``: the input side unless it is wider than INPUT_SIDE_LIMIT (for what needs the n x n moment:
    error-feedback rounding, the sequential least-squares refit)."""
    if side not in SIDES:
        raise FactorizeError(f"unknown statistics side {side!r}", fix=f"use one of {', '.join(SIDES)}")
    m, n = site.shape
    if site.kind == "embedding" or side == "input":
        return "input"
    if side == "output" or (m < n and not (prefer_input and n <= INPUT_SIDE_LIMIT)):
        return "output"
    return "input"


def stats_bytes(site: Site, side: str = "input") -> int:
    """Bytes the statistics of ``site`` take while whitening (embeddings keep a diagonal only). Output side: the
    m x m moment and its work copies, the float64 weight view, the n-vectors and one chunk of rows."""
    m, n = site.shape
    if site.kind == "embedding":
        return 8 * n * 4
    if statistics_side(site, side) == "output":
        return 8 * ((WORK_COPIES + 1) * m * m + m * n + 4 * n) + 2 * CHUNK_BYTES
    return 8 * n * WORK_COPIES * n


def collect_stats(
    model: nn.Module,
    sites: Iterable[Site | str] | None,
    batches: Iterable[Any],
    *,
    progress: bool = False,
    per_site: bool = False,
    memory_limit: int | None = None,
    side: str = "input",
    prefer_input: bool = False,
) -> dict[str, InputStats]:
    """Second moment of every site's inputs (or, on the narrow side, of its outputs), streamed over the batches.

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
        side: ``"input"`` (always the n x n input moment), ``"narrow"`` (per layer, the narrower of input and
            output, see :func:`statistics_side`; what :class:`~factorize.calibrated.search.Calibration` uses) or
            ``"output"``.
        prefer_input: with ``"narrow"``, keep the input side up to INPUT_SIDE_LIMIT wide (see
            :func:`statistics_side`).

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
    sides = {s.name: statistics_side(s, side, prefer_input=prefer_input) for s in site_list}
    check_memory({s.name: stats_bytes(s, sides[s.name]) for s in site_list}, "input statistics", limit=memory_limit)
    batch_list = as_batch_list(batches)
    stats = {s.name: InputStats(s.name, s.kind, s.shape[1], side=sides[s.name]) for s in site_list}
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
    with forward_pre_hooks(model, hooks, with_kwargs=True), eval_no_grad(model):
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
    side: str = "input",
    runners: tuple | None = None,
) -> InputStats:
    """Statistics of one site's inputs in two models fed the same batches (sequential mode).

    ``current`` is the partly compressed model, ``reference`` the original; rows line up one to one (same
    batch, same positions). Fills ``second_moment``/``total``/``abs_total`` from ``current``'s inputs X, and
    ``reference_moment``/``reference_total``/``cross`` (sum x_ref x^T) from the pairs, which is what the
    sequential refit needs to map the compressed model's inputs onto the original's outputs.
    ``stop_early`` ends each forward pass once the site has run (safe only when it runs once per pass).
    ``side="output"``: only ``current``'s inputs, as output-side statistics K = sum (W x)(W x)^T with W the site's
    weight in ``current`` (still the original's when the sites are done in forward order); the least-squares
    refit needs the n x n moments and is then not possible, so no pair moments are kept. An embedding gets its
    plain statistics (token counts) from ``current``: its input is the token ids, which compression never changes.
    ``runners``: (reference, current) callables ``run(i, batch)`` that run batch i in place of the whole models
    (input side only; see :class:`factorize.calibrated.sequential.BlockFeeds`).
    """
    if site.kind == "embedding" or statistics_side(site, side) == "output":
        # an embedding's input is token ids, the same in both models: its counts (no pair moments) are all a
        # sequential fit can use, so it is fitted as in the per-layer path
        kept = "input" if site.kind == "embedding" else "output"
        stats = InputStats(site.name, site.kind, site.shape[1], side=kept)
        bar = tqdm(total=len(batches), desc=f"calibrate {printable(site.name)}", unit="batch",
                   disable=not progress, leave=False)
        try:
            _collect(current, [site], list(batches), {site.name: stats}, bar, stop_early=stop_early)
        finally:
            bar.close()
        return stats
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
              eval_no_grad(reference), eval_no_grad(current)):
            for i, batch in enumerate(batches):
                ref_rows.clear(), cur_rows.clear()
                _run(reference, [batch], state, _NoBar(), start=i, runner=runners and runners[0])
                _run(current, [batch], state, _NoBar(), start=i, runner=runners and runners[1])
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


