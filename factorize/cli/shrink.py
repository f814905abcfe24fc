"""``factorize shrink``: compress under a rank policy, measure on sample inputs, write the checkpoint and report."""

from __future__ import annotations

import dataclasses
import shutil
from pathlib import Path

from factorize.checkpoints import files
from factorize.checkpoints.directories import extra_files, save_directory
from factorize.checkpoints.models import looks_like_callable
from factorize.errors import FactorizeError, StatisticsMemoryError, printable
from factorize.measure.evaluate import evaluate, layer_reports
from factorize.measure.report import Report, render_rich
from factorize.model.count import count_bytes, count_parameters
from factorize.model.feed import batch_size
from factorize.outofcore.weights_only import shrink_checkpoint
from factorize.pipeline import compress
from factorize.plan.defaults import held_note
from factorize.training.heal import heal
from factorize.training.watch import label

from .common import (
    Options,
    alternatives,
    calibration_inputs,
    check_no_clobber,
    check_outputs,
    directory_output,
    drop_builtin_calibration,
    load,
    max_drift_check,
    optional_path,
    options,
    output_dtype,
    output_path,
    quality_keywords,
    repeats,
    sample_inputs,
    sharded,
    weights_file,
    weights_only_checks,
    write_text,
    writes_directory,
)
from .render import UI


def run(args, ui: UI) -> dict:
    check_no_clobber(args, _outputs(args))  # before anything is loaded
    opts = options(args, ui)
    policy = opts.policy()  # a bad policy is reported before the model is loaded
    if getattr(args, "blockwise", False):  # the model is never loaded whole
        return _shrink_blockwise(args, opts, policy, ui)
    if getattr(args, "cluster", None) is not None and (args.weights or looks_like_callable(args.model)):
        raise FactorizeError("--cluster runs the weights-only shrink of a safetensors checkpoint (or, with "
                             "--blockwise, the block-by-block shrink of a transformers directory); a model given "
                             "with its code is compressed in this process",
                             fix="drop --cluster, or pass the checkpoint: --model DIR, DIR/model.safetensors or "
                                 "DIR/model.safetensors.index.json")
    loaded = load(args, ui)  # with --cluster a directory is read as its bare checkpoint: nothing large is loaded
    output = output_path(args, loaded)
    report_path = optional_path(args.report)
    check_no_clobber(args, _outputs(args, output))  # the default output name is known now
    if loaded.path is not None and output.resolve() == Path(loaded.path).resolve():
        raise FactorizeError(f"{output}: is the input; factorize never overwrites its input",
                             fix="choose another --output")
    as_directory = writes_directory(args, loaded, output)
    check_outputs([output, report_path], args.force,
                  directory=output if sharded(loaded.path) or as_directory or directory_output(loaded) else None)
    ran: dict = {}
    if loaded.weights_only:
        if args.max_drift is not None:
            raise FactorizeError("--max-drift needs a model to run, and weights-only mode has none",
                                 fix="pass --model package.module:callable --weights FILE to measure drift")
        report, plan, ran = _shrink_weights_only(args, loaded, output, opts, ui)
    else:
        report, plan = _shrink_model(args, loaded, output, opts, policy, ui, as_directory)
    if report_path is not None:
        try:
            write_text(report_path, report.to_markdown(), args.force)
        except BaseException:  # no checkpoint without the report that was asked for
            if output.is_dir():
                shutil.rmtree(output, ignore_errors=True)
            else:
                output.unlink(missing_ok=True)
            raise
    if not ui.json_mode:
        render_rich(report, ui.out)
        ui.line(f"wrote {output}" + (f" and {report_path}" if report_path else ""))
        ui.steps(next_steps(output, loaded, report_path))
    return {"command": "shrink", "model": loaded.source, "output": str(output),
            "report_file": str(report_path) if report_path else None, "report": report.to_json(), "plan": plan,
            **ran}


def _outputs(args, output: Path | None = None) -> dict:
    return {"--output": output or optional_path(args.output), "--report": optional_path(args.report),
            "--cache": optional_path(args.cache)}


