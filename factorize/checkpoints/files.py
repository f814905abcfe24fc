"""Files: save a compressed model as safetensors with its plan, and load it back into the architecture.

The file is an ordinary safetensors file (the open format of Hugging Face's ``safetensors`` project: an 8-byte
little-endian header length N, N bytes of UTF-8 JSON header -- tensor name -> dtype, shape, byte offsets, plus an
optional ``"__metadata__"`` map of strings -- then the raw little-endian tensor bytes). What makes it a factorize
checkpoint is a handful of metadata keys of our own (all prefixed ``factorize.``; see docs/file-format.md):

==============================  ==================================================================================
key                             value
==============================  ==================================================================================
``factorize.format``            ``"factorize.checkpoint"``
``factorize.format_version``    ``"1"`` (an integer as a string; a reader refuses versions it does not know)
``factorize.plan``              the plan as one JSON string (per site: kind, shape, rank or dense, reason, ...)
``factorize.aliases``           JSON ``{"alias key": "stored key"}`` for tensors shared by several state-dict keys
``factorize.library_version``   the factorize version that wrote the file (informative)
==============================  ==================================================================================

Why aliases: safetensors refuses tensors that share storage, and a tied embedding / output head is one tensor
under two state-dict keys. We store it once, record the other key as an alias, and on load re-tie the two
parameters (or copy, for buffers), so the loaded model shares the tensor as the saved one did.

``load(model, path)`` modifies the given fresh model **in place** (the factored structure is built from the plan,
then the weights are copied in) and returns it; if anything does not fit, the model is restored as it was.
"""

from __future__ import annotations

import json
import os
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

import torch
from safetensors import safe_open
from torch import nn

from factorize.errors import FactorizeError, caller_stacklevel, printable
from factorize.plan.entries import factored_names, plan_entries
from factorize.plan.ranks import PLAN_FORMAT
from factorize.storage import (
    Header,
    check_free_space,
    check_output_path,
    check_readable_file,
    read_header,
    write_atomic,
    write_safetensors,
)

FORMAT_NAME = "factorize.checkpoint"
FORMAT_VERSION = 1
KEY_FORMAT = "factorize.format"
KEY_VERSION = "factorize.format_version"
KEY_PLAN = "factorize.plan"
KEY_ALIASES = "factorize.aliases"
KEY_LIBRARY = "factorize.library_version"
KEY_PLAN_IN = "factorize.plan_in"  # shards of a sharded checkpoint: the plan lives in this index file
RESERVED_PREFIX = "factorize."


# ---------------------------------------------------------------------------------------------------------------
# checkpoints: a single file, or shards with an index (weight_map)


@dataclass
class Checkpoint:
    """A safetensors checkpoint on disk: one file, or shards listed by a ``*.safetensors.index.json``."""

    files: list[Header]
    index: Path | None = None
    index_metadata: dict = field(default_factory=dict)

    def locate(self) -> dict[str, Header]:
        """tensor name -> the file holding it."""
        return {name: h for h in self.files for name in h.tensors}

    @property
    def metadata(self) -> dict[str, str]:
        """The factorize metadata: the index's for a sharded checkpoint, else the file's."""
        if self.index is not None:
            return {k: v for k, v in self.index_metadata.items() if isinstance(v, str)}
        return self.files[0].metadata

    @property
    def nbytes(self) -> int:
        return sum(h.file_size for h in self.files)


def open_checkpoint(path: str | os.PathLike) -> Checkpoint:
    """Resolve ``path`` (a .safetensors file, an index .json, or a directory holding one of them) and read every
    header. A shard named by the index but missing on disk, or a tensor the index places in a shard that does
    not hold it, is an error naming it."""
    p = Path(path)
    if not p.exists():
        raise FactorizeError(f"{p}: no such file or directory", fix="check the path")
    if p.is_dir():
        p = _pick_in_directory(p)
    if p.name.endswith(".json"):
        return _open_index(p)
    return Checkpoint(files=[read_header(p)])


def _pick_in_directory(d: Path) -> Path:
    indexes = sorted(d.glob("*.safetensors.index.json"))
    if len(indexes) == 1:
        return indexes[0]
    files = sorted(d.glob("*.safetensors"))
    if not indexes and len(files) == 1:
        return files[0]
    found = [x.name for x in indexes] or [x.name for x in files]
    raise FactorizeError(
        f"{d}: cannot tell which checkpoint to read"
        + (f" ({len(found)} candidates)" if found else " (no .safetensors file or index in it)"),
        found,
        fix="pass the .safetensors file or the *.safetensors.index.json itself",
    )


