"""Sample inputs: where the drift is measured.

Sources (the command line's ``--inputs`` / ``--random-inputs``):

* ``.safetensors`` or ``.npz``: named arrays. The labels, if any, sit under ``labels`` (or another key named by
  ``--labels-key``). One remaining array is the model's single input (``model(x)``); several are passed by name
  (``model(**batch)``, e.g. ``input_ids`` and ``attention_mask``).
* ``.npy``: one array, the model's single input (no labels).
* ``.txt``: one sentence per line, tokenized with the tokenizer of a transformers model directory.
* random inputs of a given shape (``16x64``: 16 samples of 64 features). Random inputs say little about the
  drift on real data, so they always come with a warning.

Every array's first dimension is the sample dimension; batches are slices along it. :func:`check_inputs` runs
the first batch through the model and turns a failure into a :class:`FactorizeError` naming the file, what was
given, what the model's first layer expects, and the fix. Nothing here prints; warnings are returned in
:attr:`SampleInputs.notes` for the reporting layer.
"""

from __future__ import annotations

import math
import os
import zipfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch import nn

from factorize.errors import FactorizeError
from factorize.model.feed import batch_size, feed

LABELS_KEY = "labels"
INPUT_SUFFIXES = (".safetensors", ".npz", ".npy", ".txt")
RANDOM_WARNING = (
    "random inputs say little about drift on real data: the compressed model may drift much more (or less) on "
    "the inputs it will really see; pass --inputs with real samples for numbers worth trusting"
)


@dataclass
class SampleInputs:
    """Batches of sample inputs (batch contract of :func:`factorize.model.feed.run_model`) and optional labels."""

    batches: list[Any]
    labels: torch.Tensor | None = None  # (N,) int64, in batch order
    source: str = ""  # a short description for reports
    count: int = 0  # samples in all
    notes: list[str] = field(default_factory=list)  # warnings for the reporting layer
    builtin: bool = False  # the tool's own sentences, chosen because the user gave none


def load_inputs(
    path: str | os.PathLike,
    *,
    batch_size: int = 64,
    labels_key: str = LABELS_KEY,
    tokenizer: Any = None,
    max_length: int = 128,
    limit: int | None = None,
    flag: str = "--inputs",
    by_length: bool = True,
) -> SampleInputs:
    """Read sample inputs from a file (see the module docstring for the formats); ``flag`` names the option the
    path came from in messages (--inputs, --calibration); ``by_length`` groups sentences by length
    (:func:`sentences_inputs`)."""
    p = Path(path)
    if not p.exists():
        raise FactorizeError(f"{p}: no such file", fix=f"check the {flag} path")
    if not p.is_file() or not os.access(p, os.R_OK):
        raise FactorizeError(f"{p}: not a readable file", fix=f"check the {flag} path and its permissions")
    _check_batch_size(batch_size)
    suffix = p.suffix.lower()
    if suffix == ".txt":
        return _text_inputs(p, tokenizer, batch_size=batch_size, max_length=max_length, limit=limit,
                            by_length=by_length)
    if suffix == ".npy":
        arrays = {"": _npy(p)}
    elif suffix == ".npz":
        arrays = _npz(p)
    elif suffix == ".safetensors":
        from factorize.storage import read_safetensors

        arrays = read_safetensors(p)
    else:
        raise FactorizeError(f"{p}: unsupported input file (suffix {suffix or 'none'!r})",
                             fix=f"use one of {', '.join(INPUT_SUFFIXES)}, or --random-inputs SHAPE")
    labels = arrays.pop(labels_key, None)
    if not arrays:
        raise FactorizeError(f"{p}: holds no input array besides {labels_key!r}", fix="add the input tensor(s)")
    return _from_arrays(p, arrays, labels, labels_key=labels_key, batch_size=batch_size, limit=limit)


def _check_batch_size(batch_size: int) -> None:
    if not isinstance(batch_size, int) or batch_size < 1:
        raise FactorizeError(f"batch size must be a positive integer, got {batch_size!r}", fix="e.g. --batch-size 32")


