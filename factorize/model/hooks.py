"""Forward hooks on named layers that are always removed, on a normal exit and on an exception alike.

Several steps look inside a forward pass (input statistics, output gradients, input shapes, output positions,
layer outputs while healing). Each registers a PyTorch hook on some named submodules and must take every one
off again: a hook left behind keeps running, and keeps whatever it captures alive, on every later call of the
user's model. One context manager does the registering and the removing for all of them::

    with forward_hooks(model, {"encoder.0": record, "head": record}):
        model(x)
    # no hook of ours is left on the model here, whatever happened inside

Every name is resolved before the first hook goes on, so a name the model lacks fails with nothing registered.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager

from torch import nn
from torch.utils.hooks import RemovableHandle

from factorize.model.sites import get_module

Hook = Callable[..., object]


@contextmanager
def forward_hooks(model: nn.Module, hooks: Mapping[str, Hook], *,
                  with_kwargs: bool = False) -> Iterator[dict[str, RemovableHandle]]:
    """Forward hooks ``hook(module, args, output)`` on the named submodules of ``model`` for the ``with`` block.

    ``with_kwargs=True`` calls ``hook(module, args, kwargs, output)`` (``nn.Module.register_forward_hook``).
    "" names the model itself. Yields name -> handle; every hook is removed when the block ends.
    """
    with _registered(model, hooks, lambda m, fn: m.register_forward_hook(fn, with_kwargs=with_kwargs)) as handles:
        yield handles


@contextmanager
def forward_pre_hooks(model: nn.Module, hooks: Mapping[str, Hook], *,
                      with_kwargs: bool = False) -> Iterator[dict[str, RemovableHandle]]:
    """Forward pre-hooks ``hook(module, args)`` on the named submodules of ``model`` for the ``with`` block.

    ``with_kwargs=True`` calls ``hook(module, args, kwargs)`` (``nn.Module.register_forward_pre_hook``).
    "" names the model itself. Yields name -> handle; every hook is removed when the block ends.
    """
    with _registered(model, hooks, lambda m, fn: m.register_forward_pre_hook(fn, with_kwargs=with_kwargs)) as handles:
        yield handles


@contextmanager
def _registered(model: nn.Module, hooks: Mapping[str, Hook],
                register: Callable[[nn.Module, Hook], RemovableHandle]) -> Iterator[dict[str, RemovableHandle]]:
    modules = {name: get_module(model, name) for name in hooks}  # a missing name fails before any hook is on
    handles: dict[str, RemovableHandle] = {}
    try:
        for name, fn in hooks.items():
            handles[name] = register(modules[name], fn)
        yield handles
    finally:
        for handle in handles.values():
            handle.remove()
