"""The calibration inputs of the block-by-block shrink: token ids checked, and cut into fixed slices.

The slices are FIXED (their number does not depend on how many workers run them), so the statistics summed over
them in slice order give the same bytes on any engine.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import torch

from factorize.errors import FactorizeError


def token_batches(calibration: Any, vocab: int, types: int | None = None
                  ) -> list[tuple[torch.Tensor, torch.Tensor | None, torch.Tensor | None]]:
    """The calibration as (ids (b, T) int64, attention mask (b, T) or None, token types (b, T) int64 or None)
    batches, checked. ``types``: how many token types the model's embedding stage takes (an encoder's
    ``type_vocab_size``; None when its forward takes none). Token types in a dict batch (tokenizer output for
    sentence pairs) reach the embedding stage; all zeros, or for a model that takes none, they are dropped, and
    nonzero ones for such a model are refused."""
    if calibration is None:
        raise FactorizeError("no calibration inputs", fix="pass calibration= token ids (a (sequences, length) "
                             "integer tensor, a list of them, or tokenizer output dicts)")
    items = [calibration] if isinstance(calibration, (torch.Tensor, np.ndarray, Mapping)) else list(calibration)
    if not items:
        raise FactorizeError("no calibration batches", fix="give at least one batch of token ids")
    out, problems = [], []
    for k, item in enumerate(items):
        mask = kinds = None
        if isinstance(item, Mapping):
            if "input_ids" not in item:
                problems.append(f"batch {k}: a dict without 'input_ids' (keys: {sorted(item)})")
                continue
            ids, mask, kinds = item["input_ids"], item.get("attention_mask"), item.get("token_type_ids")
        else:
            ids = item
        ids = torch.as_tensor(ids)
        if ids.dim() == 1:
            ids = ids.unsqueeze(0)
        if ids.dim() != 2 or ids.is_floating_point() or ids.is_complex() or ids.dtype == torch.bool:
            problems.append(f"batch {k}: {ids.dtype} of shape {list(ids.shape)}, not integer token ids "
                            "(sequences, length)")
            continue
        if ids.numel() == 0:
            problems.append(f"batch {k}: empty")
            continue
        lo, hi = int(ids.min()), int(ids.max())
        if lo < 0 or hi >= vocab:
            problems.append(f"batch {k}: token ids from {lo} to {hi}, outside the vocabulary 0..{vocab - 1}")
            continue
        if mask is not None:
            mask = torch.as_tensor(mask)
            if mask.dim() == 1:
                mask = mask.unsqueeze(0)
            if tuple(mask.shape) != tuple(ids.shape) or not bool(((mask == 0) | (mask == 1)).all()):
                problems.append(f"batch {k}: the attention mask is not 0/1 of the ids' shape {list(ids.shape)}")
                continue
            if not bool((mask.sum(1) > 0).all()):
                problems.append(f"batch {k}: a sequence with no token (its attention mask is all 0)")
                continue
            mask = None if bool(mask.all()) else mask.to(torch.int64)
        if kinds is not None:
            kinds, problem = _token_types(kinds, ids, types)
            if problem:
                problems.append(f"batch {k}: {problem}")
                continue
        out.append((ids.to(torch.int64), mask, kinds))
    if problems:
        raise FactorizeError("the calibration inputs are not token ids this model accepts", problems[:30],
                             fix=f"give integer token ids in 0..{vocab - 1} from the model's tokenizer")
    return out


def _token_types(kinds: Any, ids: torch.Tensor, types: int | None) -> tuple[torch.Tensor | None, str]:
    """(the token types as int64, or None when all zero; a problem in words, or "")."""
    kinds = torch.as_tensor(kinds)
    if kinds.dim() == 1:
        kinds = kinds.unsqueeze(0)
    if tuple(kinds.shape) != tuple(ids.shape) or kinds.is_floating_point() or kinds.is_complex():
        return None, f"token_type_ids are {kinds.dtype} of shape {list(kinds.shape)}, not integers of the ids' shape"
    if not bool(kinds.any()):
        return None, ""
    if types is None:
        return None, "nonzero token_type_ids, and this model's forward takes no token types"
    lo, hi = int(kinds.min()), int(kinds.max())
    if lo < 0 or hi >= types:
        return None, f"token_type_ids from {lo} to {hi}, outside the model's {types} token types"
    return kinds.to(torch.int64), ""


def slice_plan(batches, slices: int) -> list[list[tuple[int, int, int]]]:
    """Rows of all batches cut into ``slices`` contiguous slices: per slice, (batch, first row, end row) pieces."""
    rows = [int(ids.shape[0]) for ids, *_ in batches]
    total = sum(rows)
    count = min(slices, total)
    starts = [total * j // count for j in range(count + 1)]
    plan: list[list[tuple[int, int, int]]] = [[] for _ in range(count)]
    offset = 0
    for k, n in enumerate(rows):
        for j in range(count):
            lo, hi = max(starts[j], offset), min(starts[j + 1], offset + n)
            if lo < hi:
                plan[j].append((k, lo - offset, hi - offset))
        offset += n
    return plan
