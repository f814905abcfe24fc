"""Healing's options: every problem reported at once, defaults resolved in one place, models restored."""

from __future__ import annotations

import pytest
import torch

import factorize
from factorize.errors import FactorizeError
from factorize.training.setup import HealOptions, session, validate
from tests.conftest import MLP

GIVEN = dict(steps=25, loss="auto", temperature=2, lr=1, schedule="constant", eval_every=None, patience=5,
             train="factored", match_layers=True, metric="relative_l2", seed=0, device=None, max_grad_norm=1.0,
             shuffle=True, progress=False)


def _pair():
    torch.manual_seed(0)
    teacher = MLP().eval()
    return teacher, factorize.compress(teacher, rank=4).model


def test_validate_resolves_the_defaults() -> None:
    teacher, student = _pair()
    opts = validate(student, teacher, [torch.zeros(2, 24)], None, HealOptions(**GIVEN))
    assert opts.eval_every == 2  # max(1, steps // 10)
    assert opts.match_layers == 1.0 and isinstance(opts.match_layers, float)
    assert opts.device == torch.device("cpu")
    assert isinstance(opts.temperature, float) and isinstance(opts.lr, float)


def test_every_problem_is_listed_in_one_error() -> None:
    teacher, student = _pair()
    bad = HealOptions(**{**GIVEN, "steps": 0, "lr": -1.0, "metric": "nope", "match_layers": float("nan")})
    assert len(bad.problems()) == 4
    with pytest.raises(FactorizeError) as info:
        validate(student, teacher, torch.zeros(2, 24), None, bad)  # a bare tensor is not a list of batches
    text = str(info.value)
    for word in ("steps must be", "lr must be", "metric must be", "match_layers must be", "iterable of batches"):
        assert word in text


def test_session_restores_flags_and_modes() -> None:
    teacher, student = _pair()
    student.train()
    flags = [p.requires_grad for p in student.parameters()]
    opts = validate(student, teacher, [torch.zeros(2, 24)], None, HealOptions(**GIVEN))
    with session(student, teacher, opts) as trainable:
        assert not student.training and trainable
        assert all(p.requires_grad == any(p is q for _, q in trainable) for p in student.parameters())
    assert student.training and [p.requires_grad for p in student.parameters()] == flags
