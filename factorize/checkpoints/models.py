"""Getting the model in: what ``--model`` (and ``--weights``) may name, and the clear errors when it is wrong.

``--model`` accepts:

* ``package.module:callable`` -- a function or class that builds the ``nn.Module`` when called with no
  arguments (or a module-level ``nn.Module`` instance). ``--weights FILE.safetensors`` then loads a state dict
  into it strictly, listing every missing, unexpected and mis-shaped key at once; a factorize checkpoint (one
  whose metadata holds a plan) is loaded through :func:`factorize.checkpoints.files.load`, factored structure and all.
* a directory holding a transformers model (``config.json`` plus ``*.safetensors``); needs the ``hf`` extra. A
  directory holding a factorize checkpoint (written by :func:`factorize.save_directory`, or whose
  ``model.safetensors`` has a plan in its metadata) is rebuilt through :func:`factorize.load_directory`; one whose
  ``model.safetensors`` holds factored layers without a plan (``save_pretrained`` on a compressed model) is refused.
* a bare ``.safetensors`` file, or the ``*.safetensors.index.json`` of a sharded checkpoint -- weights-only mode
  (:mod:`factorize.outofcore.weights_only`): no architecture, so its 2-D tensors are factored and reported by
  weight error only. A directory holding one of them reads the same way when it has no ``config.json``, or when
  the caller asks for the checkpoint alone (``checkpoint_only=True``: ``shrink --cluster``).
* pickled checkpoints (``.pt``, ``.pth``, ``.bin``, ``.ckpt``, ``.pkl``) are refused: unpickling can run arbitrary
  code. ``allow_pickle=True`` (``--allow-pickle``) loads them with ``torch.load(weights_only=True)``, which
  restricts unpickling to tensors and plain containers.

Every problem is a :class:`~factorize.errors.FactorizeError` naming the file and the fix.
"""

from __future__ import annotations

import importlib
import os
import pickle
import sys
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import torch
from torch import nn

from factorize.errors import FactorizeError
from factorize.storage import check_safetensors, read_safetensors

PICKLE_SUFFIXES = (".pt", ".pth", ".bin", ".ckpt", ".pkl")
DEFAULT_SPEC = "factorize.default:load_default"  # the embedded digits classifier
TOKENIZER_FILES = ("tokenizer.json", "tokenizer_config.json", "vocab.txt", "vocab.json", "tokenizer.model")


@dataclass
class LoadedModel:
    """A model named on the command line, with what the commands need to know about it."""

    source: str  # what the user named
    kind: str  # "callable", "transformers", "weights" (weights-only safetensors), "pickle" (weights-only, opted in)
    model: nn.Module | None = None  # None in weights-only mode
    path: Path | None = None  # the file or directory behind it (for default output names)
    tokenizer: Any = None  # a transformers tokenizer when the directory has one
    tensors: dict[str, torch.Tensor] | None = None  # opted-in pickle: its tensors (safetensors are streamed)
    build: Callable[[], nn.Module] | None = None  # a fresh, untrained instance of the architecture

    @property
    def weights_only(self) -> bool:
        return self.model is None

    @property
    def is_default(self) -> bool:
        return self.source == DEFAULT_SPEC


def load_model(spec: str, *, weights: str | os.PathLike | None = None, allow_pickle: bool = False,
               checkpoint_only: bool = False) -> LoadedModel:
    """Resolve ``--model`` (and ``--weights``) to a :class:`LoadedModel`; see the module docstring.

    ``checkpoint_only``: a directory is read as the bare checkpoint it holds (weights-only mode, as its
    ``*.safetensors.index.json`` or its single ``.safetensors`` file would be), and the model is not loaded --
    what a shrink whose tasks run elsewhere (``--cluster``) needs. Only the headers are read."""
    if weights is not None and not looks_like_callable(spec):
        raise FactorizeError(
            f"--weights goes with a 'package.module:callable' model, not {spec!r}",
            fix="name the code that builds the architecture with --model package.module:callable, or drop --weights",
        )
    if looks_like_callable(spec):
        model, build = _from_callable(spec)
        if weights is not None:
            model = load_weights(model, weights, allow_pickle=allow_pickle)
        return LoadedModel(source=spec, kind="callable", model=model.eval(),
                           path=Path(weights) if weights is not None else None, build=build)
    path = Path(spec)
    _check_readable(path)
    if path.is_dir() and (checkpoint_only or not (path / "config.json").is_file()):
        return _bare_directory(path, spec, checkpoint_only)
    if path.is_dir():
        return _from_directory(path, allow_pickle=allow_pickle)
    if path.suffix.lower() in PICKLE_SUFFIXES:
        tensors = _load_pickle(path, allow_pickle)
        return LoadedModel(source=spec, kind="pickle", path=path, tensors=_tensors_only(tensors, path))
    if path.suffix.lower() == ".safetensors" or path.name.endswith(".safetensors.index.json"):
        from factorize.checkpoints.files import open_checkpoint

        open_checkpoint(path)  # every header checked (and every shard of an index); tensors are streamed later
        return LoadedModel(source=spec, kind="weights", path=path)
    raise FactorizeError(
        f"{path}: not a model factorize can read (suffix {path.suffix or 'none'!r})",
        fix="pass a 'package.module:callable', a transformers directory, or a .safetensors file",
    )


