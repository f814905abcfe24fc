"""What every command needs: the model, the rank policy, the sample and calibration inputs, and output files.

Each command turns its options into a :class:`factorize.Policy` plus keyword options (:class:`Options`) and
calls the library; the checks here are about the command line's own options (which flags go together), with
messages that name the flags.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from factorize.calibrated.options import refuse_with_calibration
from factorize.checkpoints.models import LoadedModel, load_model
from factorize.choices import AWARE_METHODS, METHODS
from factorize.default import CALIBRATION_SENTENCES, HELDOUT_SENTENCES, load_digits_split
from factorize.errors import DriftLimitExceeded, FactorizeError, StatisticsMemoryError
from factorize.execution import Execution
from factorize.measure.inputs import (
    SampleInputs,
    check_inputs,
    load_inputs,
    parse_shape,
    prepare,
    random_inputs,
    sentences_inputs,
)
from factorize.plan.ranks import POLICY_KEYS, Override, Policy
from factorize.plan.recipe import load_recipe
from factorize.storage import check_output_path, write_atomic

from .parser import OUTPUT_SUFFIX
from .render import UI

# ---------------------------------------------------------------------------------------------------------------
# the model and the policy


def load(args, ui: UI) -> LoadedModel:
    """The model named by --model (and --weights), with a note on stderr saying what was loaded."""
    if ui.quiet and Path(args.model).is_dir():
        with contextlib.suppress(ImportError):  # transformers draws its own progress bars on stderr
            from transformers.utils import logging as hf_logging

            hf_logging.disable_progress_bar()
    device = compute_device(args)  # a missing GPU is reported before the model is loaded
    checkpoint_only = getattr(args, "cluster", None) is not None  # tasks run elsewhere: never load the model here
    loaded = load_model(args.model, weights=args.weights, allow_pickle=args.allow_pickle,
                        checkpoint_only=checkpoint_only)
    ui.note(f"model: {loaded.source} ({loaded.kind})")
    if device is not None and loaded.model is not None:
        loaded.model.to(device)  # inputs follow the model (measure.inputs.prepare), factors are built beside it
        ui.note(f"device: {device}")
    elif device is not None and device.type != "cpu":
        ui.warn("weights-only mode streams the file on the CPU: --device is not used")
    warn_nonfinite_weights(loaded, ui)
    return loaded


# ---------------------------------------------------------------------------------------------------------------
# device, threads and output dtype (--device, --threads, --dtype)


def compute_device(args):
    """The torch.device of --device (None when not given; --threads is applied around the whole command, see
    :func:`factorize.cli._dispatch`); a CUDA device that torch
    does not see is refused (exit 2) before anything is loaded."""
    import torch

    name = getattr(args, "device", None)
    if name is None:
        return None
    device = torch.device(name)
    if device.type == "cuda":
        if not torch.cuda.is_available():
            raise FactorizeError(f"--device {name}: torch sees no CUDA GPU on this machine",
                                 fix="drop --device (or pass --device cpu), or install a CUDA build of torch")
        count = torch.cuda.device_count()
        if device.index is not None and device.index >= count:
            raise FactorizeError(f"--device {name}: this machine has {count} CUDA device(s), numbered from 0",
                                 fix=f"pass --device cuda:0 ... cuda:{count - 1}")
    return device


def execution(args, ui: UI) -> Execution:
    """How the command's work runs, built once from its flags and passed whole to the library: --workers, --seed
    (of randomized decompositions), --threads, and progress bars (on unless --quiet or --json)."""
    return Execution(workers=getattr(args, "workers", 1), seed=getattr(args, "seed", 0), progress=ui.progress,
                     threads=getattr(args, "threads", None))


def output_dtype(args, model):
    """``model`` cast to --dtype for saving (the same object, cast in place), or unchanged without --dtype."""
    import torch

    name = getattr(args, "dtype", None)
    return model if name is None else model.to(getattr(torch, name))


def warn_nonfinite_weights(loaded: LoadedModel, ui: UI) -> None:
    """Name every parameter or buffer holding NaN or Inf (layers that are factored raise their own error; this
    catches the others, e.g. excluded ones, whose NaN would otherwise show only as a non-finite drift)."""
    if loaded.model is None:
        return
    import torch

    meta = [name for name, t in loaded.model.state_dict().items() if t.is_meta]
    if meta:  # shapes without values: refused up front, before any work
        raise FactorizeError(f"--model {loaded.source}: {len(meta)} tensor(s) are on the meta device (shapes only, "
                             "no values)", meta[:20], fix="build the model with real weights (load its state dict, "
                             "or call model.to_empty(device='cpu') and load the weights, before returning it)")
    bad = [f"{name} ({int((~torch.isfinite(t)).sum())})" for name, t in loaded.model.state_dict().items()
           if t.is_floating_point() and not bool(torch.isfinite(t).all())]
    if bad:
        ui.warn(f"{len(bad)} tensor(s) of the model hold NaN or Inf values (count): {', '.join(bad[:10])}"
                + (", ..." if len(bad) > 10 else "") + "; the outputs and every drift number will be unreliable")


@dataclass
class Options:
    """The rank policy and layer selection asked for: the recipe's values, then the options given (which win)."""

    rule: dict[str, Any]  # the one rank rule ({"budget": 0.5}), or {} when the command chooses it (sweep)
    multiple: int = 1
    cost: str = "params"
    overrides: tuple[Override, ...] = ()
    include: list[str] | None = None
    exclude: list[str] | None = None
    method: str | None = None  # None: the library's default
    seed: int = 0
    precisions: tuple[str, ...] | None = None  # stored precisions allowed with cost="bytes" (None: the default)

    def policy(self, **rule: Any) -> Policy:
        """The :class:`factorize.Policy` for this rule (default: the one asked for): rank rule, selection, method,
        seed, rounding, cost and overrides, built by the library's one constructor."""
        return Policy.from_keywords(**(rule or self.rule), **self.selection())

    def selection(self) -> dict[str, Any]:
        """Every policy keyword but the rank rule (for --target-drift, where the search chooses the budget)."""
        return {"include": self.include, "exclude": self.exclude, "method": self.method, "seed": self.seed,
                "multiple": self.multiple, "cost": self.cost, "overrides": self.overrides,
                "precisions": self.precisions}