def _open_index(p: Path) -> Checkpoint:
    check_readable_file(p)
    try:
        text = p.read_text(encoding="utf-8")
    except UnicodeDecodeError as e:
        raise FactorizeError(f"{p}: not a valid index file ({e})", fix="pass the *.safetensors.index.json") from None
    index = load_json(text, f"{p}: index file", fix="pass the *.safetensors.index.json")
    wm = index.get("weight_map") if isinstance(index, dict) else None
    if not isinstance(wm, dict) or not all(isinstance(k, str) and isinstance(v, str) for k, v in wm.items()):
        raise FactorizeError(
            f"{p}: not a sharded-checkpoint index (no 'weight_map' of tensor name -> shard file)",
            fix="pass the *.safetensors.index.json that lists the shards",
        )
    shards = list(dict.fromkeys(wm.values()))
    missing = [s for s in shards if not (p.parent / s).is_file()]
    if missing:
        raise FactorizeError(
            f"{p}: {len(missing)} shard(s) named in the index are missing", [str(p.parent / s) for s in missing],
            fix="download or copy the missing shard files next to the index",
        )
    headers = [read_header(p.parent / s) for s in shards]
    by_file = dict(zip(shards, headers))
    wrong = [f"{name}: the index places it in {s}, which does not hold it" for name, s in wm.items()
             if name not in by_file[s].tensors]
    if wrong:
        raise FactorizeError(f"{p}: the index does not match its shards", wrong, fix="re-create the index")
    meta = index.get("metadata") if isinstance(index.get("metadata"), dict) else {}
    return Checkpoint(files=headers, index=p, index_metadata=meta)


MAX_JSON_DEPTH = 64  # plans, indexes and manifests nest a few levels; deeper is corrupt or crafted


def json_depth(text: str) -> int:
    """The deepest nesting of arrays and objects in ``text`` (JSON), found without recursion."""
    depth = deepest = 0
    in_string = escaped = False
    for c in text:
        if in_string:
            if escaped:
                escaped = False
            elif c == "\\":
                escaped = True
            elif c == '"':
                in_string = False
        elif c == '"':
            in_string = True
        elif c in "[{":
            depth += 1
            deepest = max(deepest, depth)
        elif c in "]}":
            depth -= 1
    return deepest


def load_json(text: str, where: str, fix: str):
    """``json.loads(text)``, refusing (FactorizeError naming ``where``) text that is not JSON or nests deeper
    than :data:`MAX_JSON_DEPTH` levels, which would otherwise exhaust the parser's recursion."""
    if json_depth(text) > MAX_JSON_DEPTH:
        raise FactorizeError(f"{where}: JSON nested more than {MAX_JSON_DEPTH} levels deep: corrupt or crafted",
                             fix=fix)
    try:
        return json.loads(text)
    except (json.JSONDecodeError, RecursionError) as e:
        raise FactorizeError(f"{where}: not valid JSON ({e})", fix=fix) from None


def read_plan(path: str | os.PathLike) -> dict:
    """The plan stored in a factorize checkpoint (a file, an index .json or a directory)."""
    plan, _ = _plan_and_aliases(open_checkpoint(path), path)
    return plan


def _plan_and_aliases(ckpt: Checkpoint, path) -> tuple[dict, dict[str, str]]:
    meta = ckpt.metadata
    if meta.get(KEY_FORMAT) != FORMAT_NAME:
        raise FactorizeError(
            f"{path}: a safetensors checkpoint, but not a factorize checkpoint (no {KEY_FORMAT!r} metadata)",
            fix="load plain weights with model.load_state_dict(safetensors.torch.load_file(path)) "
            "(or safetensors.torch.load_model); to compress them, use factorize.compress or shrink_checkpoint",
        )
    version = meta.get(KEY_VERSION, "")
    # ASCII digits only: int() would also take a full-width digit or a 5000-digit number
    if version != str(FORMAT_VERSION):
        raise FactorizeError(
            f"{path}: factorize checkpoint format version {printable(version[:20])!r}; this factorize reads version "
            f"{FORMAT_VERSION}",
            fix="upgrade factorize to the version that wrote the file (see its 'factorize.library_version' "
            "metadata), or re-create the checkpoint with this version",
        )
    if KEY_PLAN not in meta:
        raise FactorizeError(f"{path}: the plan in the metadata is missing", fix="re-create the checkpoint")
    plan = load_json(meta[KEY_PLAN], f"{path}: the plan in the metadata", fix="re-create the checkpoint")
    aliases = load_json(meta.get(KEY_ALIASES, "{}"), f"{path}: {KEY_ALIASES!r} metadata",
                        fix="re-create the checkpoint")
    if not isinstance(plan, dict) or plan.get("format") != PLAN_FORMAT or not isinstance(plan.get("sites"), dict):
        raise FactorizeError(f"{path}: the metadata holds no valid factorize plan", fix="re-create the checkpoint")
    from factorize.rewrite.apply import check_plan

    check_plan(plan, str(path))
    if not isinstance(aliases, dict) or not all(isinstance(k, str) and isinstance(v, str) for k, v in aliases.items()):
        raise FactorizeError(f"{path}: corrupt {KEY_ALIASES!r} metadata", fix="re-create the checkpoint")
    return plan, aliases


