"""The architecture of a transformers checkpoint, built on the meta device, and its blocks.

The block-by-block shrink never holds the model: the model class named in ``config.json`` is built on the meta
device (shapes and names, no values), the tensors are located in the (sharded) safetensors files, and one block
at a time is materialised on the CPU in float32, its tensors read one at a time from the memory-mapped shards.

Nothing here is specific to one family. The blocks are found in the model itself: the one ``ModuleList`` of
``num_hidden_layers`` modules of one class (``model.layers`` in Llama, Mistral, Qwen2, Phi and Gemma,
``transformer.h`` in GPT-2, ``encoder.layer`` in BERT). The linears inside a block are the walker's sites
(:func:`factorize.model.sites.walk`): ``nn.Linear``, and GPT-2's ``Conv1D``, whose weight is stored (in, out) and
which the walker's probe recognises on a materialised copy of one module (kind ``"transposed"``). What runs
before the first block (embeddings, position embeddings, masks) is the model's own code:
:mod:`factorize.outofcore.stem`.
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

from factorize.checkpoints.directories import build_architecture, import_transformers
from factorize.checkpoints.files import Checkpoint, open_checkpoint
from factorize.errors import FactorizeError, printable
from factorize.model.sites import is_transposed_projection, walk
from factorize.outofcore.candidates import Candidate
from factorize.plan.policy import Policy
from factorize.storage import read_rows, read_tensor

# model_type values checked block by block against transformers' own model classes (tests/outofcore/
# test_blockwise_families.py); any other family whose blocks the search below finds runs too
CHECKED_TYPES = ("bert", "gemma", "gpt2", "llama", "mistral", "phi", "qwen2")
BLOCK_KINDS = ("linear", "transposed")  # the layer kinds factored inside a block


@dataclass
class Architecture:
    """A checkpoint's model on the meta device, where its blocks and embedding live, and its tensors' files."""

    directory: Path
    config: Any
    model: torch.nn.Module  # on the meta device
    prefix: str  # the blocks' ModuleList: "model.layers", "transformer.h", "encoder.layer"
    blocks: int
    embed: str  # the input embedding's weight: "model.embed_tokens.weight"
    ckpt: Checkpoint
    where: dict  # tensor name -> Header
    kinds: dict  # linear inside a block (relative name) -> "linear" or "transposed"

    @property
    def model_type(self) -> str:
        return str(getattr(self.config, "model_type", "?"))


def _transformers():
    """The transformers module, or a clear error naming the extra to install."""
    return import_transformers("the block-by-block shrink")


@functools.lru_cache(maxsize=2)
def architecture(directory: str) -> Architecture:
    """The model built on the meta device from ``directory``'s config, and where each tensor lives (cached per
    process: every task of a run asks for the same one)."""
    _transformers()
    d = Path(directory)
    with torch.device("meta"):
        model = build_architecture(d)
    config = model.config
    prefix, layers = find_blocks(model, config)
    embed = model.get_input_embeddings() if hasattr(model, "get_input_embeddings") else None
    names = {m: n for n, m in model.named_modules()}
    if not isinstance(embed, torch.nn.Embedding) or embed not in names:
        raise FactorizeError(f"{d}: model_type {getattr(config, 'model_type', None)!r}: the model "
                             f"{type(model).__name__} has no token embedding (get_input_embeddings)",
                             fix="the block-by-block shrink handles transformers models that take token ids")
    ckpt = open_checkpoint(d)
    return Architecture(d, config, model, prefix, len(layers), names[embed] + ".weight", ckpt, ckpt.locate(),
                        _block_kinds(layers[0]))


def find_blocks(model: torch.nn.Module, config: Any) -> tuple[str, torch.nn.ModuleList]:
    """The one ModuleList of ``num_hidden_layers`` modules of one class (the transformer's blocks), by name."""
    text = config.get_text_config() if hasattr(config, "get_text_config") else config
    depth = getattr(text, "num_hidden_layers", None)
    kind = getattr(config, "model_type", None)
    found = [(n, m) for n, m in model.named_modules() if isinstance(m, torch.nn.ModuleList) and len(m) > 0
             and len(m) == depth and len({type(b) for b in m}) == 1]
    if len(found) != 1:
        what = "no" if not found else f"{len(found)} ({', '.join(n for n, _ in found)})"
        raise FactorizeError(
            f"model_type {kind!r} ({type(model).__name__}): {what} list of num_hidden_layers={depth} blocks of one "
            "class was found in the model, so it cannot be run block by block",
            fix="shrink it in memory (without --blockwise) or weights-only; encoder-decoder models, which hold "
            "two lists of blocks, are not handled block by block")
    return found[0]


def _block_kinds(block: torch.nn.Module) -> dict[str, str]:
    """Relative name -> kind of every factorizable projection inside a (meta) block: the walker's linears, and
    transposed projections (GPT-2's Conv1D), recognised by the walker's probe on a materialised copy of the module
    (its probe cannot run on the meta device)."""
    skeleton = copy.deepcopy(block)  # meta: no values copied
    kinds: dict[str, str] = {}
    for name, module in list(skeleton.named_modules()):
        params = dict(module.named_parameters(recurse=False))
        w = params.get("weight")
        if isinstance(module, (torch.nn.Linear, torch.nn.Embedding, torch.nn.modules.conv._ConvNd)) or \
                any(True for _ in module.children()) or w is None or w.dim() != 2 or set(params) - {"weight", "bias"}:
            continue
        probe = copy.deepcopy(module).to_empty(device="cpu").float()
        gen = torch.Generator().manual_seed(0)
        with torch.no_grad():
            for p in probe.parameters():
                p.copy_(torch.randn(p.shape, generator=gen))
        if is_transposed_projection(probe):
            kinds[name] = "transposed"
        skeleton.set_submodule(name, torch.nn.Identity())  # the walker would probe it on the meta device
    kinds.update({s.name: s.kind for s in walk(skeleton, allow_meta=True).sites if s.kind == "linear"})
    return dict(sorted(kinds.items(), key=lambda kv: [n for n, _ in block.named_modules()].index(kv[0])))


def check_source(src: Path) -> Architecture:
    if not src.is_dir() or not (src / "config.json").is_file():
        raise FactorizeError(f"{src}: not a transformers model directory (no config.json in it)",
                             fix="pass the directory holding config.json and the safetensors shards")
    try:
        raw = json.loads((src / "config.json").read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as e:
        raise FactorizeError(f"{src / 'config.json'}: unreadable or not JSON ({e})") from None
    kind = raw.get("model_type") if isinstance(raw, dict) else None
    if not isinstance(kind, str):
        raise FactorizeError(f"{src / 'config.json'}: no model_type", fix="pass a config.json written by transformers")
    try:
        arch = architecture(str(src.resolve()))
    except FactorizeError:
        raise
    except (OSError, ValueError, KeyError, TypeError, AttributeError) as err:
        raise FactorizeError(f"{src}: model_type {printable(kind)!r}: transformers cannot build the model from its "
                             f"config: {str(err).splitlines()[0] if str(err) else type(err).__name__}",
                             fix="check config.json, or shrink the model weights-only") from None
    problems = _missing(arch)
    if problems:
        raise FactorizeError(f"{src}: the checkpoint does not match its config (model_type {kind!r})", problems[:30],
                             fix="pass a complete, unmodified transformers checkpoint")
    return arch


def _missing(arch: Architecture) -> list[str]:
    """The blocks' and the token embedding's tensors missing from the checkpoint or of another shape."""
    problems = []
    for name, value in arch.model.state_dict().items():
        if not (name.startswith(arch.prefix + ".") or name == arch.embed):
            continue
        h = arch.where.get(name)
        if h is None:
            problems.append(f"{name}: missing from the checkpoint")
        elif tuple(h.tensors[name].shape) != tuple(value.shape):
            problems.append(f"{name}: shape {list(h.tensors[name].shape)} in the checkpoint, the config says "
                            f"{list(value.shape)}")
    return problems


def block_linears(arch: Architecture, policy: Policy) -> list[str]:
    """Qualified names of the projections inside the blocks that the policy's include/exclude select."""
    out = []
    for i in range(arch.blocks):
        for r in arch.kinds:
            name = f"{arch.prefix}.{i}.{r}"
            if policy.include is not None and not any(fnmatch.fnmatchcase(name, p) for p in policy.include):
                continue
            if policy.exclude and any(fnmatch.fnmatchcase(name, p) for p in policy.exclude):
                continue
            out.append(name)
    return out


def kind_of(arch: Architecture, name: str) -> str:
    """The kind of a qualified linear name inside a block ("linear" or "transposed")."""
    return arch.kinds[name[len(arch.prefix) + 1:].split(".", 1)[1]]


def block_candidates(arch: Architecture, names: list[str]) -> list[Candidate]:
    """The checkpoint tensors of the named projections, with their kind (a transposed one's matrix is its
    stored weight transposed), in the checkpoint's order of tensors (the plan lists them in this order)."""
    position = {n: k for k, n in enumerate(arch.where)}
    out = []
    for name in sorted(names, key=lambda n: position[n + ".weight"]):
        w, b = name + ".weight", name + ".bias"
        bias = arch.where[b].tensors[b] if b in arch.where else None
        out.append(Candidate(name, arch.where[w].tensors[w], arch.where[w], bias,
                             arch.where[b] if bias is not None else None, kind=kind_of(arch, name)))
    return out


def fill_from_checkpoint(arch: Architecture, module: torch.nn.Module, prefix: str, *, recurse: bool = True,
                         missing_ok: bool = False, rows: dict[str, torch.Tensor] | None = None) -> list[str]:
    """Materialise ``module`` (a meta-device part of ``arch.model`` named ``prefix``; only its own tensors unless
    ``recurse``) on the CPU in float32: its buffers from the model's own initialisation (rotary frequencies,
    position ids), then every parameter and persistent buffer the checkpoint holds, read one tensor at a time.
    A parameter missing from the checkpoint is an error, or with ``missing_ok`` filled with NaN (so that any use
    shows) and returned by name. A tensor named in ``rows`` gets only those rows of the stored one (sorted
    indices; the module's tensor must already have that many rows)."""
    init = getattr(arch.model, "_init_weights", None)
    missing: list[str] = []
    subs = module.named_modules() if recurse else [("", module)]
    with torch.no_grad():
        for rel, sub in subs:
            name = ".".join(p for p in (prefix, rel) if p)
            sub.to_empty(device="cpu", recurse=False)
            if init is not None and any(b is not None for b in sub._buffers.values()):
                init(sub)  # transformers' own initialiser recomputes non-persistent buffers
            sub._apply(lambda t: t.float() if t.is_floating_point() else t, recurse=False)
            own = [(n, t, True) for n, t in sub._parameters.items() if t is not None]
            own += [(n, t, False) for n, t in sub._buffers.items()
                    if t is not None and n not in sub._non_persistent_buffers_set]
            for n, tensor, is_param in own:
                full = f"{name}.{n}" if name else n
                h = arch.where.get(full)
                if h is not None and rows is not None and full in rows:
                    tensor.copy_(read_rows(h.path, full, rows[full]))
                elif h is not None:
                    tensor.copy_(read_tensor(h.path, full))  # the stored dtype (e.g. bfloat16) cast to float32
                elif is_param:
                    missing.append(full)
                    tensor.fill_(float("nan"))
    if missing and not missing_ok:
        raise FactorizeError(f"{arch.directory}: model_type {arch.model_type!r}: parameters the model uses before "
                             "or inside its blocks are missing from the checkpoint", missing[:30],
                             fix="pass a complete, unmodified transformers checkpoint")
    return missing


@torch.no_grad()
def materialise_block(arch: Architecture, i: int) -> torch.nn.Module:
    """Block i on the CPU in float32, its tensors read one at a time from the memory-mapped shards."""
    block = copy.deepcopy(arch.model.get_submodule(f"{arch.prefix}.{i}"))
    fill_from_checkpoint(arch, block, f"{arch.prefix}.{i}")
    return block.eval()