def options(args, ui: UI, *, default_budget: float | None = 0.5) -> Options:
    """The :class:`Options` of --recipe plus the command-line options; the budget is ``default_budget`` when
    neither names a rule."""
    found: dict[str, Any] = {}
    if getattr(args, "recipe", None):
        recipe = load_recipe(args.recipe)
        found = recipe.compress_kwargs()
        ui.note(f"recipe: {recipe.source}: {recipe.description}")
        if recipe.calibration and not getattr(args, "calibration", None):
            ui.warn(f"this recipe needs calibration inputs for good results ({recipe.calibration}); "
                    "pass --calibration FILE")
    chosen = {k: getattr(args, k, None) for k in POLICY_KEYS}
    chosen = {k: v for k, v in chosen.items() if v is not None}
    if len(chosen) > 1:
        raise FactorizeError(f"give one rank policy, not {len(chosen)} ({', '.join('--' + k for k in chosen)})",
                             fix="keep one of --budget, --rank, --energy, --keep")
    rule = chosen or {k: found[k] for k in POLICY_KEYS if k in found}
    if not rule and default_budget is not None:
        rule = {"budget": default_budget}
    for key in ("include", "exclude", "method", "multiple", "cost", "precisions"):
        value = getattr(args, key, None)
        if value is not None:
            found[key] = value
    return Options(rule=rule, multiple=found.get("multiple", 1), cost=found.get("cost", "params"),
                   overrides=tuple(found.get("overrides") or ()), include=found.get("include"),
                   exclude=found.get("exclude"), method=found.get("method"), seed=getattr(args, "seed", 0),
                   precisions=found.get("precisions"))


# ---------------------------------------------------------------------------------------------------------------
# sample and calibration inputs


