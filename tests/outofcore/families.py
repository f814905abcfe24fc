"""Tiny random checkpoints of the transformer families the block-by-block shrink covers, built with transformers'
own model classes from tiny configs and written with ``save_pretrained`` (safetensors). Configs invented for tests
(small widths so each family builds in milliseconds); the layouts are transformers'."""

from __future__ import annotations

from collections.abc import Callable, Collection
from pathlib import Path

import torch

VOCAB = 256


def padded_calibration(vocab: int, rows: tuple[int, int]) -> list:
    """Two batches of token ids of different lengths (24 and 16); the second is right-padded (a dict with an
    attention mask), so padded positions must be left out of the statistics and masked in attention."""
    g = torch.Generator().manual_seed(1)
    first = torch.randint(0, vocab, (rows[0], 24), generator=g)
    ids = torch.randint(0, vocab, (rows[1], 16), generator=g)
    mask = torch.ones(rows[1], 16, dtype=torch.int64)
    mask[1, 12:] = 0
    mask[3, 9:] = 0
    return [first, {"input_ids": ids, "attention_mask": mask}]


def configs(transformers) -> dict:
    """model_type -> (model class, config). Mistral has a sliding window shorter than the calibration sequences;
    Qwen2 mixes sliding-window and full-attention layers (two distinct sets of block inputs); Phi rotates half
    of each head (partial rotary); Gemma scales its embeddings by sqrt(hidden)."""
    common = dict(vocab_size=VOCAB, hidden_size=32, intermediate_size=48, num_hidden_layers=2,
                  num_attention_heads=4, max_position_embeddings=64)
    t = transformers
    return {
        "gpt2": (t.GPT2LMHeadModel, t.GPT2Config(vocab_size=VOCAB, n_embd=32, n_layer=2, n_head=4, n_positions=64)),
        "llama": (t.LlamaForCausalLM, t.LlamaConfig(**common, num_key_value_heads=2)),
        "mistral": (t.MistralForCausalLM, t.MistralConfig(**common, num_key_value_heads=2, sliding_window=8)),
        "qwen2": (t.Qwen2ForCausalLM, t.Qwen2Config(**common, num_key_value_heads=2, use_sliding_window=True,
                                                      sliding_window=8, max_window_layers=1)),
        "phi": (t.PhiForCausalLM, t.PhiConfig(**common, partial_rotary_factor=0.5)),
        "gemma": (t.GemmaForCausalLM, t.GemmaConfig(**common, num_key_value_heads=1, head_dim=8)),
        "bert": (t.BertModel, t.BertConfig(**common, type_vocab_size=2)),
    }


def write_family(transformers, kind: str, directory: Path, *, shard: str | None = None, seed: int = 0) -> Path:
    """A tiny random checkpoint of family ``kind`` in ``directory`` (sharded when ``shard`` is a size such as
    "20KB"); returns the directory."""
    cls, config = configs(transformers)[kind]
    torch.manual_seed(seed)
    model = cls(config).eval()
    with torch.no_grad():  # larger random weights than the initialiser's, so the blocks do something visible
        for name, p in model.named_parameters():
            if p.dim() == 2 and "embed" not in name and "wte" not in name and "wpe" not in name:
                p.mul_(10.0)
    kwargs = {"max_shard_size": shard} if shard else {}
    model.save_pretrained(directory, safe_serialization=True, **kwargs)
    return directory


def family_getter(transformers, root: Path, sharded: Collection[str] = ()) -> Callable[[str], Path]:
    """``get(kind)``: the family's tiny checkpoint under ``root``, written on first use (sharded for the kinds in
    ``sharded``) -- what a module-scoped fixture hands its tests."""
    made: dict[str, Path] = {}

    def get(kind: str) -> Path:
        if kind not in made:
            made[kind] = write_family(transformers, kind, root / kind, shard="12KB" if kind in sharded else None)
        return made[kind]

    return get


def outputs(model, ids) -> torch.Tensor:
    """A model's logits (language models) or last hidden states (encoders) for token ids, without gradients."""
    with torch.no_grad():
        out = model(input_ids=ids)
    return out.logits if hasattr(out, "logits") else out.last_hidden_state
