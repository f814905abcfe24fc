"""Count what a model stores, with one explicit rule for shared tensors.

Rule: a tensor is counted once however many modules hold it (tied embedding and output head, a module
registered twice). Parameters and buffers are counted separately; bytes use each tensor's own element size.
"""

from __future__ import annotations

import math

from torch import nn


def _unique_parameters(model: nn.Module):
    seen: set[int] = set()
    for p in model.parameters():  # torch's parameters() already skips duplicates by identity
        if id(p) not in seen:
            seen.add(id(p))
            yield p


def count_parameters(model: nn.Module) -> int:
    """Number of parameter elements, each shared tensor counted once. A weight stored rounded
    (:mod:`factorize.rewrite.stored`: buffers, not a Parameter) counts its elements as the Parameter it replaced
    did: it still holds that many numbers, in fewer bits (its bytes are in :func:`count_bytes`)."""
    stored = sum(math.prod(m.layout) for m in model.modules() if getattr(m, "_factorize_stored", False))
    return sum(p.numel() for p in _unique_parameters(model)) + stored


def count_bytes(model: nn.Module, *, buffers: bool = True) -> int:
    """Bytes held by parameters (and buffers), each shared tensor counted once."""
    total = sum(p.numel() * p.element_size() for p in _unique_parameters(model))
    if buffers:
        total += sum(b.numel() * b.element_size() for b in model.buffers())
    return total