def checkpoint_metadata(plan: Mapping, aliases: Mapping[str, str] | None = None,
                        extra: Mapping[str, str] | None = None) -> dict[str, str]:
    """The metadata map of a factorize checkpoint (used by :func:`save` and the weights-only writer)."""
    from factorize._version import __version__

    meta = dict(_user_metadata(extra))
    meta.update({
        KEY_FORMAT: FORMAT_NAME,
        KEY_VERSION: str(FORMAT_VERSION),
        KEY_PLAN: plan_json(plan),
        KEY_LIBRARY: __version__,
    })
    if aliases:
        meta[KEY_ALIASES] = json.dumps(dict(aliases), sort_keys=True)
    return meta


def plan_json(plan: Mapping) -> str:
    if not isinstance(plan, Mapping) or plan.get("format") != PLAN_FORMAT or not isinstance(plan.get("sites"), Mapping):
        raise FactorizeError("not a factorize plan", fix=f"pass the .plan of a compress() result ({PLAN_FORMAT!r})")
    try:
        return json.dumps(plan, sort_keys=False, allow_nan=True)
    except (TypeError, ValueError) as e:
        raise FactorizeError(f"the plan is not JSON-serialisable ({e})",
                             fix="pass the plan as compress() made it") from None


def _user_metadata(extra: Mapping[str, str] | None) -> dict[str, str]:
    if not extra:
        return {}
    if not isinstance(extra, Mapping):
        raise FactorizeError(f"metadata must be a mapping of strings, got {type(extra).__name__}")
    bad = [f"{k!r}: {v!r}" for k, v in extra.items() if not isinstance(k, str) or not isinstance(v, str)]
    reserved = [k for k in extra if isinstance(k, str) and k.startswith(RESERVED_PREFIX)]
    if bad or reserved:
        raise FactorizeError(
            "metadata entries must be string -> string and not use the reserved 'factorize.' prefix",
            bad + [f"{k!r}: reserved key" for k in reserved],
            fix="convert values with str() / json.dumps and rename reserved keys",
        )
    return dict(extra)


# ---------------------------------------------------------------------------------------------------------------
# atomic writes


# ---------------------------------------------------------------------------------------------------------------
# save / load a compressed model


def _dedupe(state: Mapping[str, torch.Tensor]) -> tuple[dict[str, torch.Tensor], dict[str, str]]:
    """Store each tensor once: keys holding the very same view become aliases of the first key.

    Keys whose tensors only overlap (different views of one storage) are stored as separate contiguous copies;
    safetensors cannot express partial overlap, and a fresh architecture re-creates such views itself."""
    seen: dict[tuple, str] = {}
    tensors: dict[str, torch.Tensor] = {}
    aliases: dict[str, str] = {}
    for key, t in state.items():
        ident = (t.device, t.untyped_storage().data_ptr(), t.storage_offset(), tuple(t.shape), t.stride(), t.dtype)
        if t.numel() and ident in seen:
            aliases[key] = seen[ident]
            continue
        seen[ident] = key
        tensors[key] = t
    ptrs: dict[tuple, str] = {}
    for key, t in list(tensors.items()):  # remaining overlaps: give each its own storage
        pk = (t.device, t.untyped_storage().data_ptr())
        if t.numel() and pk in ptrs:
            tensors[key] = t.clone()
        else:
            ptrs[pk] = key
    return tensors, aliases


