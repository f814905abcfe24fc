"""Hooks on named layers: they run inside the block and are gone afterwards, on an exception too.

"Gone" is read from PyTorch's own registries, ``nn.Module._forward_hooks`` and ``_forward_pre_hooks`` (the
dicts ``register_forward_hook`` and ``register_forward_pre_hook`` fill; torch.nn.Module source).
"""

from __future__ import annotations

import pytest
import torch
from torch import nn

from factorize.model.hooks import forward_hooks, forward_pre_hooks


def _model() -> nn.Module:
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(4, 6), nn.ReLU(), nn.Linear(6, 3))


def _no_hooks(model: nn.Module) -> bool:
    return all(not m._forward_hooks and not m._forward_pre_hooks and not m._forward_hooks_with_kwargs
               and not m._forward_pre_hooks_with_kwargs for m in model.modules())


def test_forward_hooks_see_outputs_and_are_removed():
    model, x = _model(), torch.randn(5, 4)
    seen = {}
    with forward_hooks(model, {"0": lambda m, a, out: seen.setdefault("0", out),
                               "2": lambda m, a, out: seen.setdefault("2", out)}) as handles:
        assert set(handles) == {"0", "2"}
        assert len(model[0]._forward_hooks) == 1 and len(model[2]._forward_hooks) == 1
        y = model(x)
    assert _no_hooks(model)
    assert torch.equal(seen["0"], model[0](x)) and torch.equal(seen["2"], y)
    seen.clear()
    model(x)
    assert not seen  # nothing runs after the block


def test_hooks_removed_after_an_exception():
    model = _model()
    with (pytest.raises(RuntimeError, match="inside the block"),
          forward_hooks(model, {"0": lambda *a: None}), forward_pre_hooks(model, {"2": lambda *a: None})):
        assert model[0]._forward_hooks and model[2]._forward_pre_hooks
        raise RuntimeError("inside the block")
    assert _no_hooks(model)


def test_hook_raising_inside_forward_is_removed():
    model = _model()

    def boom(module, args):
        raise ValueError("stop here")

    with pytest.raises(ValueError, match="stop here"), forward_pre_hooks(model, {"2": boom}):
        model(torch.randn(2, 4))
    assert _no_hooks(model)
    model(torch.randn(2, 4))  # runs again without the hook


def test_pre_hooks_with_kwargs_and_the_model_itself():
    model, x = _model(), torch.randn(3, 4)
    got = []
    with forward_pre_hooks(model, {"": lambda m, args, kwargs: got.append((m, args[0].shape, dict(kwargs)))},
                           with_kwargs=True):
        model(x)
    assert got == [(model, x.shape, {})]
    outs = []
    with forward_hooks(model, {"1": lambda m, args, kwargs, out: outs.append(out)}, with_kwargs=True):
        model(x)
    assert torch.equal(outs[0], torch.relu(model[0](x)))
    assert _no_hooks(model)


def test_unknown_name_registers_nothing_and_keeps_foreign_hooks():
    model = _model()
    theirs = model[0].register_forward_hook(lambda *a: None)  # a hook the user put there: not ours to remove
    with pytest.raises(AttributeError), forward_hooks(model, {"2": lambda *a: None, "nope": lambda *a: None}):
        pass
    assert not model[2]._forward_hooks
    with forward_hooks(model, {"0": lambda *a: None}):
        assert len(model[0]._forward_hooks) == 2
    assert list(model[0]._forward_hooks) == [theirs.id]
    theirs.remove()
    assert _no_hooks(model)