def sample_inputs(args, loaded: LoadedModel, ui: UI, *, by_length: bool = True) -> SampleInputs | None:
    """The sample inputs named on the command line, or the model's built-in default; None when there are none.
    Sentences are grouped by length unless ``by_length`` is False (see :func:`sentences_inputs`)."""
    if args.batch_size < 1:
        raise FactorizeError(f"--batch-size must be >= 1, got {args.batch_size}", fix="e.g. --batch-size 32")
    if args.max_samples is not None and args.max_samples < 1:
        raise FactorizeError(f"--max-samples must be >= 1, got {args.max_samples}", fix="e.g. --max-samples 256")
    if args.inputs and args.random_inputs:
        raise FactorizeError("--inputs and --random-inputs exclude each other", fix="give one of them")
    if args.inputs:
        inputs = load_inputs(args.inputs, batch_size=args.batch_size, labels_key=args.labels_key,
                             tokenizer=loaded.tokenizer, limit=args.max_samples, by_length=by_length)
        source = args.inputs
    elif args.random_inputs:
        shape = parse_shape(args.random_inputs)
        if args.max_samples:
            shape = (min(shape[0], args.max_samples), *shape[1:])
        inputs = random_inputs(loaded.model, shape, batch_size=args.batch_size, seed=args.seed)
        source = f"--random-inputs {args.random_inputs}"
    else:
        inputs = _default_inputs(loaded, args, by_length)
        if inputs is None:
            return None
        source = inputs.source
    inputs = _checked(inputs, loaded, source, ui)
    ui.note(f"sample inputs: {inputs.source}")
    return inputs


def _checked(inputs: SampleInputs, loaded: LoadedModel, source: str, ui: UI) -> SampleInputs:
    """Warn about what the loader noticed, cast to the model's dtype, and check the first layer accepts them."""
    for note in inputs.notes:
        ui.warn(note)
    inputs = prepare(inputs, loaded.model)
    refuse_nonfinite_inputs(inputs, source)
    check_inputs(loaded.model, inputs, source)
    return inputs


def refuse_nonfinite_inputs(inputs: SampleInputs, source: str) -> None:
    """NaN or Inf in float sample inputs make every drift number meaningless (and top-1 agreement of NaN outputs
    reads 100%): refuse them, saying where."""
    import torch

    bad = []
    for i, batch in enumerate(inputs.batches):
        items = batch.items() if isinstance(batch, dict) else enumerate(batch if isinstance(batch, (list, tuple))
                                                                         else [batch])
        for key, t in items:
            if isinstance(t, torch.Tensor) and t.is_floating_point() and not bool(torch.isfinite(t).all()):
                bad.append(f"batch {i}" + (f", {key}" if isinstance(key, str) else "") +
                           f": {int((~torch.isfinite(t)).sum())} NaN or Inf value(s)")
    if bad:
        raise FactorizeError(f"{source}: the sample inputs hold NaN or Inf values, so no drift can be measured",
                             bad[:20], fix="clean the sample file (e.g. numpy.nan_to_num) or pass another one")


def _default_inputs(loaded: LoadedModel, args, by_length: bool = True) -> SampleInputs | None:
    """The embedded default's held-out digits; the built-in held-out sentences for a model with a tokenizer."""
    if loaded.is_default and loaded.path is None:
        x, y = load_digits_split("test")
        if args.max_samples:
            x, y = x[: args.max_samples], y[: args.max_samples]
        return SampleInputs(batches=list(x.split(args.batch_size)), labels=y, count=len(y),
                            source=f"held-out digits (UCI, Alpaydin & Kaynak): {len(y)} samples")
    if loaded.tokenizer is not None:
        lines = list(HELDOUT_SENTENCES)[: args.max_samples]
        inputs = sentences_inputs(lines, loaded.tokenizer, batch_size=args.batch_size,
                                  source="built-in held-out English sentences", by_length=by_length)
        inputs.notes.append("no --inputs given: drift is measured on built-in English sentences; pass --inputs "
                            "with text from your own domain")
        return inputs
    return None


def calibration_inputs(args, loaded: LoadedModel, ui: UI, opts: Options) -> SampleInputs | None:
    """The --calibration sample inputs, loaded and checked like --inputs. Without --calibration: for a model with a
    tokenizer, the built-in English calibration sentences (see :func:`builtin_calibration`); else None."""
    path = getattr(args, "calibration", None)
    if getattr(args, "no_calibration", False):
        if path:
            raise FactorizeError("--calibration and --no-calibration exclude each other", fix="give one of them")
        return None
    if not path:
        return builtin_calibration(args, loaded, ui, opts)
    calib = load_inputs(path, batch_size=args.batch_size, labels_key=args.labels_key, tokenizer=loaded.tokenizer,
                        flag="--calibration")
    calib = _checked(calib, loaded, path, ui)
    if args.inputs and Path(args.inputs).resolve() == Path(path).resolve():
        ui.warn("--calibration and --inputs are the same file: the factors were fitted to the inputs drift is "
                "measured on, so the drift shown is optimistic")
    ui.note(f"calibration inputs: {calib.source}")
    return calib


