"""Transformers directories: write a compressed transformers model as a directory that reloads exactly, read it
back with one call, and refuse the routes that would load it silently wrong.

Why a format of our own: ``save_pretrained`` on a compressed model writes ``model.safetensors`` holding
``<layer>.first.weight`` / ``<layer>.second.weight``; ``from_pretrained`` then reports those keys as unexpected and
re-initialises the dense ``<layer>.weight`` at random -- with a warning at most, and outputs that are simply wrong.
A directory written here holds:

======================================  ===========================================================================
file                                    what
======================================  ===========================================================================
``config.json``                         the original model's config (``config.save_pretrained``), with
                                        ``architectures`` naming the model's class
``generation_config.json``              the generation settings, for models that generate
``factorized.safetensors``              the compressed weights: a factorize checkpoint (plan in its metadata, see
                                        :mod:`factorize.checkpoints.files`)
``factorize.json``                      what this directory is: format, version, the weights file, class, dtype,
                                        the library version and the plan
tokenizer files                         when a tokenizer is given (``tokenizer.save_pretrained``)
the input's other files                 when the source directory is given: every file it holds that factorize
                                        does not write (tokenizer files, sentence-transformers module configs such
                                        as ``modules.json`` and ``1_Pooling/config.json``, README ...), copied byte
                                        for byte; never the original weights (:data:`ORIGINAL_WEIGHT_SUFFIXES`)
======================================  ===========================================================================

No file is called ``model.safetensors`` (nor any other name transformers looks for), so a plain
``from_pretrained(directory)`` raises ``OSError: no file named model.safetensors ...`` instead of building a model
with random weights; :func:`check_directory` turns every such case into a :class:`FactorizeError` with the fix.
"""

from __future__ import annotations

import copy
import json
import os
import shutil
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import torch
from torch import nn

from factorize.errors import FactorizeError
from factorize.storage import check_output_path, new_temp_dir, publish_dir, read_header

DIRECTORY_FORMAT = "factorize.directory"
DIRECTORY_VERSION = 1
MANIFEST = "factorize.json"
HF_EXTRA = 'pip install ".[hf]" (in a checkout of factorize)'
WEIGHTS = "factorized.safetensors"  # not a name transformers' from_pretrained looks for
TRANSFORMERS_WEIGHTS = ("model.safetensors", "model.safetensors.index.json", "pytorch_model.bin",
                        "pytorch_model.bin.index.json")
# files of the source directory never copied: what factorize writes itself, and the original (dense) weights in
# any format (copying them would give the user's library the uncompressed model, or a mix of both)
WRITTEN_HERE = ("config.json", MANIFEST, WEIGHTS)
ORIGINAL_WEIGHT_SUFFIXES = (".safetensors", ".bin", ".pt", ".pth", ".ckpt", ".pkl", ".h5", ".msgpack", ".onnx",
                            ".gguf", ".ot", ".npz")


def _load_fix(directory: Path) -> str:
    return f"load it with factorize.load_directory({str(directory)!r}) (or --model {directory} on the command line)"


# ---------------------------------------------------------------------------------------------------------------
# what a directory holds


def directory_kind(directory: str | os.PathLike) -> str:
    """What a model directory holds, as far as loading it goes:

    * ``"factorize"``: written by :func:`save_directory` (a ``factorize.json``);
    * ``"factorize-file"``: a transformers weights file (``model.safetensors`` or its index) that is really a
      factorize checkpoint (plan in its metadata) -- e.g. ``factorize.save(model, dir / "model.safetensors")``;
    * ``"factored-plain"``: ``model.safetensors`` holding factored keys (``X.first.weight`` and ``X.second.weight``
      but no ``X.weight``) without a plan: ``save_pretrained`` on a compressed model; the plan is lost;
    * ``"plain"``: anything else (an ordinary transformers directory, or not one at all).
    """
    d = Path(directory)
    if (d / MANIFEST).is_file():
        return "factorize"
    for name in ("model.safetensors", "model.safetensors.index.json"):
        if (d / name).is_file() and _has_plan(d / name):
            return "factorize-file"
    if (d / "model.safetensors").is_file() and _factored_keys(d / "model.safetensors"):
        return "factored-plain"
    return "plain"


