"""``factorize export``: write a (compressed) model as ONNX or a torch.export program, traced on one batch.

The model is loaded as ``compare`` loads ``--against``: a ``--weights`` file written by ``factorize shrink``
(its plan in the metadata) is loaded into a fresh instance of ``--model``'s architecture; plain weights are
loaded as usual.
"""

from __future__ import annotations

from pathlib import Path

from factorize.checkpoints import files
from factorize.checkpoints.export import export_onnx, export_program
from factorize.checkpoints.models import has_plan, load_model
from factorize.errors import FactorizeError
from factorize.storage import check_output_path

from .common import load, sample_inputs
from .parser import EXPORT_FORMATS
from .render import UI


def run(args, ui: UI) -> dict:
    output = Path(args.output)
    fmt = _format(args, output)
    check_output_path(output, force=args.force)  # before the model is loaded
    loaded = _load(args, ui)
    if args.batch_size < 2 and not args.fixed_batch:
        raise FactorizeError(f"--batch-size {args.batch_size}: a batch of any size needs a traced batch of >= 2",
                             fix="pass --batch-size 2 or more, or --fixed-batch")
    inputs = sample_inputs(args, loaded, ui, by_length=False)  # the traced sequence length: the longest
    if inputs is None:
        raise FactorizeError("export traces the model on a sample batch, and none was given",
                             fix="pass --inputs FILE (or --random-inputs SHAPE, e.g. 2x64)")
    example = inputs.batches[0]
    write = export_onnx if fmt == "onnx" else export_program
    extra = {"opset": args.opset} if fmt == "onnx" else {}
    done = write(loaded.model, example, output, dynamic_batch=not args.fixed_batch, force=args.force, **extra)
    if not ui.json_mode:
        ui.line(f"wrote {done.path} ({fmt}, {'any batch size' if done.dynamic_batch else 'fixed batch size'})")
        if done.max_abs_diff is None:
            ui.line("not run here (onnxruntime is not installed): parity not measured")
        else:
            ui.line(f"run with {done.checked_with} on the traced batch: largest absolute output difference "
                    f"to torch {done.max_abs_diff:.3g}")
    return {"command": "export", "model": loaded.source, "inputs": inputs.source, **done.to_json()}


def _format(args, output: Path) -> str:
    if args.format is not None:
        return args.format
    suffix = output.suffix.lower().lstrip(".")
    if suffix in EXPORT_FORMATS:
        return suffix
    raise FactorizeError(f"--output {output}: cannot tell the format from the suffix {output.suffix or '(none)'!r}",
                         fix="name the file .onnx or .pt2, or pass --format onnx|pt2")


def _load(args, ui: UI):
    weights = Path(args.weights) if args.weights else None
    if weights is None or weights.suffix.lower() != ".safetensors" or not weights.is_file() or not has_plan(weights):
        loaded = load(args, ui)
    else:  # a factorize checkpoint: the architecture from --model, the factored structure and weights from the file
        loaded = load_model(args.model, allow_pickle=args.allow_pickle)
        files.load(loaded.model, weights)
        ui.note(f"model: {args.model} with {weights} (factorize checkpoint)")
    if loaded.weights_only:
        raise FactorizeError("export traces a model, and a bare weights file has none",
                             fix="pass --model package.module:callable (with --weights FILE) or a transformers "
                             "directory")
    return loaded
