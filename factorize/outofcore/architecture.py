"""The architecture of a decoder-only transformers checkpoint, built on the meta device, and its blocks.

The block-by-block shrink never holds the model: the model class is built from ``config.json`` on the meta device
(shapes and names, no values), the tensors are located in the (sharded) safetensors files, and one block at a time
is materialised on the CPU in float32, its tensors read one at a time from the memory-mapped shards.
"""

from __future__ import annotations

import copy
import fnmatch
import functools
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import torch

from factorize.checkpoints.directories import import_transformers
from factorize.checkpoints.files import Checkpoint, open_checkpoint
from factorize.errors import FactorizeError
from factorize.model.sites import walk
from factorize.plan.policy import Policy
from factorize.storage import read_tensor

SUPPORTED_TYPES = ("llama",)  # model_type values whose decoder layers were checked against transformers' model


@dataclass
class Architecture:
    """A checkpoint's model on the meta device, where its blocks and embedding live, and its tensors' files."""

    directory: Path
    config: Any
    model: torch.nn.Module  # on the meta device
    prefix: str  # "model.layers"
    blocks: int
    embed: str  # "model.embed_tokens.weight"
    rotary: torch.nn.Module  # on the CPU, real buffers
    ckpt: Checkpoint
    where: dict  # tensor name -> Header


def _transformers():
    """The transformers module, or a clear error naming the extra to install."""
    return import_transformers("the block-by-block shrink")


@functools.lru_cache(maxsize=2)
def architecture(directory: str) -> Architecture:
    """The model built on the meta device from ``directory``'s config, and where each tensor lives (cached per
    process: every task of a run asks for the same one)."""
    transformers = _transformers()
    d = Path(directory)
    config = transformers.AutoConfig.from_pretrained(d, local_files_only=True)
    with torch.device("meta"):
        model = transformers.AutoModelForCausalLM.from_config(config)
    base = getattr(model, getattr(model, "base_model_prefix", "model"), None)
    layers = getattr(base, "layers", None)
    rotary = getattr(base, "rotary_emb", None)
    embed = getattr(base, "embed_tokens", None)
    if not isinstance(layers, torch.nn.ModuleList) or rotary is None or embed is None:
        raise FactorizeError(f"{d}: the model has no layers ModuleList, rotary embedding and token embedding at "
                             f"{type(model).__name__}.{model.base_model_prefix}",
                             fix="the block-by-block shrink handles Llama-style decoder-only models")
    names = {m: n for n, m in model.named_modules()}
    with torch.device("cpu"):
        rotary_cpu = type(rotary)(config=config)  # real inv_freq buffers (the meta ones hold no values)
    ckpt = open_checkpoint(d)
    return Architecture(d, config, model, names[layers], len(layers), names[embed] + ".weight", rotary_cpu.eval(),
                         ckpt, ckpt.locate())


def check_source(src: Path) -> Architecture:
    if not src.is_dir() or not (src / "config.json").is_file():
        raise FactorizeError(f"{src}: not a transformers model directory (no config.json in it)",
                             fix="pass the directory holding config.json and the safetensors shards")
    try:
        raw = json.loads((src / "config.json").read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as e:
        raise FactorizeError(f"{src / 'config.json'}: unreadable or not JSON ({e})") from None
    kind = raw.get("model_type") if isinstance(raw, dict) else None
    archs = [a for a in (raw.get("architectures") or []) if isinstance(a, str)] if isinstance(raw, dict) else []
    if kind not in SUPPORTED_TYPES or not any(a.endswith("ForCausalLM") for a in archs):
        raise FactorizeError(
            f"{src}: model_type {kind!r} with architectures {archs}: the block-by-block shrink handles decoder-only "
            f"causal language models of type {', '.join(SUPPORTED_TYPES)}",
            fix="shrink other models in memory (factorize shrink --model DIR --calibration FILE, without "
            "--blockwise) or weights-only (factorize shrink --model checkpoint.safetensors)")
    try:
        arch = architecture(str(src.resolve()))
    except FactorizeError:
        raise
    except (OSError, ValueError, KeyError) as err:
        raise FactorizeError(f"{src}: transformers cannot build the model from its config: "
                             f"{str(err).splitlines()[0] if str(err) else type(err).__name__}",
                             fix="check config.json") from None
    expected = {k: tuple(v.shape) for k, v in arch.model.state_dict().items()}
    problems = []
    for name, shape in expected.items():
        if name.startswith(arch.prefix + ".") or name == arch.embed:
            h = arch.where.get(name)
            if h is None:
                problems.append(f"{name}: missing from the checkpoint")
            elif tuple(h.tensors[name].shape) != shape:
                problems.append(f"{name}: shape {list(h.tensors[name].shape)} in the checkpoint, the config says "
                                f"{list(shape)}")
    if problems:
        raise FactorizeError(f"{src}: the checkpoint does not match its config", problems[:30],
                             fix="pass a complete, unmodified transformers checkpoint")
    return arch


def block_linears(arch: Architecture, policy: Policy) -> list[str]:
    """Qualified names of the linear layers inside the blocks that the policy's include/exclude select."""
    block = arch.model.get_submodule(f"{arch.prefix}.0")
    rel = [s.name for s in walk(block, allow_meta=True).sites if s.kind == "linear"]  # a meta-device skeleton
    out = []
    for i in range(arch.blocks):
        for r in rel:
            name = f"{arch.prefix}.{i}.{r}"
            if policy.include is not None and not any(fnmatch.fnmatchcase(name, p) for p in policy.include):
                continue
            if policy.exclude and any(fnmatch.fnmatchcase(name, p) for p in policy.exclude):
                continue
            out.append(name)
    return out


@torch.no_grad()
def materialise_block(arch: Architecture, i: int) -> torch.nn.Module:
    """Block i on the CPU in float32, its tensors read one at a time from the memory-mapped shards."""
    block = copy.deepcopy(arch.model.get_submodule(f"{arch.prefix}.{i}")).to_empty(device="cpu").float()
    state = block.state_dict(keep_vars=True)
    for name, param in state.items():
        full = f"{arch.prefix}.{i}.{name}"
        param.copy_(read_tensor(arch.where[full].path, full))
        # ``copy_`` casts the stored dtype (e.g. bfloat16) to the float32 compute copy
    return block.eval()