def builtin_calibration(args, loaded: LoadedModel, ui: UI, opts: Options) -> SampleInputs | None:
    """The built-in English calibration sentences, for a model with a tokenizer given no --calibration.

    Plain truncated SVD ignores what the layers see, and on a pretrained sentence encoder at budget 0.5 that is the
    difference between a mean held-out cosine of 0.47 and 0.91 (BENCHMARKS.md, "Calibrated by default"); generic
    English fits the factors far better than none. The sentences are never among the built-in held-out ones drift
    is measured on by default. Not used (None) with --no-calibration, for a model without a tokenizer, or where the
    user asked for what calibration cannot honour: a plain decomposition method, --cache or --speed-check (a note
    says so)."""
    if loaded.tokenizer is None or loaded.weights_only:
        return None
    blockers = [flag for flag, on in (
        (f"--method {opts.method}", opts.method in METHODS and opts.method != "auto"),
        ("--cache", bool(getattr(args, "cache", None))),
        ("--speed-check", bool(getattr(args, "speed_check", False)))) if on]
    if blockers:
        ui.note(f"not fitted to the built-in calibration sentences: {', '.join(blockers)} asks for plain truncated "
                "SVD; pass --calibration FILE for activation-aware factors")
        return None
    inputs = sentences_inputs(list(CALIBRATION_SENTENCES), loaded.tokenizer, batch_size=args.batch_size,
                              source="built-in English calibration sentences")
    inputs.builtin = True
    inputs = _checked(inputs, loaded, inputs.source, ui)
    ui.note(f"calibration inputs: {inputs.source}, none of them among the built-in held-out sentences; pass "
            "--calibration with text from your own domain, or --no-calibration for plain truncated SVD")
    return inputs


def drop_builtin_calibration(err: StatisticsMemoryError, calibration: SampleInputs | None, ui: UI,
                             instead: str) -> None:
    """After calibration statistics were refused for memory (``err``, before anything large was allocated): raise
    it again where the user gave the calibration inputs; for the built-in sentences, which nobody asked for, warn
    that the run goes on as ``instead`` says (plain truncated SVD)."""
    if calibration is None or not calibration.builtin:
        raise err
    ui.warn(f"not fitted to the built-in calibration sentences: {err.message}; {instead} (--no-calibration says so "
            "up front; --calibration FILE with --exclude for the widest layers keeps activation-aware factors for "
            "the rest)")


def quality_keywords(args, calibration: SampleInputs | None, inputs: SampleInputs | None,
                     opts: Options) -> dict[str, Any]:
    """compress() options for activation-aware factors, target drift, cache, workers and the speed check, after
    checking which of those flags go together."""
    target = getattr(args, "target_drift", None)
    wanted = [flag for flag, on in (
        (f"--method {opts.method}", opts.method in AWARE_METHODS),
        ("--sequential", getattr(args, "sequential", None) is True),
        ("--sensitivity", getattr(args, "sensitivity", False)),
        ("--target-drift", target is not None), ("--heal", getattr(args, "heal", None) is not None)) if on]
    if wanted and calibration is None:
        raise FactorizeError(f"{', '.join(wanted)} needs --calibration FILE",
                             fix="pass --calibration with sample inputs of your own (kept apart from --inputs)")
    if calibration is None:
        return {"cache": getattr(args, "cache", None), "workers": getattr(args, "workers", 1),
                "speed_check": getattr(args, "speed_check", False)}
    refuse_with_calibration(speed_check=bool(getattr(args, "speed_check", False)),
                            cache=bool(getattr(args, "cache", None)), flags=True)
    sequential = "auto" if args.sequential is None else args.sequential
    extra = {"calibration": calibration.batches, "sequential": sequential, "sensitivity": args.sensitivity,
             "workers": getattr(args, "workers", 1)}
    if target is not None:
        for k in POLICY_KEYS:
            if getattr(args, k, None) is not None:
                raise FactorizeError(f"--target-drift chooses the budget itself; it cannot be combined with --{k}",
                                     fix=f"drop --{k} or --target-drift")
        if inputs is None:
            raise FactorizeError("--target-drift needs --inputs to measure drift on",
                                 fix="pass --inputs FILE with held-out samples (not the calibration file)")
        extra.update(max_drift=target, heldout=inputs.batches,
                     drift_metric=getattr(args, "drift_metric", None) or "relative_l2")
    return extra