def _shrink_model(args, loaded, output: Path, opts: Options, policy, ui: UI, as_directory: bool = False):
    inputs = sample_inputs(args, loaded, ui)
    if args.max_drift is not None and inputs is None:
        raise FactorizeError("--max-drift needs sample inputs to measure drift on",
                             fix="pass --inputs FILE (or --random-inputs SHAPE)")
    calibration = calibration_inputs(args, loaded, ui, opts)
    try:
        result, inputs = _compressed(args, loaded, opts, policy, inputs, calibration, ui)
    except StatisticsMemoryError as err:
        drop_builtin_calibration(err, calibration, ui, "compressing with plain truncated SVD instead")
        calibration = None
        result, inputs = _compressed(args, loaded, opts, policy, inputs, calibration, ui)
    notes = list(inputs.notes) if inputs is not None else []
    notes += _calibration_notes(result, calibration) + _speed_notes(result.plan)
    notes += [n for n in [held_note(result.plan)] if n]  # a transformers model's input embedding, left dense
    if args.heal:
        notes += _heal(args, loaded, result, calibration, inputs, ui)
    if inputs is not None:
        memo: dict = {}  # the original's outputs, shared with the alternatives
        report = evaluate(loaded.model, result.model, inputs.batches, labels=inputs.labels, plan=result.plan,
                          latency_repeats=repeats(args, 7), title="factorize shrink", model_name=loaded.source,
                          inputs=inputs.source, notes=notes, progress=ui.progress,
                          pooling=getattr(args, "pooling", None), kind=getattr(args, "output_kind", None), memo=memo)
        max_drift_check(args, report)
        if not getattr(args, "no_alternatives", False):
            report.alternatives = alternatives(loaded.model, result, inputs, report, memo, args, ui)
    else:
        report = Report(title="factorize shrink", model=loaded.source, params_before=count_parameters(loaded.model),
                        params_after=count_parameters(result.model), bytes_before=count_bytes(loaded.model),
                        bytes_after=count_bytes(result.model), policy=result.plan["policy"],
                        layers=layer_reports(loaded.model, result.model, plan=result.plan),
                        notes=["no sample inputs given: output drift was not measured; pass --inputs FILE"])
        ui.warn(report.notes[0])
    if getattr(args, "dtype", None):
        report.notes.append(f"checkpoint stored as {args.dtype}; drift above was measured before the cast")
    stored = output_dtype(args, result.model)
    if as_directory:  # config, factorize weights, factorize.json and the input's other files: load_directory
        source = loaded.path if loaded.path is not None and Path(loaded.path).is_dir() else None
        if source is not None:
            report.notes.append(_copied_note(source))
        save_directory(stored, result.plan, output, tokenizer=None if source else loaded.tokenizer,
                       force=args.force, source=source)
    else:
        files.save(stored, output, plan=result.plan, force=args.force)
    return report, result.plan


def _compressed(args, loaded, opts: Options, policy, inputs, calibration, ui: UI):
    """compress() as the flags ask, and the sample inputs the report then measures on (with --target-drift, the
    part of them the budget was not chosen on)."""
    extra = quality_keywords(args, calibration, inputs, opts)
    if inputs is not None and calibration is None and args.speed_check:
        extra["speed_example"] = inputs.batches[0]
    if inputs is not None and calibration is None:
        extra["example"] = inputs.batches[0]  # the result is run on it (and multiply-accumulates counted there)
    if "max_drift" in extra:  # --target-drift chooses the budget itself, on one part of --inputs
        extra["heldout"], inputs = split_for_search(inputs, ui)
        return compress(loaded.model, progress=ui.progress, **opts.selection(), **extra), inputs
    return compress(loaded.model, policy, progress=ui.progress, **extra), inputs


def _copied_note(source: Path) -> str:
    """One line naming what the output directory takes over from the input, unchanged."""
    copied = [str(p) for p in extra_files(source)]
    if not copied:
        return f"nothing else in {source} to copy beside config.json and the weights"
    shown = ", ".join(copied[:6]) + (f" and {len(copied) - 6} more" if len(copied) > 6 else "")
    return (f"copied unchanged from {source}: {shown} (the original weights are not copied; run the result without "
            "factorize through 'factorize export', see docs/export.md)")


def split_for_search(inputs, ui: UI):
    """(batches the target-drift search selects the budget on, the inputs the report measures drift on): the
    held-out batches split in two, so the drift reported is not the one the budget was chosen for (that would be
    optimistic). With a single batch of one sample there is nothing to split: both use it, with a warning."""
    batches = list(inputs.batches)
    if len(batches) == 1:
        batches = _halves(batches[0])
    if len(batches) < 2:
        ui.warn("--target-drift: only one sample in --inputs, so the budget is chosen and reported on the same "
                "sample; the drift shown is optimistic")
        return inputs.batches, inputs
    half = len(batches) // 2
    chosen, report = batches[:half], batches[half:]
    n_chosen = sum(batch_size(b) for b in chosen)
    labels = None if inputs.labels is None else inputs.labels[n_chosen:]
    note = (f"target drift: the budget was chosen on the first {n_chosen} samples of --inputs and the drift "
            f"below is measured on the other {sum(batch_size(b) for b in report)}")
    return chosen, dataclasses.replace(inputs, batches=report, labels=labels, count=inputs.count - n_chosen,
                                       notes=[*inputs.notes, note])