def check_plan_matches(model: nn.Module, plan: Mapping) -> None:
    from factorize.rewrite.layers import Factored, factored_layers

    factored = factored_layers(model)
    problems = []
    for e in plan_entries(plan):
        name, layer = e.name, factored.get(e.name)
        if e.factored:
            if not isinstance(layer, Factored):
                problems.append(f"{name}: the plan factors it at rank {e.rank}, the model holds it dense")
            elif layer.rank != e.rank or layer.kind != e.kind:
                problems.append(f"{name}: plan says {e.kind} rank {e.rank}, "
                                f"model has {layer.kind} rank {layer.rank}")
        elif layer is not None:
            problems.append(f"{name}: factored in the model (rank {layer.rank}) but dense in the plan")
    for name in factored:
        if name not in plan["sites"]:
            problems.append(f"{name}: factored in the model but absent from the plan")
    if problems:
        raise FactorizeError(
            "the plan does not describe this model", problems,
            fix="save the model and plan of the same compress() result (result.model, plan=result.plan)",
        )


def save(
    model: nn.Module,
    path: str | os.PathLike,
    *,
    plan: Mapping,
    force: bool = False,
    metadata: Mapping[str, str] | None = None,
) -> Path:
    """Write a compressed model's state_dict and its plan as one safetensors file, atomically.

    Args:
        model: the compressed model (e.g. ``compress(...).model``); only read.
        path: output file; refused if it exists unless ``force``.
        plan: the plan that produced ``model`` (``result.plan``); checked against the model's factored layers.
        force: replace an existing file.
        metadata: extra string -> string entries for the header (keys must not start with ``factorize.``).

    Returns the path written. Raises :class:`FactorizeError` for a bad path, too little disk space, a plan that
    does not describe the model, or a failed write (nothing is left behind).
    """
    if not isinstance(model, nn.Module):
        raise FactorizeError(f"expected a torch.nn.Module, got {type(model).__name__}", fix="pass the model object")
    final = check_output_path(path, force=force)
    plan_json(plan)
    check_plan_matches(model, plan)
    state = {k: v.detach() for k, v in model.state_dict().items()}
    tensors, aliases = _dedupe(state)
    meta = checkpoint_metadata(plan, aliases, metadata)
    tensors = {k: (v if v.is_contiguous() else v.contiguous()).cpu() for k, v in tensors.items()}
    nbytes = sum(t.numel() * t.element_size() for t in tensors.values()) + len(json.dumps(meta)) + 64 * len(tensors)
    check_free_space(final.parent, nbytes, f"{final.name}")
    write_atomic(final, lambda tmp: write_safetensors(tmp, tensors, meta), force=force)
    return final


def load(model: nn.Module, path: str | os.PathLike, *, strict: bool = True,
         dtype: torch.dtype | None = None) -> nn.Module:
    """Rebuild the factored structure from the plan in ``path`` on ``model`` and load the weights.

    ``model`` must be a fresh (not factored) instance of the architecture the checkpoint was made from; it is
    modified in place and returned. Every missing, unexpected, mis-shaped or differently typed key is listed in
    one :class:`FactorizeError`, and the model is left as it was. With ``strict=False`` missing and unexpected
    keys are allowed (a warning lists them) and differing dtypes are cast; shapes must still match.

    ``dtype`` (e.g. ``torch.float32``): the floating dtype the loaded model ends in, whatever dtype the model was
    built in and the checkpoint stored (a weights-only shrink keeps the checkpoint's, often bfloat16): the model
    is cast to the checkpoint's own dtype (:func:`checkpoint_dtype`) so the plan's forms are rebuilt as they were
    saved, the tensors are loaded, then every floating parameter and buffer is cast to ``dtype``; stored weights
    keep their stored tensors (codes, scales) and decode to ``dtype``. None (the default) loads as stored and,
    when ``strict``, asks the model to be in the checkpoint's dtype already.
    """
    from factorize.model.sites import get_module, set_module
    from factorize.rewrite.apply import apply_plan, validate_plan
    from factorize.rewrite.stored import cast_floating

    if not isinstance(model, nn.Module):
        raise FactorizeError(f"expected a torch.nn.Module, got {type(model).__name__}",
                             fix="build a fresh instance of the architecture and pass it")
    if dtype is not None and not (isinstance(dtype, torch.dtype) and dtype.is_floating_point):
        raise FactorizeError(f"dtype={dtype!r} is not a floating torch dtype", fix="pass e.g. dtype=torch.float32")
    ckpt = open_checkpoint(path)
    plan, aliases = _plan_and_aliases(ckpt, path)
    validate_plan(model, plan)
    stored = checkpoint_dtype(ckpt) if dtype is not None else None
    if stored is not None:  # the plan's forms are built as they were saved (a precision equal to the weight's own
        cast_floating(model, stored)  # is no stored form), then everything is cast to ``dtype``
    names = factored_names(plan)
    originals = {n: get_module(model, n) for n in names}
    apply_plan(model, plan, weights=False, inplace=True)
    try:
        _load_weights(model, ckpt, aliases, strict, path, cast=dtype is not None)
    except BaseException:
        for n, m in originals.items():
            set_module(model, n, m)
        raise
    if dtype is not None:
        cast_floating(model, dtype)
    return model