def alternatives(model, result, inputs, report, memo: dict, args, ui: UI, *, plan=None) -> list:
    """The plain alternatives at the plan's size on the report's inputs (:func:`factorize.alternatives.
    compare_alternatives`); a healed plan is compared as healed, the alternatives are not healed."""
    from factorize.alternatives import compare_alternatives

    ui.note("measuring the plain alternatives at the same size (int8 alone, rank alone, rank and precision "
            "together); --no-alternatives skips this")
    found = compare_alternatives(model, result, inputs.batches, plan=plan, drift=report.drift, memo=memo,
                                 pooling=getattr(args, "pooling", None), kind=getattr(args, "output_kind", None))
    if getattr(args, "heal", None):
        for a in found:
            if a.this_plan:
                a.note = "healed after compression; the others are not"
    return found


def repeats(args, default: int) -> int:
    value = default if getattr(args, "repeats", None) is None else args.repeats
    if value < 0:
        raise FactorizeError(f"--repeats must be >= 0, got {value}", fix="e.g. --repeats 7, or 0 to skip timing")
    return value


def max_drift_check(args, report) -> None:
    """Exit 1 (DriftLimitExceeded) when the measured drift is above --max-drift."""
    limit = getattr(args, "max_drift", None)
    if limit is None:
        return
    measured = report.drift["relative_l2"]
    if measured > limit:
        raise DriftLimitExceeded(
            f"relative L2 output drift {measured:.4g} is above --max-drift {limit:g} "
            f"(measured on {report.samples} sample inputs); nothing was written"
        )


# ---------------------------------------------------------------------------------------------------------------
# weights-only mode


def weights_only_checks(args) -> None:
    """Weights-only mode (a bare safetensors file) has no model to run: refuse the options that need one."""
    if getattr(args, "inputs", None) or getattr(args, "random_inputs", None):
        raise FactorizeError("sample inputs need a model to run, and weights-only mode (a bare safetensors file) "
                             "has none",
                             fix="drop --inputs/--random-inputs, or pass --model package.module:callable "
                             "--weights FILE")
    flags = [f for f, on in (("--calibration", getattr(args, "calibration", None)),
                             ("--heal", getattr(args, "heal", None)),
                             ("--speed-check", getattr(args, "speed_check", False)),
                             ("--target-drift", getattr(args, "target_drift", None))) if on]
    if flags:
        raise FactorizeError(f"{', '.join(flags)} need a model to run, and weights-only mode (a bare safetensors "
                             "file) has none", fix="pass --model package.module:callable --weights FILE")


@contextlib.contextmanager
def weights_file(loaded: LoadedModel):
    """A safetensors path for weights-only mode (a pickled checkpoint, opted in, is converted to a temp file)."""
    if loaded.kind != "pickle":
        yield loaded.path
        return
    from safetensors.torch import save_file

    with tempfile.TemporaryDirectory(prefix="factorize-") as d:
        tmp = Path(d) / (loaded.path.stem + ".safetensors")
        save_file({k: v.detach().clone().contiguous() for k, v in loaded.tensors.items()}, str(tmp))
        yield tmp


# ---------------------------------------------------------------------------------------------------------------
# output files


def output_path(args, loaded: LoadedModel) -> Path:
    """--output, or the input's name with OUTPUT_SUFFIX beside it (a directory of shards for a sharded input)."""
    if args.output:
        return Path(args.output)
    base = loaded.path
    if base is None:  # a callable without a weights file: name it after the callable, in the working directory
        return Path(args.model.rpartition(":")[2].replace(".", "_") + OUTPUT_SUFFIX)
    base = Path(base)
    if base.is_dir() and loaded.weights_only:  # a bare checkpoint's directory gives a directory, as its index does
        return base.parent / (base.name + OUTPUT_SUFFIX.removesuffix(".safetensors"))
    if base.is_dir():
        return base.parent / (base.name + OUTPUT_SUFFIX)
    if sharded(base):  # a sharded checkpoint gives a directory of shards
        return base.parent.with_name(base.parent.name + OUTPUT_SUFFIX.removesuffix(".safetensors"))
    return base.with_name(base.name.removesuffix(base.suffix) + OUTPUT_SUFFIX)