# ---------------------------------------------------------------------------------------------------------------
# package.module:callable


def looks_like_callable(spec: str) -> bool:
    """Whether ``--model spec`` names ``package.module:callable`` (code to run) rather than a path on disk."""
    module, sep, attr = spec.partition(":")
    if not sep or not module or not attr or os.path.exists(spec):
        return False
    return all(part.isidentifier() for part in module.split(".") + attr.split("."))


def _from_callable(spec: str) -> tuple[nn.Module, Callable[[], nn.Module]]:
    module_name, _, attr = spec.partition(":")
    cwd = os.getcwd()
    added = cwd not in sys.path
    if added:  # let `factorize` find the user's own modules in the working directory, as `python -m` does
        sys.path.insert(0, cwd)
    try:
        module = importlib.import_module(module_name)
    except ModuleNotFoundError as err:
        raise FactorizeError(
            f"--model {spec}: cannot import {err.name!r}",
            fix="check the module path, run from the directory that holds it, or add it to PYTHONPATH",
        ) from None
    except (Exception, SystemExit) as err:  # noqa: BLE001 - the user's module may raise anything while importing
        raise FactorizeError(f"--model {spec}: importing {module_name} failed: {_describe(err)}",
                             fix=f"fix the error in {module_name} (try: python -c 'import {module_name}')") from None
    finally:
        if added:
            sys.path.remove(cwd)
    target: Any = module
    for part in attr.split("."):
        if not hasattr(target, part):
            raise FactorizeError(f"--model {spec}: {module_name} has no attribute {attr!r}",
                                 fix="name a function or class that builds the model, e.g. mypkg.models:build")
        target = getattr(target, part)
    if isinstance(target, nn.Module):
        instance = target
        return instance, lambda: _fresh_copy(instance)

    def build() -> nn.Module:
        return _call_builder(spec, target)

    return build(), build


def _call_builder(spec: str, target: Any) -> nn.Module:
    if not callable(target):
        raise FactorizeError(f"--model {spec}: {type(target).__name__} is not callable",
                             fix="name a function or class that builds the model when called with no arguments")
    try:
        model = target()
    except TypeError as err:
        raise FactorizeError(f"--model {spec}: calling it with no arguments failed: {err}",
                             fix="wrap the constructor in a function that takes no arguments") from None
    except (Exception, SystemExit) as err:  # noqa: BLE001 - the user's builder may raise (or exit) with anything
        raise FactorizeError(f"--model {spec}: the builder failed: {_describe(err)}",
                             fix="fix the builder so that calling it with no arguments returns the model") from None
    if not isinstance(model, nn.Module):
        raise FactorizeError(
            f"--model {spec} returned {type(model).__name__}, not a torch.nn.Module",
            fix="make the callable return the model (an nn.Module instance)",
        )
    return model


def _describe(err: BaseException) -> str:
    """One line for an exception raised by the user's code: its type and first line (sys.exit: the code)."""
    if isinstance(err, SystemExit):
        return f"it called sys.exit({err.code!r})"
    if isinstance(err, SyntaxError):
        return f"SyntaxError: {err.msg} ({err.filename}, line {err.lineno})"
    first = str(err).splitlines()[0] if str(err) else ""
    return type(err).__name__ + (f": {first}" if first else "")


def _fresh_copy(model: nn.Module) -> nn.Module:
    import copy

    return copy.deepcopy(model)


# ---------------------------------------------------------------------------------------------------------------
# weights


