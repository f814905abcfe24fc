"""The distillation losses of :func:`factorize.training.heal.heal`, and the rule that picks one.

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
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import torch
import torch.nn.functional as F

from factorize.errors import FactorizeError
from factorize.model.feed import primary_output

LOSSES = ("auto", "kl", "mse", "cosine")


def resolve_loss(loss: str, output: Any) -> str:
    """The loss to use: ``loss`` itself, or for ``"auto"`` the rule of the module docstring applied to ``output``."""
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


def row_mask(batch: Any, out: torch.Tensor) -> torch.Tensor | None:
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


def layer_match_loss(student_outputs: Mapping[str, Any], teacher_outputs: Mapping[str, Any],
                     names: list[str], device: torch.device) -> torch.Tensor:
    """Mean over the named layers of ``||y_s - y_t||^2 / ||y_t||^2`` (FitNets-style hints; see heal's docstring).

    A layer missing from either mapping (it did not run on this batch) is left out; none left gives 0.
    """
    terms = []
    for name in names:
        ys, yt = student_outputs.get(name), teacher_outputs.get(name)
        if not isinstance(ys, torch.Tensor) or not isinstance(yt, torch.Tensor):
            continue  # the layer did not run on this batch
        if ys.shape != yt.shape:
            raise FactorizeError(
                f"match_layers: layer {name} gives {tuple(ys.shape)} in the compressed model but "
                f"{tuple(yt.shape)} in the teacher", fix="pass the original model, or match_layers=False")
        yt = yt.detach().float()
        terms.append(((ys.float() - yt) ** 2).sum() / (yt**2).sum().clamp_min(1e-12))  # relative squared error
    return torch.stack(terms).mean() if terms else torch.zeros((), device=device)
