"""Pooled outputs: one vector per sample from per-token states, so an encoder is judged on what it is used for.

* ``"mean"``: the mean of the token states over the attention mask (the sentence embedding of Sentence-BERT,
  Reimers & Gurevych 2019, and of all-MiniLM-L6-v2);
* ``"cls"``: the first token's state (BERT's classification token, Devlin et al. 2019);
* ``"last"``: the state of each sample's last real token (how causal language models summarise a sequence,
  common practice).

A batch without an attention mask counts every position.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import torch

from factorize.choices import POOLINGS
from factorize.errors import FactorizeError


def pool(states: torch.Tensor, batch: Any, how: str) -> torch.Tensor:
    """(B, d) pooled vectors from (B, T, d) states; ``batch`` gives the attention mask, if any."""
    if how not in POOLINGS:
        raise FactorizeError(f"unknown pooling {how!r}", fix=f"use one of {', '.join(POOLINGS)}")
    if states.dim() != 3:
        raise FactorizeError(f"pooling needs per-token outputs of shape (batch, tokens, width), got "
                             f"{tuple(states.shape)}", fix="drop the pooling option for this model")
    mask = batch.get("attention_mask") if isinstance(batch, Mapping) else None
    if not isinstance(mask, torch.Tensor) or tuple(mask.shape) != tuple(states.shape[:2]):
        mask = torch.ones(states.shape[:2], dtype=torch.int64)
    mask = mask.to(states.device)
    if how == "cls":
        return states[:, 0]
    if how == "last":
        last = (mask.sum(1) - 1).clamp_min(0)  # (B,) index of the last real token (right padding)
        return states[torch.arange(states.shape[0], device=states.device), last]
    w = mask.to(states.dtype).unsqueeze(-1)  # (B, T, 1)
    return (states * w).sum(1) / w.sum(1).clamp_min(1)
