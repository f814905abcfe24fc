"""Measured speed: time each factored layer against its dense form on this machine, keep dense where
factoring does not pay.

Fewer multiply-accumulates do not always mean lower latency (common practice): two thin matrix products pay
two kernel launches and two passes over the activations, and small or skinny shapes run far from peak. So the
decision is made from timings on the machine at hand, at batch 1 and at a larger batch, never from FLOPs alone.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import torch
from torch import nn

from factorize.measure.timing import paired_ms
from factorize.model.feed import run_model
from factorize.model.hooks import forward_hooks
from factorize.model.sites import get_module
from factorize.rewrite.layers import Factored


@dataclass(frozen=True)
class LayerTiming:
    """Median forward time of one layer, dense vs factored, at one batch size."""

    name: str
    batch: int
    dense_ms: float
    factored_ms: float

    @property
    def speedup(self) -> float:
        return self.dense_ms / self.factored_ms if self.factored_ms > 0 else float("inf")

    def to_dict(self) -> dict:
        return {"name": self.name, "batch": self.batch, "dense_ms": self.dense_ms,
                "factored_ms": self.factored_ms, "speedup": self.speedup}


def record_input_shapes(model: nn.Module, names: Sequence[str], batch) -> dict[str, tuple[int, ...]]:
    """Shape of the input each named layer sees on one sample batch (forward hooks, nothing kept but shapes)."""
    shapes: dict[str, tuple[int, ...]] = {}
    hooks = {}
    for name in names:
        def hook(_m, args, _out, name=name):
            shapes.setdefault(name, tuple(args[0].shape))
        hooks[name] = hook
    with forward_hooks(model, hooks):
        run_model(model, [batch])
    return shapes


def probe_input(layer: nn.Module, shape: tuple[int, ...], batch: int, ref: torch.Tensor) -> torch.Tensor:
    """A seeded sample input of ``shape`` with its batch dimension set to ``batch``: token ids for an embedding
    (plain or factored), else Gaussian values in ``ref``'s dtype and device."""
    shape = (batch, *shape[1:])
    if isinstance(layer, nn.Embedding) or (isinstance(layer, Factored) and layer.kind == "embedding"):
        n = layer.num_embeddings if isinstance(layer, nn.Embedding) else layer.first.num_embeddings
        return torch.randint(0, n, shape, generator=torch.Generator().manual_seed(0)).to(ref.device)
    return torch.randn(shape, generator=torch.Generator().manual_seed(0)).to(device=ref.device, dtype=ref.dtype)


def time_layers(
    original: nn.Module,
    compressed: nn.Module,
    input_shapes: Mapping[str, tuple[int, ...]],
    *,
    batches: Sequence[int] = (1, 32),
    repeats: int = 20,
    clock: Callable[[], float] = time.perf_counter,
) -> list[LayerTiming]:
    """Time every factored layer of ``compressed`` against the same layer of ``original``.

    ``input_shapes`` gives each layer's input shape (from :func:`record_input_shapes`, or ``(1, n)`` for a linear
    layer fed single vectors); the leading (batch) dimension is replaced by each entry of ``batches``. ``clock``
    (seconds) is handed to :func:`factorize.measure.timing.paired_ms`.
    """
    out = []
    for name, shape in input_shapes.items():
        fac = get_module(compressed, name)
        if not isinstance(fac, Factored):
            continue
        dense = get_module(original, name)
        for b in batches:
            x = probe_input(dense, shape, b, fac.second.weight)
            d, f = paired_ms(lambda: dense(x), lambda: fac(x), repeats=repeats, clock=clock)  # noqa: B023 - timed now
            out.append(LayerTiming(name, b, d, f))
    return out


def slower_layers(timings: Sequence[LayerTiming], *, margin: float = 1.0) -> dict[str, str]:
    """Layers whose factored form was slower than dense at any measured batch: name -> reason."""
    slow: dict[str, str] = {}
    for t in timings:
        if t.factored_ms > margin * t.dense_ms and t.name not in slow:
            slow[t.name] = (
                f"measured slower factored than dense at batch {t.batch} "
                f"({t.factored_ms:.3f} ms vs {t.dense_ms:.3f} ms); kept dense"
            )
    return slow


def keep_fast(
    model: nn.Module,
    compressed: nn.Module,
    *,
    example=None,
    batches: Sequence[int] = (1, 32),
    repeats: int = 20,
    timer: Callable[..., list[LayerTiming]] = time_layers,
) -> tuple[dict[str, str], list[LayerTiming]]:
    """Time every factored layer of ``compressed`` against ``model`` and name those that do not pay.

    ``example`` is one sample batch (tensor, tuple or dict) used to learn each layer's input shape; without it,
    linear layers are timed on single vectors (1, n) and layers that need a spatial shape (convolutions) are not
    timed. ``timer(model, compressed, input_shapes, batches=..., repeats=...)`` does the timing (default
    :func:`time_layers`; pass another, e.g. one with a fake clock, to decide from timings not measured here).
    Returns (name -> reason for the layers to keep dense, all timings).
    """
    names = [n for n, m in compressed.named_modules() if isinstance(m, Factored)]
    if example is not None:
        shapes = record_input_shapes(model, names, example)
    else:
        shapes = {}
        for n in names:
            layer = get_module(compressed, n)
            if layer.kind in ("linear", "transposed"):
                shapes[n] = (1, layer.first.in_features)
            elif layer.kind == "embedding":
                shapes[n] = (1, 16)  # 16 token ids per row
    timings = timer(model, compressed, shapes, batches=batches, repeats=repeats)
    return slower_layers(timings), timings