def _has_plan(path: Path) -> bool:
    from factorize.checkpoints.files import read_plan

    try:
        read_plan(path)
    except FactorizeError:
        return False
    return True


def _factored_keys(path: Path) -> list[str]:
    """Layers stored as two factors without the dense weight: the mark of a compressed model saved plainly."""
    try:
        keys = set(read_header(path).tensors)
    except FactorizeError:
        return []
    found = []
    for k in keys:
        if k.endswith(".first.weight"):
            name = k.removesuffix(".first.weight")
            if name + ".second.weight" in keys and name + ".weight" not in keys:
                found.append(name)
    return sorted(found)


def check_directory(directory: str | os.PathLike) -> None:
    """Raise a :class:`FactorizeError` with the fix when a plain ``from_pretrained(directory)`` would not load the
    model it holds (it would fail, or -- worse -- re-initialise weights at random); return None when the
    directory is an ordinary transformers directory."""
    d = Path(directory)
    kind = directory_kind(d)
    if kind in ("factorize", "factorize-file"):
        where = MANIFEST if kind == "factorize" else "its weights file's metadata"
        raise FactorizeError(
            f"{d}: this directory holds a factorize checkpoint (see {where}); transformers' from_pretrained cannot "
            "load it (the factored layers would be reported unexpected and the dense ones re-initialised at random)",
            fix=_load_fix(d),
        )
    if kind == "factored-plain":
        names = _factored_keys(d / "model.safetensors")
        raise FactorizeError(
            f"{d}: model.safetensors holds factored layers ({len(names)}) but no factorize plan: it was written by "
            "save_pretrained on a compressed model, and from_pretrained would re-initialise these layers at random",
            names[:20],
            fix="save the compressed model in memory with factorize.save_directory(model, plan, directory), or "
            "merge it first (factorize.merge(model)) and then call save_pretrained",
        )


# ---------------------------------------------------------------------------------------------------------------
# writing


def save_directory(
    model: nn.Module,
    plan: Mapping,
    directory: str | os.PathLike,
    *,
    tokenizer: Any = None,
    force: bool = False,
    source: str | os.PathLike | None = None,
) -> Path:
    """Write a compressed transformers model as a directory that :func:`load_directory` reloads exactly.

    Args:
        model: the compressed transformers model (``compress(...).model``); only read (its config is copied).
        plan: the plan that produced it (``result.plan``); checked against the model's factored layers.
        directory: the output directory; refused if it exists unless ``force`` (which replaces it whole).
        tokenizer: a transformers tokenizer to save beside the model (optional).
        force: replace an existing directory.
        source: the directory the model was loaded from; every file in it that factorize does not write
            (:func:`extra_files`: tokenizer, sentence-transformers module configs, README ...) is copied byte for
            byte, so the user's own library finds them. Written before the tokenizer, which replaces its files.

    The directory is written under a temporary name beside the target and renamed into place when complete, so a
    failure leaves nothing behind. Returns the directory written.
    """
    from factorize.checkpoints.files import check_plan_matches, plan_json

    if not isinstance(model, nn.Module):
        raise FactorizeError(f"expected a torch.nn.Module, got {type(model).__name__}", fix="pass the model object")
    config = getattr(model, "config", None)
    if config is None or not hasattr(config, "save_pretrained"):
        raise FactorizeError(
            f"{type(model).__name__} has no transformers config: the directory format is for transformers models",
            fix="save other models with factorize.save(model, 'file.safetensors', plan=plan)",
        )
    final = check_output_path(directory, force=force, directory=True)
    plan_json(plan)
    check_plan_matches(model, plan)  # before anything is written
    extra = [] if source is None else extra_files(source)
    if source is not None and Path(source).resolve() == final.resolve():
        raise FactorizeError(f"{final}: is the source directory; factorize never overwrites its input",
                             fix="write the compressed model to another directory")
    tmp = new_temp_dir(final)
    try:
        for rel in extra:
            (tmp / rel).parent.mkdir(parents=True, exist_ok=True)
            shutil.copyfile(Path(source) / rel, tmp / rel)  # the content (a symlink's target), byte for byte
        _write_into(tmp, model, config, plan, tokenizer)
        publish_dir(tmp, final, force=force)
    except OSError as e:
        shutil.rmtree(tmp, ignore_errors=True)
        raise FactorizeError(f"{final}: writing failed ({e.strerror or e}); nothing was written",
                             fix="check free space and permissions, then retry") from e
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return final


