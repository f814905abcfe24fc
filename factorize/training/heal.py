"""Heal a compressed model: fine-tune its factors to reproduce the original model's outputs (distillation).

After factorization a short fine-tune wins back most of what the truncation cost. ``heal`` trains the
compressed model (the *student*) to match the original (the *teacher*) on sample inputs; no labels are needed.

Losses (``loss=``), computed on the primary output (a tensor, ``logits``, ``last_hidden_state``, or the first
tensor; see :func:`factorize.model.feed.primary_output`):

* ``"kl"``: knowledge distillation with a temperature T (Hinton, Vinyals & Dean, "Distilling the knowledge in a
  neural network", 2015): ``T^2 * KL(softmax(t / T) || softmax(s / T))`` summed over the last dimension and
  averaged over rows; the ``T^2`` factor keeps gradient magnitudes comparable across temperatures (same paper).
* ``"mse"``: mean squared error between the outputs (regression heads).
* ``"cosine"``: ``1 - cos(s, t)`` per output vector along the last dimension (embeddings, hidden states).
* ``"auto"`` picks from the teacher's output on the first batch:
  ``logits`` field -> ``kl``; ``last_hidden_state`` field -> ``cosine``; a plain 2-D tensor (batch, k) with
  k > 1 -> ``kl`` (read as class logits, the same shape rule as :func:`factorize.measure.drift.output_drift`);
  a tensor of 3 or more dimensions -> ``cosine`` (per-position features); anything else (one value per
  sample) -> ``mse``. A model that returns a (batch, d) embedding or several regression targets should pass
  ``loss="cosine"`` or ``loss="mse"`` explicitly.

For (batch, positions, features) outputs fed from a dict batch holding an ``attention_mask`` of shape
(batch, positions), padded positions are left out of the loss.

``match_layers`` adds, for every factored layer, the relative squared error between its output and the output of
the teacher's dense layer of the same name, ``||y_s - y_t||^2 / ||y_t||^2`` (matching intermediate
representations: Romero et al., "FitNets: hints for thin deep nets", ICLR 2015 -- cited from memory).

Safety: the held-out drift (``factorize.measure.drift.output_drift``) is measured before training (step 0) and every
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
from contextlib import contextmanager
from dataclasses import asdict, dataclass, field
from typing import Any

import torch
import torch.nn.functional as F
from torch import nn
from tqdm.auto import tqdm

from factorize.choices import HEAL_SCHEDULES as SCHEDULES
from factorize.errors import FactorizeError
from factorize.measure.drift import output_drift
from factorize.model.feed import feed, primary_output
from factorize.rewrite.layers import factored_layers

LOSSES = ("auto", "kl", "mse", "cosine")
WARMUP_FRACTION = 0.05  # schedule "cosine": share of the steps spent warming the learning rate up linearly
TRAIN = ("factored", "all")
METRICS = {"relative_l2": False, "cosine_mean": True, "kl": False, "top1_agreement": True}  # name -> higher is better


@dataclass
class HealCheck:
    """One held-out measurement."""

    step: int  # optimizer steps taken before the measurement (0: the unhealed model)
    drift: float  # the value of the chosen metric
    metrics: dict[str, float]  # everything output_drift reported
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
    metric: str  # the held-out metric that decided the best state
    steps_run: int  # optimizer steps taken
    trained_parameters: int  # number of parameter elements that trained
    seconds: float  # wall time
    device: str  # where healing ran
    non_finite: bool = False  # True when the loss became NaN or Inf and the best state was restored
    temperature: float | None = None  # for loss "kl"
    lr: float = 0.0
    schedule: str = "constant"

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

    def to_dict(self) -> dict:
        """JSON-serialisable summary (without the model)."""
        d = {k: v for k, v in asdict(self).items() if k not in ("model", "checks")}
        d["checks"] = [asdict(c) for c in self.checks]
        d["initial_drift"] = self.initial_drift
        d["best_drift"] = self.best_drift
        return d


@dataclass
class _Options:
    steps: int
    loss: str
    temperature: float
    lr: float
    schedule: str
    eval_every: int
    patience: int | None
    train: str
    match_weight: float
    metric: str
    seed: int
    max_grad_norm: float | None
    shuffle: bool
    progress: bool
    device: torch.device = field(default_factory=lambda: torch.device("cpu"))


# ---------------------------------------------------------------------------------------------------------------
# public entry point


def heal(
    compressed: nn.Module,
    teacher: nn.Module,
    data: Iterable[Any],
    *,
    steps: int,
    heldout: Iterable[Any] | None = None,
    loss: str = "auto",
    temperature: float = 2.0,
    lr: float = 1e-4,
    schedule: str = "constant",
    eval_every: int | None = None,
    patience: int | None = 5,
    train: str = "factored",
    match_layers: bool | float = False,
    metric: str = "relative_l2",
    seed: int = 0,
    device: str | torch.device | None = None,
    max_grad_norm: float | None = 1.0,
    shuffle: bool = True,
    progress: bool = True,
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
        steps: number of optimizer steps (>= 1).
        heldout: batches for the held-out drift check; never trained on. Strongly recommended: without it there is
            no early stopping and no best-state guarantee (the final state is returned).
        loss: ``"auto"``, ``"kl"``, ``"mse"`` or ``"cosine"`` (see the module docstring for the ``auto`` rule).
        temperature: T for ``"kl"`` (Hinton et al. 2015).
        lr: Adam learning rate (the peak rate under a schedule).
        schedule: ``"constant"`` keeps ``lr``; ``"cosine"`` warms it up linearly over the first 5% of the steps
            and then decays it to zero at ``steps`` along a half cosine (warm-up: Goyal et al. 2017; cosine
            decay: Loshchilov & Hutter, "SGDR", ICLR 2017; both cited from memory -- common practice). A warm-up
            lets a larger ``lr`` start without Adam's first, full-size steps undoing the compressed weights.
        eval_every: steps between held-out checks; default ``max(1, steps // 10)``.
        patience: stop after this many checks without a better held-out drift; None never stops early.
        train: ``"factored"`` trains only the factored layers (the rest is frozen); ``"all"`` trains every
            floating-point parameter. ``requires_grad`` flags are restored afterwards.
        match_layers: also match every factored layer's output to the teacher's layer of the same name; True
            weighs that term 1.0, a number sets its weight.
        metric: the held-out drift that decides the best state: ``"relative_l2"`` (lower is better),
            ``"cosine_mean"`` (higher), ``"kl"`` (lower; class logits only), ``"top1_agreement"`` (higher;
            class logits only).
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
    opts = _validate(compressed, teacher, data, steps, heldout, loss, temperature, lr, schedule, eval_every, patience,
                     train, match_layers, metric, seed, device, max_grad_norm, shuffle, progress)
    with _session(compressed, teacher, opts) as trainable:
        return _Healer(compressed, teacher, data, heldout, trainable, opts).run()


# ---------------------------------------------------------------------------------------------------------------
# validation and set-up


def _is_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _is_number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def _validate(student, teacher, data, steps, heldout, loss, temperature, lr, schedule, eval_every, patience, train,
              match_layers, metric, seed, device, max_grad_norm, shuffle, progress) -> _Options:
    for what, m in (("compressed", student), ("teacher", teacher)):
        if not isinstance(m, nn.Module):
            raise FactorizeError(f"{what} must be a torch.nn.Module, got {type(m).__name__}",
                                 fix="pass the compressed model and the original model")
    if student is teacher:
        raise FactorizeError("the teacher is the compressed model itself",
                             fix="pass the original model as teacher (compress() returns a copy unless inplace=True)")
    problems = []
    if not _is_int(steps) or steps <= 0:
        problems.append(f"steps must be an integer >= 1, got {steps!r}")
    if loss not in LOSSES:
        problems.append(f"loss must be one of {', '.join(LOSSES)}, got {loss!r}")
    if train not in TRAIN:
        problems.append(f"train must be one of {', '.join(TRAIN)}, got {train!r}")
    if metric not in METRICS:
        problems.append(f"metric must be one of {', '.join(METRICS)}, got {metric!r}")
    if not _is_number(temperature) or temperature <= 0:
        problems.append(f"temperature must be a number > 0, got {temperature!r}")
    if not _is_number(lr) or lr <= 0:
        problems.append(f"lr must be a number > 0, got {lr!r}")
    if schedule not in SCHEDULES:
        problems.append(f"schedule must be one of {', '.join(SCHEDULES)}, got {schedule!r}")
    if eval_every is not None and (not _is_int(eval_every) or eval_every < 1):
        problems.append(f"eval_every must be an integer >= 1 or None, got {eval_every!r}")
    if patience is not None and (not _is_int(patience) or patience < 1):
        problems.append(f"patience must be an integer >= 1 or None, got {patience!r}")
    if max_grad_norm is not None and (not _is_number(max_grad_norm) or max_grad_norm <= 0):
        problems.append(f"max_grad_norm must be a number > 0 or None, got {max_grad_norm!r}")
    if not _is_int(seed):
        problems.append(f"seed must be an integer, got {seed!r}")
    weight = float(match_layers) if isinstance(match_layers, (bool, int, float)) else -1.0
    if not math.isfinite(weight) or weight < 0:
        problems.append(f"match_layers must be True/False or a weight >= 0, got {match_layers!r}")
    for what, batches in (("data", data), ("heldout", heldout)):
        if batches is None and what == "heldout":
            continue
        if isinstance(batches, (torch.Tensor, Mapping)) or not isinstance(batches, Iterable):
            problems.append(f"{what} must be an iterable of batches, got a {type(batches).__name__}")
    if problems:
        raise FactorizeError("invalid healing arguments", problems,
                             fix="data/heldout take a list of batches, e.g. [x] or list(x.split(32)); see help(heal)")
    if train == "factored" and not factored_layers(student):
        raise FactorizeError("the compressed model has no factored layer to train",
                             fix="compress the model first (factorize.compress), or pass train='all'")
    return _Options(steps, loss, float(temperature), float(lr), schedule, eval_every or max(1, steps // 10), patience,
                    train, weight, metric, seed, max_grad_norm, shuffle, progress, _resolve_device(device, student))


def _model_device(model: nn.Module) -> torch.device:
    for t in model.parameters():
        return t.device
    for t in model.buffers():
        return t.device
    return torch.device("cpu")


def _resolve_device(device: str | torch.device | None, student: nn.Module) -> torch.device:
    if device is None:
        return _model_device(student)
    try:
        dev = torch.device(device)
    except (RuntimeError, TypeError) as e:
        raise FactorizeError(f"unknown device {device!r}: {e}", fix="use None, 'cpu' or 'cuda'") from None
    if dev.type == "cuda" and not torch.cuda.is_available():
        raise FactorizeError(
            "device='cuda' was asked for, but torch.cuda.is_available() is False on this machine",
            fix="use device='cpu' (or None), or install a CUDA build of torch on a machine with a GPU",
        )
    if dev.type not in ("cpu", "cuda"):
        raise FactorizeError(f"device {device!r} is not supported", fix="use None, 'cpu' or 'cuda'")
    return dev


def _trainable(student: nn.Module, teacher: nn.Module, train: str) -> list[tuple[str, nn.Parameter]]:
    if train == "factored":
        chosen = {}
        for name, layer in factored_layers(student).items():
            for pname, p in layer.named_parameters():
                chosen.setdefault(id(p), (f"{name}.{pname}", p))
        params = list(chosen.values())
    else:
        params = [(n, p) for n, p in student.named_parameters() if p.is_floating_point()]
    if not params:
        raise FactorizeError("no floating-point parameter to train", fix="check the model, or pass train='factored'")
    teacher_ids = {id(p) for p in teacher.parameters()}
    shared = [n for n, p in params if id(p) in teacher_ids]
    if shared:
        raise FactorizeError(
            "the teacher and the compressed model share parameters, so healing would change the teacher",
            shared[:10], fix="pass a separate copy of the original model as teacher (copy.deepcopy before compressing)",
        )
    return params


@contextmanager
def _session(student: nn.Module, teacher: nn.Module, opts: _Options) -> Iterator[list[tuple[str, nn.Parameter]]]:
    """Freeze, switch to eval mode and move to the device for healing; undo all of it afterwards."""
    trainable = _trainable(student, teacher, opts.train)
    flags = [(p, p.requires_grad) for p in student.parameters()]
    modes = [(m, m.training) for model in (student, teacher) for m in model.modules()]
    homes = [(model, _model_device(model)) for model in (student, teacher)]
    try:
        for model in (student, teacher):
            if _model_device(model) != opts.device:
                model.to(opts.device)  # moves parameter data in place: parameter identity is kept
            model.eval()
        for p, _ in flags:
            p.requires_grad_(False)
        for _, p in trainable:
            p.requires_grad_(True)
        yield trainable
    finally:
        for p, flag in flags:
            p.requires_grad_(flag)
        for m, mode in modes:
            m.training = mode
        for model, home in homes:
            if _model_device(model) != home:
                model.to(home)


# ---------------------------------------------------------------------------------------------------------------
# losses


def _resolve_loss(loss: str, output: Any) -> str:
    """The ``auto`` rule (module docstring)."""
    if loss != "auto":
        return loss
    field_of = (lambda k: output.get(k)) if isinstance(output, Mapping) else (lambda k: getattr(output, k, None))
    if not isinstance(output, torch.Tensor):
        if isinstance(field_of("logits"), torch.Tensor):
            return "kl"
        if isinstance(field_of("last_hidden_state"), torch.Tensor):
            return "cosine"
    t = primary_output(output)
    if t.dim() == 2 and t.shape[1] > 1:
        return "kl"
    if t.dim() >= 3:
        return "cosine"
    return "mse"


def _row_mask(batch: Any, out: torch.Tensor) -> torch.Tensor | None:
    """(rows,) weights leaving padded positions out, for (B, T, d) outputs fed from a dict with attention_mask."""
    mask = batch.get("attention_mask") if isinstance(batch, Mapping) else None
    if not isinstance(mask, torch.Tensor) or out.dim() != 3 or tuple(mask.shape) != tuple(out.shape[:2]):
        return None
    return mask.reshape(-1).to(out.dtype)  # (B*T,)


def _mean_rows(per_row: torch.Tensor, mask: torch.Tensor | None) -> torch.Tensor:
    if mask is None:
        return per_row.mean()
    return (per_row * mask).sum() / mask.sum().clamp_min(1.0)


def distill_loss(kind: str, student: torch.Tensor, teacher: torch.Tensor, *, temperature: float = 2.0,
                 mask: torch.Tensor | None = None) -> torch.Tensor:
    """The distillation loss between two output tensors of the same shape (rows: vectors along the last dim).

    ``mask`` (rows,) weighs the rows (0 leaves a padded position out).
    """
    d = student.shape[-1]
    s, t = student.reshape(-1, d).float(), teacher.reshape(-1, d).float()  # (rows, d)
    if kind == "kl":
        # Hinton, Vinyals & Dean 2015: T^2 * KL(softmax(t/T) || softmax(s/T)), per row, summed over classes
        log_p = F.log_softmax(t / temperature, dim=-1)  # (rows, d)
        log_q = F.log_softmax(s / temperature, dim=-1)
        per_row = (log_p.exp() * (log_p - log_q)).sum(-1) * temperature**2  # (rows,)
    elif kind == "cosine":
        per_row = 1.0 - F.cosine_similarity(s, t, dim=-1, eps=1e-8)  # (rows,)
    elif kind == "mse":
        per_row = ((s - t) ** 2).mean(-1)  # (rows,)
    else:
        raise ValueError(f"unknown loss {kind!r}")
    return _mean_rows(per_row, mask)


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


class _LayerTaps:
    """Forward hooks that record the outputs of named layers in a model during one forward pass."""

    def __init__(self, model: nn.Module, names: Sequence[str]) -> None:
        self.outputs: dict[str, torch.Tensor] = {}
        self._handles = []
        for name in names:
            module = model.get_submodule(name)
            self._handles.append(module.register_forward_hook(self._hook(name)))

    def _hook(self, name: str):
        def record(_module, _inputs, output):
            self.outputs[name] = output
        return record

    def remove(self) -> None:
        for h in self._handles:
            h.remove()


def _lr_factor(schedule: str, steps: int):
    """The multiplier of ``lr`` before optimizer step ``i + 1`` (``i`` = steps taken), for ``LambdaLR``."""
    if schedule == "constant":
        return lambda i: 1.0
    warm = max(1, round(WARMUP_FRACTION * steps))

    def factor(i: int) -> float:
        if i < warm:
            return (i + 1) / warm
        return 0.5 * (1.0 + math.cos(math.pi * min(1.0, (i - warm) / max(1, steps - warm))))
    return factor


class _Healer:
    """State of one healing run (kept out of ``heal`` to keep each step short)."""

    def __init__(self, student, teacher, data, heldout, trainable, opts: _Options) -> None:
        self.student, self.teacher, self.data, self.opts = student, teacher, data, opts
        self.params = [p for _, p in trainable]
        self.generator = torch.Generator().manual_seed(opts.seed)
        self.optimizer = torch.optim.Adam(self.params, lr=opts.lr)
        self.scheduler = torch.optim.lr_scheduler.LambdaLR(self.optimizer, _lr_factor(opts.schedule, opts.steps))
        self.heldout = None if heldout is None else list(heldout)
        self.kind: str | None = None if opts.loss == "auto" else opts.loss
        self.losses: list[float] = []
        self.checks: list[HealCheck] = []
        self.best_step, self.best_score, self.best_state = 0, math.inf, self._snapshot()
        self.teacher_cache: dict[int, torch.Tensor] = {}
        self.layer_names = sorted(factored_layers(student)) if opts.match_weight > 0 else []
        self.taps: tuple[_LayerTaps, _LayerTaps] | None = None
        self.bar = None

    # ---- run ------------------------------------------------------------------------------------------------

    def run(self) -> HealResult:
        start = time.perf_counter()
        opts = self.opts
        if self.layer_names:
            self._check_layer_names()
            self.taps = (_LayerTaps(self.student, self.layer_names), _LayerTaps(self.teacher, self.layer_names))
        self.bar = tqdm(total=opts.steps, desc="heal", unit="step", disable=not opts.progress, dynamic_ncols=True)
        try:
            reason, stopped, non_finite = self._loop()
        finally:
            self.bar.close()
            if self.taps:
                for tap in self.taps:
                    tap.remove()
        self._restore(self.best_state)
        return HealResult(
            model=self.student, losses=self.losses, checks=self.checks, best_step=self.best_step,
            stopped_early=stopped, reason=reason, loss=self.kind or opts.loss, metric=opts.metric,
            steps_run=len(self.losses), trained_parameters=sum(p.numel() for p in self.params),
            seconds=time.perf_counter() - start, device=str(opts.device), non_finite=non_finite,
            temperature=opts.temperature if self.kind == "kl" else None, lr=opts.lr,
            schedule=opts.schedule,
        )

    def _loop(self) -> tuple[str, bool, bool]:
        opts = self.opts
        if self.heldout is not None:
            self._prepare_heldout()
            bad = self._check(0, None)
            if bad:
                raise FactorizeError(f"the compressed model's held-out {opts.metric} is not finite before any "
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
                    return (f"stopped at step {step}: no better held-out {opts.metric} in the last {stale} checks "
                            f"({stale * opts.eval_every} steps); kept step {self.best_step}"), True, False
        if self.heldout is None:
            return f"ran all {opts.steps} steps; no held-out data, so the final state is kept", False, False
        return f"ran all {opts.steps} steps; kept step {self.best_step}, the best held-out {opts.metric}", False, False

    def _postfix(self, loss: float) -> dict[str, str]:
        post = {"loss": f"{loss:.4g}"}
        if self.checks:
            post[self.opts.metric] = f"{self.checks[-1].drift:.4g}"
        return post

    def _non_finite(self, step: int, value: float, where: str = "training loss") -> str:
        back = self.best_step
        msg = (f"healing stopped at step {step}: the {where} became {value} (lr={self.opts.lr:g}); restored the "
               f"state of step {back}. Lower lr or set max_grad_norm.")
        warnings.warn(msg, RuntimeWarning, stacklevel=5)
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
        self.heldout_reference = [
            primary_output(self._run(self.teacher, b, i, "heldout", "the teacher")).detach().cpu()
            for i, b in enumerate(self.heldout)
        ]

    def _run(self, model: nn.Module, batch: Any, index: int, where: str, who: str) -> Any:
        """One forward pass; an exception becomes an error naming the batch."""
        if not isinstance(batch, (torch.Tensor, Mapping, tuple, list)):
            raise FactorizeError(f"{where} batch {index} is a {type(batch).__name__}",
                                 fix="each batch must be a tensor, a tuple/list of model arguments, or a dict")
        try:
            return feed(model, batch)
        except Exception as e:  # noqa: BLE001 - the user's model can raise anything; say which batch and why
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
            self.kind = _resolve_loss(self.opts.loss, t_out)
        with torch.enable_grad():
            s = primary_output(self._run(self.student, batch, index, "data", "the compressed model"))
            if s.shape != t.shape:
                raise FactorizeError(
                    f"the teacher and the compressed model give outputs of different shapes on data batch {index}: "
                    f"teacher {tuple(t.shape)}, compressed {tuple(s.shape)}",
                    fix="heal a model against the original it was compressed from, on the same inputs",
                )
            loss = distill_loss(self.kind, s, t, temperature=self.opts.temperature, mask=_row_mask(batch, t))
            if self.layer_names:
                loss = loss + self.opts.match_weight * self._layer_loss()
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
        terms = []
        for name in self.layer_names:
            ys, yt = s_taps.outputs.get(name), t_taps.outputs.get(name)
            if not isinstance(ys, torch.Tensor) or not isinstance(yt, torch.Tensor):
                continue  # the layer did not run on this batch
            if ys.shape != yt.shape:
                raise FactorizeError(
                    f"match_layers: layer {name} gives {tuple(ys.shape)} in the compressed model but "
                    f"{tuple(yt.shape)} in the teacher", fix="pass the original model, or match_layers=False")
            yt = yt.detach().float()
            terms.append(((ys.float() - yt) ** 2).sum() / (yt**2).sum().clamp_min(1e-12))  # relative squared error
        s_taps.outputs.clear()
        t_taps.outputs.clear()
        return torch.stack(terms).mean() if terms else torch.zeros((), device=self.opts.device)

    # ---- held-out checks and best state ---------------------------------------------------------------------

    def _check(self, step: int, loss_mean: float | None) -> bool:
        """Measure held-out drift; keep the state if it is the best so far. True when the drift is not finite."""
        outputs = []
        with torch.no_grad():
            for i, b in enumerate(self.heldout):
                outputs.append(primary_output(self._run(self.student, b, i, "heldout", "the compressed model"))
                               .detach().cpu())
        if self.taps:
            for tap in self.taps:
                tap.outputs.clear()
        metrics = output_drift(self.heldout_reference, outputs)
        if self.opts.metric not in metrics:
            raise FactorizeError(
                f"metric {self.opts.metric!r} needs class logits (a 2-D output with several columns); this model's "
                f"output has shape {tuple(outputs[0].shape)}", fix="use metric='relative_l2' or 'cosine_mean'")
        value = float(metrics[self.opts.metric])
        self.checks.append(HealCheck(step, value, metrics, loss_mean))
        if not math.isfinite(value):
            return True
        score = -value if METRICS[self.opts.metric] else value
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
