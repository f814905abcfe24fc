"""Block by block: the calibrated (activation-aware) shrink of a decoder-only transformers checkpoint that does not
fit in memory.

The in-memory calibrated path (:func:`factorize.compress` with ``calibration=``) holds the whole model and every
layer's input second moment at once. Here only one block (one entry of the model's ``layers`` ModuleList) is
materialised at a time, from the memory-mapped safetensors shards, one tensor at a time:

1. **Embed.** The calibration token ids go through ``embed_tokens`` (the only tensor read for this step); the
   hidden states are written to a work directory, cut into a FIXED number of slices (``slices``, independent of
   how many workers run them).
2. **Statistics, block by block.** For block i, one task per slice loads the block's weights, runs its slice's
   hidden states through it (rotary position embeddings and the causal mask built by the model's own helpers,
   exactly as the model's forward builds them), accumulates every selected linear's input second moment
   C = X^T X in float64 (q/k/v share one input and gate/up another: each distinct input is accumulated once),
   writes the block's outputs for block i + 1 and its partial moments to the work directory. The client sums the
   partial moments in slice order, computes each linear's whitened spectrum (singular values of W L with
   L L^T = C + lambda I, :func:`factorize.calibrated.aware.decompose_aware`), keeps the values only, stores C
   for the factor step and frees the block.

   The hidden states passed on are the ORIGINAL block's outputs, not those of a compressed block: the ranks are
   only known once every block's spectrum is (the budget is allocated globally), so the statistics must not
   depend on them. (The sequential refit of the in-memory path, which feeds compressed outputs on, is not
   available here.)
3. **Plan and factors.** The budget is allocated across all blocks' whitened spectra at once
   (:func:`factorize.plan.ranks.choose_ranks`), then each factored linear is one task: its weight from the shard
   and its group's C from the work directory give the factors at the planned rank.
4. **Write.** A sharded checkpoint in a new directory (same shard names, ``<module>.first.weight`` (r, in) and
   ``<module>.second.weight`` (out, r) for factored linears, everything else copied; the plan in the index's
   metadata) plus the source's config and tokenizer files. :func:`factorize.load_directory` (or
   ``factorize.load(fresh_model, directory)``) reads it back. The directory is written under a temporary name
   and renamed into place when complete: a failure leaves nothing.

Byte-identical results on any engine (:mod:`factorize.cluster`): the slices are fixed, each task computes in
float64 under the same pinned torch thread count (``threads``; the client's count by default), and the client sums
the partial moments in slice order. Results are identical across engines and task orders for the same thread
count on the same kind of machine (float rounding of the float32 block forward depends on the CPU's kernels).

Memory: the client holds at most one group's moment (n x n float64) and the whitening work for one linear
(about three n x n float64 matrices, see :mod:`factorize.calibrated.aware`); a task holds one block in float32,
its slice's hidden states in and out, and the block's intermediate activations for ``tokens_per_pass`` tokens.
The report states the measured peak resident memory of this process (``peak_rss_bytes``), the block's and the
activations' sizes, and the bound 2 blocks + activations + 1 GB as a number, met or not.
"""

from __future__ import annotations

import copy
import functools
import inspect
import json
import math
import os
import resource
import shutil
import tempfile
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch
from safetensors import safe_open
from tqdm.auto import tqdm

from factorize.calibrated.aware import AwareSpectrum, decompose_aware
from factorize.calibrated.stats import (
    InputStats,
    accumulate,
    check_finite,
    input_rows,
)
from factorize.checkpoints.files import Checkpoint, open_checkpoint
from factorize.checkpoints.stream import _Job, _read, _relative_error, select
from factorize.choices import calibrated_methods
from factorize.cluster import Engine, LocalEngine, open_engine
from factorize.errors import FactorizeError
from factorize.model.hooks import forward_pre_hooks
from factorize.model.sites import walk
from factorize.plan.policy import Policy, rank_needed, resolve_policy
from factorize.plan.ranks import choose_ranks, plan_summary
from factorize.storage import (
    check_free_space,
    check_output_path,
    human_bytes,
    proc_field,
    write_safetensors,
)