def _halves(batch) -> list:
    """A batch (tensor, tuple/list or dict of tensors, samples first) as two halves; [batch] when it cannot be."""
    n = batch_size(batch)
    if n < 2:
        return [batch]
    cut = n // 2

    def part(lo, hi):
        if isinstance(batch, dict):
            return {k: v[lo:hi] if hasattr(v, "shape") else v for k, v in batch.items()}
        if isinstance(batch, (tuple, list)):
            return type(batch)(v[lo:hi] if hasattr(v, "shape") else v for v in batch)
        return batch[lo:hi]

    return [part(0, cut), part(cut, n)]


def _speed_notes(plan: dict) -> list[str]:
    """One note per layer the speed check kept dense, naming it and the times measured."""
    return [f"speed check: {name}: {e.get('reason')}" for name, e in plan["sites"].items()
            if isinstance(e, dict) and "measured slower" in str(e.get("reason", ""))]


def next_steps(output: Path, loaded, report_path: Path | None) -> str:
    """What to do with the result: reload it, measure it on your own inputs, or review the report."""
    model = f"--model {loaded.source}" if loaded.kind == "callable" and loaded.path is None else \
        (f"--model {loaded.source} --weights {loaded.path}" if loaded.kind == "callable" else "--model <your builder>")
    reload = f"factorize.load_directory('{output}')" if (output / "config.json").is_file() else \
        f"factorize.load(fresh_model, '{output}')"  # a directory with its config: no model to build by hand
    steps = [f"reload it with {reload} (dtype=torch.float32 to compute in float32)",
             f"measure it on your own inputs: factorize compare {model} --against {output} --inputs FILE"]
    if report_path is not None:
        steps.append(f"review {report_path}")
    return "next steps: " + "; ".join(steps)


def _calibration_notes(result, calibration) -> list[str]:
    if calibration is None:
        return []
    method = result.plan.get("calibration", {}).get("method", "whiten")
    notes = [f"activation-aware factors ({method}) fitted to {calibration.source}"]
    search = getattr(result, "search", None)
    if search is not None:
        walked = ", ".join(f"{p.budget:.3g} -> " + ("not feasible" if p.drift is None else f"{p.drift:.4g}")
                           for p in search.points)
        notes.append(f"target drift {search.max_drift:g} ({search.metric}): budgets tried (budget -> drift): {walked}")
    return notes


def _heal(args, loaded, result, calibration, inputs, ui: UI) -> list[str]:
    """Distil the compressed model towards the original on the calibration inputs; held-out: --inputs."""
    chosen = {k: v for k, v in (("lr", args.heal_lr), ("schedule", args.heal_schedule)) if v is not None}
    done = heal(result.model, loaded.model, calibration.batches, steps=args.heal,
                pooling=getattr(args, "pooling", None), heldout=inputs.batches if inputs is not None else None,
                progress=ui.progress, **chosen)
    result.plan["heal"] = done.to_dict(timings=False)  # seconds go to the report, not the file
    if inputs is None:
        ui.warn("--heal without --inputs: no held-out check, the last state is kept")
    drift = "" if done.initial_drift is None else \
        f"; {label(done.metric, done.pooling)} {done.initial_drift:.4g} -> {done.best_drift:.4g} " \
        f"(best step {done.best_step})"
    schedule = ", cosine schedule" if done.schedule == "cosine" else ""
    return [(f"healed {done.steps_run} steps ({done.loss} loss, lr {done.lr:g}{schedule}, {done.seconds:.1f} s)"
             f"{drift}: {done.reason}")]


def _shrink_weights_only(args, loaded, output: Path, opts: Options, ui: UI):
    weights_only_checks(args)
    policy = opts.policy()
    if policy.cost not in ("params", "bytes"):  # time and multiply-accumulates need the model to run
        ui.warn(f"weights-only mode counts parameters or stored bytes, not {policy.cost}: the cost is ignored")
        policy = dataclasses.replace(policy, cost="params")
    with weights_file(loaded) as src:
        done = shrink_checkpoint(src, output, policy, force=args.force, progress=ui.progress, cache_dir=args.cache,
                                 cluster=getattr(args, "cluster", None), threads=getattr(args, "threads", None) or 1)
    return done.report(loaded.source), done.plan, {"ran_on": done.engine, "redone": done.redone}