def _npy(p: Path) -> torch.Tensor:
    try:
        array = np.load(p, allow_pickle=False)
    except ValueError as err:
        raise FactorizeError(f"{p}: cannot read it as a numeric .npy array ({err})",
                             fix="save a numeric array (np.save) without Python objects") from None
    except (OSError, EOFError, zipfile.BadZipFile) as err:
        raise FactorizeError(f"{p}: not a valid .npy file ({err})", fix="save it again with numpy.save") from None
    return _tensor(array, p, "")


def _npz(p: Path) -> dict[str, torch.Tensor]:
    try:
        with np.load(p, allow_pickle=False) as archive:
            return {k: _tensor(archive[k], p, k) for k in archive.files}
    except ValueError as err:
        raise FactorizeError(f"{p}: cannot read it as numeric arrays ({err})",
                             fix="save numeric arrays (np.savez) without Python objects") from None
    except (OSError, EOFError, zipfile.BadZipFile) as err:
        raise FactorizeError(f"{p}: not a valid .npz file ({err})", fix="save it again with numpy.savez") from None


def _tensor(array: np.ndarray, p: Path, key: str) -> torch.Tensor:
    if array.dtype.kind not in "biuf":
        raise FactorizeError(f"{p}{f' [{key}]' if key else ''}: dtype {array.dtype} is not numeric",
                             fix="store inputs as float or integer arrays")
    return torch.from_numpy(np.ascontiguousarray(array))


def _from_arrays(p: Path, arrays: dict[str, torch.Tensor], labels, *, labels_key: str, batch_size: int,
                 limit: int | None) -> SampleInputs:
    counts = {k or "input": (int(v.shape[0]) if v.dim() else 0) for k, v in arrays.items()}
    if len(set(counts.values())) != 1 or 0 in counts.values():
        raise FactorizeError(
            f"{p}: the input arrays disagree on the number of samples (first dimension)",
            [f"{k}: {n} samples" for k, n in counts.items()],
            fix="put samples along the first dimension of every array, the same number in each",
        )
    n = next(iter(counts.values()))
    if labels is not None:
        labels = _labels(labels, n, p, labels_key)
    if limit is not None:
        arrays = {k: v[:limit] for k, v in arrays.items()}
        labels = None if labels is None else labels[:limit]
        n = min(n, limit)
    keys = list(arrays)
    batches: list[Any] = []
    for start in range(0, n, batch_size):
        chunk = {k: v[start:start + batch_size] for k, v in arrays.items()}
        batches.append(chunk[keys[0]] if len(keys) == 1 else chunk)
    what = ", ".join(f"{k} {list(v.shape[1:])} {str(v.dtype).removeprefix('torch.')}" for k, v in arrays.items()
                     if k) or f"{list(arrays[''].shape[1:])} {str(arrays[''].dtype).removeprefix('torch.')}"
    return SampleInputs(batches=batches, labels=labels, source=f"{p.name}: {n} samples of {what}", count=n)


def _labels(labels: torch.Tensor, n: int, p: Path, key: str) -> torch.Tensor:
    if labels.is_floating_point() or labels.dtype == torch.bool or labels.dim() != 1 or labels.shape[0] != n:
        raise FactorizeError(
            f"{p}: {key!r} must be one integer class label per sample, shape ({n},); found "
            f"{str(labels.dtype).removeprefix('torch.')} {list(labels.shape)}",
            fix=f"store labels as an integer array of shape ({n},), or name another key with --labels-key",
        )
    return labels.to(torch.int64)


def _text_inputs(p: Path, tokenizer, *, batch_size: int, max_length: int, limit: int | None,
                 by_length: bool) -> SampleInputs:
    if tokenizer is None:
        raise FactorizeError(
            f"{p}: text inputs need a tokenizer, and this model has none",
            fix="use --model with a transformers directory that holds tokenizer files, or pass tensors "
            "(.safetensors/.npz/.npy) as --inputs",
        )
    try:
        lines = [line.strip() for line in p.read_text(encoding="utf-8").splitlines()]
    except UnicodeDecodeError:
        raise FactorizeError(f"{p}: not UTF-8 text", fix="save the sentences as UTF-8, one per line") from None
    lines = [line for line in lines if line][:limit]
    if not lines:
        raise FactorizeError(f"{p}: no sentences (the file is empty)", fix="write one sentence per line")
    return sentences_inputs(lines, tokenizer, batch_size=batch_size, max_length=max_length, source=p.name,
                            by_length=by_length)