SUPPORTED_TYPES = ("llama",)  # model_type values whose decoder layers were checked against transformers' model
DEFAULT_SLICES = 8
TOKENS_PER_PASS = 2048  # tokens per forward pass inside a task: bounds the block's intermediate activations
SUM_ROWS = 256  # rows of a partial moment added at a time when summing the slices
BOUND_SLACK = 2**30  # the "+ 1 GB" of the memory bound
WEIGHT_SUFFIXES = (".safetensors", ".bin", ".pt", ".pth", ".ckpt", ".msgpack", ".h5")


# ---------------------------------------------------------------------------------------------------------------
# the architecture, on the meta device


@dataclass
class _Architecture:
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
    try:
        import transformers
    except ImportError:
        raise FactorizeError("the block-by-block shrink needs the transformers library, which is not installed",
                             fix='install the hf extra: pip install "factorize[hf]"') from None
    return transformers


@functools.lru_cache(maxsize=2)
def _architecture(directory: str) -> _Architecture:
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
    return _Architecture(d, config, model, names[layers], len(layers), names[embed] + ".weight", rotary_cpu.eval(),
                         ckpt, ckpt.locate())


def _check_source(src: Path) -> _Architecture:
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
        arch = _architecture(str(src.resolve()))
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


def _block_linears(arch: _Architecture, policy: Policy) -> list[str]:
    """Qualified names of the linear layers inside the blocks that the policy's include/exclude select."""
    import fnmatch

    block = arch.model.get_submodule(f"{arch.prefix}.0")
    rel = [s.name for s in walk(block).sites if s.kind == "linear"]
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
def _materialise_block(arch: _Architecture, i: int) -> torch.nn.Module:
    """Block i on the CPU in float32, its tensors read one at a time from the memory-mapped shards."""
    block = copy.deepcopy(arch.model.get_submodule(f"{arch.prefix}.{i}")).to_empty(device="cpu").float()
    state = block.state_dict(keep_vars=True)
    for name, param in state.items():
        full = f"{arch.prefix}.{i}.{name}"
        param.copy_(_read(arch.where[full], full))
        # ``copy_`` casts the stored dtype (e.g. bfloat16) to the float32 compute copy
    return block.eval()


# ---------------------------------------------------------------------------------------------------------------
# calibration tokens


def _token_batches(calibration: Any, vocab: int) -> list[tuple[torch.Tensor, torch.Tensor | None]]:
    """The calibration as (ids (b, T) int64, attention mask (b, T) or None) batches, checked."""
    if calibration is None:
        raise FactorizeError("no calibration inputs", fix="pass calibration= token ids (a (sequences, length) "
                             "integer tensor, a list of them, or tokenizer output dicts)")
    items = [calibration] if isinstance(calibration, (torch.Tensor, np.ndarray, Mapping)) else list(calibration)
    if not items:
        raise FactorizeError("no calibration batches", fix="give at least one batch of token ids")
    out, problems = [], []
    for k, item in enumerate(items):
        mask = None
        if isinstance(item, Mapping):
            if "input_ids" not in item:
                problems.append(f"batch {k}: a dict without 'input_ids' (keys: {sorted(item)})")
                continue
            ids, mask = item["input_ids"], item.get("attention_mask")
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
        out.append((ids.to(torch.int64), mask))
    if problems:
        raise FactorizeError("the calibration inputs are not token ids this model accepts", problems[:30],
                             fix=f"give integer token ids in 0..{vocab - 1} from the model's tokenizer")
    return out


def _slice_plan(batches, slices: int) -> list[list[tuple[int, int, int]]]:
    """Rows of all batches cut into ``slices`` contiguous slices: per slice, (batch, first row, end row) pieces."""
    rows = [int(ids.shape[0]) for ids, _ in batches]
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


# ---------------------------------------------------------------------------------------------------------------
# tasks (module level, picklable items, inputs and outputs in the work directory)


