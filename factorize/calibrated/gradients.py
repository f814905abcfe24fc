"""Output-side statistics: per layer, the Gauss-Newton matrix of the model's final output with respect to the layer's
output (m x m), estimated with random projections and backward passes (:func:`collect_output_grams`), which weight
a layer's output directions by how much they move the final output."""

from __future__ import annotations

from collections.abc import Iterable
from contextlib import contextmanager
from typing import Any

import torch
import torch.nn.functional as F
from torch import nn
from tqdm.auto import tqdm

from factorize.calibrated.memory import check_memory
from factorize.calibrated.stats import as_batch_list, check_finite, resolve_sites
from factorize.errors import FactorizeError
from factorize.model.feed import feed, token_mask
from factorize.model.hooks import forward_hooks
from factorize.model.sites import Site, get_module


def _transpose_output_rows(module: nn.Module, g: torch.Tensor) -> torch.Tensor:
    """Rows (input positions, out * prod(kernel)) for a transposed conv: its output is the col2im scatter of the
    per-position products, so the gradient of each product is the im2col (``F.unfold``) gather of the output
    gradient with the same kernel, stride, padding and dilation (the adjoint of col2im)."""
    one_d = len(module.kernel_size) == 1
    if g.dim() == (2 if one_d else 3):
        g = g.unsqueeze(0)  # unbatched
    lift = (lambda t, fill: (fill, *t)) if one_d else (lambda t, fill: tuple(t))  # 1-D as a (1, L) image
    cols = F.unfold(g.unsqueeze(2) if one_d else g, lift(module.kernel_size, 1), dilation=lift(module.dilation, 1),
                    padding=lift(module.padding, 0), stride=lift(module.stride, 1))  # (B, out * k, L)
    return cols.transpose(1, 2).reshape(-1, cols.shape[1])


def _output_rows(kind: str, g: torch.Tensor, mask: torch.Tensor | None, module: nn.Module | None = None
                 ) -> torch.Tensor:
    """A site's output (or its gradient) as rows of length m: conv (B, m, *spatial) -> (B * positions, m)."""
    if kind.startswith("conv_transpose"):
        return _transpose_output_rows(module, g)
    if kind in ("conv1d", "conv2d", "conv3d"):
        if g.dim() == {"conv1d": 3, "conv2d": 4, "conv3d": 5}[kind]:  # noqa: SIM108 - one comment per branch
            g = g.movedim(1, -1)  # channels last
        else:
            g = g.movedim(0, -1)  # unbatched
        return g.reshape(-1, g.shape[-1])
    if mask is not None and tuple(mask.shape) == tuple(g.shape[:-1]):
        return g[mask.to(g.device).bool()]
    return g.reshape(-1, g.shape[-1])


def _projection_for(f: torch.Tensor, mask: torch.Tensor | None, gen: torch.Generator) -> torch.Tensor:
    v = torch.randn(f.shape, generator=gen, dtype=torch.float32).to(device=f.device, dtype=f.dtype)
    if mask is not None and f.dim() >= 2 and tuple(mask.shape) == tuple(f.shape[:2]):
        v = v * mask.to(f.device, f.dtype).reshape(*mask.shape, *([1] * (f.dim() - 2)))  # padding carries no weight
    return v


@contextmanager
def _grad_on(model: nn.Module):
    """Parameters temporarily require grad (so intermediate outputs join the graph); flags restored after.
    Gradients are taken with torch.autograd.grad, so no parameter's ``.grad`` is touched."""
    flags = [(p, p.requires_grad) for p in model.parameters()]
    was_training = model.training
    model.eval()
    try:
        for p, _ in flags:
            if p.is_floating_point():
                p.requires_grad_(True)
        with torch.enable_grad():
            yield
    finally:
        for p, f in flags:
            p.requires_grad_(f)
        model.train(was_training)


