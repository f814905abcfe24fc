"""Heal a compressed model: fine-tune its factors to reproduce the original model's outputs (distillation).

After factorization a short fine-tune wins back most of what the truncation cost. ``heal`` trains the
compressed model (the *student*) to match the original (the *teacher*) on sample inputs; no labels are needed.

The losses (``loss=``: ``"kl"``, ``"mse"``, ``"cosine"``, or ``"auto"`` to pick one from the teacher's output)
and the masking of padded positions are described in :mod:`factorize.training.losses`; the learning-rate
schedules in :mod:`factorize.training.schedule`; the checking of the arguments and the preparation of both
models in :mod:`factorize.training.setup`. This module holds ``heal`` and the training loop.

``match_layers`` adds, for every factored layer, the relative squared error between its output and the output of
the teacher's dense layer of the same name, ``||y_s - y_t||^2 / ||y_t||^2`` (matching intermediate
representations: Romero et al., "FitNets: hints for thin deep nets", ICLR 2015 -- cited from memory).

Safety: the held-out drift (:mod:`factorize.training.watch`) is measured before training (step 0) and every
``eval_every`` steps; the state with the best held-out drift, step 0 included, is restored at the end, so healing
never returns a model that drifts more on the held-out inputs than the unhealed one. Drift measured on sample
inputs is no guarantee of behaviour on other inputs; use in safety-relevant settings needs re-validation under
the rules that govern it.

Determinism: the order of the training batches comes from a ``torch.Generator`` seeded with ``seed``, and both
models run in eval mode (no dropout), so on the CPU the same inputs and seed give identical weights. On a GPU some
kernels are not deterministic, so results may vary slightly between runs.
"""

from __future__ import annotations

import math
import time
import warnings
from collections.abc import Iterable, Iterator, Mapping, Sequence
from contextlib import ExitStack
from dataclasses import asdict, dataclass
from typing import Any

import torch
from torch import nn
from tqdm.auto import tqdm

from factorize.errors import FactorizeError, caller_stacklevel
from factorize.model.feed import feed, primary_output
from factorize.model.hooks import Hook, forward_hooks
from factorize.rewrite.layers import factored_layers
from factorize.training.losses import (
    distill_loss,
    layer_match_loss,
    resolve_loss,
    row_mask,
)
from factorize.training.schedule import lr_factor
from factorize.training.setup import METRICS, HealOptions, session, validate
from factorize.training.watch import label, mean_next_token_loss, measure, resolve_metric


@dataclass
class HealCheck:
    """One held-out measurement."""

    step: int  # optimizer steps taken before the measurement (0: the unhealed model)
    drift: float  # the value of the chosen metric
    metrics: dict[str, float]  # everything measured (factorize.training.watch.measure)
    loss: float | None  # mean training loss over the steps since the previous check (None at step 0)


@dataclass
class HealResult:
    """What :func:`heal` returns. ``model`` is the compressed model itself, healed in place."""

    model: nn.Module
    losses: list[float]  # training loss of every step taken (losses[i] belongs to step i + 1)
    checks: list[HealCheck]  # held-out drift at step 0 and every eval_every steps (empty without heldout)
    best_step: int  # the step whose state was kept (0: the unhealed weights)
    stopped_early: bool  # True when training stopped before ``steps`` (no improvement, or non-finite loss)
    reason: str  # why training ended, in words
    loss: str  # the loss used ("kl", "mse" or "cosine"; "auto" resolved)
    metric: str  # the held-out metric that decided the best state ("auto" resolved; "auto" without heldout)
    steps_run: int  # optimizer steps taken
    trained_parameters: int  # number of parameter elements that trained
    seconds: float  # wall time
    device: str  # where healing ran
    non_finite: bool = False  # True when the loss became NaN or Inf and the best state was restored
    temperature: float | None = None  # for loss "kl"
    lr: float = 0.0
    schedule: str = "constant"
    pooling: str | None = None  # how per-token outputs were pooled for the held-out metric (None: not pooled)

    @property
    def initial_drift(self) -> float | None:
        """Held-out drift of the unhealed model (None without held-out data)."""
        return self.checks[0].drift if self.checks else None

    @property
    def best_drift(self) -> float | None:
        """Held-out drift of the returned model (None without held-out data)."""
        for c in self.checks:
            if c.step == self.best_step:
                return c.drift
        return None

    def to_dict(self, *, timings: bool = True) -> dict:
        """JSON-serialisable summary (without the model). ``timings=False`` leaves out the wall-clock seconds, for
        what is written into a file: the same command twice then gives the same bytes (timings go to the report)."""
        dropped = ("model", "checks") if timings else ("model", "checks", "seconds")
        d = {k: v for k, v in asdict(self).items() if k not in dropped}
        d["checks"] = [asdict(c) for c in self.checks]
        d["initial_drift"] = self.initial_drift
        d["best_drift"] = self.best_drift
        return d


