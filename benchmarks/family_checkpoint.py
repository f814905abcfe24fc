"""Write a random sharded bfloat16 checkpoint of a GPT-2- or BERT-shaped model at 1B-class sizes, for the
block-by-block benchmarks of families other than Llama.

The layout (tensor names, shapes, ``config.json``) is transformers' own: the model class is built on the meta device
from the config, so nothing is allocated for it, and every tensor of its state dict is written in turn. Weights are
made as in ``llama_checkpoint.py`` (a decaying singular spectrum and a small flat floor, entries of spread 0.02);
biases are zeros and norm weights ones. A tied output head is not written (transformers ties it on load).

Sizes (from memory of the published configurations of these shapes; nothing is downloaded):

* ``gpt2-xl``: hidden 1600, 48 blocks, 25 heads, MLP 6400, vocabulary 50257, 1024 positions (about 1.56 B).
* ``bert-large``: hidden 1024, 24 blocks, 16 heads, MLP 4096, vocabulary 30522, 512 positions (about 335 M; the
  largest common encoder shape, so the encoder case is as large as its family usually gets).

    python benchmarks/family_checkpoint.py OUT_DIR --family gpt2-xl|bert-large [--shard-mb 500] [--seed 0]
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import torch
from safetensors.torch import save_file

sys.path.insert(0, str(Path(__file__).resolve().parent))
from llama_checkpoint import make_tensor

FAMILIES = {
    "gpt2-xl": ("GPT2LMHeadModel", "GPT2Config", {"n_embd": 1600, "n_layer": 48, "n_head": 25, "n_positions": 1024,
                                                   "vocab_size": 50257, "tie_word_embeddings": True}),
    "bert-large": ("BertModel", "BertConfig", {"hidden_size": 1024, "num_hidden_layers": 24, "num_attention_heads": 16,
                                               "intermediate_size": 4096, "vocab_size": 30522,
                                               "max_position_embeddings": 512, "type_vocab_size": 2}),
}


def _tensor(name: str, shape: tuple[int, ...], gen: torch.Generator) -> torch.Tensor:
    if len(shape) == 1:
        ones = name.endswith(("ln_1.weight", "ln_2.weight", "ln_f.weight", "LayerNorm.weight"))
        return torch.ones(shape, dtype=torch.bfloat16) if ones else torch.zeros(shape, dtype=torch.bfloat16)
    if "wte" in name or "wpe" in name or "embeddings" in name:
        return (torch.randn(*shape, generator=gen) * 0.02).to(torch.bfloat16)
    return make_tensor(name, shape, gen)


def write_family_checkpoint(out_dir: str | Path, family: str, *, shard_mb: float = 500, seed: int = 0) -> Path:
    import transformers

    cls_name, cfg_name, sizes = FAMILIES[family]
    config = getattr(transformers, cfg_name)(**sizes)
    config.architectures = [cls_name]
    with torch.device("meta"):
        model = getattr(transformers, cls_name)(config)
    shapes = [(k, tuple(v.shape)) for k, v in model.state_dict().items()
              if not (config.tie_word_embeddings and k == "lm_head.weight")]
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    config.to_json_file(str(out / "config.json"))
    gen = torch.Generator().manual_seed(seed)
    limit, parts, current, size = int(shard_mb * 2**20), [], {}, 0

    def flush() -> None:  # each shard written as soon as it is full: one shard in memory at a time
        parts.append((out / f"part-{len(parts)}.tmp", list(current)))
        save_file(current, str(parts[-1][0]), metadata={"format": "pt"})
        current.clear()

    for name, shape in shapes:
        t = _tensor(name, shape, gen)
        if current and size + t.numel() * 2 > limit:
            flush()
            size = 0
        current[name] = t
        size += t.numel() * 2
    flush()
    weight_map = {}
    for i, (tmp, names) in enumerate(parts):
        fname = f"model-{i + 1:05d}-of-{len(parts):05d}.safetensors"
        tmp.rename(out / fname)
        weight_map.update(dict.fromkeys(names, fname))
    total = sum(2 * torch.Size(shape).numel() for _, shape in shapes)
    (out / "model.safetensors.index.json").write_text(json.dumps(
        {"metadata": {"total_size": total}, "weight_map": weight_map}, indent=2))
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("out")
    ap.add_argument("--family", choices=sorted(FAMILIES), required=True)
    ap.add_argument("--shard-mb", type=float, default=500)
    ap.add_argument("--seed", type=int, default=0)
    a = ap.parse_args()
    path = write_family_checkpoint(a.out, a.family, shard_mb=a.shard_mb, seed=a.seed)
    print(f"wrote {path}")


if __name__ == "__main__":
    main()