def checkpoint_dtype(ckpt: Checkpoint) -> torch.dtype | None:
    """The floating dtype holding most of a checkpoint's bytes outside stored weights (codes and scales of a stored
    precision have their own): the dtype its model was saved in. None when it holds no such tensor."""
    totals: dict[torch.dtype, int] = {}
    for h in ckpt.files:
        for name, info in h.tensors.items():
            t = info.torch_dtype
            if t is not None and t.is_floating_point and ".stored_weight." not in name:
                totals[t] = totals.get(t, 0) + info.nbytes
    return max(totals, key=lambda t: (totals[t], str(t))) if totals else None


def _load_weights(model: nn.Module, ckpt: Checkpoint, aliases: Mapping[str, str], strict: bool, path, *,
                  cast: bool = False) -> None:
    expected = model.state_dict()
    where = ckpt.locate()
    stored = {k: where[k].tensors[k] for k in where}
    for alias, key in aliases.items():
        if key in stored:
            stored.setdefault(alias, stored[key])
    problems, notes = _compare(expected, stored, _tied_groups(expected), strict, cast)
    if problems:
        raise FactorizeError(
            f"{path}: the checkpoint does not fit this model", problems,
            fix="build the same architecture (and dtype) the checkpoint was saved from; "
            "strict=False tolerates missing/unexpected keys and casts dtypes",
        )
    if notes:
        warnings.warn(f"{path}: loaded with strict=False; " + "; ".join(notes), stacklevel=caller_stacklevel())
    for h in ckpt.files:
        with safe_open(str(h.path), framework="pt", device="cpu") as f:
            chunk = {k: f.get_tensor(k) for k in h.tensors if k in expected}
        chunk.update({a: chunk[k] for a, k in aliases.items() if k in chunk and a in expected})
        model.load_state_dict(chunk, strict=False)
        del chunk
    _retie(model, aliases)


def _tied_groups(expected: Mapping[str, torch.Tensor]) -> dict[str, set[str]]:
    """key -> other keys of the model that share its storage (a tied embedding and head)."""
    by_ptr: dict[tuple, set[str]] = {}
    for k, t in expected.items():
        if t.numel():
            by_ptr.setdefault((t.device, t.untyped_storage().data_ptr(), t.storage_offset()), set()).add(k)
    return {k: g - {k} for g in by_ptr.values() for k in g}


def _compare(expected, stored, tied, strict, cast=False) -> tuple[list[str], list[str]]:
    problems, notes = [], []
    for k, t in expected.items():
        info = stored.get(k)
        if info is None:
            if any(o in stored for o in tied.get(k, ())):
                continue  # tied in the model to a key the file holds: filled through the tie
            (problems if strict else notes).append(f"{k}: missing from the file (model has {list(t.shape)})")
        elif tuple(t.shape) != info.shape:
            problems.append(f"{k}: file has shape {list(info.shape)}, model has {list(t.shape)}")
        elif info.torch_dtype != t.dtype and not (cast and t.is_floating_point() and info.torch_dtype is not None
                                                  and info.torch_dtype.is_floating_point):
            msg = f"{k}: file has {info.dtype}, model has {str(t.dtype).removeprefix('torch.')}"
            (problems if strict else notes).append(msg + ("" if strict else " (cast)"))
    for k in stored:
        if k not in expected:
            (problems if strict else notes).append(f"{k}: in the file but not in the model")
    return problems, notes


def _retie(model: nn.Module, aliases: Mapping[str, str]) -> None:
    """Make each alias key share the stored key's parameter again (as it did in the saved model)."""
    for alias, key in aliases.items():
        a_mod, _, a_attr = alias.rpartition(".")
        k_mod, _, k_attr = key.rpartition(".")
        try:
            am, km = model.get_submodule(a_mod), model.get_submodule(k_mod)
        except AttributeError:
            continue
        src = km._parameters.get(k_attr)
        dst = am._parameters.get(a_attr)
        if isinstance(src, nn.Parameter) and isinstance(dst, nn.Parameter) and src is not dst \
                and src.shape == dst.shape and src.dtype == dst.dtype:
            am._parameters[a_attr] = src