def sentences_inputs(lines: list[str], tokenizer, *, batch_size: int = 64, max_length: int = 128,
                     source: str = "sentences", by_length: bool = True) -> SampleInputs:
    """Tokenize a list of sentences into batches (for built-in sentence sets).

    Sentences of a batch are padded to the same length and the padding is masked. A tokenizer with no padding
    token (usual for causal language models, e.g. GPT-2's) pads with its end-of-text token, as is common practice;
    one with neither is refused.

    Sentences are grouped by token length (:func:`length_groups`): at most ``batch_size`` to a batch, and a batch's
    longest sentence at most :data:`PAD_SLACK` times its shortest. On the 64 built-in held-out sentences one batch
    padded to the longest was 54% padding; grouped, the forward passes that measure drift take about half the
    time. Every metric masks the padding and none depends on the order of the samples, so the numbers change only
    by floating-point rounding. ``by_length=False`` keeps the sentences in order, ``batch_size`` to a batch padded
    to its longest (an export's traced example, whose sequence length the graph keeps).
    """
    if getattr(tokenizer, "pad_token", None) is None and len(lines) > 1:
        eos = getattr(tokenizer, "eos_token", None)
        if eos is None:
            raise FactorizeError(
                f"{source}: the tokenizer has neither a padding nor an end-of-text token, so sentences of different "
                "lengths cannot share a batch", fix="set tokenizer.pad_token and save the tokenizer again")
        tokenizer.pad_token = eos
    enc = tokenizer(lines, padding=True, truncation=True, max_length=max_length, return_tensors="pt",
                    return_attention_mask=True)  # once: each batch is its rows, cut to its own longest
    lengths = enc["attention_mask"].sum(1).tolist()
    if "attention_mask" not in getattr(tokenizer, "model_input_names", ("attention_mask",)):
        del enc["attention_mask"]  # asked for the lengths only: this model does not take it
    groups = length_groups(lengths, batch_size) if by_length else [
        list(range(i, min(i + batch_size, len(lines)))) for i in range(0, len(lines), batch_size)]
    left = getattr(tokenizer, "padding_side", "right") == "left"  # the padding sits before the tokens

    def batch(group: list[int]) -> dict:  # what tokenizing these sentences alone with padding=True gives
        width, rows = max(lengths[i] for i in group), torch.tensor(group)
        cols = slice(enc["input_ids"].shape[1] - width, None) if left else slice(0, width)
        return {k: v[rows][:, cols].contiguous() for k, v in enc.items()}

    return SampleInputs(batches=[batch(g) for g in groups], source=f"{source}: {len(lines)} sentences",
                        count=len(lines))


PAD_SLACK = 1.25  # a batch's longest sentence at most this many times its shortest (in tokens)
MIN_GROUP = 8  # ... unless the batch would hold fewer sentences than this (tiny batches cost per call)


def length_groups(lengths: list[int], batch_size: int) -> list[list[int]]:
    """Indices of ``lengths`` in batches of similar length: sorted by length (ties in input order), a new batch
    when it is full or when the next length exceeds :data:`PAD_SLACK` times the batch's first (once the batch holds
    :data:`MIN_GROUP`)."""
    order = sorted(range(len(lengths)), key=lambda i: lengths[i])
    groups: list[list[int]] = []
    for i in order:
        g = groups[-1] if groups else None
        if g is None or len(g) >= batch_size or (len(g) >= MIN_GROUP and lengths[i] > PAD_SLACK * lengths[g[0]]):
            groups.append([i])
        else:
            g.append(i)
    return groups


# ---------------------------------------------------------------------------------------------------------------
# random inputs