@dataclass(frozen=True)
class _BlockTask:
    source: str  # checkpoint directory (resolved)
    block: int
    piece: int  # slice index
    inputs: str  # hidden states entering the block
    outputs: str  # the block's outputs (the next block's inputs)
    stats: str  # partial moments of this slice
    names: tuple[str, ...]  # qualified names of the linears to collect statistics for
    threads: int
    tokens_per_pass: int


def _save(tensors: dict, path: str, metadata: dict | None = None) -> None:
    """A work file, written tensor by tensor (no serialised copy of the whole dict in memory), then renamed."""
    tmp = f"{path}.{os.getpid()}.part"
    write_safetensors(tmp, tensors, metadata)
    os.replace(tmp, path)


def _causal_mask(arch: _Architecture, h: torch.Tensor, mask: torch.Tensor | None, pos: torch.Tensor):
    """The attention mask exactly as the model's forward builds it (transformers' ``create_causal_mask``)."""
    from transformers.masking_utils import create_causal_mask

    params = inspect.signature(create_causal_mask).parameters
    cache = {"cache": None} if "cache" in params else {"past_key_values": None}
    extra = {"cache_position": pos[0]} if "cache_position" in params else {}
    embeds = "inputs_embeds" if "inputs_embeds" in params else "input_embeds"
    return create_causal_mask(config=arch.config, **{embeds: h}, attention_mask=mask, position_ids=pos,
                              **cache, **extra)


def _block_slice_task(task: _BlockTask) -> dict:
    """Run one slice through block ``task.block``: its outputs and partial input moments go to the work dir."""
    torch.set_num_threads(task.threads)  # pinned (not restored: a concurrent task must not see another count)
    arch = _architecture(task.source)
    block = _materialise_block(arch, task.block)
    prefix = f"{arch.prefix}.{task.block}."
    rel = {n[len(prefix):]: n for n in task.names if n.startswith(prefix)}
    groups: dict[str, str] = {}  # linear (relative) -> the linear whose input it shares (the group's name)
    stats: dict[str, InputStats] = {}
    live: dict[int, tuple[torch.Tensor, str]] = {}  # id(input) -> (input, group), within one forward pass
    state = {"mask": None, "pass": 0}

    def hook_for(name: str):
        def hook(module, args, kwargs):
            x = args[0] if args else next(iter(kwargs.values()))
            if name not in groups:
                seen = live.get(id(x))
                groups[name] = seen[1] if seen is not None and seen[0] is x else name
            live[id(x)] = (x, groups[name])
            if groups[name] != name:
                return  # the same input was accumulated for its group
            rows = input_rows(module, "linear", x.detach(), state["mask"])  # padded positions left out
            check_finite(rows, rel[name], state["pass"])
            if name not in stats:
                stats[name] = InputStats(rel[name], "linear", int(x.shape[-1]))
            accumulate(stats[name], rows)

        return hook

    outputs: dict[str, torch.Tensor] = {}
    with safe_open(task.inputs, framework="pt", device="cpu") as f:
        stored = set(f.keys())
        keys = sorted({k.split(".", 1)[1] for k in stored}, key=int)
        with forward_pre_hooks(block, {r: hook_for(r) for r in rel}, with_kwargs=True), torch.no_grad():
            for k in keys:
                h_all = f.get_tensor(f"h.{k}")  # (b, T, hidden) float32
                m_all = f.get_tensor(f"m.{k}") if f"m.{k}" in stored else None
                b, t = int(h_all.shape[0]), int(h_all.shape[1])
                step = max(1, task.tokens_per_pass // max(t, 1))
                parts = []
                for lo in range(0, b, step):
                    h = h_all[lo:lo + step]
                    m = None if m_all is None else m_all[lo:lo + step]
                    pos = torch.arange(t).unsqueeze(0)
                    state["mask"] = m
                    live.clear()
                    pe = arch.rotary(h, pos)
                    out = block(h, attention_mask=_causal_mask(arch, h, m, pos), position_ids=pos,
                                position_embeddings=pe)
                    parts.append((out[0] if isinstance(out, tuple) else out).contiguous())
                    state["pass"] += 1
                    live.clear()
                outputs[f"h.{k}"] = torch.cat(parts) if len(parts) > 1 else parts[0]
                if m_all is not None:
                    outputs[f"m.{k}"] = m_all
                del h_all, parts
    del block
    _save(outputs, task.outputs)
    del outputs
    tensors, counts = {}, {}
    for name, st in stats.items():
        tensors[f"{name}.moment"] = st.second_moment
        tensors[f"{name}.total"] = st.total
        tensors[f"{name}.abs_total"] = st.abs_total
        counts[name] = st.count
    _save(tensors, task.stats, {"counts": json.dumps(counts), "groups": json.dumps(groups)})
    return {"groups": {rel[k]: rel[v] for k, v in groups.items()}, "counts": {rel[k]: c for k, c in counts.items()}}


@dataclass(frozen=True)
class _FactorTask:
    source: str
    module: str  # qualified linear name
    moment: str  # file of its group's summed moment
    rank: int
    method: str
    solver: str
    ridge: float | None
    seed: int
    precision: str | None
    output: str
    threads: int


def _read_stats(path: str, name: str) -> InputStats:
    with safe_open(path, framework="pt", device="cpu") as f:
        meta = f.metadata()
        C = f.get_tensor("moment")
        st = InputStats(name, "linear", int(C.shape[0]), count=int(meta["count"]), second_moment=C,
                        total=f.get_tensor("total"), abs_total=f.get_tensor("abs_total"),
                        batches=int(meta.get("batches", 0)))
    return st


def _factor_task(task: _FactorTask) -> str:
    """Factors of one linear at its planned rank, from its weight and its group's input moment."""
    torch.set_num_threads(task.threads)
    arch = _architecture(task.source)
    weight = task.module + ".weight"
    W = _read(arch.where[weight], weight)  # (out, in), stored dtype
    st = _read_stats(task.moment, task.module)
    spec = decompose_aware(W, st, method=task.method, solver=task.solver, ridge=task.ridge, rank=task.rank,
                           seed=task.seed, precision=task.precision, name=task.module)
    B, A = spec.factors(min(task.rank, spec.computed_rank))  # (out, r), (r, in)
    _save({"first": A.to(W.dtype).contiguous(), "second": B.to(W.dtype).contiguous()}, task.output)
    return task.output


# ---------------------------------------------------------------------------------------------------------------
# memory


def _reset_peak() -> bool:
    """Reset this process's peak resident size (Linux: writing 5 to /proc/self/clear_refs); False where not."""
    try:
        with open("/proc/self/clear_refs", "w", encoding="ascii") as f:
            f.write("5")
        return True
    except OSError:
        return False


def _peak_rss() -> int:
    """Peak resident bytes of this process (VmHWM; else ru_maxrss, which Linux gives in KiB)."""
    value = proc_field("/proc/self/status", "VmHWM")
    if value is not None:
        return int(value) * 1024
    return int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss) * 1024


