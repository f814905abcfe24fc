"""Export a (compressed) model to ONNX or to a torch.export program (``.pt2``), and check the result runs.

A compressed model holds :class:`factorize.Factored` layers: two stock torch layers (Linear, Conv, Embedding) in
sequence, or a layer factored in place whose ``weight`` is a property computing ``B @ A``. Both trace as ordinary
torch operations, so ``torch.export`` (and the ONNX exporter built on it) needs nothing special: a computed
weight becomes a matrix product in the graph. Parity is measured, not assumed: after writing, the exported
artifact is run on the example batch (``.pt2`` through ``ExportedProgram.module()``, ONNX through onnxruntime
when it is installed) and the largest absolute difference to the model's own output is returned.

The example follows the batch contract of :func:`factorize.run_model`: a tensor is fed as ``model(x)``, a tuple
or list as ``model(*batch)``, a dict as ``model(**batch)`` (non-tensor values, such as ``use_cache=False``, are
fixed in the graph). With ``dynamic_batch`` the first dimension of every tensor input is one symbolic size
``batch``, so the file accepts any batch size; torch.export specialises sizes 0 and 1, so the example then needs
at least two samples.

Both writers are atomic (a temporary file beside the output, moved into place when complete).
"""

from __future__ import annotations

import contextlib
import io
import os
import warnings
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import torch
from torch import nn

from factorize.errors import FactorizeError
from factorize.model.feed import batch_size, feed, primary_output
from factorize.storage import check_output_path, write_atomic

EXPORT_EXTRA = 'pip install ".[export]" (in a checkout of factorize)'
ONNX_PROTOBUF_LIMIT = 2**31  # a single ONNX protobuf file holds at most 2 GiB


@dataclass(frozen=True)
class Exported:
    """What was written and how well it matched: ``max_abs_diff`` between the exported artifact's output and the
    model's on the example (None when it could not be run here, e.g. ONNX without onnxruntime)."""

    path: Path
    format: str  # "onnx" or "pt2"
    max_abs_diff: float | None
    checked_with: str | None  # "onnxruntime", "torch.export", or None
    dynamic_batch: bool

    def to_json(self) -> dict:
        return {"path": str(self.path), "format": self.format, "max_abs_diff": self.max_abs_diff,
                "checked_with": self.checked_with, "dynamic_batch": self.dynamic_batch}


def export_onnx(model: nn.Module, example: Any, path: str | os.PathLike, *, opset: int | None = None,
                dynamic_batch: bool = True, force: bool = False, check: bool = True) -> Exported:
    """Write ``model`` as an ONNX file at ``path`` (torch.onnx's exporter on a torch.export graph).

    Args:
        model: the model (compressed or not); put in eval mode for the export, its mode restored afterwards.
        example: one batch under the batch contract (tensor, tuple/list, dict).
        path: output file (``.onnx``); refused if it exists unless ``force``.
        opset: ONNX opset version (None: the exporter's default).
        dynamic_batch: make the first dimension of every tensor input symbolic (needs >= 2 samples).
        check: run the file with onnxruntime on ``example`` (when installed) and measure the largest difference.

    Needs the ``export`` extra (onnx, onnxscript; onnxruntime for the check): ``pip install ".[export]"`` in a checkout.
    Raises :class:`FactorizeError` for a bad model, example or path, a missing extra, or a failed export.
    """
    final, args, kwargs = _validated(model, example, path, force, dynamic_batch)
    _require("onnx", "onnxscript")
    if opset is not None and (not isinstance(opset, int) or opset < 7):
        raise FactorizeError(f"opset must be an integer >= 7, got {opset!r}", fix="e.g. opset=18, or None")
    nbytes = sum(t.numel() * t.element_size() for t in model.state_dict().values())
    if nbytes >= ONNX_PROTOBUF_LIMIT:
        raise FactorizeError(f"the model holds {nbytes / 2**30:.1f} GiB of weights; one ONNX file holds at most 2 GiB",
                             fix="export to .pt2 (export_program), or shrink the model further first")
    with _eval(model), _quiet():
        try:
            program = torch.onnx.export(model, args, kwargs=kwargs, dynamo=True, opset_version=opset,
                                        dynamic_shapes=_dynamic_shapes(args, kwargs) if dynamic_batch else None,
                                        verbose=False, report=False)
        except Exception as err:  # the exporter raises many types; name the model and the cause
            raise _failed("ONNX", model, err) from err
    write_atomic(final, lambda tmp: program.save(str(tmp), external_data=False), force=force)
    diff, how = (None, None)
    if check:
        diff, how = _check_onnx(model, final, args, kwargs)
    return Exported(final, "onnx", diff, how, dynamic_batch)


def export_program(model: nn.Module, example: Any, path: str | os.PathLike, *, dynamic_batch: bool = True,
                   force: bool = False, check: bool = True) -> Exported:
    """Write ``model`` as a torch.export program (``torch.export.save``; reload with ``torch.export.load``).

    Same arguments as :func:`export_onnx` (no opset); ``check`` runs the saved program, reloaded from disk, on
    ``example`` and measures the largest difference to the model's output.
    """
    final, args, kwargs = _validated(model, example, path, force, dynamic_batch)
    with _eval(model), _quiet():
        try:
            program = torch.export.export(model, args, kwargs=kwargs,
                                          dynamic_shapes=_dynamic_shapes(args, kwargs) if dynamic_batch else None)
        except Exception as err:
            raise _failed("torch.export", model, err) from err
    write_atomic(final, lambda tmp: torch.export.save(program, str(tmp)), force=force)
    diff, how = (None, None)
    if check:
        diff, how = _check_program(model, final, args, kwargs), "torch.export"
    return Exported(final, "pt2", diff, how, dynamic_batch)