# ---------------------------------------------------------------------------------------------------------------
# public entry point


def heal(
    compressed: nn.Module,
    teacher: nn.Module,
    data: Iterable[Any],
    options: HealOptions | None = None,
    *,
    heldout: Iterable[Any] | None = None,
    **keywords: Any,
) -> HealResult:
    """Fine-tune ``compressed`` so that its outputs match ``teacher``'s (distillation), in place.

    Args:
        compressed: the compressed model (the student); its parameters are updated in place and it is returned as
            ``result.model``.
        teacher: the original model; only read (it runs under ``torch.no_grad`` in eval mode).
        data: an iterable of input batches (the batch contract: a tensor is fed as ``model(x)``, a tuple or list as
            ``model(*x)``, a dict as ``model(**x)``); cycled through until ``steps`` optimizer steps were taken.
            A list or tuple of batches is visited in a seeded random order each pass (``shuffle``); any other
            iterable in its own order (a one-shot generator cannot be cycled: pass a list).
        options: a :class:`~factorize.training.setup.HealOptions` holding every keyword below but ``heldout``;
            or, instead, those keywords (``steps`` is then required).
        heldout: batches for the held-out drift check; never trained on. Strongly recommended: without it there is
            no early stopping and no best-state guarantee (the final state is returned).
        steps: number of optimizer steps (>= 1).
        loss: ``"auto"``, ``"kl"``, ``"mse"`` or ``"cosine"`` (see :mod:`factorize.training.losses` for the
            ``auto`` rule).
        temperature: T for ``"kl"`` (Hinton et al. 2015).
        lr: Adam learning rate (the peak rate under a schedule); default 3e-4.
        schedule: ``"cosine"`` (the default) warms ``lr`` up linearly over the first 5% of the steps and then
            decays it to zero at ``steps`` along a half cosine (warm-up: Goyal et al. 2017; cosine decay:
            Loshchilov & Hutter, "SGDR", ICLR 2017; both cited from memory -- common practice); ``"constant"``
            keeps ``lr``. A warm-up lets a larger ``lr`` start without Adam's first, full-size steps undoing the
            compressed weights. The defaults (3e-4, cosine) are the best measured on the sentence encoder of
            BENCHMARKS.md (Healing); they were 1e-4 and constant before.
        eval_every: steps between held-out checks; default ``max(1, steps // 10)``.
        patience: stop after this many checks without a better held-out drift; None never stops early.
        train: ``"factored"`` trains only the factored layers (the rest is frozen); ``"all"`` trains every
            floating-point parameter. ``requires_grad`` flags are restored afterwards.
        match_layers: also match every factored layer's output to the teacher's layer of the same name; True
            weighs that term 1.0, a number sets its weight.
        metric: the held-out measure that decides the best state and shows on the progress line: ``"auto"``
            (what the model's users judge it by: perplexity for a causal language model, the cosine of pooled
            outputs for an encoder, relative L2 otherwise; see :mod:`factorize.training.watch`),
            ``"relative_l2"`` (lower is better), ``"cosine_mean"`` (higher), ``"kl"`` (lower; class logits only),
            ``"top1_agreement"`` (higher; class logits only), ``"perplexity"`` (lower; causal language models).
        pooling: ``"mean"``, ``"cls"`` or ``"last"``: measure the held-out metric on one pooled vector per sample
            (:func:`factorize.measure.pooling.pool`); None: ``"mean"`` for an encoder under ``metric="auto"``,
            otherwise the outputs as they are.
        seed: seeds the order of the training batches.
        device: None heals where the student is; ``"cpu"`` or ``"cuda"`` moves both models there for healing and
            back afterwards (``"cuda"`` only when available).
        max_grad_norm: clip the gradient norm of the trained parameters to this (common practice); None: no
            clipping.
        shuffle: visit a list of batches in a seeded random order each pass.
        progress: show a tqdm progress bar (loss and held-out drift) on stderr.

    Returns:
        :class:`HealResult` with the healed model, the loss and drift history, the step kept and why training ended.

    Raises:
        FactorizeError: bad arguments, outputs of different shapes, a batch that does not run through a model,
            outputs that are not finite before training.
    """
    options = HealOptions.from_keywords(options, **keywords)
    opts = validate(compressed, teacher, data, heldout, options)
    with session(compressed, teacher, opts) as trainable:
        return _Healer(compressed, teacher, data, heldout, trainable, opts).run()