def parse_shape(text: str) -> tuple[int, ...]:
    """``"16x64"`` -> (16, 64): the number of samples first, then each sample's shape."""
    parts = str(text).lower().replace("*", "x").replace(",", "x").split("x")
    try:
        shape = tuple(int(s) for s in parts)
    except ValueError:
        shape = ()
    if len(shape) < 2 or any(d < 1 for d in shape):
        raise FactorizeError(
            f"bad shape {text!r} for random inputs",
            fix="give the number of samples then each sample's shape, e.g. 16x64 or 8x3x32x32",
        )
    return shape


def random_inputs(
    model: nn.Module | None,
    shape: str | tuple[int, ...],
    *,
    batch_size: int = 64,
    seed: int = 0,
) -> SampleInputs:
    """Seeded random inputs: token ids below the vocabulary size when the model starts with an embedding,
    standard normal floats in the model's dtype otherwise. Always carries :data:`RANDOM_WARNING`."""
    _check_batch_size(batch_size)
    dims = parse_shape(shape) if isinstance(shape, str) else tuple(shape)
    _check_random_size(dims)
    _check_seed(seed)
    gen = torch.Generator().manual_seed(seed)
    first = _first_layer(model) if model is not None else None
    if isinstance(first, nn.Embedding):
        x = torch.randint(0, first.num_embeddings, dims, generator=gen)
        what = f"token ids below {first.num_embeddings}"
    else:
        x = torch.randn(dims, generator=gen, dtype=_float_dtype(model))
        what = "standard normal values"
    batches = list(x.split(batch_size))
    return SampleInputs(batches=batches, source=f"random inputs: {dims[0]} samples of {list(dims[1:])}, {what}",
                        count=dims[0], notes=[RANDOM_WARNING])


MAX_RANDOM_ELEMENTS = 2**27  # 134M numbers (512 MiB of float32): more says nothing more about drift


def _check_random_size(dims: tuple[int, ...]) -> None:
    """Refuse, before allocating, random inputs of more than :data:`MAX_RANDOM_ELEMENTS` numbers."""
    total = math.prod(dims)
    if total > MAX_RANDOM_ELEMENTS:
        raise FactorizeError(f"random inputs of shape {'x'.join(map(str, dims))} would hold {total:,} numbers, over "
                             f"the limit of {MAX_RANDOM_ELEMENTS:,}",
                             fix="ask for fewer samples (the first number), e.g. 64x" + "x".join(map(str, dims[1:])))


def _check_seed(seed: int) -> None:
    if isinstance(seed, bool) or not isinstance(seed, int) or not 0 <= seed < 2**63:
        raise FactorizeError(f"seed {seed!r} is out of range", fix="give an integer from 0 to 2**63 - 1")


def _float_dtype(model: nn.Module | None) -> torch.dtype:
    for p in model.parameters() if model is not None else ():
        if p.is_floating_point():
            return p.dtype
    return torch.float32


def _first_layer(model: nn.Module) -> nn.Module | None:
    """The first layer with a weight in module order (usually the one that reads the input)."""
    for _, m in model.named_modules():
        if isinstance(m, (nn.Linear, nn.Embedding, nn.modules.conv._ConvNd)):
            return m
    return None


# ---------------------------------------------------------------------------------------------------------------
# checking inputs against the model


def prepare(inputs: SampleInputs, model: nn.Module) -> SampleInputs:
    """Cast floating-point inputs to the model's floating dtype and device (integer ids are left as they are)."""
    p = next((q for q in model.parameters() if q.is_floating_point()), None)
    if p is None:
        return inputs

    def cast(t):
        if isinstance(t, torch.Tensor):
            return t.to(device=p.device, dtype=p.dtype if t.is_floating_point() else t.dtype)
        if isinstance(t, dict):
            return {k: cast(v) for k, v in t.items()}
        if isinstance(t, (tuple, list)):
            return type(t)(cast(v) for v in t)
        return t

    inputs.batches = [cast(b) for b in inputs.batches]
    return inputs