def extra_files(source: str | os.PathLike) -> list[Path]:
    """The files of ``source`` (relative paths, sorted, subfolders included) that :func:`save_directory` copies:
    all but what it writes itself (``config.json``, ``factorize.json``, the factorize weights), the original
    weights (suffixes in :data:`ORIGINAL_WEIGHT_SUFFIXES`, and their ``*.index.json``) and hidden entries (names
    starting with a dot: version-control folders, temporary files). Symlinked files count by their target;
    symlinked folders are not entered."""
    src = Path(source)
    if not src.is_dir():
        raise FactorizeError(f"{src}: the source is not a directory",
                             fix="pass the directory the model was loaded from")
    found = []
    for root, dirs, names in os.walk(src):
        dirs[:] = sorted(d for d in dirs if not d.startswith("."))
        for name in sorted(names):
            rel = (Path(root) / name).relative_to(src)
            lower = name.lower()
            if name.startswith(".") or (rel.parent == Path(".") and name in WRITTEN_HERE) or \
                    lower.endswith(ORIGINAL_WEIGHT_SUFFIXES) or lower.endswith(".index.json") or \
                    not (Path(root) / name).is_file():
                continue
            found.append(rel)
    return found


def _write_into(tmp: Path, model: nn.Module, config, plan: Mapping, tokenizer) -> None:
    from factorize._version import __version__
    from factorize.checkpoints.files import save

    config = copy.deepcopy(config)  # the caller's config is never modified
    config.architectures = [type(model).__name__]  # as save_pretrained records it
    config.save_pretrained(tmp)
    generation = getattr(model, "generation_config", None)
    can_generate = getattr(model, "can_generate", None)
    if generation is not None and callable(can_generate) and can_generate():
        generation.save_pretrained(tmp)
    save(model, tmp / WEIGHTS, plan=plan)
    if tokenizer is not None:
        tokenizer.save_pretrained(tmp)
    manifest = {
        "format": DIRECTORY_FORMAT,
        "format_version": DIRECTORY_VERSION,
        "weights": WEIGHTS,
        "architecture": config.architectures[0],
        "dtype": str(_dtype_of(model)).removeprefix("torch."),
        "library_version": __version__,
        "load_with": "factorize.load_directory(directory)",
        "plan": dict(plan),
    }
    (tmp / MANIFEST).write_text(json.dumps(manifest, indent=1) + "\n", encoding="utf-8")


def _dtype_of(model: nn.Module) -> torch.dtype:
    for p in model.parameters():
        if p.is_floating_point():
            return p.dtype
    return torch.get_default_dtype()


# ---------------------------------------------------------------------------------------------------------------
# reading


def import_transformers(needed_for: str):
    """The transformers module, or a FactorizeError saying that ``needed_for`` needs it and how to install it."""
    try:
        import transformers
    except ImportError:
        raise FactorizeError(f"{needed_for} needs the transformers library, which is not installed",
                             fix=f"install the hf extra: {HF_EXTRA}") from None
    return transformers


def read_manifest(directory: str | os.PathLike) -> dict:
    """The ``factorize.json`` of a directory written by :func:`save_directory`, checked."""
    d = Path(directory)
    path = d / MANIFEST
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise FactorizeError(f"{d}: no {MANIFEST} in it: not a directory written by factorize.save_directory",
                             fix="pass the directory that save_directory (or shrink --output DIR) wrote") from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as e:
        raise FactorizeError(f"{path}: unreadable or not JSON ({e})", fix="re-create the directory") from None
    if not isinstance(manifest, dict) or manifest.get("format") != DIRECTORY_FORMAT:
        raise FactorizeError(f"{path}: not a factorize directory manifest (format is not {DIRECTORY_FORMAT!r})",
                             fix="re-create the directory with factorize.save_directory")
    if manifest.get("format_version") != DIRECTORY_VERSION:
        raise FactorizeError(
            f"{path}: directory format version {manifest.get('format_version')!r}; this factorize reads version "
            f"{DIRECTORY_VERSION}",
            fix=f"use the factorize version that wrote it ({manifest.get('library_version')}), or re-create it")
    weights = manifest.get("weights")
    if not isinstance(weights, str) or Path(weights).name != weights or not (d / weights).is_file():
        raise FactorizeError(f"{path}: the weights file it names ({weights!r}) is not in {d}",
                             fix="copy the whole directory, or re-create it")
    return manifest