# ---------------------------------------------------------------------------------------------------------------
# writing


class _Writer(_Job):
    """The streamed, atomic sharded writer of the weights-only shrink, fed with the factor files computed here
    (same keys ``first`` (r, in) and ``second`` (out, r), in the weight's dtype, as the weights-only tasks write)."""

    def __init__(self, ckpt, chosen, policy, method, plan, factors: Mapping[str, str], progress) -> None:
        super().__init__(ckpt, chosen, policy, method, policy.seed, None, None, progress, engine=LocalEngine(),
                         work_dir=Path(tempfile.gettempdir()))
        self.plan = plan
        self.entries = dict(plan["sites"])
        self.factor_files = dict(factors)

    def _write_layer(self, c, w) -> None:
        path = self.factor_files.get(c.module)
        entry = self.entries[c.module]
        error = 0.0
        if entry["action"] == "factor":
            with safe_open(path, framework="pt", device="cpu") as f:
                A, B = f.get_tensor("first"), f.get_tensor("second")
            if A.shape[0] != entry["rank"]:
                raise FactorizeError(f"{path}: factors of rank {A.shape[0]}, the plan says {entry['rank']}")
            error = _relative_error(_read(c.weight_file, c.weight.name), B, A)
            del A, B
        self.results[c.weight.name] = {"file": path, "relative_error": error}
        super()._write_layer(c, w)