# ---------------------------------------------------------------------------------------------------------------
# the loop


def _to_device(batch: Any, device: torch.device) -> Any:
    if isinstance(batch, torch.Tensor):
        return batch.to(device)
    if isinstance(batch, Mapping):
        return {k: _to_device(v, device) for k, v in batch.items()}
    if isinstance(batch, (tuple, list)):
        return type(batch)(_to_device(v, device) for v in batch) if isinstance(batch, list) else tuple(
            _to_device(v, device) for v in batch)
    return batch


def _recorders(outputs: dict[str, Any], names: Sequence[str]) -> dict[str, Hook]:
    """Forward hooks that store the output of each named layer in ``outputs`` (match_layers)."""
    def record(name: str) -> Hook:
        def hook(_module, _inputs, output):
            outputs[name] = output
        return hook
    return {name: record(name) for name in names}


class _Healer:
    """State of one healing run (kept out of ``heal`` to keep each step short)."""

    def __init__(self, student, teacher, data, heldout, trainable, opts: HealOptions) -> None:
        self.student, self.teacher, self.data, self.opts = student, teacher, data, opts
        self.params = [p for _, p in trainable]
        self.generator = torch.Generator().manual_seed(opts.seed)
        self.optimizer = torch.optim.Adam(self.params, lr=opts.lr)
        self.scheduler = torch.optim.lr_scheduler.LambdaLR(self.optimizer, lr_factor(opts.schedule, opts.steps))
        self.heldout = None if heldout is None else list(heldout)
        self.kind: str | None = None if opts.loss == "auto" else opts.loss
        self.losses: list[float] = []
        self.checks: list[HealCheck] = []
        self.best_step, self.best_score, self.best_state = 0, math.inf, self._snapshot()
        self.teacher_cache: dict[int, torch.Tensor] = {}
        self.layer_names = sorted(factored_layers(student)) if opts.match_layers > 0 else []
        self.taps: tuple[dict[str, Any], dict[str, Any]] | None = None  # layer outputs, student's and teacher's
        self.bar = None
        self.metric, self.pooling = opts.metric, opts.pooling  # "auto" is resolved on the first held-out batch
        self.reference_loss: float | None = None  # the teacher's held-out next-token loss (metric "perplexity")

    # ---- run ------------------------------------------------------------------------------------------------

    def run(self) -> HealResult:
        start = time.perf_counter()
        opts = self.opts
        with ExitStack() as hooks:
            if self.layer_names:
                self._check_layer_names()
                self.taps = ({}, {})
                for model, outputs in zip((self.student, self.teacher), self.taps):
                    hooks.enter_context(forward_hooks(model, _recorders(outputs, self.layer_names)))
            self.bar = tqdm(total=opts.steps, desc="heal", unit="step", disable=not opts.progress, dynamic_ncols=True)
            try:
                reason, stopped, non_finite = self._loop()
            finally:
                self.bar.close()
        self._restore(self.best_state)
        return HealResult(
            model=self.student, losses=self.losses, checks=self.checks, best_step=self.best_step,
            stopped_early=stopped, reason=reason, loss=self.kind or opts.loss, metric=self.metric,
            steps_run=len(self.losses), trained_parameters=sum(p.numel() for p in self.params),
            seconds=time.perf_counter() - start, device=str(opts.device), non_finite=non_finite,
            temperature=opts.temperature if self.kind == "kl" else None, lr=opts.lr,
            schedule=opts.schedule, pooling=self.pooling,
        )

    def _loop(self) -> tuple[str, bool, bool]:
        opts = self.opts
        if self.heldout is not None:
            self._prepare_heldout()
            bad = self._check(0, None)
            if bad:
                raise FactorizeError(f"the compressed model's held-out {self.metric} is not finite before any "
                                     "training", fix="check the compressed model and the held-out batches")
        batches = self._batches()
        since_check: list[float] = []
        stale = 0
        for step in range(1, opts.steps + 1):
            index, batch = next(batches)
            value = self._train_step(index, batch, step)
            if not math.isfinite(value):
                return self._non_finite(step, value), True, True
            self.losses.append(value)
            since_check.append(value)
            self.bar.update(1)
            self.bar.set_postfix(self._postfix(value), refresh=False)
            if step % opts.eval_every == 0 or step == opts.steps:
                loss_mean = sum(since_check) / len(since_check)
                since_check = []
                if self.heldout is None:
                    self.best_step, self.best_state = step, self._snapshot()  # last good state
                    continue
                if self._check(step, loss_mean):
                    return self._non_finite(step, float("nan"), where="held-out drift"), True, True
                stale = 0 if self.best_step == step else stale + 1
                if opts.patience is not None and stale >= opts.patience and step < opts.steps:
                    return (f"stopped at step {step}: no better held-out {self.metric} in the last {stale} checks "
                            f"({stale * opts.eval_every} steps); kept step {self.best_step}"), True, False
        if self.heldout is None:
            return f"ran all {opts.steps} steps; no held-out data, so the final state is kept", False, False
        return f"ran all {opts.steps} steps; kept step {self.best_step}, the best held-out {self.metric}", False, False

    def _postfix(self, loss: float) -> dict[str, str]:
        post = {"loss": f"{loss:.4g}"}
        if self.checks:
            post[label(self.metric, self.pooling)] = f"{self.checks[-1].drift:.4g} (start {self.checks[0].drift:.4g})"
        return post

    def _non_finite(self, step: int, value: float, where: str = "training loss") -> str:
        back = self.best_step
        msg = (f"healing stopped at step {step}: the {where} became {value} (lr={self.opts.lr:g}); restored the "
               f"state of step {back}. Lower lr or set max_grad_norm.")
        warnings.warn(msg, RuntimeWarning, stacklevel=caller_stacklevel())
        return msg

    # ---- data -----------------------------------------------------------------------------------------------

    def _batches(self) -> Iterator[tuple[int, Any]]:
        """Endless (index in its pass, batch): seeded order for a list/tuple, the iterable's own order otherwise."""
        data = self.data
        passes = 0
        while True:
            n = 0
            if isinstance(data, Sequence) and not isinstance(data, str):
                order = torch.randperm(len(data), generator=self.generator) if self.opts.shuffle else range(len(data))
                for i in order:
                    n += 1
                    yield int(i), data[int(i)]
            else:
                for i, batch in enumerate(data):
                    n += 1
                    yield i, batch
            if n == 0:
                raise FactorizeError(
                    "data yielded no batches" + (" on its second pass (a one-shot iterator?)" if passes else ""),
                    fix="pass a list of batches (or a DataLoader) so healing can cycle through it",
                )
            passes += 1

    def _prepare_heldout(self) -> None:
        if not self.heldout:
            raise FactorizeError("heldout yielded no batches", fix="pass a list with at least one batch, or None")
        self.heldout = [_to_device(b, self.opts.device) for b in self.heldout]
        self.heldout_reference = []
        for i, b in enumerate(self.heldout):
            with torch.no_grad():
                out = self._run(self.teacher, b, i, "heldout", "the teacher")
            if i == 0:
                self.metric, self.pooling = resolve_metric(self.opts.metric, self.opts.pooling, self.teacher, out, b)
            self.heldout_reference.append(primary_output(out).detach().cpu())
        if self.metric == "perplexity":
            self.reference_loss = mean_next_token_loss(self.heldout_reference, self.heldout)

    def _run(self, model: nn.Module, batch: Any, index: int, where: str, who: str) -> Any:
        """One forward pass; an exception becomes an error naming the batch."""
        if not isinstance(batch, (torch.Tensor, Mapping, tuple, list)):
            raise FactorizeError(f"{where} batch {index} is a {type(batch).__name__}",
                                 fix="each batch must be a tensor, a tuple/list of model arguments, or a dict")
        try:
            return feed(model, batch)
        except Exception as e:  # the user's model can raise anything; say which batch and why
            raise FactorizeError(
                f"{where} batch {index} does not run through {who}: {type(e).__name__}: {e}",
                fix="each batch must be what the model takes: a tensor for model(x), a tuple/list for model(*x), "
                "a dict for model(**x)",
            ) from e

    # ---- one step -------------------------------------------------------------------------------------------

    def _teacher_output(self, index: int, batch: Any) -> tuple[Any, torch.Tensor]:
        cacheable = isinstance(self.data, Sequence) and not self.layer_names
        if cacheable and index in self.teacher_cache:
            return None, self.teacher_cache[index]
        with torch.no_grad():
            out = self._run(self.teacher, batch, index, "data", "the teacher")
        t = primary_output(out).detach()
        if cacheable:
            self.teacher_cache[index] = t
        return out, t

    def _train_step(self, index: int, batch: Any, step: int) -> float:
        batch = _to_device(batch, self.opts.device)
        t_out, t = self._teacher_output(index, batch)
        if self.kind is None:
            self.kind = resolve_loss(self.opts.loss, t_out)
        with torch.enable_grad():
            s = primary_output(self._run(self.student, batch, index, "data", "the compressed model"))
            if s.shape != t.shape:
                raise FactorizeError(
                    f"the teacher and the compressed model give outputs of different shapes on data batch {index}: "
                    f"teacher {tuple(t.shape)}, compressed {tuple(s.shape)}",
                    fix="heal a model against the original it was compressed from, on the same inputs",
                )
            loss = distill_loss(self.kind, s, t, temperature=self.opts.temperature, mask=row_mask(batch, t))
            if self.layer_names:
                loss = loss + self.opts.match_layers * self._layer_loss()
            value = float(loss.detach())
            if not math.isfinite(value):
                if step == 1:
                    self._raise_not_finite(index, s, t)
                return value
            self.optimizer.zero_grad(set_to_none=True)
            loss.backward()
        if self.opts.max_grad_norm is not None:
            torch.nn.utils.clip_grad_norm_(self.params, self.opts.max_grad_norm)
        self.optimizer.step()
        self.scheduler.step()
        return value

    def _raise_not_finite(self, index: int, s: torch.Tensor, t: torch.Tensor) -> None:
        who = "the teacher" if not bool(torch.isfinite(t).all()) else "the compressed model"
        if who == "the compressed model" and bool(torch.isfinite(s).all()):
            who = "the loss (outputs are finite, but too large for the chosen loss)"
        raise FactorizeError(f"outputs are not finite before any training, on data batch {index}: {who}",
                             fix="check the models and the inputs (NaN or Inf in the data?)")

    def _check_layer_names(self) -> None:
        missing = [n for n in self.layer_names if not _has_module(self.teacher, n)]
        if missing:
            raise FactorizeError(
                "match_layers: the teacher has no layer with the name of these factored layers", missing,
                fix="pass the original model the student was compressed from, or match_layers=False",
            )

    def _layer_loss(self) -> torch.Tensor:
        s_taps, t_taps = self.taps
        loss = layer_match_loss(s_taps, t_taps, self.layer_names, self.opts.device)
        s_taps.clear()
        t_taps.clear()
        return loss

    # ---- held-out checks and best state ---------------------------------------------------------------------

    def _check(self, step: int, loss_mean: float | None) -> bool:
        """Measure held-out drift; keep the state if it is the best so far. True when the drift is not finite."""
        outputs = []
        with torch.no_grad():
            for i, b in enumerate(self.heldout):
                outputs.append(primary_output(self._run(self.student, b, i, "heldout", "the compressed model"))
                               .detach().cpu())
        if self.taps:
            for layer_outputs in self.taps:
                layer_outputs.clear()
        metrics = measure(self.metric, self.pooling, self.heldout_reference, outputs, self.heldout, self.reference_loss)
        if self.metric not in metrics:
            raise FactorizeError(
                f"metric {self.metric!r} needs class logits (a 2-D output with several columns); this model's "
                f"output has shape {tuple(outputs[0].shape)}", fix="use metric='relative_l2' or 'cosine_mean'")
        value = float(metrics[self.metric])
        self.checks.append(HealCheck(step, value, metrics, loss_mean))
        if not math.isfinite(value):
            return True
        score = -value if METRICS[self.metric] else value
        if score < self.best_score:
            self.best_step, self.best_score, self.best_state = step, score, self._snapshot()
        if self.bar is not None:
            self.bar.set_postfix(self._postfix(self.losses[-1] if self.losses else math.nan))
        return False

    def _snapshot(self) -> list[torch.Tensor]:
        return [p.detach().clone() for p in self.params]

    @torch.no_grad()
    def _restore(self, state: list[torch.Tensor]) -> None:
        for p, saved in zip(self.params, state):
            p.copy_(saved)


def _has_module(model: nn.Module, name: str) -> bool:
    try:
        model.get_submodule(name)
    except AttributeError:
        return False
    return True
