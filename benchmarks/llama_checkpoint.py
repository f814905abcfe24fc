"""Write a Llama-shaped transformers checkpoint with random weights whose spectra decay, sharded, for benchmarks.

Nothing here is trained: every projection is ``W = c * (G1 * s) @ G2^T + noise`` with Gaussian G1 (out x r),
G2 (in x r), a power-law profile s_i = i^-0.7 over r = min(out, in) / 8 directions and a small Gaussian floor, scaled
so that the weight's entries have a typical initialisation spread (std 0.02, common practice for this family).
That gives each matrix a decaying singular spectrum (which a budget can exploit) at the cost of one thin product
per matrix. Norm weights are ones; the embedding and the output head are Gaussian.

Shapes: ``"1b"`` is a Llama-family layout of about 1.1 billion parameters (hidden 2048, MLP 5632, 22 layers,
32 query heads with 4 key/value heads, vocabulary 32000; the sizes of a published 1.1B Llama-architecture
configuration, from memory); ``"mid"`` (about 123 M parameters, hidden 1024, 8 layers) and ``"small"`` (about
50 M parameters, hidden 768, 6 layers) check a benchmark in a minute or two; ``"tiny"`` is the same layout at test
size.

    python benchmarks/llama_checkpoint.py OUT_DIR [--scale 1b|mid|small|tiny] [--shard-mb 500] [--seed 0]

The output is a directory a transformers ``LlamaForCausalLM.from_pretrained`` reads: ``config.json``,
``model-0000i-of-0000n.safetensors`` shards in bfloat16 and ``model.safetensors.index.json``.
"""

from __future__ import annotations

import argparse
import json
import os
from pathlib import Path

import torch
from safetensors.torch import save_file

SCALES = {
    "1b": {"hidden_size": 2048, "intermediate_size": 5632, "num_hidden_layers": 22, "num_attention_heads": 32,
               "num_key_value_heads": 4, "vocab_size": 32000, "max_position_embeddings": 2048},
    "small": {"hidden_size": 768, "intermediate_size": 2048, "num_hidden_layers": 6, "num_attention_heads": 12,
              "num_key_value_heads": 4, "vocab_size": 8192, "max_position_embeddings": 1024},
    "mid": {"hidden_size": 1024, "intermediate_size": 2816, "num_hidden_layers": 8, "num_attention_heads": 16,
                "num_key_value_heads": 4, "vocab_size": 16000, "max_position_embeddings": 2048},
    "tiny": {"hidden_size": 64, "intermediate_size": 176, "num_hidden_layers": 2, "num_attention_heads": 4,
                 "num_key_value_heads": 2, "vocab_size": 256, "max_position_embeddings": 256},
}
STD = 0.02


def config_dict(scale: str) -> dict:
    s = SCALES[scale]
    return {"architectures": ["LlamaForCausalLM"], "model_type": "llama", "hidden_act": "silu",
            "rms_norm_eps": 1e-5, "rope_theta": 10000.0, "tie_word_embeddings": False, "torch_dtype": "bfloat16",
            "bos_token_id": 1, "eos_token_id": 2, "initializer_range": STD, **s}


def tensor_shapes(scale: str) -> list[tuple[str, tuple[int, ...]]]:
    """Every tensor's name and shape, in the order transformers names them."""
    s = SCALES[scale]
    h, f, v = s["hidden_size"], s["intermediate_size"], s["vocab_size"]
    kv = h // s["num_attention_heads"] * s["num_key_value_heads"]
    out = [("model.embed_tokens.weight", (v, h))]
    for i in range(s["num_hidden_layers"]):
        p = f"model.layers.{i}."
        out += [(p + "input_layernorm.weight", (h,)), (p + "self_attn.q_proj.weight", (h, h)),
                (p + "self_attn.k_proj.weight", (kv, h)), (p + "self_attn.v_proj.weight", (kv, h)),
                (p + "self_attn.o_proj.weight", (h, h)), (p + "post_attention_layernorm.weight", (h,)),
                (p + "mlp.gate_proj.weight", (f, h)), (p + "mlp.up_proj.weight", (f, h)),
                (p + "mlp.down_proj.weight", (h, f))]
    out += [("model.norm.weight", (h,)), ("lm_head.weight", (v, h))]
    return out


def make_tensor(name: str, shape: tuple[int, ...], gen: torch.Generator) -> torch.Tensor:
    if len(shape) == 1:
        return torch.ones(shape, dtype=torch.bfloat16)
    m, n = shape
    if "embed_tokens" in name or "lm_head" in name:
        return (torch.randn(m, n, generator=gen) * STD).to(torch.bfloat16)
    r = max(1, min(m, n) // 8)
    s = torch.arange(1, r + 1, dtype=torch.float32) ** -0.7
    w = (torch.randn(m, r, generator=gen) * s) @ torch.randn(r, n, generator=gen)  # (m, n), decaying spectrum
    w += torch.randn(m, n, generator=gen) * (w.std() * 0.05)  # a small flat floor
    return (w * (STD / w.std())).to(torch.bfloat16)


def write_llama_checkpoint(out_dir: str | os.PathLike, *, scale: str = "tiny", shard_mb: float = 500,
                           seed: int = 0) -> Path:
    """Write the checkpoint (config, shards, index) into ``out_dir`` (created; must not hold a checkpoint)."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    if (out / "model.safetensors.index.json").exists():
        raise SystemExit(f"{out}: already holds a checkpoint; choose an empty directory")
    shapes = tensor_shapes(scale)
    limit = int(shard_mb * 2**20)
    shards: list[list[tuple[str, tuple[int, ...]]]] = [[]]
    size = 0
    for name, shape in shapes:
        nbytes = 2 * int(torch.Size(shape).numel())
        if shards[-1] and size + nbytes > limit:
            shards.append([])
            size = 0
        shards[-1].append((name, shape))
        size += nbytes
    weight_map, total = {}, 0
    for i, group in enumerate(shards, 1):
        fname = f"model-{i:05d}-of-{len(shards):05d}.safetensors"
        tensors = {}
        for name, shape in group:
            gen = torch.Generator().manual_seed(seed * 1_000_003 + shapes.index((name, shape)))
            tensors[name] = make_tensor(name, shape, gen)
            weight_map[name] = fname
            total += tensors[name].numel() * 2
        save_file(tensors, str(out / fname), metadata={"format": "pt"})
        del tensors
    (out / "model.safetensors.index.json").write_text(
        json.dumps({"metadata": {"total_size": total}, "weight_map": weight_map}, indent=2))
    (out / "config.json").write_text(json.dumps(config_dict(scale), indent=2))
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("out_dir")
    ap.add_argument("--scale", choices=sorted(SCALES), default="tiny")
    ap.add_argument("--shard-mb", type=float, default=500)
    ap.add_argument("--seed", type=int, default=0)
    a = ap.parse_args()
    path = write_llama_checkpoint(a.out_dir, scale=a.scale, shard_mb=a.shard_mb, seed=a.seed)
    n = sum(torch.Size(s).numel() for _, s in tensor_shapes(a.scale))
    print(f"wrote {path} ({n / 1e6:,.1f} M parameters, bfloat16)")


if __name__ == "__main__":
    main()