def load_directory(directory: str | os.PathLike, *, device: str | torch.device | None = None,
                   dtype: torch.dtype | None = None) -> nn.Module:
    """Rebuild a compressed transformers model from a directory: the architecture from ``config.json`` (the class
    in ``architectures``; nothing is downloaded), the factored structure from the plan, then the weights.

    Reads what :func:`save_directory` writes, and also a transformers directory whose ``model.safetensors`` (or
    ``model.safetensors.index.json``) is a factorize checkpoint: what ``shrink --blockwise`` and a weights-only
    shrink of a directory write. Returns the model in eval mode, on ``device`` (default: CPU), in ``dtype``
    (default: the dtype the weights were stored in; a floating dtype such as ``torch.float32`` casts them).
    """
    from factorize.checkpoints.files import load, read_plan

    d = Path(directory)
    if not d.is_dir():
        raise FactorizeError(f"{d}: not a directory", fix="pass the directory that save_directory wrote")
    kind = directory_kind(d)
    if kind == "factorize":
        manifest = read_manifest(d)
        weights = d / manifest["weights"]
        stored_dtype = getattr(torch, str(manifest.get("dtype", "float32")), None)
        if read_plan(weights) != manifest.get("plan"):
            raise FactorizeError(f"{d}: the plan in {MANIFEST} differs from the one in {weights.name}",
                                 fix="the directory was edited or mixed; re-create it with save_directory")
    elif kind == "factorize-file":
        weights = next(d / n for n in ("model.safetensors.index.json", "model.safetensors") if (d / n).is_file())
    else:
        check_directory(d)  # raises for a plainly saved compressed model
        raise FactorizeError(f"{d}: holds no factorize checkpoint ({MANIFEST} or model.safetensors with a plan)",
                             fix="load an ordinary transformers directory with from_pretrained, or pass the "
                             "directory save_directory wrote")
    model = build_architecture(d)
    if dtype is not None:
        load(model, weights, dtype=dtype)  # cast as loaded (checked there)
    else:
        stored = stored_dtype if kind == "factorize" else _stored_dtype(weights)
        if isinstance(stored, torch.dtype) and stored.is_floating_point:
            model = model.to(stored)
        load(model, weights)
    if device is not None:
        model = model.to(device)
    return model.eval()


def _stored_dtype(weights: Path) -> torch.dtype | None:
    from factorize.checkpoints.files import open_checkpoint

    for h in open_checkpoint(weights).files:
        for info in h.tensors.values():
            t = info.torch_dtype
            if t is not None and t.is_floating_point:
                return t
    return None


def build_architecture(directory: str | os.PathLike) -> nn.Module:
    """A fresh (randomly initialised) instance of the model class named in ``directory``'s config.json."""
    transformers = import_transformers("reading a transformers directory")
    d = Path(directory)
    if not (d / "config.json").is_file():
        raise FactorizeError(f"{d}: no config.json in it", fix="pass a directory written by save_directory")
    try:
        config = transformers.AutoConfig.from_pretrained(d, local_files_only=True)
    except (OSError, ValueError, KeyError) as err:
        raise FactorizeError(f"{d / 'config.json'}: not a transformers config: {str(err).splitlines()[0]}",
                             fix="re-create the directory with save_directory") from None
    names = list(getattr(config, "architectures", None) or ())
    cls = next((getattr(transformers, n) for n in names if hasattr(transformers, n)), None)
    if cls is None and names:
        raise FactorizeError(f"{d / 'config.json'}: names no model class this transformers has "
                             f"(architectures: {names})",
                             fix="upgrade transformers to a version with that class, or fix 'architectures'")
    # no 'architectures' (a config saved from a model built by hand): the base model of its type
    model = transformers.AutoModel.from_config(config) if cls is None else cls(config)
    generation = d / "generation_config.json"
    if generation.is_file() and getattr(model, "generation_config", None) is not None:
        model.generation_config = transformers.GenerationConfig.from_pretrained(d, local_files_only=True)
    return model