def writes_directory(args, loaded: LoadedModel, output: Path) -> bool:
    """Whether shrink writes a transformers directory (:func:`factorize.save_directory`): the input is a
    transformers directory and --output names a directory (no .safetensors suffix, or an existing directory)."""
    if loaded.kind != "transformers" or not args.output:
        return False
    return output.is_dir() or not output.name.lower().endswith(".safetensors")


def sharded(path: Path | None) -> bool:
    return path is not None and Path(path).name.endswith(".safetensors.index.json")


def directory_output(loaded: LoadedModel) -> bool:
    """Whether a weights-only shrink of ``loaded`` writes a directory: a sharded index or a directory given."""
    return loaded.weights_only and loaded.path is not None and (sharded(loaded.path) or Path(loaded.path).is_dir())


def check_outputs(paths: Sequence[Path | None], force: bool, *, directory: Path | None = None) -> None:
    """Refuse, before any work, outputs that exist (without --force) or cannot be written."""
    for p in paths:
        if p is not None:
            check_output_path(p, force=force, directory=p == directory)


def write_text(path: Path, text: str, force: bool) -> None:
    write_atomic(path, lambda tmp: tmp.write_text(text, encoding="utf-8"), force=force)


def optional_path(value: str | None) -> Path | None:
    return Path(value) if value else None



# ---------------------------------------------------------------------------------------------------------------
# nothing lost: no output may name an input or another output

INPUT_FLAGS = ("model", "weights", "inputs", "calibration", "recipe", "against")


def input_paths(args) -> dict[str, list[Path]]:
    """Every file (or directory) the command reads, by flag: --model/--weights/--inputs/--calibration/--recipe/
    --against when they name something on disk; a sharded index brings its shard files with it."""
    found: dict[str, list[Path]] = {}
    for flag in INPUT_FLAGS:
        value = getattr(args, flag, None)
        if not value or not Path(value).exists():
            continue
        p = Path(value)
        found[f"--{flag}"] = [p, *_shards_of(p)]
    return found


def _shards_of(p: Path) -> list[Path]:
    if not p.is_file() or not p.name.endswith(".safetensors.index.json"):
        return []
    import json

    try:
        index = json.loads(p.read_text(encoding="utf-8"))
        return [p.parent / s for s in set(index.get("weight_map", {}).values()) if isinstance(s, str)]
    except (OSError, ValueError, AttributeError, RecursionError):
        return []  # a broken index is reported by the loader, with its own message


def check_no_clobber(args, outputs: dict[str, Path | None]) -> None:
    """Refuse, before any work, an output that is an input (resolved, links included; --force does not change
    this), lies inside an input directory, holds an input (an output directory), or is another output."""
    inputs = input_paths(args)
    problems: list[str] = []
    seen: dict[Path, str] = {}
    for flag, out in outputs.items():
        if out is None:
            continue
        target = Path(out).resolve()
        for in_flag, paths in inputs.items():
            for p in paths:
                if _same(target, p):
                    problems.append(f"{flag} {out} is the {in_flag} file {p}")
                elif p.is_dir() and p.resolve() in target.parents:
                    problems.append(f"{flag} {out} lies inside the {in_flag} directory {p}")
                elif flag != "--cache" and target in p.resolve().parents:  # cache files have their own names
                    problems.append(f"{flag} {out} would hold the {in_flag} file {p}")
        if target in seen:
            problems.append(f"{flag} {out} is also {seen[target]}")
        seen.setdefault(target, flag)
    if problems:
        raise FactorizeError("an output would overwrite an input or another output; factorize never modifies its "
                             "inputs", list(dict.fromkeys(problems)),
                             fix="give each output (-o/--output, --report, --csv, --plot, --cache) its own new path")


def _same(target: Path, p: Path) -> bool:
    """``target`` (resolved) is ``p``: equal after resolving links, or the same file on disk (a hard link)."""
    if target == p.resolve():
        return True
    try:
        return target.exists() and os.path.samefile(target, p)
    except OSError:
        return False
