"""``factorize compare``: output drift between two models on the same sample inputs."""

from __future__ import annotations

from pathlib import Path

from factorize.checkpoints import files
from factorize.checkpoints.models import (
    PICKLE_SUFFIXES,
    has_plan,
    load_model,
    load_weights,
)
from factorize.errors import FactorizeError
from factorize.measure.evaluate import evaluate
from factorize.measure.report import render_rich

from .common import (
    alternatives,
    check_no_clobber,
    check_outputs,
    load,
    optional_path,
    repeats,
    sample_inputs,
    write_text,
)
from .render import UI, print_words


def run(args, ui: UI) -> dict:
    report_path = optional_path(args.report)
    check_no_clobber(args, {"--report": report_path})
    check_outputs([report_path], args.force)
    loaded = load(args, ui)
    if loaded.weights_only:
        raise FactorizeError("compare runs both models, so --model must build one (weights-only files cannot run)",
                             fix="pass --model package.module:callable (with --weights FILE) or a transformers "
                             "directory")
    other, plan = _load_against(args, loaded, ui)
    if args.device is not None:
        other.to(args.device)  # both models on the device the inputs are prepared for
    inputs = sample_inputs(args, loaded, ui)
    if inputs is None:
        raise FactorizeError("compare needs sample inputs", fix="pass --inputs FILE (or --random-inputs SHAPE)")
    memo: dict = {}  # the original's outputs, shared with the alternatives
    report = evaluate(loaded.model, other, inputs.batches, labels=inputs.labels, plan=plan,
                      latency_repeats=repeats(args, 7), title="factorize compare",
                      model_name=f"{loaded.source} vs {args.against}", inputs=inputs.source, notes=inputs.notes,
                      progress=ui.progress, pooling=getattr(args, "pooling", None),
                      kind=getattr(args, "output_kind", None), memo=memo)
    if plan is not None and not getattr(args, "no_alternatives", False):  # a factorize checkpoint: its plan is known
        report.alternatives = alternatives(loaded.model, other, inputs, report, memo, args, ui, plan=plan)
    if report_path is not None:
        write_text(report_path, report.to_markdown(), args.force)
    if not ui.json_mode:
        render_rich(report, ui.out)
    result = {"command": "compare", "model": loaded.source, "against": args.against, "report": report.to_json(),
              "report_file": str(report_path) if report_path else None}
    if args.max_drift is not None and report.drift["relative_l2"] > args.max_drift:
        print_words(ui.err, f"check failed: relative L2 output drift {report.drift['relative_l2']:.4g} is above "
                    f"--max-drift {args.max_drift:g}")
        ui.exit_code = 1
    return result


def _load_against(args, loaded, ui: UI):
    """The second model: a factorize checkpoint or weights for --model's architecture, or another model spec."""
    spec = Path(args.against)
    is_file = spec.is_file() or spec.suffix.lower() in (".safetensors", *PICKLE_SUFFIXES)
    if is_file and loaded.build is not None:
        fresh = loaded.build()
        if spec.suffix.lower() == ".safetensors" and spec.exists() and has_plan(spec):
            ui.note(f"against: {spec} (factorize checkpoint, loaded into a fresh {type(fresh).__name__})")
            strict = not getattr(args, "non_strict", False)
            return files.load(fresh, spec, strict=strict).eval(), files.read_plan(spec)
        ui.note(f"against: {spec} (weights for {type(fresh).__name__})")
        return load_weights(fresh, spec, allow_pickle=args.allow_pickle).eval(), None
    other = load_model(args.against, allow_pickle=args.allow_pickle)
    if other.weights_only:
        raise FactorizeError(f"--against {args.against}: weights-only files need --model's architecture",
                             fix="pass --model as package.module:callable or a transformers directory")
    return other.model, None