# ---------------------------------------------------------------------------------------------------------------
# validation


def _validated(model, example, path, force: bool, dynamic_batch: bool):
    if not isinstance(model, nn.Module):
        raise FactorizeError(f"expected a torch.nn.Module, got {type(model).__name__}", fix="pass the model object")
    if example is None:
        raise FactorizeError("an example batch is needed to trace the model",
                             fix="pass one batch of inputs, e.g. torch.randn(2, 64) or tokenizer(texts, ...)")
    final = check_output_path(path, force=force)
    if final.suffix == "":
        raise FactorizeError(f"{final}: give the output a suffix", fix="e.g. model.onnx or model.pt2")
    args, kwargs = _split(example)
    if dynamic_batch and batch_size(example) < 2:
        raise FactorizeError(f"dynamic_batch needs an example with at least 2 samples, got {batch_size(example)} "
                             "(torch.export fixes sizes 0 and 1)",
                             fix="pass a batch of 2 or more samples, or dynamic_batch=False (--fixed-batch)")
    with _eval(model), torch.no_grad():
        try:
            feed(model, example)
        except Exception as err:  # noqa: BLE001 - any failure means the example does not fit the model
            raise FactorizeError(f"the model does not run on the example: {type(err).__name__}: {err}",
                                 fix="pass a batch the model accepts (tensor, tuple of arguments, or dict of "
                                 "keyword arguments)") from None
    return final, args, kwargs


def _split(example) -> tuple[tuple, dict]:
    if isinstance(example, Mapping):
        return (), dict(example)
    if isinstance(example, (tuple, list)):
        return tuple(example), {}
    return (example,), {}


def _dynamic_shapes(args: tuple, kwargs: dict):
    """Dimension 0 of every tensor (of >= 1 dimension) is one shared symbolic ``batch`` size."""
    batch = torch.export.Dim("batch")

    def spec(v):
        return {0: batch} if isinstance(v, torch.Tensor) and v.dim() >= 1 else None

    if kwargs:
        return {k: spec(v) for k, v in kwargs.items()}
    return tuple(spec(v) for v in args)


def _require(*modules: str) -> None:
    missing = []
    for name in modules:
        try:
            __import__(name)
        except ImportError:
            missing.append(name)
    if missing:
        raise FactorizeError(f"ONNX export needs {', '.join(missing)}, which {'is' if len(missing) == 1 else 'are'} "
                             "not installed", fix=EXPORT_EXTRA)


def _failed(what: str, model: nn.Module, err: Exception) -> FactorizeError:
    text = str(err).strip().splitlines()
    return FactorizeError(f"{what} could not trace {type(model).__name__}: {type(err).__name__}: "
                          f"{text[0] if text else ''}",
                          fix="check the model runs under torch.export.export(model, args); a causal language model "
                          "may need use_cache=False in the example dict; nothing was written")


@contextlib.contextmanager
def _eval(model: nn.Module):
    was = model.training
    model.eval()
    try:
        yield
    finally:
        model.train(was)


@contextlib.contextmanager
def _quiet():
    """The exporters print progress on stdout and emit many warnings; computation here never prints."""
    with contextlib.redirect_stdout(io.StringIO()), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        yield


# ---------------------------------------------------------------------------------------------------------------
# parity


def _reference(model: nn.Module, args: tuple, kwargs: dict) -> torch.Tensor:
    with _eval(model), torch.no_grad():
        return primary_output(model(*args, **kwargs)).detach().float().cpu()


def _check_program(model: nn.Module, path: Path, args: tuple, kwargs: dict) -> float:
    ref = _reference(model, args, kwargs)
    loaded = torch.export.load(str(path))
    with torch.no_grad():
        out = primary_output(loaded.module()(*args, **kwargs)).detach().float().cpu()
    return float((out - ref).abs().max()) if out.numel() else 0.0


def _check_onnx(model: nn.Module, path: Path, args: tuple, kwargs: dict) -> tuple[float | None, str | None]:
    try:
        import onnxruntime as ort
    except ImportError:
        return None, None
    ref = _reference(model, args, kwargs)
    session = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    outputs = session.run(None, onnx_feed(session, args, kwargs))
    match = [torch.from_numpy(o).float() for o in outputs if tuple(o.shape) == tuple(ref.shape)]
    if not match:
        raise FactorizeError(f"{path}: no ONNX output has the model's output shape {tuple(ref.shape)}",
                             [f"output {i}: shape {tuple(o.shape)}" for i, o in enumerate(outputs)],
                             fix="report this; the file was written but its outputs could not be matched")
    return float((match[0] - ref).abs().max()) if ref.numel() else 0.0, "onnxruntime"


def onnx_feed(session, args: tuple, kwargs: dict) -> dict:
    """onnxruntime's input dict for a batch: by name for keyword inputs, in order for positional ones (inputs fixed
    in the graph, such as ``use_cache=False``, have no entry)."""
    names = [i.name for i in session.get_inputs()]
    if kwargs:
        return {k: v.detach().cpu().numpy() for k, v in kwargs.items() if k in names and isinstance(v, torch.Tensor)}
    tensors = [a for a in args if isinstance(a, torch.Tensor)]
    return {n: t.detach().cpu().numpy() for n, t in zip(names, tensors)}