def collect_output_grams(
    model: nn.Module,
    sites: Iterable[Site | str] | None,
    batches: Iterable[Any],
    *,
    projections: int = 2,
    output_fn=None,
    seed: int = 0,
    progress: bool = False,
) -> dict[str, torch.Tensor]:
    """Per site, the mean Gauss-Newton matrix of the final output with respect to the site's output (m x m).

    For a final output f (the primary output, or ``output_fn(output, batch)``) and a site output y at row t
    (token, position), J_t = df / dy_t. G = (1/N) sum_t J_t^T J_t says how much each output direction of the
    layer moves f. It is estimated without forming J: for Gaussian v, E[(J^T v)(J^T v)^T] = J^T J (Hutchinson,
    "A stochastic estimator of the trace of the influence matrix", 1990 -- the same identity, from memory), and
    J_t^T v is one backward pass of v . f. ``projections`` random v per batch (one forward, that many backward
    passes). With input statistics C, trace(G dW C dW^T) approximates the final-output error a weight error dW
    causes, to first order and ignoring correlations between rows -- the Kronecker-factored approximation of
    K-FAC (Martens & Grosse, ICML 2015). Weighting output directions by it is in the spirit of Fisher-weighted
    SVD (Hsu et al., ICLR 2022), with the output's Gauss-Newton matrix in place of a task loss's Fisher.

    Needs a differentiable model: parameters are switched to ``requires_grad`` for the duration (restored), and
    no ``.grad`` is written. Padded positions (``attention_mask``) get no projection weight.
    """
    from factorize.model.feed import primary_output

    if not isinstance(projections, int) or projections < 1:
        raise FactorizeError(f"projections must be a positive integer, got {projections!r}")
    site_list = resolve_sites(model, sites)
    check_memory({s.name: 8 * s.shape[0] ** 2 * 2 for s in site_list}, "output weights")  # G and its factor
    batch_list = as_batch_list(batches)
    grams = {s.name: torch.zeros(s.shape[0], s.shape[0], dtype=torch.float64) for s in site_list}
    rows = {s.name: 0 for s in site_list}
    captured: dict[str, list[torch.Tensor]] = {}

    def hook_for(name: str):
        def hook(module, args, output):
            out = primary_output(output)
            captured.setdefault(name, []).append(out)
        return hook

    gen = torch.Generator().manual_seed(seed)
    bar = tqdm(total=len(batch_list), desc="output weights", unit="batch", disable=not progress, leave=False)
    kinds = {s.name: s.kind for s in site_list}
    modules = {s.name: get_module(model, s.name) for s in site_list}
    try:
        with forward_hooks(model, {s.name: hook_for(s.name) for s in site_list}), _grad_on(model):
            for i, batch in enumerate(batch_list):
                captured.clear()
                mask = token_mask(batch)
                try:
                    out = feed(model, batch)
                except Exception as err:
                    raise FactorizeError(f"calibration batch {i} did not run through the model: "
                                         f"{type(err).__name__}: {err}") from err
                f = output_fn(out, batch) if output_fn is not None else primary_output(out)
                names = [n for n in captured if any(t.requires_grad for t in captured[n])]
                tensors = [t for n in names for t in captured[n]]
                if not f.requires_grad or not tensors:
                    raise FactorizeError(
                        "the model's output does not depend differentiably on its layers (it is computed without "
                        "autograd, or detached), so gradient sensitivity cannot be measured",
                        fix="use sensitivity='probes', which only runs the model forward")
                for k in range(projections):
                    v = _projection_for(f, mask, gen)
                    try:
                        grads = torch.autograd.grad((f * v).sum(), tensors, retain_graph=k + 1 < projections,
                                                    allow_unused=True)
                    except RuntimeError as err:
                        raise FactorizeError(f"backward pass failed on calibration batch {i}: {err}",
                                             fix="use sensitivity='probes', which only runs the model forward") from err
                    j = 0
                    for n in names:
                        for _ in captured[n]:
                            g = grads[j]
                            j += 1
                            if g is None:
                                continue
                            # (rows, m)
                            r = _output_rows(kinds[n], g.detach(), mask, modules[n]).to(torch.float64).cpu()
                            check_finite(r, n, i)
                            grams[n].addmm_(r.T, r)
                            if k == 0:
                                rows[n] += r.shape[0]
                bar.update()
    finally:
        bar.close()
        captured.clear()
    for n in grams:
        grams[n] /= projections * max(rows[n], 1)  # mean over rows and projections
    return grams