def load_weights(model: nn.Module, path: str | os.PathLike, *, allow_pickle: bool = False) -> nn.Module:
    """Load a weights file into ``model`` strictly.

    A factorize checkpoint (a plan in its metadata) is loaded with :func:`factorize.checkpoints.files.load`, which first
    rebuilds the factored structure. Otherwise the file's tensors must match the model's state dict exactly: every
    missing, unexpected and mis-shaped key is listed in one error.
    """
    path = Path(path)
    _check_readable(path)
    if path.suffix.lower() in PICKLE_SUFFIXES:
        state = _tensors_only(_load_pickle(path, allow_pickle), path)
    else:
        check_safetensors(path)
        if has_plan(path):
            from factorize.checkpoints import files as io

            return io.load(model, path)
        state = read_safetensors(path)
    problems = state_dict_problems(model, state)
    if problems:
        raise FactorizeError(
            f"{path}: the weights do not fit the architecture ({len(problems)} problem(s))",
            problems,
            fix="load weights saved from this architecture (model.state_dict()), or fix the listed keys",
        )
    model.load_state_dict(state, strict=True)
    return model


def state_dict_problems(model: nn.Module, state: Mapping[str, torch.Tensor]) -> list[str]:
    """Every key of ``state`` that does not fit ``model``: missing, unexpected, or of the wrong shape."""
    expected = model.state_dict()
    problems = [f"missing: {k} (expected shape {list(v.shape)})" for k, v in expected.items() if k not in state]
    problems += [f"unexpected: {k} (shape {list(v.shape)})" for k, v in state.items() if k not in expected]
    problems += [
        f"wrong shape: {k}: file has {list(v.shape)}, model expects {list(expected[k].shape)}"
        for k, v in state.items() if k in expected and tuple(v.shape) != tuple(expected[k].shape)
    ]
    return problems


def has_plan(path: str | os.PathLike) -> bool:
    """Whether ``path`` is a factorize checkpoint (a plan in its metadata)."""
    try:
        from factorize.checkpoints import files as io
    except ImportError:  # pragma: no cover - the files module ships with the package
        return False
    try:  # the format marker decides; a marked file with a broken plan must say so, not load as plain weights
        return io.open_checkpoint(path).metadata.get(io.KEY_FORMAT) == io.FORMAT_NAME
    except FactorizeError:
        return False


def _load_pickle(path: Path, allow: bool) -> Any:
    if not allow:
        raise FactorizeError(
            f"{path}: refusing to load a pickled checkpoint: unpickling can run arbitrary code from the file",
            fix="convert it once, in an environment you trust, to safetensors: python -c \"import torch; "
            "from safetensors.torch import save_file; "
            f"save_file(torch.load('{path}', weights_only=True), '{path.with_suffix('.safetensors')}')\" "
            "-- or, if you trust the file, pass --allow-pickle (loads with torch.load(weights_only=True))",
        )
    try:
        return torch.load(path, map_location="cpu", weights_only=True)
    except Exception as err:  # noqa: BLE001 - unpickling failures come in many types
        raise FactorizeError(
            f"{path}: torch.load(weights_only=True) could not read it: {str(err).splitlines()[0]}",
            fix="the file must hold a state dict of tensors; convert it to safetensors where it was made",
        ) from None


def _tensors_only(obj: Any, path: Path) -> dict[str, torch.Tensor]:
    if isinstance(obj, Mapping) and "state_dict" in obj and isinstance(obj["state_dict"], Mapping):
        obj = obj["state_dict"]  # common training-checkpoint layout (common practice)
    if not isinstance(obj, Mapping):
        raise FactorizeError(f"{path}: holds a {type(obj).__name__}, not a state dict of tensors",
                             fix="save model.state_dict(), preferably with safetensors.torch.save_file")
    bad = [str(k) for k, v in obj.items() if not isinstance(v, torch.Tensor)]
    if bad:
        raise FactorizeError(f"{path}: some entries are not tensors", bad[:20],
                             fix="save model.state_dict() only (no optimizer state or other objects)")
    return {str(k): v for k, v in obj.items()}


# ---------------------------------------------------------------------------------------------------------------
# safetensors files


def _check_readable(path: Path) -> None:
    if not path.exists():
        raise FactorizeError(f"{path}: no such file or directory", fix="check the path")
    if not os.access(path, os.R_OK):
        raise FactorizeError(f"{path}: not readable (permission denied)", fix="check the file's permissions")






# ---------------------------------------------------------------------------------------------------------------
# transformers directories


def _transformers():
    from factorize.checkpoints.directories import import_transformers

    return import_transformers("reading a transformers model directory")