def _copy_side_files(src: Path, dst: Path, ckpt: Checkpoint) -> list[str]:
    """Config, generation config and tokenizer files: every small regular file that is not a weights file."""
    skip = {h.path.name for h in ckpt.files} | ({ckpt.index.name} if ckpt.index else set())
    copied = []
    for p in sorted(src.iterdir()):
        if p.name in skip or p.name.startswith(".") or not p.is_file() or p.name.endswith(WEIGHT_SUFFIXES) \
                or p.name.endswith(".index.json"):
            continue
        shutil.copyfile(p, dst / p.name)
        copied.append(p.name)
    return copied


# ---------------------------------------------------------------------------------------------------------------
# public


def shrink_blockwise(
    src: str | os.PathLike,
    dst: str | os.PathLike,
    policy: Policy | None = None,
    *,
    calibration: Any,
    cluster: Any = None,
    work_dir: str | os.PathLike | None = None,
    slices: int = DEFAULT_SLICES,
    threads: int | None = None,
    tokens_per_pass: int = TOKENS_PER_PASS,
    ridge: float | None = None,
    precision: str | None = None,
    force: bool = False,
    metadata: Mapping[str, str] | None = None,
    progress: bool = False,
    **keywords: Any,
) -> dict:
    """Calibrated shrink of a decoder-only transformers checkpoint, one block in memory at a time.

    Args:
        src: a transformers model directory (config.json and safetensors shards, or one model.safetensors) of a
            supported type (Llama); only read.
        dst: the output directory (created; refused if it exists unless ``force``).
        policy: a :class:`~factorize.plan.policy.Policy` or its keywords (``budget=0.5``, ``rank=``, ``energy=``,
            ``keep=``, ``multiple``, ``include`` / ``exclude`` on qualified linear names such as
            ``model.layers.*.mlp.*``); ``method`` ``"whiten"`` (default) or ``"scale"``, or a solver for the
            whitened matrix (``"gram"`` default). Only the linears inside the blocks are factored; the embedding,
            the final norm and the output head are copied.
        calibration: token ids: a (sequences, length) integer tensor, a list of them, or dicts with
            ``input_ids`` (and an ``attention_mask`` whose padded positions are left out of the statistics).
        cluster: where the tasks run (:func:`factorize.cluster.open_engine`): None for this process, or an
            :class:`~factorize.cluster.Engine`; with a cluster, ``work_dir`` must be on storage every worker reads.
        work_dir: where the intermediate files go (a fresh folder is made inside it and removed at the end;
            default: beside ``dst``). Needs about 2 x the activations plus every block's n x n float64 moments.
        slices: how many slices the calibration sequences are cut into (fixed, so results do not depend on how
            many workers run them).
        threads: torch threads per task and for the client's decompositions (default: this process's count);
            the same count gives the same bytes.
        tokens_per_pass: tokens run through a block at once inside a task (bounds the intermediate activations).
        ridge / precision: as for :func:`factorize.calibrated.aware.decompose_aware`.
        force: replace an existing ``dst``.
        metadata: extra string entries for the output's metadata.
        progress: progress bars on stderr.

    Returns:
        ``{"plan", "tensors", "files", "output", "params_before", "params_after", "kept_fraction",
        "bytes_before", "bytes_after", "blocks", "sequences", "tokens", "slices", "threads", "engine", "seconds",
        "peak_rss_bytes", "peak_reset", "block_bytes", "activation_bytes", "bound_bytes", "bound_met"}``.
        ``peak_rss_bytes`` is this process's peak resident size during the call (from the start of the call when
        ``peak_reset``, else over the process's life); tasks on other machines are not in it.
    """
    started = time.perf_counter()
    peak_reset = _reset_peak()
    policy = resolve_policy(policy, keywords)
    aware, solver = calibrated_methods(policy.method)
    if policy.cost != "params":
        raise FactorizeError("cost='macs' is not available block by block", fix="use cost='params' (the default)")
    if not isinstance(slices, int) or isinstance(slices, bool) or slices < 1:
        raise FactorizeError(f"slices={slices!r}: expected a positive integer", fix="use e.g. slices=8")
    if not isinstance(tokens_per_pass, int) or tokens_per_pass < 1:
        raise FactorizeError(f"tokens_per_pass={tokens_per_pass!r}: expected a positive integer")
    src_path, dst_path = Path(src), Path(dst)
    arch = _check_source(src_path)
    vocab = int(arch.model.get_submodule(arch.embed.rsplit(".", 1)[0]).weight.shape[0])
    batches = _token_batches(calibration, vocab)
    if dst_path.resolve() == src_path.resolve() or src_path.resolve() in dst_path.resolve().parents:
        raise FactorizeError(f"{dst_path}: is (inside) the input directory; the input is never modified",
                             fix="choose another output directory")
    check_output_path(dst_path, force=force, directory=True)
    names = _block_linears(arch, policy)
    if not names:
        raise FactorizeError(f"{src_path}: no linear layer inside the blocks matches the include/exclude patterns",
                             fix="check the patterns against names such as model.layers.0.self_attn.q_proj")
    chosen, _ = select(arch.ckpt, include=names)
    chosen = [c for c in chosen if c.module in set(names)]
    sites = [c.site for c in chosen]
    threads = torch.get_num_threads() if threads is None else int(threads)
    hidden = int(arch.config.hidden_size)
    tokens = sum(int(ids.numel()) for ids, _ in batches)
    activation_bytes = tokens * hidden * 4
    block_bytes = max(sum(math.prod(arch.where[n].tensors[n].shape) * 4 for n in arch.where
                          if n.startswith(f"{arch.prefix}.{i}.")) for i in range(arch.blocks))
    per_block_moments = sum(8 * c.site.shape[1] ** 2 for c in chosen) / arch.blocks
    need = 2 * activation_bytes + (arch.blocks + slices) * per_block_moments + arch.ckpt.nbytes
    parent = Path(work_dir) if work_dir is not None else (dst_path.parent if str(dst_path.parent) else Path("."))
    if not parent.is_dir():
        raise FactorizeError(f"{parent}: the work directory does not exist", fix="create it or pass another")
    check_free_space(parent, int(need), "the block-by-block work files (activations, moments, factors)")
    engine = open_engine(cluster, threads=threads)
    where = engine.describe()
    saved_threads = torch.get_num_threads()
    work = Path(tempfile.mkdtemp(prefix=".factorize-blocks-", dir=parent))
    try:
        torch.set_num_threads(threads)
        spectra, samples, groups = _statistics(arch, batches, names, sites, engine, work, slices, threads,
                                               tokens_per_pass, aware, solver, ridge, policy, precision, progress)
        plan = choose_ranks(sites, spectra, policy, method=aware)
        plan["calibration"] = {"method": aware, "solver": solver, "blockwise": True, "sequential": False,
                               "sequences": sum(int(ids.shape[0]) for ids, _ in batches), "tokens": tokens,
                               "samples": {n: samples[n] for n in names}, "slices": len(_slice_plan(batches, slices)),
                               "threads": threads}
        factors = _factors(arch, plan, groups, engine, work, aware, solver, ridge, policy, precision, threads)
        written = _write(arch, src_path, dst_path, chosen, policy, aware, plan, factors, metadata, force, progress)
    finally:
        torch.set_num_threads(saved_threads)
        shutil.rmtree(work, ignore_errors=True)
        if not isinstance(cluster, Engine):  # ours to close (an Engine passed in stays open; so does a Client)
            engine.close()
    peak = _peak_rss()
    summary = plan_summary(plan)
    bound = 2 * block_bytes + activation_bytes + BOUND_SLACK
    return {
        "plan": plan,
        "tensors": written["tensors"],
        "files": written["files"],
        "output": str(dst_path),
        "params_before": written["params_before"],
        "params_after": written["params_after"],
        "kept_fraction": summary["kept_fraction"],
        "bytes_before": arch.ckpt.nbytes,
        "bytes_after": written["bytes_after"],
        "blocks": arch.blocks,
        "sequences": plan["calibration"]["sequences"],
        "tokens": tokens,
        "slices": plan["calibration"]["slices"],
        "threads": threads,
        "engine": where,
        "seconds": time.perf_counter() - started,
        "peak_rss_bytes": peak,
        "peak_reset": peak_reset,
        "block_bytes": block_bytes,
        "activation_bytes": activation_bytes,
        "bound_bytes": bound,
        "bound_met": peak <= bound,
    }


