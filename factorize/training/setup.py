"""Checking the arguments of :func:`factorize.training.heal.heal` and preparing the two models for it.

``heal``'s keywords are gathered into one :class:`HealOptions` in one place; :func:`validate` checks them all at
once (every problem is listed in one error, before any model runs) and returns them resolved: the default
``eval_every`` filled in, ``match_layers`` turned into a weight, ``device`` into a ``torch.device``.
:func:`session` then freezes, switches to eval mode and moves the models for healing, and undoes all of it.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass, fields, replace
from typing import Any

import torch
from torch import nn

from factorize.choices import POOLINGS
from factorize.errors import FactorizeError
from factorize.rewrite.layers import factored_layers
from factorize.training.losses import LOSSES
from factorize.training.schedule import SCHEDULES

TRAIN = ("factored", "all")
# name -> higher is better; "auto" (the default) resolves to one of them (factorize.training.watch)
METRICS = {"relative_l2": False, "cosine_mean": True, "kl": False, "top1_agreement": True, "perplexity": False}


@dataclass(frozen=True)
class HealOptions:
    """How :func:`~factorize.training.heal.heal` trains (each field is one of its keywords, see its docstring):
    built by :meth:`from_keywords` from ``heal``'s keywords, or given whole as ``heal(..., options)``; resolved
    by :func:`validate`.

    Resolved, ``eval_every`` is an int, ``match_layers`` the float weight of the layer term, ``device`` a
    ``torch.device``, ``temperature`` and ``lr`` floats. ``steps`` has no default: it must be given.
    """

    steps: int | None = None
    loss: str = "auto"
    temperature: float = 2.0
    lr: float = 3e-4
    schedule: str = "cosine"
    eval_every: int | None = None
    patience: int | None = 5
    train: str = "factored"
    match_layers: bool | float = False
    metric: str = "auto"
    pooling: str | None = None
    seed: int = 0
    device: str | torch.device | None = None
    max_grad_norm: float | None = 1.0
    shuffle: bool = True
    progress: bool = True

    @classmethod
    def from_keywords(cls, options: HealOptions | None = None, **keywords: Any) -> HealOptions:
        """``options`` as given, or the options named by ``heal``'s keywords (``steps`` required); an unknown
        keyword, a missing ``steps`` or options together with keywords is an error saying which."""
        names = [f.name for f in fields(cls)]
        unknown = [k for k in keywords if k not in names]
        if unknown:
            raise FactorizeError(f"heal() got unknown keyword{'s' if len(unknown) > 1 else ''}: {', '.join(unknown)}",
                                 fix="accepted: options, heldout, " + ", ".join(names))
        if options is not None:
            if keywords:
                raise FactorizeError("HealOptions and healing keywords were both given", [f"{k}=" for k in keywords],
                                     fix="put them into the options (dataclasses.replace(options, ...)) or pass "
                                         "keywords only")
            return options
        if "steps" not in keywords:
            raise FactorizeError("heal() needs steps=, the number of optimizer steps", fix="e.g. steps=200")
        return cls(**keywords)

    def problems(self) -> list[str]:
        """What is wrong with these options, one line each (empty when nothing is)."""
        problems = []
        if not _is_int(self.steps) or self.steps <= 0:
            problems.append(f"steps must be an integer >= 1, got {self.steps!r}")
        for name, allowed in (("loss", LOSSES), ("train", TRAIN), ("metric", ("auto", *METRICS))):
            if getattr(self, name) not in allowed:
                problems.append(f"{name} must be one of {', '.join(allowed)}, got {getattr(self, name)!r}")
        for name in ("temperature", "lr"):
            if not _is_number(getattr(self, name)) or getattr(self, name) <= 0:
                problems.append(f"{name} must be a number > 0, got {getattr(self, name)!r}")
        if self.schedule not in SCHEDULES:
            problems.append(f"schedule must be one of {', '.join(SCHEDULES)}, got {self.schedule!r}")
        for name in ("eval_every", "patience"):
            value = getattr(self, name)
            if value is not None and (not _is_int(value) or value < 1):
                problems.append(f"{name} must be an integer >= 1 or None, got {value!r}")
        if self.max_grad_norm is not None and (not _is_number(self.max_grad_norm) or self.max_grad_norm <= 0):
            problems.append(f"max_grad_norm must be a number > 0 or None, got {self.max_grad_norm!r}")
        if self.pooling is not None and self.pooling not in POOLINGS:
            problems.append(f"pooling must be None or one of {', '.join(POOLINGS)}, got {self.pooling!r}")
        if self.pooling is not None and self.metric == "perplexity":
            problems.append("metric 'perplexity' is measured on the per-token logits: pass pooling=None")
        if not _is_int(self.seed):
            problems.append(f"seed must be an integer, got {self.seed!r}")
        if self._match_weight() < 0:
            problems.append(f"match_layers must be True/False or a weight >= 0, got {self.match_layers!r}")
        return problems

    def _match_weight(self) -> float:
        """The weight ``match_layers`` stands for; -1 when it is not a finite number >= 0."""
        ok = isinstance(self.match_layers, (bool, int, float))
        weight = float(self.match_layers) if ok else -1.0
        return weight if math.isfinite(weight) and weight >= 0 else -1.0


def validate(student: Any, teacher: Any, data: Any, heldout: Any, options: HealOptions) -> HealOptions:
    """Check the models, the batches and ``options`` (all problems in one error); return the options resolved."""
    for what, m in (("compressed", student), ("teacher", teacher)):
        if not isinstance(m, nn.Module):
            raise FactorizeError(f"{what} must be a torch.nn.Module, got {type(m).__name__}",
                                 fix="pass the compressed model and the original model")
    if student is teacher:
        raise FactorizeError("the teacher is the compressed model itself",
                             fix="pass the original model as teacher (compress() returns a copy unless inplace=True)")
    problems = options.problems()
    for what, batches in (("data", data), ("heldout", heldout)):
        if batches is None and what == "heldout":
            continue
        if isinstance(batches, (torch.Tensor, Mapping)) or not isinstance(batches, Iterable):
            problems.append(f"{what} must be an iterable of batches, got a {type(batches).__name__}")
    if problems:
        batch_problem = any("iterable of batches" in p for p in problems)
        raise FactorizeError("invalid healing arguments", problems,
                             fix="data/heldout take a list of batches, e.g. [x] or list(x.split(32)); see help(heal)"
                             if batch_problem else "correct the listed values; see help(heal)")
    if options.train == "factored" and not factored_layers(student):
        raise FactorizeError("the compressed model has no factored layer to train",
                             fix="compress the model first (factorize.compress), or pass train='all'")
    return replace(options, temperature=float(options.temperature), lr=float(options.lr),
                   eval_every=options.eval_every or max(1, options.steps // 10),
                   match_layers=options._match_weight(), device=_resolve_device(options.device, student))


def _is_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _is_number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def model_device(model: nn.Module) -> torch.device:
    """Where the model's first parameter (or buffer) lives; the CPU for a model with neither."""
    for t in model.parameters():
        return t.device
    for t in model.buffers():
        return t.device
    return torch.device("cpu")


def _resolve_device(device: str | torch.device | None, student: nn.Module) -> torch.device:
    if device is None:
        return model_device(student)
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
def session(student: nn.Module, teacher: nn.Module, opts: HealOptions) -> Iterator[list[tuple[str, nn.Parameter]]]:
    """Freeze, switch to eval mode and move to the device for healing; undo all of it afterwards.

    ``opts`` are resolved options (:func:`validate`). Yields (name, parameter) of every parameter that trains.
    """
    trainable = _trainable(student, teacher, opts.train)
    flags = [(p, p.requires_grad) for p in student.parameters()]
    modes = [(m, m.training) for model in (student, teacher) for m in model.modules()]
    homes = [(model, model_device(model)) for model in (student, teacher)]
    try:
        for model in (student, teacher):
            if model_device(model) != opts.device:
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
            if model_device(model) != home:
                model.to(home)