def check_inputs(model: nn.Module, inputs: SampleInputs, source: str) -> None:
    """Run the first batch through ``model``; a failure becomes a :class:`FactorizeError` that names ``source``,
    what was given, and what the model's first layer expects."""
    if not inputs.batches:
        raise FactorizeError(f"{source}: no samples", fix="give at least one sample")
    batch = inputs.batches[0]
    was_training = model.training
    model.eval()
    try:
        with torch.no_grad():
            feed(model, batch)
    except Exception as err:  # noqa: BLE001 - any failure here means the inputs do not fit the model
        raise FactorizeError(
            f"{source}: the model cannot run on these inputs (given {describe_batch(batch)}): "
            f"{str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__}",
            [expected_input(model)],
            fix="give inputs shaped (samples, ...) as the model's forward expects: the first dimension is the "
            "sample, the rest must match the first layer",
        ) from None
    finally:
        model.train(was_training)


def describe_batch(batch: Any) -> str:
    def one(t):
        if isinstance(t, torch.Tensor):
            return f"{list(t.shape)} {str(t.dtype).removeprefix('torch.')}"
        return type(t).__name__

    if isinstance(batch, dict):
        return ", ".join(f"{k}: {one(v)}" for k, v in batch.items())
    if isinstance(batch, (tuple, list)):
        return ", ".join(one(v) for v in batch)
    return one(batch)


def expected_input(model: nn.Module) -> str:
    first = _first_layer(model)
    name = next((n for n, m in model.named_modules() if m is first), "?")
    if isinstance(first, nn.Linear):
        return f"first layer {name}: Linear reading {first.in_features} features in the last dimension"
    if isinstance(first, nn.modules.conv._ConvNd):
        dims = len(first.kernel_size)
        return f"first layer {name}: {type(first).__name__} reading {first.in_channels} channels, " \
               f"input (samples, {first.in_channels}, {', '.join(['size'] * dims)})"
    if isinstance(first, nn.Embedding):
        return f"first layer {name}: Embedding reading integer token ids below {first.num_embeddings}"
    return "the model's first layer could not be determined"


def random_subset(inputs: SampleInputs, n: int, seed: int) -> tuple[SampleInputs, list[int]]:
    """(``n`` of ``inputs``' samples drawn at random without replacement, their indices in batch order).

    The samples keep their batch grouping and order; a batch that loses every sample is dropped, and a token
    batch (a dict with a 2-D ``attention_mask``) loses the trailing positions that are padding in every row it
    keeps. The same ``seed`` draws the same samples. ``n`` at least the number of samples returns ``inputs``."""
    sizes = [batch_size(b) for b in inputs.batches]
    total = sum(sizes)
    if n >= total:
        return inputs, list(range(total))
    chosen = torch.randperm(total, generator=torch.Generator().manual_seed(seed))[:n].sort().values
    batches, start = [], 0
    for batch, size in zip(inputs.batches, sizes):
        local = chosen[(chosen >= start) & (chosen < start + size)] - start
        if local.numel():
            batches.append(_trim_padding(_take_rows(batch, local, size)))
        start += size
    labels = None if inputs.labels is None else inputs.labels[chosen]
    return (SampleInputs(batches=batches, labels=labels, source=inputs.source, count=n, notes=list(inputs.notes),
                         builtin=inputs.builtin), chosen.tolist())


def _take_rows(batch: Any, rows: torch.Tensor, size: int) -> Any:
    """The given rows of every tensor of ``batch`` whose first dimension is the batch's samples."""
    def take(v):
        return v[rows] if isinstance(v, torch.Tensor) and v.dim() and v.shape[0] == size else v

    if isinstance(batch, dict):
        return {k: take(v) for k, v in batch.items()}
    if isinstance(batch, (tuple, list)):
        return type(batch)(take(v) for v in batch)
    return take(batch)


def _trim_padding(batch: Any) -> Any:
    """A token batch without its trailing positions that no row attends to (shorter rows kept after a draw)."""
    mask = batch.get("attention_mask") if isinstance(batch, dict) else None
    if not isinstance(mask, torch.Tensor) or mask.dim() != 2 or not mask.shape[1]:
        return batch
    used = torch.nonzero(mask.ne(0).any(0)).reshape(-1)
    keep = int(used.max()) + 1 if used.numel() else mask.shape[1]
    if keep == mask.shape[1]:
        return batch
    return {k: v[:, :keep] if isinstance(v, torch.Tensor) and v.dim() >= 2 and tuple(v.shape[:2]) == tuple(mask.shape)
            else v for k, v in batch.items()}