def _statistics(arch, batches, names, sites, engine, work: Path, slices, threads, tokens_per_pass, aware, solver,
                ridge, policy, precision, progress):
    """Steps 1 and 2: embed, then per block the slice tasks, the summed moments and the whitened spectra."""
    pieces = _slice_plan(batches, slices)
    acts = work / "acts"
    acts.mkdir()
    _embed(arch, batches, pieces, acts / "0")
    source = str(arch.directory.resolve())
    k_of = {s.name: (rank_needed(s, policy) if solver in ("auto", "randomized") else None) for s in sites}
    spectra: dict[str, AwareSpectrum] = {}
    samples: dict[str, int] = {}
    groups: dict[str, str] = {}
    (work / "moments").mkdir()
    bar = tqdm(range(arch.blocks), desc="blocks", unit="block", disable=not progress, leave=False)
    for i in bar:
        mine = tuple(n for n in names if n.startswith(f"{arch.prefix}.{i}."))
        (acts / str(i + 1)).mkdir()
        (work / f"stats{i}").mkdir()
        tasks = [_BlockTask(source, i, j, str(acts / str(i) / f"{j}.safetensors"),
                            str(acts / str(i + 1) / f"{j}.safetensors"), str(work / f"stats{i}" / f"{j}.safetensors"),
                            mine, threads, tokens_per_pass) for j in range(len(pieces))]
        results = engine.map(_block_slice_task, tasks, label=f"block {i}")
        shutil.rmtree(acts / str(i), ignore_errors=True)  # this block's inputs are no longer needed
        if not mine:
            shutil.rmtree(work / f"stats{i}", ignore_errors=True)
            continue
        block_groups = results[0]["groups"]
        for leader in sorted(set(block_groups.values()), key=mine.index):
            st = _summed(leader, [t.stats for t in tasks], len(batches))
            path = work / "moments" / f"{leader}.safetensors"
            _save({"moment": st.second_moment, "total": st.total, "abs_total": st.abs_total}, str(path),
                  {"count": str(st.count), "batches": str(st.batches)})
            for name in [n for n in mine if block_groups.get(n) == leader]:
                groups[name] = str(path)
                samples[name] = st.count
                W = _read(arch.where[name + ".weight"], name + ".weight")
                spec = decompose_aware(W, st, method=aware, solver=solver, ridge=ridge, rank=k_of[name],
                                       seed=policy.seed, precision=precision, name=name)
                spectra[name] = _values_only(spec)
                del W, spec
            del st
        shutil.rmtree(work / f"stats{i}", ignore_errors=True)
        missing = [n for n in mine if n not in spectra]
        if missing:
            raise FactorizeError("the calibration inputs never reached some linear layers", missing,
                                 fix="these layers are not called by the block's forward pass; exclude them")
    return spectra, samples, groups