BLOCKWISE_REFUSED = (("--inputs", "inputs"), ("--random-inputs", "random_inputs"), ("--max-drift", "max_drift"),
                     ("--target-drift", "target_drift"), ("--heal", "heal"), ("--sensitivity", "sensitivity"),
                     ("--cache", "cache"), ("--speed-check", "speed_check"),
                     ("--weights", "weights"), ("--dtype", "dtype"), ("--device", "device"))


def checkpoint_directory(path: Path) -> Path:
    """The transformers directory behind ``--model`` for --blockwise: the directory itself, or the one holding the
    ``*.safetensors.index.json`` or single ``.safetensors`` file given, when that file is the checkpoint the
    directory holds (so a directory, its index and its single file name the same model)."""
    from factorize.checkpoints.files import open_checkpoint

    if path.is_dir():
        return path
    named = path.name.endswith(".safetensors.index.json") or path.suffix == ".safetensors"
    parent = path.parent if str(path.parent) else Path(".")
    if named and path.is_file() and (parent / "config.json").is_file():
        ckpt = open_checkpoint(parent)
        held = ckpt.index if ckpt.index is not None else ckpt.files[0].path
        if held.resolve() == path.resolve():
            return parent
    raise FactorizeError(f"--blockwise: --model {printable(str(path))} is not a transformers directory, nor the "
                         "index or single weights file of one",
                         fix="pass a transformers model directory (config.json and safetensors shards), or its "
                             "*.safetensors.index.json")


def _shrink_blockwise(args, opts: Options, policy, ui: UI) -> dict:
    """--blockwise: the calibrated shrink of a transformers directory one block at a time (never loaded whole)."""
    from factorize.measure.inputs import load_inputs
    from factorize.outofcore.blockwise import shrink_blockwise

    model_dir = checkpoint_directory(Path(args.model))
    if not getattr(args, "calibration", None):
        raise FactorizeError("--blockwise needs --calibration FILE (token ids, or text with the model's tokenizer)",
                             fix="pass --calibration with sample inputs of your own")
    given = [flag for flag, attr in BLOCKWISE_REFUSED if getattr(args, attr, None) not in (None, False)]
    if given:
        raise FactorizeError(f"--blockwise cannot be combined with {', '.join(given)}: the whole model is never "
                             "in memory here", fix="drop them; measure the result afterwards with 'factorize "
                             "compare' on a machine that holds the model")
    output = Path(args.output) if args.output else model_dir.parent / (model_dir.name + "-factorized")
    report_path = optional_path(args.report)
    check_no_clobber(args, _outputs(args, output))
    check_outputs([output, report_path], args.force, directory=output)
    tokenizer = None
    if str(args.calibration).lower().endswith(".txt"):
        try:
            from transformers import AutoTokenizer

            tokenizer = AutoTokenizer.from_pretrained(model_dir, local_files_only=True)
        except (ImportError, OSError, ValueError) as err:
            raise FactorizeError(f"{args.calibration}: text calibration needs the tokenizer of {model_dir}, which "
                                 f"could not be loaded ({type(err).__name__})",
                                 fix="save the tokenizer into the model directory, or pass token ids (.npy/.npz)") \
                from None
    calib = load_inputs(args.calibration, batch_size=args.batch_size, labels_key=args.labels_key,
                        tokenizer=tokenizer, flag="--calibration")
    ui.note(f"calibration inputs: {calib.source}")
    done = shrink_blockwise(model_dir, output, policy, calibration=calib.batches, force=args.force,
                            progress=ui.progress, cluster=getattr(args, "cluster", None),
                            threads=getattr(args, "threads", None),
                            sequential=bool(getattr(args, "sequential", False)))
    report = done.report(str(model_dir), calib.source)
    if report_path is not None:
        try:
            write_text(report_path, report.to_markdown(), args.force)
        except BaseException:
            shutil.rmtree(output, ignore_errors=True)
            raise
    if not ui.json_mode:
        render_rich(report, ui.out)
        ui.line(f"wrote {output}" + (f" and {report_path}" if report_path else ""))
    return {"command": "shrink", "model": str(model_dir), "output": str(output),
            "report_file": str(report_path) if report_path else None, "report": report.to_json(),
            "plan": done.plan, "memory": done.memory()}