def _from_directory(path: Path, *, allow_pickle: bool) -> LoadedModel:
    config_file = path / "config.json"
    if not config_file.is_file():
        raise FactorizeError(f"{path}: a directory without config.json is not a transformers model",
                             fix="point --model at the directory saved by save_pretrained(), or at a file")
    from factorize.checkpoints import directories

    if directories.directory_kind(path) in ("factorize", "factorize-file"):
        return _from_factorize_directory(path)
    directories.check_directory(path)  # a compressed model saved with save_pretrained: refused with the fix
    weight_files = sorted(path.glob("*.safetensors"))
    pickled = sorted(p for p in path.glob("*") if p.suffix in PICKLE_SUFFIXES)
    if not weight_files and pickled and not allow_pickle:
        _load_pickle(pickled[0], False)  # raises the refusal with the conversion path
    if not weight_files and not pickled:
        raise FactorizeError(f"{path}: no *.safetensors weights next to config.json",
                             fix="save the model with save_pretrained(..., safe_serialization=True)")
    for f in weight_files:
        check_safetensors(f)
    transformers = _transformers()
    try:
        config = transformers.AutoConfig.from_pretrained(path, local_files_only=True)
    except (OSError, ValueError, KeyError) as err:
        raise FactorizeError(f"{config_file}: not a transformers config: {str(err).splitlines()[0]}",
                             fix="save the model with save_pretrained()") from None
    cls = _architecture_class(transformers, config)

    def build() -> nn.Module:
        return cls.from_config(config) if cls is transformers.AutoModel else cls(config)

    try:
        model = cls.from_pretrained(path, local_files_only=True, use_safetensors=bool(weight_files))
    except pickle.UnpicklingError as err:  # --allow-pickle: torch.load(weights_only=True) refused the file
        raise _pickle_refused(pickled, err) from None
    except (OSError, ValueError, RuntimeError) as err:
        raise FactorizeError(
            f"{path}: transformers could not load the model: {str(err).splitlines()[0]}",
            fix="check that the weights belong to config.json; save again with save_pretrained()",
        ) from None
    tokenizer = _tokenizer(transformers, path)
    return LoadedModel(source=str(path), kind="transformers", model=model.eval(), path=path, tokenizer=tokenizer,
                       build=build)


def _bare_directory(path: Path, spec: str, asked: bool) -> LoadedModel:
    """A directory read as the bare checkpoint it holds (weights-only mode), headers checked, nothing loaded."""
    from factorize.checkpoints.files import open_checkpoint

    if not asked and not any(path.glob("*.safetensors")) and not any(path.glob("*.safetensors.index.json")):
        raise FactorizeError(f"{path}: a directory without config.json is not a transformers model, and it holds no "
                             ".safetensors checkpoint either",
                             fix="point --model at the directory saved by save_pretrained(), or at a file")
    open_checkpoint(path)  # which checkpoint (the index, or the one file), every header checked
    return LoadedModel(source=spec, kind="weights", path=path)


def _pickle_refused(pickled: list[Path], err: Exception) -> FactorizeError:
    """One message for a pickled weights file that ``torch.load(weights_only=True)`` refused, naming the file."""
    lines = [line.strip() for line in str(err).splitlines() if line.strip()]
    reason = next((line for line in lines if "GLOBAL" in line), lines[0] if lines else type(err).__name__)
    names = ", ".join(str(p) for p in pickled)
    return FactorizeError(
        f"{names}: torch.load(weights_only=True) refused the pickled weights: {reason}",
        fix="the file holds more than tensors (unpickling it fully could run code from it); get a safetensors copy "
        "of the weights, or convert the file where it was made, from a source you trust")


def _from_factorize_directory(path: Path) -> LoadedModel:
    """A directory holding a factorize checkpoint (written by save_directory, or a model.safetensors with a plan):
    the compressed model, rebuilt through :func:`factorize.checkpoints.directories.load_directory`."""
    from factorize.checkpoints.directories import build_architecture, load_directory

    model = load_directory(path)
    return LoadedModel(source=str(path), kind="transformers", model=model, path=path,
                       tokenizer=_tokenizer(_transformers(), path), build=lambda: build_architecture(path))


def _tokenizer(transformers, path: Path):
    if not any((path / name).is_file() for name in TOKENIZER_FILES):
        return None
    try:
        return transformers.AutoTokenizer.from_pretrained(path, local_files_only=True)
    except (OSError, ValueError) as err:
        raise FactorizeError(f"{path}: the tokenizer files could not be read: {str(err).splitlines()[0]}",
                             fix="save the tokenizer with tokenizer.save_pretrained() next to the model") from None


def _architecture_class(transformers, config):
    """The class named in ``config.architectures`` (keeps a task head such as an LM head), else AutoModel."""
    for name in getattr(config, "architectures", None) or ():
        cls = getattr(transformers, name, None)
        if cls is not None:
            return cls
    return transformers.AutoModel