def _summed(leader: str, files: Sequence[str], batches: int) -> InputStats:
    """One group's statistics summed over the slices, in slice order (the order fixes the bytes)."""
    acc: dict[str, torch.Tensor] = {}
    count = 0
    for path in files:
        with safe_open(path, framework="pt", device="cpu") as f:
            count += int(json.loads(f.metadata()["counts"])[_relative(leader)])
            for part in ("moment", "total", "abs_total"):
                key = f"{_relative(leader)}.{part}"
                if part not in acc:
                    acc[part] = f.get_tensor(key)
                    continue
                rows = f.get_slice(key)
                n = int(acc[part].shape[0])
                for lo in range(0, n, SUM_ROWS):  # row blocks: no second n x n matrix in memory
                    acc[part][lo:lo + SUM_ROWS] += rows[lo:lo + SUM_ROWS]
    return InputStats(leader, "linear", int(acc["moment"].shape[0]), count=count, second_moment=acc["moment"],
                      total=acc["total"], abs_total=acc["abs_total"], batches=batches)


def _relative(name: str) -> str:
    """``model.layers.3.self_attn.q_proj`` -> ``self_attn.q_proj`` (the name inside the block)."""
    parts = name.split(".")
    for k, p in enumerate(parts):
        if p.isdigit():
            return ".".join(parts[k + 1:])
    return name


def _values_only(spec: AwareSpectrum) -> AwareSpectrum:
    """The spectrum without singular vectors: enough to choose ranks."""
    m, n = spec.shape
    return AwareSpectrum(spec.U.new_empty(m, 0), spec.S.clone(), spec.Vh.new_empty(0, n), spec.total_energy,
                         spec.method, spec.exact, energy=np.array(spec.energy, copy=True), residual=spec.residual,
                         ridge=spec.ridge, samples=spec.samples)


@torch.no_grad()
def _embed(arch: _Architecture, batches, pieces, out: Path) -> None:
    """Step 1: the token embeddings of every slice, in float32, to ``out/<slice>.safetensors``."""
    out.mkdir()
    table = _read(arch.where[arch.embed], arch.embed)  # (vocab, hidden), stored dtype
    for j, piece in enumerate(pieces):
        tensors = {}
        for k, (b, lo, hi) in enumerate(piece):
            ids, mask = batches[b]
            tensors[f"h.{k}"] = torch.nn.functional.embedding(ids[lo:hi], table).float().contiguous()
            if mask is not None:
                tensors[f"m.{k}"] = mask[lo:hi].contiguous()
        _save(tensors, str(out / f"{j}.safetensors"))
        del tensors
    del table


def _factors(arch, plan, groups, engine, work: Path, aware, solver, ridge, policy, precision, threads) -> dict:
    """Step 3: one task per factored linear; name -> file of its factors."""
    (work / "factors").mkdir()
    source = str(arch.directory.resolve())
    tasks = [_FactorTask(source, name, groups[name], int(e["rank"]), aware, solver, ridge, policy.seed, precision,
                         str(work / "factors" / f"{name}.safetensors"), threads)
             for name, e in plan["sites"].items() if e.get("action") == "factor"]
    files = engine.map(_factor_task, tasks, label="factors")
    return {t.module: f for t, f in zip(tasks, files)}


def _write(arch, src: Path, dst: Path, chosen, policy, aware, plan, factors, metadata, force, progress) -> dict:
    """Step 4: the output directory, written under a temporary name and renamed into place."""
    from factorize.checkpoints.directories import _publish_dir, _temp_dir

    ckpt = arch.ckpt
    job = _Writer(ckpt, chosen, policy, aware, plan, factors, progress)
    check_free_space(dst.parent if str(dst.parent) else Path("."), job.planned_bytes(), "the shrunk checkpoint")
    tmp = _temp_dir(dst)
    try:
        names = [h.path.name for h in ckpt.files]
        if len(set(names)) < len(names):
            raise FactorizeError(f"{src}: several shards share a file name", fix="re-create the checkpoint")
        finals = [tmp / n for n in names] + ([tmp / ckpt.index.name] if ckpt.index else [])
        job.write_all(finals, metadata, force=False)
        _copy_side_files(src, tmp, ckpt)
        _publish_dir(tmp, dst, force=force)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    files = [str(dst / p.name) for p in finals]
    return {"tensors": job.report, "files": files, "params_before": job.params_before,
            "params_after": job.params_after, "bytes_after": sum(Path(f).stat().st_size for f in files)}


def blockwise_note(done: Mapping) -> str:
    """One line on memory for reports: the measured peak against the bound."""
    return (f"block by block: peak resident memory {human_bytes(done['peak_rss_bytes'])}; one block "
            f"{human_bytes(done['block_bytes'])} (float32), activations {human_bytes(done['activation_bytes'])}; "
            f"bound 2 blocks + activations + 1 GB = {human_bytes(done['bound_bytes'])}: "
            f"{'met' if done['bound_met'] else 'missed'}")
