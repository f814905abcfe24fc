"""The ``factorize`` command line: scan, shrink, sweep, compare, demo.

Output rules: tables (rich) and the report go to stdout; progress bars (tqdm) and warnings go to stderr, and
progress vanishes with ``--quiet``. With ``--json`` stdout holds exactly one JSON object and nothing else (on
failure too: ``{"error": ...}``). Exit codes: 0 done, 1 a requested check failed (``--max-drift``), 2 bad usage
or bad input -- one clear message on stderr, no traceback.
"""

from __future__ import annotations

import argparse
import contextlib
import csv
import io as _io
import json
import math
import os
import shutil
import sys
import tempfile
import warnings
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from factorize.errors import DriftLimitExceeded, FactorizeError

PROG = "factorize"
DEFAULT_BUDGETS = (0.9, 0.75, 0.5, 0.3)
DEMO_BUDGETS = (0.3, 0.05)  # mild and strong, chosen from a measured sweep of the embedded default (docs/cli.md)
SCAN_ENERGY = 0.9  # scan suggests the smallest rank keeping this fraction of sum(s^2): relative weight error <= 0.32
OUTPUT_SUFFIX = ".factorized.safetensors"
SKETCH_LEVELS = " ▁▂▃▄▅▆▇█"  # spectrum sketch: one character per slice of the singular values, height = s / s_max
SKETCH_WIDTH = 12
PLOT_EXTRA = 'pip install "factorize[plot]"'


# ---------------------------------------------------------------------------------------------------------------
# entry point


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "command", None):
        parser.print_help(sys.stderr)
        return 2
    ui = UI(json_mode=args.json, quiet=args.quiet)
    try:
        with ui.capture_stdout(), warnings.catch_warnings():
            warnings.showwarning = lambda message, *_a, **_k: ui.warn(str(message))  # one line, no source echo
            result = args.handler(args, ui)
    except DriftLimitExceeded as err:
        return ui.fail(str(err), 1)
    except FactorizeError as err:
        return ui.fail(str(err), 2, problems=err.problems, fix=err.fix)
    except (FileNotFoundError, PermissionError, IsADirectoryError, NotADirectoryError) as err:
        where = f"{err.filename}: " if err.filename else ""
        return ui.fail(f"{where}{err.strerror or err}", 2, fix="check the path and its permissions")
    except KeyboardInterrupt:
        ui.err.print("interrupted; nothing was written")
        return 130
    except Exception as err:
        from safetensors import SafetensorError

        if isinstance(err, SafetensorError):
            return ui.fail(f"not a valid safetensors file: {err}", 2, fix="copy or save the file again")
        raise
    return ui.finish(result)


class UI:
    """The one reporting layer: stdout console (or one JSON object), stderr console, progress on/off."""

    def __init__(self, *, json_mode: bool, quiet: bool) -> None:
        from rich.console import Console

        self.json_mode, self.quiet = json_mode, quiet
        self.stdout = sys.stdout
        self.out = Console(file=self.stdout, width=_width(self.stdout), highlight=False)
        self.err = Console(file=sys.stderr, stderr=True, highlight=False, width=_width(sys.stderr))
        self.exit_code = 0

    @property
    def progress(self) -> bool:
        return not self.quiet

    @contextlib.contextmanager
    def capture_stdout(self):
        """In --json mode anything a library prints goes to stderr, so stdout holds only our JSON object."""
        if not self.json_mode:
            yield
            return
        with contextlib.redirect_stdout(sys.stderr):
            yield

    def warn(self, text: str) -> None:
        self.err.print(f"[yellow]warning:[/] {text}", markup=True)

    def note(self, text: str) -> None:
        if not self.quiet:
            self.err.print(text, markup=False)

    def fail(self, message: str, code: int, *, problems: Sequence[str] = (), fix: str | None = None) -> int:
        from rich.text import Text

        prefix = "error: " if code == 2 else "check failed: "
        self.err.print(Text(prefix, style="bold red") + Text(message), soft_wrap=True)
        if self.json_mode:
            payload = {"error": message.splitlines()[0], "problems": list(problems), "fix": fix, "exit_code": code}
            self.stdout.write(json.dumps(payload) + "\n")
        return code

    def finish(self, result: dict | None) -> int:
        if self.json_mode and result is not None:
            self.stdout.write(json.dumps(_finite(result), allow_nan=False) + "\n")
        return self.exit_code


def _width(stream) -> int | None:
    """Terminal width on a terminal or when COLUMNS is set (rich reads both); 120 columns into a pipe or file."""
    isatty = getattr(stream, "isatty", lambda: False)()
    return None if isatty or os.environ.get("COLUMNS") else 120


def _finite(value: Any) -> Any:
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {str(k): _finite(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_finite(v) for v in value]
    return value


# ---------------------------------------------------------------------------------------------------------------
# the parser


class _Formatter(argparse.RawDescriptionHelpFormatter):
    def __init__(self, prog: str) -> None:
        super().__init__(prog, max_help_position=32, width=100)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog=PROG,
        formatter_class=_Formatter,
        description="Shrink trained PyTorch models by low-rank factorization of their dense layers, and measure\n"
        "what it saved (parameters, bytes, multiply-accumulates, latency) and what it cost (output drift,\n"
        "accuracy) on sample inputs.",
        epilog=_examples(
            "factorize demo                                   # the whole job on the embedded digits model",
            "factorize scan --model mypkg.models:build --weights model.safetensors",
            "factorize shrink --model mypkg.models:build --weights model.safetensors --inputs samples.npz \\\n"
            "    --budget 0.5 --max-drift 0.05 --report review.md",
            "factorize sweep --model factorize.default:load_default --plot sweep.png",
            "factorize compare --model mypkg.models:build --weights model.safetensors \\\n"
            "    --against model.factorized.safetensors --inputs samples.npz",
        )
        + "\nRun 'factorize COMMAND --help' for each command's options. Exit codes: 0 done, 1 a requested check\n"
        "failed (--max-drift), 2 bad usage or bad input.",
    )
    from factorize._version import __version__

    parser.add_argument("--version", action="version", version=f"%(prog)s {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", title="commands")
    common, model, inputs, policy, out = _parents()

    p = sub.add_parser(
        "scan", parents=[common, model, _scan_options()], formatter_class=_Formatter,
        help="per-layer spectrum report: effective ranks, break-even, a suggested rank",
        description="List every factorizable layer with its shape, parameters, the rank needed to keep 90%, 99%\n"
        "and 99.9% of its spectral energy (sum of squared singular values), the break-even rank\n"
        "floor(mn/(m+n)) past which factoring saves nothing, a suggested rank, and a sketch of the\n"
        "singular-value decay (left: largest; bar height: s_i / s_max).",
        epilog=_examples(
            "factorize scan --model factorize.default:load_default",
            "factorize scan --model ./bert-dir --include '*encoder.layer.*'",
            "factorize scan --model checkpoint.safetensors --json     # weights-only mode",
        ),
    )
    p.set_defaults(handler=cmd_scan)

    p = sub.add_parser(
        "shrink", parents=[common, model, inputs, policy, out, _check_options(), _quality_options(shrink=True)],
        formatter_class=_Formatter,
        help="write a compressed checkpoint and its report",
        description="Factor the model's dense layers under a rank policy, measure the result on sample inputs,\n"
        "and write the compressed checkpoint (safetensors, with the plan in its metadata; reload it with\n"
        "factorize.load(model, path)). Without a policy option the budget is 0.5.",
        epilog=_examples(
            "factorize shrink --model factorize.default:load_default --budget 0.5",
            "factorize shrink --model mypkg.models:build --weights model.safetensors --inputs x.npz \\\n"
            "    --recipe recipes/mlp-classifier.toml --output small.safetensors --report review.md",
            "factorize shrink --model ./bert-dir --inputs sentences.txt --recipe bert-encoder.toml --max-drift 0.1",
            "factorize shrink --model checkpoint.safetensors --rank 64 --exclude '*embed*'   # weights-only mode",
            "factorize shrink --model ./bert-dir --calibration calib.txt --inputs heldout.txt --sensitivity \\\n"
            "    --target-drift 0.1 --heal 200",
        ),
    )
    p.set_defaults(handler=cmd_shrink)

    p = sub.add_parser(
        "sweep", parents=[common, model, inputs, _sweep_policy(), _sweep_options(), _quality_options(shrink=False)],
        formatter_class=_Formatter,
        help="evaluate a grid of budgets from one decomposition pass",
        description="Compress at each budget of a grid, reusing one decomposition of every layer, and tabulate\n"
        "parameters kept against output drift (and accuracy when labels are given) to find the knee of\n"
        "the curve.",
        epilog=_examples(
            "factorize sweep --model factorize.default:load_default --plot sweep.png",
            "factorize sweep --model mypkg.models:build --weights w.safetensors --inputs x.npz --budgets 0.8,0.6,0.4",
            "factorize sweep --model factorize.default:load_default --json --csv sweep.csv",
        ),
    )
    p.set_defaults(handler=cmd_sweep)

    p = sub.add_parser(
        "compare", parents=[common, model, inputs, _compare_options(), _check_options()], formatter_class=_Formatter,
        help="output drift between two models on sample inputs",
        description="Run two models on the same sample inputs and report the drift between their outputs.\n"
        "--against may be a compressed checkpoint written by 'factorize shrink' (loaded into a fresh\n"
        "instance of --model's architecture), a plain weights file for that architecture, or any\n"
        "other model (callable or transformers directory).",
        epilog=_examples(
            "factorize compare --model factorize.default:load_default --against load_default.factorized.safetensors",
            "factorize compare --model mypkg.models:build --weights a.safetensors --against b.safetensors --inputs x.npz",
        ),
    )
    p.set_defaults(handler=cmd_compare)

    p = sub.add_parser(
        "demo", parents=[common, _demo_options()], formatter_class=_Formatter,
        help="the whole job on the embedded digits classifier",
        description="Scan, shrink at a mild and a strong budget, measure accuracy on the held-out part of the\n"
        "handwritten-digits data (Alpaydin & Kaynak, UCI; as bundled with scikit-learn) before and after,\n"
        "measure drift, save and reload the compressed model. Writes nothing to disk.",
        epilog=_examples("factorize demo", "factorize demo --json", "factorize demo --budgets 0.6,0.2"),
    )
    p.set_defaults(handler=cmd_demo)
    return parser


def _examples(*lines: str) -> str:
    return "examples:\n" + "\n".join(f"  {line}" for line in lines)


def _parents():
    common = argparse.ArgumentParser(add_help=False)
    g = common.add_argument_group("output")
    g.add_argument("--json", action="store_true", help="print one JSON object on stdout and nothing else there")
    g.add_argument("--quiet", "-q", action="store_true", help="no progress bars or notes on stderr")

    model = argparse.ArgumentParser(add_help=False)
    g = model.add_argument_group("model")
    g.add_argument("--model", "-m", required=True, metavar="SPEC",
                   help="package.module:callable that builds the model, a transformers directory (config.json + "
                   "safetensors), or a bare .safetensors file (weights-only mode)")
    g.add_argument("--weights", "-w", metavar="FILE", help="a .safetensors state dict to load into the callable's model")
    g.add_argument("--allow-pickle", action="store_true",
                   help="allow pickled .pt/.pth/.bin checkpoints (loaded with torch.load(weights_only=True)); only "
                   "for files you trust")

    inputs = argparse.ArgumentParser(add_help=False)
    g = inputs.add_argument_group("sample inputs (where drift is measured)")
    g.add_argument("--inputs", "-i", metavar="FILE",
                   help=".safetensors/.npz/.npy tensors (first dimension = samples; labels under 'labels'), or a "
                   ".txt of sentences (one per line) for a transformers directory with a tokenizer")
    g.add_argument("--random-inputs", metavar="SHAPE",
                   help="seeded random inputs, e.g. 16x64 (16 samples of 64 features); they say little about real "
                   "drift")
    g.add_argument("--labels-key", default="labels", metavar="KEY", help="key of the labels in --inputs (default: labels)")
    g.add_argument("--batch-size", type=int, default=64, metavar="N", help="samples per forward pass (default: 64)")
    g.add_argument("--max-samples", type=int, metavar="N", help="use at most N samples")
    g.add_argument("--repeats", type=int, default=None, metavar="N",
                   help="timed forward passes per model for the median latency (0: do not time)")
    g.add_argument("--seed", type=int, default=0, metavar="N", help="seed for random inputs and randomized SVD")

    policy = argparse.ArgumentParser(add_help=False)
    g = policy.add_argument_group("rank policy (one of --budget/--rank/--energy/--keep; default --budget 0.5)")
    g.add_argument("--budget", type=_fraction("--budget"), metavar="F",
                   help="the selected layers together keep fraction F of their parameters, in (0, 1]")
    g.add_argument("--rank", type=_positive_int("--rank"), metavar="N", help="the same rank N in every layer")
    g.add_argument("--energy", type=_fraction("--energy"), metavar="T",
                   help="per layer, the smallest rank keeping fraction T of the sum of squared singular values")
    g.add_argument("--keep", type=_fraction("--keep"), metavar="F", help="each layer keeps fraction F of its parameters")
    _selection(g)
    g.add_argument("--recipe", metavar="FILE.toml", help="a TOML recipe (recipes/*.toml); options given here win")

    out = argparse.ArgumentParser(add_help=False)
    g = out.add_argument_group("files")
    g.add_argument("--output", "-o", metavar="FILE",
                   help=f"compressed checkpoint to write (default: next to the input, suffix {OUTPUT_SUFFIX})")
    g.add_argument("--report", metavar="FILE.md", help="also write the report as Markdown")
    g.add_argument("--force", "-f", action="store_true", help="replace existing output files")
    return common, model, inputs, policy, out


def _selection(g) -> None:
    g.add_argument("--include", action="append", metavar="GLOB",
                   help="only layers whose name matches (repeatable; fnmatch rules, '*' crosses dots)")
    g.add_argument("--exclude", action="append", metavar="GLOB", help="never factor matching layers (repeatable)")
    from factorize.spectra.decompose import METHODS

    g.add_argument("--method", choices=METHODS + AWARE_METHODS,
                   help="how to decompose: exact (LAPACK SVD), gram (eigensolve of the smaller Gram matrix), "
                   "randomized (Halko et al. 2011), auto (the library's choice; default); with --calibration: "
                   "whiten (reduced-rank regression on the layer inputs; the default there) or scale (per-channel "
                   "activation scaling)")
    g.add_argument("--multiple", type=_positive_int("--multiple"), metavar="N", help="round ranks to a multiple of N")


def _scan_options():
    p = argparse.ArgumentParser(add_help=False)
    g = p.add_argument_group("scan")
    g.add_argument("--include", action="append", metavar="GLOB", help="only layers whose name matches (repeatable)")
    g.add_argument("--exclude", action="append", metavar="GLOB", help="leave out matching layers (repeatable)")
    g.add_argument("--target-energy", type=_fraction("--target-energy"), default=SCAN_ENERGY, metavar="T",
                   help=f"the suggested rank keeps this fraction of sum(s^2) (default {SCAN_ENERGY})")
    g.add_argument("--multiple", type=_positive_int("--multiple"), default=1, metavar="N",
                   help="round suggested ranks up to a multiple of N")
    return p


AWARE_METHODS = ("whiten", "scale")


def _quality_options(*, shrink: bool):
    """Activation-aware factors, healing and speed options (shrink has them all, sweep the decomposition ones)."""
    p = argparse.ArgumentParser(add_help=False)
    g = p.add_argument_group("activation-aware factors" + (", healing" if shrink else "") + " and speed")
    g.add_argument("--calibration", "-c", metavar="FILE",
                   help="sample inputs (same formats as --inputs) the factors are fitted to: each layer keeps its "
                   "outputs on them (whitening); keep them apart from --inputs, where drift is measured")
    g.add_argument("--sequential", action="store_true",
                   help="with --calibration: factor layers in forward order, each fitted to the inputs the partly "
                   "compressed model gives it")
    g.add_argument("--sensitivity", nargs="?", const=True, default=False, choices=("gradients", "probes", "both"),
                   metavar="HOW",
                   help="with --calibration: allocate the budget by each layer's measured effect on the final output; "
                   "HOW: gradients (cheapest: one forward and two backward passes per batch), probes (truncation "
                   "probes, two per layer), both (the default)")
    g.add_argument("--cache", metavar="DIR", help="keep spectra in DIR so a later run on the same weights skips the SVD")
    g.add_argument("--workers", type=_positive_int("--workers"), default=1, metavar="N",
                   help="decompose N layers at a time (threads; results equal a serial run)")
    if shrink:
        g.add_argument("--target-drift", type=_nonnegative("--target-drift"), metavar="X",
                       help="with --calibration: the smallest budget whose relative L2 drift on --inputs stays <= X "
                       "(exit 1 with the closest budget when none does)")
        g.add_argument("--heal", type=_positive_int("--heal"), metavar="STEPS",
                       help="after compressing, fine-tune the factors for STEPS steps to match the original on "
                       "--calibration (distillation); the best state on --inputs is kept")
        g.add_argument("--heal-lr", type=_nonnegative("--heal-lr"), default=1e-4, metavar="LR",
                       help="learning rate for --heal (default 1e-4; the peak rate with --heal-schedule cosine)")
        g.add_argument("--heal-schedule", choices=("constant", "cosine"), default="constant",
                       help="learning-rate schedule for --heal: constant (default), or cosine (a 5%% linear warm-up, "
                       "then a half cosine down to zero)")
        g.add_argument("--speed-check", action="store_true",
                       help="time each factored layer against its dense form here (batch 1 and 32) and keep dense "
                       "the ones that are slower")
    return p


def _check_options():
    p = argparse.ArgumentParser(add_help=False)
    g = p.add_argument_group("checks")
    g.add_argument("--max-drift", type=_nonnegative("--max-drift"), metavar="X",
                   help="exit 1 (and write no checkpoint) when the relative L2 output drift is above X")
    return p


def _sweep_policy():
    p = argparse.ArgumentParser(add_help=False)
    g = p.add_argument_group("grid")
    g.add_argument("--budgets", type=_fractions, default=DEFAULT_BUDGETS, metavar="F,F,...",
                   help="budgets to evaluate (default: " + ",".join(map(str, DEFAULT_BUDGETS)) + ")")
    _selection(g)
    g.add_argument("--recipe", metavar="FILE.toml", help="take include/exclude/method/overrides from a recipe")
    return p


def _sweep_options():
    p = argparse.ArgumentParser(add_help=False)
    g = p.add_argument_group("files")
    g.add_argument("--csv", metavar="FILE", help="write the table as CSV")
    g.add_argument("--plot", metavar="FILE.png", help="plot parameters kept against drift (needs matplotlib)")
    g.add_argument("--force", "-f", action="store_true", help="replace existing output files")
    return p


def _compare_options():
    p = argparse.ArgumentParser(add_help=False)
    g = p.add_argument_group("the other model")
    g.add_argument("--against", "-a", required=True, metavar="SPEC",
                   help="a checkpoint from 'factorize shrink' or a weights file for --model's architecture, or "
                   "another model spec")
    g.add_argument("--report", metavar="FILE.md", help="also write the report as Markdown")
    g.add_argument("--force", "-f", action="store_true", help="replace an existing report file")
    return p


def _demo_options():
    p = argparse.ArgumentParser(add_help=False)
    g = p.add_argument_group("demo")
    g.add_argument("--budgets", type=_fractions, default=DEMO_BUDGETS, metavar="F,F",
                   help="budgets to shrink at (default: " + ",".join(map(str, DEMO_BUDGETS)) + ")")
    g.add_argument("--repeats", type=int, default=7, metavar="N", help="timed passes for latency (0: do not time)")
    return p


def _fraction(flag: str) -> Callable[[str], float]:
    def parse(text: str) -> float:
        try:
            v = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a number; {flag} takes a fraction in (0, 1]") from None
        if not 0 < v <= 1:
            raise argparse.ArgumentTypeError(f"{v} is outside (0, 1]; {flag} takes a fraction such as 0.5")
        return v

    return parse


def _fractions(text: str) -> tuple[float, ...]:
    parse = _fraction("--budgets")
    values = tuple(parse(t.strip()) for t in text.split(",") if t.strip())
    if not values:
        raise argparse.ArgumentTypeError("give at least one budget, e.g. 0.9,0.5")
    return values


def _positive_int(flag: str) -> Callable[[str], int]:
    def parse(text: str) -> int:
        try:
            v = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not an integer; {flag} takes an integer >= 1") from None
        if v < 1:
            raise argparse.ArgumentTypeError(f"{v} is below 1; {flag} takes an integer >= 1")
        return v

    return parse


def _nonnegative(flag: str) -> Callable[[str], float]:
    def parse(text: str) -> float:
        try:
            v = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a number; {flag} takes a number >= 0") from None
        if not v >= 0:
            raise argparse.ArgumentTypeError(f"{v} is negative; {flag} takes a number >= 0")
        return v

    return parse


# ---------------------------------------------------------------------------------------------------------------
# shared steps


def _load(args, ui: UI):
    from factorize.checkpoints.models import load_model

    if ui.quiet and Path(args.model).is_dir():
        with contextlib.suppress(ImportError):  # transformers draws its own progress bars on stderr
            from transformers.utils import logging as hf_logging

            hf_logging.disable_progress_bar()
    loaded = load_model(args.model, weights=args.weights, allow_pickle=args.allow_pickle)
    ui.note(f"model: {loaded.source} ({loaded.kind})")
    return loaded


def _policy_kwargs(args, ui: UI, *, default_budget: float | None = 0.5) -> dict:
    """compress() keyword arguments from --recipe plus the command-line options (which win)."""
    kwargs: dict[str, Any] = {}
    if getattr(args, "recipe", None):
        from factorize.plan.recipe import load_recipe

        recipe = load_recipe(args.recipe)
        kwargs = recipe.compress_kwargs()
        ui.note(f"recipe: {recipe.source}: {recipe.description}")
    chosen = {k: getattr(args, k, None) for k in ("budget", "rank", "energy", "keep")}
    chosen = {k: v for k, v in chosen.items() if v is not None}
    if len(chosen) > 1:
        raise FactorizeError(f"give one rank policy, not {len(chosen)} ({', '.join('--' + k for k in chosen)})",
                             fix="keep one of --budget, --rank, --energy, --keep")
    if chosen:
        for k in ("budget", "rank", "energy", "keep"):
            kwargs.pop(k, None)
        kwargs.update(chosen)
    elif not any(k in kwargs for k in ("budget", "rank", "energy", "keep")) and default_budget is not None:
        kwargs["budget"] = default_budget
    for key in ("include", "exclude", "method", "multiple"):
        value = getattr(args, key, None)
        if value is not None:
            kwargs[key] = value
    kwargs["seed"] = getattr(args, "seed", 0)
    return kwargs


def _sample_inputs(args, loaded, ui: UI):
    """The sample inputs named on the command line, or the model's built-in default; None when there are none."""
    from factorize.measure.inputs import (
        check_inputs,
        load_inputs,
        prepare,
        random_inputs,
    )

    if args.batch_size < 1:
        raise FactorizeError(f"--batch-size must be >= 1, got {args.batch_size}", fix="e.g. --batch-size 32")
    if args.max_samples is not None and args.max_samples < 1:
        raise FactorizeError(f"--max-samples must be >= 1, got {args.max_samples}", fix="e.g. --max-samples 256")
    if args.inputs and args.random_inputs:
        raise FactorizeError("--inputs and --random-inputs exclude each other", fix="give one of them")
    if args.inputs:
        inputs = load_inputs(args.inputs, batch_size=args.batch_size, labels_key=args.labels_key,
                             tokenizer=loaded.tokenizer, limit=args.max_samples)
        source = args.inputs
    elif args.random_inputs:
        from factorize.measure.inputs import parse_shape

        shape = parse_shape(args.random_inputs)
        if args.max_samples:
            shape = (min(shape[0], args.max_samples),) + shape[1:]
        inputs = random_inputs(loaded.model, shape, batch_size=args.batch_size, seed=args.seed)
        source = f"--random-inputs {args.random_inputs}"
    else:
        inputs = _default_inputs(loaded, args)
        if inputs is None:
            return None
        source = inputs.source
    for note in inputs.notes:
        ui.warn(note)
    inputs = prepare(inputs, loaded.model)
    check_inputs(loaded.model, inputs, source)
    ui.note(f"sample inputs: {inputs.source}")
    return inputs


def _default_inputs(loaded, args):
    """The embedded default's held-out digits; the built-in held-out sentences for a model with a tokenizer."""
    from factorize.measure.inputs import SampleInputs, sentences_inputs

    if loaded.is_default and loaded.path is None:
        from factorize.default import load_digits_split

        x, y = load_digits_split("test")
        if args.max_samples:
            x, y = x[: args.max_samples], y[: args.max_samples]
        return SampleInputs(batches=list(x.split(args.batch_size)), labels=y, count=len(y),
                            source=f"held-out digits (UCI, Alpaydin & Kaynak): {len(y)} samples")
    if loaded.tokenizer is not None:
        from factorize.default import HELDOUT_SENTENCES

        lines = list(HELDOUT_SENTENCES)[: args.max_samples]
        inputs = sentences_inputs(lines, loaded.tokenizer, batch_size=args.batch_size,
                                  source="built-in held-out English sentences")
        inputs.notes.append("no --inputs given: drift is measured on built-in English sentences; pass --inputs "
                            "with text from your own domain")
        return inputs
    return None


def _output_path(args, loaded) -> Path:
    if args.output:
        return Path(args.output)
    base = loaded.path
    if base is None:  # a callable without a weights file: name it after the callable, in the working directory
        return Path(args.model.rpartition(":")[2].replace(".", "_") + OUTPUT_SUFFIX)
    base = Path(base)
    if base.is_dir():
        return base.parent / (base.name + OUTPUT_SUFFIX)
    if _sharded(base):  # a sharded checkpoint gives a directory of shards
        return base.parent.with_name(base.parent.name + OUTPUT_SUFFIX.removesuffix(".safetensors"))
    return base.with_name(base.name.removesuffix(base.suffix) + OUTPUT_SUFFIX)


def _sharded(path: Path | None) -> bool:
    return path is not None and path.name.endswith(".safetensors.index.json")


def _check_outputs(paths: Sequence[Path | None], force: bool, *, directory: Path | None = None) -> None:
    from factorize.storage import check_output_path

    for p in paths:
        if p is not None:
            check_output_path(p, force=force, directory=p == directory)


def _write_text(path: Path, text: str, force: bool) -> None:
    from factorize.storage import write_atomic

    write_atomic(path, lambda tmp: tmp.write_text(text, encoding="utf-8"), force=force)


def _repeats(args, default: int) -> int:
    value = default if getattr(args, "repeats", None) is None else args.repeats
    if value < 0:
        raise FactorizeError(f"--repeats must be >= 0, got {value}", fix="e.g. --repeats 7, or 0 to skip timing")
    return value


def _max_drift_check(args, report) -> None:
    limit = getattr(args, "max_drift", None)
    if limit is None:
        return
    measured = report.drift["relative_l2"]
    if measured > limit:
        raise DriftLimitExceeded(
            f"relative L2 output drift {measured:.4g} is above --max-drift {limit:g} "
            f"(measured on {report.samples} sample inputs); nothing was written"
        )


def _require_inputs_for_check(args, inputs) -> None:
    if getattr(args, "max_drift", None) is not None and inputs is None:
        raise FactorizeError("--max-drift needs sample inputs to measure drift on",
                             fix="pass --inputs FILE (or --random-inputs SHAPE)")


# ---------------------------------------------------------------------------------------------------------------
# scan


def cmd_scan(args, ui: UI) -> dict:
    loaded = _load(args, ui)
    rows, skipped = _scan_weights_only(args, loaded, ui) if loaded.weights_only else _scan_model(args, loaded, ui)
    result = {"command": "scan", "model": loaded.source, "target_energy": args.target_energy, "layers": rows,
              "skipped": skipped, "params": sum(r["params"] for r in rows),
              "params_at_suggested": sum(r["params_at_suggested"] for r in rows)}
    if not ui.json_mode:
        _render_scan(result, ui)
    return result


def _scan_model(args, loaded, ui):
    from factorize.model.sites import walk
    from factorize.spectra.sites import decompose_sites

    found = walk(loaded.model, include=args.include, exclude=args.exclude)
    if not found.sites:
        raise FactorizeError("no factorizable layer found" + (" matching --include/--exclude" if args.include or
                             args.exclude else ""), [f"{s.name}: {s.reason}" for s in found.skipped],
                             fix="check the patterns against the model's module names")
    spectra = decompose_sites(loaded.model, [s for s in found.sites if not s.tied_with], progress=ui.progress)
    rows = [_scan_row(s, spectra.get(s.name), args) for s in found.sites]
    return rows, [{"name": s.name, "reason": s.reason} for s in found.skipped]


def _scan_weights_only(args, loaded, ui):
    from tqdm.auto import tqdm

    from factorize.spectra.decompose import decompose

    with _weights_file(loaded) as path:
        from factorize.checkpoints.files import open_checkpoint
        from factorize.checkpoints.stream import select

        chosen, passed = select(open_checkpoint(path), args.include, args.exclude)
        rows = []
        for c in tqdm(chosen, desc="decompose", unit="layer", disable=not ui.progress, leave=False):
            W = _read_tensor(c.weight_file.path, c.weight.name)
            rows.append(_scan_row(c.site, decompose(W, name=c.module), args))
    ui.note("weights-only mode: every 2-D tensor named <module>.weight is read as a linear layer's weight")
    return rows, [{"name": k, "reason": v} for k, v in passed.items()]


def _read_tensor(path, name: str):
    from safetensors import safe_open

    with safe_open(str(path), framework="pt", device="cpu") as f:
        return f.get_tensor(name)


def _scan_row(site, spec, args) -> dict:
    row = {"name": site.name, "kind": site.kind, "shape": list(site.shape), "params": site.params,
           "break_even": site.break_even}
    if spec is None:  # tied weight
        row.update(rank_90=None, rank_99=None, rank_999=None, suggested_rank=None, params_at_suggested=site.params,
                   spectrum=[], note=f"weight shared with {', '.join(site.tied_with)}; kept dense")
        return row
    row.update(rank_90=spec.rank_for_energy(0.9), rank_99=spec.rank_for_energy(0.99),
               rank_999=spec.rank_for_energy(0.999))
    r = spec.rank_for_energy(args.target_energy)
    r = int(math.ceil(r / args.multiple) * args.multiple)
    saves = site.saves_at(r)
    row.update(suggested_rank=r if saves else None, params_at_suggested=site.factored_params(r) if saves else site.params,
               predicted_error=spec.relative_error(r) if saves else 0.0, spectrum=spectrum_profile(spec.S.tolist()),
               note="" if saves else f"rank {r} for {args.target_energy:g} of the energy is past break-even; keep dense")
    return row


def spectrum_profile(singular_values: Sequence[float], width: int = SKETCH_WIDTH) -> list[float]:
    """The singular values in ``width`` equal slices of the index range, each slice's mean divided by s_max."""
    s = [float(v) for v in singular_values]
    if not s or s[0] <= 0:
        return [0.0] * min(width, len(s))
    k = len(s)
    width = min(width, k)
    out = []
    for i in range(width):
        lo, hi = i * k // width, max((i + 1) * k // width, i * k // width + 1)
        out.append(sum(s[lo:hi]) / (hi - lo) / s[0])
    return out


def spectrum_sketch(profile: Sequence[float]) -> str:
    """Unicode bars for :func:`spectrum_profile`: height proportional to s / s_max (a zero slice is a blank)."""
    top = len(SKETCH_LEVELS) - 1
    return "".join(SKETCH_LEVELS[min(top, max(0 if v <= 0 else 1, round(v * top)))] for v in profile)


def _render_scan(result: dict, ui: UI) -> None:
    from rich.table import Table

    table = Table(title=f"scan: {result['model']}", title_justify="left")
    for name, justify in (("layer", "left"), ("kind", "left"), ("shape", "left"), ("params", "right"),
                          ("r@90%", "right"), ("r@99%", "right"), ("r@99.9%", "right"), ("break-even", "right"),
                          ("suggested", "right"), ("spectrum", "left")):
        table.add_column(name, justify=justify, no_wrap=name in ("spectrum", "shape"))  # type: ignore[arg-type]
    for r in result["layers"]:
        m, n = r["shape"]
        table.add_row(r["name"], r["kind"], f"{m}x{n}", f"{r['params']:,}", _opt(r["rank_90"]), _opt(r["rank_99"]),
                      _opt(r["rank_999"]), str(r["break_even"]),
                      "dense" if r["suggested_rank"] is None else str(r["suggested_rank"]),
                      spectrum_sketch(r["spectrum"]))
    ui.out.print(table)
    before, after = result["params"], result["params_at_suggested"]
    ui.out.print(f"suggested ranks keep {result['target_energy']:g} of each layer's spectral energy: "
                 f"{before:,} -> {after:,} weight parameters ({after / before:.1%} kept). "
                 "Spectrum: slices of the singular values, largest first, bar height s / s_max.")
    for s in result["skipped"]:
        ui.out.print(f"skipped {s['name']}: {s['reason']}")


def _opt(v) -> str:
    return "-" if v is None else str(v)


@contextlib.contextmanager
def _weights_file(loaded):
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
# shrink


def cmd_shrink(args, ui: UI) -> dict:
    kwargs = _policy_kwargs(args, ui)
    loaded = _load(args, ui)
    output = _output_path(args, loaded)
    report_path = Path(args.report) if args.report else None
    if loaded.path is not None and output.resolve() == Path(loaded.path).resolve():
        raise FactorizeError(f"{output}: is the input; factorize never overwrites its input",
                             fix="choose another --output")
    _check_outputs([output, report_path], args.force, directory=output if _sharded(loaded.path) else None)
    if loaded.weights_only:
        if args.max_drift is not None:
            raise FactorizeError("--max-drift needs a model to run, and weights-only mode has none",
                                 fix="pass --model package.module:callable --weights FILE to measure drift")
        report, plan = _shrink_weights_only(args, loaded, output, kwargs, ui)
    else:
        report, plan = _shrink_model(args, loaded, output, kwargs, ui)
    if report_path is not None:
        try:
            _write_text(report_path, report.to_markdown(), args.force)
        except BaseException:  # no checkpoint without the report that was asked for
            if output.is_dir():
                shutil.rmtree(output, ignore_errors=True)
            else:
                output.unlink(missing_ok=True)
            raise
    if not ui.json_mode:
        from factorize.measure.report import render_rich

        render_rich(report, ui.out)
        ui.out.print(f"wrote {output}" + (f" and {report_path}" if report_path else ""))
    return {"command": "shrink", "model": loaded.source, "output": str(output),
            "report_file": str(report_path) if report_path else None, "report": report.to_json(), "plan": plan}


def _shrink_model(args, loaded, output: Path, kwargs: dict, ui: UI):
    from factorize.checkpoints import files as io
    from factorize.measure.evaluate import evaluate, layer_reports
    from factorize.measure.report import Report
    from factorize.model.count import count_bytes, count_parameters
    from factorize.pipeline import compress

    inputs = _sample_inputs(args, loaded, ui)
    _require_inputs_for_check(args, inputs)
    calibration = _calibration_inputs(args, loaded, inputs, ui)
    kwargs.update(_quality_kwargs(args, calibration, inputs, kwargs, ui))
    if inputs is not None and calibration is None and getattr(args, "speed_check", False):
        kwargs["speed_example"] = inputs.batches[0]
    result = compress(loaded.model, progress=ui.progress, **kwargs)
    notes = list(inputs.notes) if inputs is not None else []
    notes += _calibration_notes(result, calibration)
    if getattr(args, "heal", None):
        notes += _heal(args, loaded, result, calibration, inputs, ui)
    if inputs is not None:
        report = evaluate(loaded.model, result.model, inputs.batches, labels=inputs.labels, plan=result.plan,
                          latency_repeats=_repeats(args, 7), title="factorize shrink", model_name=loaded.source,
                          inputs=inputs.source, notes=notes, progress=ui.progress)
        _max_drift_check(args, report)
    else:
        report = Report(title="factorize shrink", model=loaded.source, params_before=count_parameters(loaded.model),
                        params_after=count_parameters(result.model), bytes_before=count_bytes(loaded.model),
                        bytes_after=count_bytes(result.model), policy=result.plan["policy"],
                        layers=layer_reports(loaded.model, result.model, plan=result.plan),
                        notes=["no sample inputs given: output drift was not measured; pass --inputs FILE"])
        ui.warn(report.notes[0])
    io.save(result.model, output, plan=result.plan, force=args.force)
    return report, result.plan


def _calibration_inputs(args, loaded, inputs, ui: UI):
    """The --calibration sample inputs, loaded and checked like --inputs; None when not given."""
    path = getattr(args, "calibration", None)
    if not path:
        return None
    from factorize.measure.inputs import check_inputs, load_inputs, prepare

    calib = load_inputs(path, batch_size=args.batch_size, labels_key=args.labels_key, tokenizer=loaded.tokenizer)
    for note in calib.notes:
        ui.warn(note)
    calib = prepare(calib, loaded.model)
    check_inputs(loaded.model, calib, path)
    if args.inputs and Path(args.inputs).resolve() == Path(path).resolve():
        ui.warn("--calibration and --inputs are the same file: the factors were fitted to the inputs drift is "
                "measured on, so the drift shown is optimistic")
    ui.note(f"calibration inputs: {calib.source}")
    return calib


def _quality_kwargs(args, calibration, inputs, kwargs: dict, ui: UI) -> dict:
    """compress() options for activation-aware factors, target drift, cache, workers and the speed check."""
    target = getattr(args, "target_drift", None)
    wanted = [flag for flag, on in (
        ("--method " + str(kwargs.get("method")), kwargs.get("method") in AWARE_METHODS),
        ("--sequential", getattr(args, "sequential", False)), ("--sensitivity", getattr(args, "sensitivity", False)),
        ("--target-drift", target is not None), ("--heal", getattr(args, "heal", None) is not None)) if on]
    if wanted and calibration is None:
        raise FactorizeError(f"{', '.join(wanted)} needs --calibration FILE",
                             fix="pass --calibration with sample inputs of your own (kept apart from --inputs)")
    if calibration is None:
        return {"cache": getattr(args, "cache", None), "workers": getattr(args, "workers", 1),
                "speed_check": getattr(args, "speed_check", False)}
    problems = [f for f, on in (("--cache", getattr(args, "cache", None)), ("--workers", getattr(args, "workers", 1) > 1),
                                ("--speed-check", getattr(args, "speed_check", False))) if on]
    if problems:
        raise FactorizeError(f"{', '.join(problems)} cannot be combined with --calibration yet",
                             fix="drop them, or compress without --calibration")
    kwargs.pop("seed", None)
    extra = {"calibration": calibration.batches, "sequential": args.sequential, "sensitivity": args.sensitivity}
    if target is not None:
        for k in ("budget", "rank", "energy", "keep"):
            if getattr(args, k, None) is not None:
                raise FactorizeError(f"--target-drift chooses the budget itself; it cannot be combined with --{k}",
                                     fix=f"drop --{k} or --target-drift")
            kwargs.pop(k, None)
        if inputs is None:
            raise FactorizeError("--target-drift needs --inputs to measure drift on",
                                 fix="pass --inputs FILE with held-out samples (not the calibration file)")
        extra.update(max_drift=target, heldout=inputs.batches)
    return extra


def _calibration_notes(result, calibration) -> list[str]:
    if calibration is None:
        return []
    notes = [f"activation-aware factors ({result.plan.get('calibration', {}).get('method', 'whiten')}) fitted to "
             f"{calibration.source}"]
    search = getattr(result, "search", None)
    if search is not None:
        walked = ", ".join(f"{p.budget:.3g} -> " + ("not feasible" if p.drift is None else f"{p.drift:.4g}")
                           for p in search.points)
        notes.append(f"target drift {search.max_drift:g} ({search.metric}): budgets tried (budget -> drift): {walked}")
    return notes


def _heal(args, loaded, result, calibration, inputs, ui: UI) -> list[str]:
    """Distil the compressed model towards the original on the calibration inputs; held-out: --inputs."""
    from factorize.training.heal import heal

    done = heal(result.model, loaded.model, calibration.batches, steps=args.heal, lr=args.heal_lr,
                schedule=args.heal_schedule,
                heldout=inputs.batches if inputs is not None else None, progress=ui.progress)
    result.plan["heal"] = done.to_dict()
    if inputs is None:
        ui.warn("--heal without --inputs: no held-out check, the last state is kept")
    drift = "" if done.initial_drift is None else \
        f"; held-out {done.metric} {done.initial_drift:.4g} -> {done.best_drift:.4g} (best step {done.best_step})"
    schedule = ", cosine schedule" if done.schedule == "cosine" else ""
    return [f"healed {done.steps_run} steps ({done.loss} loss, lr {done.lr:g}{schedule}, {done.seconds:.1f} s){drift}: "
            f"{done.reason}"]


def _no_inputs_in_weights_only(args) -> None:
    if getattr(args, "inputs", None) or getattr(args, "random_inputs", None):
        raise FactorizeError("sample inputs need a model to run, and weights-only mode (a bare safetensors file) has none",
                             fix="drop --inputs/--random-inputs, or pass --model package.module:callable --weights FILE")


def _shrink_weights_only(args, loaded, output: Path, kwargs: dict, ui: UI):
    from factorize.checkpoints.stream import shrink_checkpoint

    _no_inputs_in_weights_only(args)
    _no_model_options_in_weights_only(args)
    kwargs = {k: v for k, v in kwargs.items() if k != "cost"}
    with _weights_file(loaded) as src:
        done = shrink_checkpoint(src, output, force=args.force, progress=ui.progress, cache_dir=args.cache, **kwargs)
    return _weights_only_report(done, loaded.source), done["plan"]


def _no_model_options_in_weights_only(args) -> None:
    flags = [f for f, on in (("--calibration", getattr(args, "calibration", None)),
                             ("--heal", getattr(args, "heal", None)), ("--speed-check", getattr(args, "speed_check", False)),
                             ("--target-drift", getattr(args, "target_drift", None))) if on]
    if flags:
        raise FactorizeError(f"{', '.join(flags)} need a model to run, and weights-only mode (a bare safetensors "
                             "file) has none", fix="pass --model package.module:callable --weights FILE")


def _weights_only_report(done: dict, source: str):
    from factorize.measure.report import LayerReport, Report

    layers = []
    for row in done["tensors"].values():
        m, n = row["shape"]
        rank = row["rank"] if row["action"] == "factor" else None
        layers.append(LayerReport(name=row["module"], kind="linear", shape=(m, n), rank=rank, params=m * n,
                                  params_after=m * n if rank is None else rank * (m + n),
                                  weight_error=row.get("relative_error", 0.0 if rank is None else None),
                                  predicted_error=row.get("predicted_error")))
    return Report(title="factorize shrink (weights-only)", model=source, params_before=done["params_before"],
                  params_after=done["params_after"], bytes_before=done["bytes_before"],
                  bytes_after=done["bytes_after"], layers=layers, policy=done["plan"]["policy"],
                  notes=["weights-only mode: there is no architecture to run, so output drift was not measured; "
                         "load the output into your model with factorize.load(model, path) and run "
                         "'factorize compare' on real inputs"])


# ---------------------------------------------------------------------------------------------------------------
# sweep


def cmd_sweep(args, ui: UI) -> dict:
    csv_path = Path(args.csv) if args.csv else None
    plot_path = Path(args.plot) if args.plot else None
    if plot_path is not None:
        _matplotlib()  # fail before any work when the plot cannot be drawn
    _check_outputs([csv_path, plot_path], args.force)
    kwargs = _policy_kwargs(args, ui, default_budget=None)
    loaded = _load(args, ui)
    for k in ("budget", "rank", "energy", "keep"):
        kwargs.pop(k, None)
    budgets = sorted(set(args.budgets), reverse=True)
    if loaded.weights_only:
        rows = _sweep_weights_only(args, loaded, budgets, kwargs, ui)
        inputs_source = None
    else:
        rows, inputs_source = _sweep_model(args, loaded, budgets, kwargs, ui)
    from factorize.measure.report import CAUTION

    result = {"command": "sweep", "model": loaded.source, "inputs": inputs_source, "rows": rows, "caution": CAUTION}
    if csv_path is not None:
        _write_text(csv_path, _csv_text(rows), args.force)
    if plot_path is not None:
        _plot_sweep(rows, plot_path, loaded.source, args.force)
    result.update(csv=str(csv_path) if csv_path else None, plot=str(plot_path) if plot_path else None)
    if not ui.json_mode:
        _render_sweep(result, ui)
    return result


def _sweep_model(args, loaded, budgets, kwargs, ui):
    from factorize.measure.evaluate import evaluate
    from factorize.pipeline import compress

    inputs = _sample_inputs(args, loaded, ui)
    if inputs is None:
        ui.warn("no sample inputs given: only parameters and weight errors are shown; pass --inputs FILE for drift")
    calibration = _calibration_inputs(args, loaded, inputs, ui)
    quality = _quality_kwargs(args, calibration, inputs, kwargs, ui)
    build = _calibrated_builder(loaded.model, calibration, quality, kwargs, ui) if calibration is not None else None
    rows, spectra, memo = [], None, {}  # memo: the original's outputs, computed once for every budget
    for budget in budgets:
        if build is not None:
            result = build(budget)
        else:
            result = compress(loaded.model, budget=budget, spectra=spectra, progress=ui.progress and spectra is None,
                              cache=quality["cache"], workers=quality["workers"], **kwargs)
            spectra = result.spectra  # one decomposition pass: later budgets reuse every spectrum
        row = {"budget": budget, "params_before": result.params_before, "params_after": result.params_after,
               "kept_fraction": result.kept_fraction, "factored_layers": sum(
                   1 for e in result.plan["sites"].values() if e["action"] == "factor")}
        if inputs is not None:
            rep = evaluate(loaded.model, result.model, inputs.batches, labels=inputs.labels, plan=result.plan,
                           latency_repeats=_repeats(args, 0), model_name=loaded.source, inputs=inputs.source,
                           memo=memo)
            row.update({k: rep.drift.get(k) for k in ("relative_l2", "cosine_mean", "cosine_min", "top1_agreement",
                                                        "kl")})
            row.update(accuracy_before=rep.accuracy_before, accuracy_after=rep.accuracy_after,
                       worst_weight_error=rep.worst_weight_error, macs_before=rep.macs_before,
                       macs_after=rep.macs_after, latency_ms_before=rep.latency_ms_before,
                       latency_ms_after=rep.latency_ms_after)
        else:
            errors = [e.get("predicted_error", 0.0) for e in result.plan["sites"].values() if e["action"] == "factor"]
            row["worst_weight_error"] = max(errors) if errors else 0.0
        rows.append(row)
    return rows, None if inputs is None else inputs.source


def _calibrated_builder(model, calibration, quality: dict, kwargs: dict, ui: UI):
    """budget -> compressed result, from one set of calibration statistics, spectra and sensitivities."""
    from factorize.calibrated.search import CalibratedResult, Calibration
    from factorize.model.count import count_parameters
    from factorize.plan.ranks import Override, Policy

    method = kwargs.get("method") if kwargs.get("method") in AWARE_METHODS else "whiten"
    solver = kwargs.get("method") if kwargs.get("method") in ("exact", "gram", "randomized", "auto") else "gram"
    multiple = kwargs.get("multiple") or 1
    calib = Calibration(model, calibration.batches, include=kwargs.get("include"), exclude=kwargs.get("exclude"),
                        method=method, solver=solver, sensitivity=quality["sensitivity"], multiple=multiple,
                        progress=ui.progress)
    overrides = tuple(o if isinstance(o, Override) else Override(**o) for o in kwargs.get("overrides") or ())

    def build(budget: float):
        plan = calib.plan(Policy(budget=budget, multiple=multiple, overrides=overrides))
        compressed = calib.build(plan, sequential=quality["sequential"])
        calib.annotate(plan, sequential=quality["sequential"])
        return CalibratedResult(model=compressed, plan=plan, sites=calib.found, spectra=dict(calib.spectra),
                                params_before=count_parameters(model), params_after=count_parameters(compressed))

    return build


def _sweep_weights_only(args, loaded, budgets, kwargs, ui):
    from tqdm.auto import tqdm

    _no_inputs_in_weights_only(args)
    _no_model_options_in_weights_only(args)
    from factorize.checkpoints.files import open_checkpoint
    from factorize.checkpoints.stream import select
    from factorize.plan.ranks import Override, Policy, choose_ranks, plan_summary
    from factorize.spectra.decompose import decompose

    with _weights_file(loaded) as path:
        chosen, _ = select(open_checkpoint(path), kwargs.get("include"), kwargs.get("exclude"))
        if not chosen:
            raise FactorizeError(f"{loaded.source}: no 2-D tensor named <module>.weight matches the patterns",
                                 fix="check --include/--exclude against the tensor names")
        sites = [c.site for c in chosen]
        spectra = {c.module: decompose(_read_tensor(c.weight_file.path, c.weight.name), name=c.module,
                                       method=kwargs.get("method") or "auto")
                   for c in tqdm(chosen, desc="decompose", unit="layer", disable=not ui.progress, leave=False)}
    overrides = tuple(o if isinstance(o, Override) else Override(**o) for o in kwargs.get("overrides") or ())
    rows = []
    for budget in budgets:
        plan = choose_ranks(sites, spectra, Policy(budget=budget, multiple=kwargs.get("multiple", 1),
                                                   overrides=overrides))
        s = plan_summary(plan)
        errors = [e["predicted_error"] for e in plan["sites"].values() if e["action"] == "factor"]
        rows.append({"budget": budget, "params_before": s["params_before"], "params_after": s["params_after"],
                     "kept_fraction": s["kept_fraction"], "factored_layers": s["factored"],
                     "worst_weight_error": max(errors) if errors else 0.0})
    ui.note("weights-only mode: parameters are the factored weights only; errors are predicted weight errors "
            "(Eckart-Young), no drift")
    return rows


CSV_COLUMNS = ("budget", "params_before", "params_after", "kept_fraction", "factored_layers", "relative_l2",
               "cosine_mean", "cosine_min", "top1_agreement", "kl", "accuracy_before", "accuracy_after",
               "worst_weight_error", "macs_before", "macs_after", "latency_ms_before", "latency_ms_after")


def _csv_text(rows: list[dict]) -> str:
    buf = _io.StringIO()
    columns = [c for c in CSV_COLUMNS if any(r.get(c) is not None for r in rows)]
    writer = csv.DictWriter(buf, fieldnames=columns, extrasaction="ignore", lineterminator="\n")
    writer.writeheader()
    for r in rows:
        writer.writerow({c: "" if r.get(c) is None else r[c] for c in columns})
    return buf.getvalue()


def _matplotlib():
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        raise FactorizeError("--plot needs matplotlib, which is not installed",
                             fix=f"install the plot extra: {PLOT_EXTRA} (or drop --plot)") from None
    return plt


def _plot_sweep(rows: list[dict], path: Path, title: str, force: bool) -> None:
    from factorize.storage import write_atomic

    plt = _matplotlib()
    fig, ax = plt.subplots(figsize=(6.4, 4.2), dpi=120)
    x = [100 * r["kept_fraction"] for r in rows]
    key = "relative_l2" if rows and rows[0].get("relative_l2") is not None else "worst_weight_error"
    ax.plot(x, [r[key] for r in rows], marker="o", color="tab:blue")
    for r, xi in zip(rows, x):
        ax.annotate(f"{r['budget']:g}", (xi, r[key]), textcoords="offset points", xytext=(4, 4), fontsize=8)
    ax.set_xlabel("parameters kept (% of the original model)")
    ax.set_ylabel("relative L2 output drift" if key == "relative_l2" else "worst relative weight error")
    ax.set_title(f"factorize sweep: {title}", fontsize=10)
    ax.grid(alpha=0.3)
    if rows and rows[0].get("accuracy_after") is not None:
        ax2 = ax.twinx()
        ax2.plot(x, [100 * r["accuracy_after"] for r in rows], marker="s", color="tab:orange", label="accuracy")
        ax2.axhline(100 * rows[0]["accuracy_before"], color="tab:orange", linestyle=":", linewidth=1)
        ax2.set_ylabel("accuracy after (%), dotted: before", color="tab:orange")
    fig.text(0.01, 0.01, "drift on sample inputs only; no guarantee on other inputs", fontsize=7, color="gray")
    fig.tight_layout()
    write_atomic(path, lambda tmp: fig.savefig(tmp, format="png"), force=force)
    plt.close(fig)


def _render_sweep(result: dict, ui: UI) -> None:
    from rich.panel import Panel
    from rich.table import Table

    rows = result["rows"]
    table = Table(title=f"sweep: {result['model']}" + (f" on {result['inputs']}" if result["inputs"] else ""),
                  title_justify="left")
    columns = [("budget", "budget", lambda v: f"{v:g}"), ("params kept", "kept_fraction", _pct),
               ("params", "params_after", lambda v: f"{v:,}"), ("layers factored", "factored_layers", str),
               ("relative L2", "relative_l2", _g4), ("cosine worst", "cosine_min", lambda v: f"{v:.6f}"),
               ("top-1 agree", "top1_agreement", _pct), ("accuracy", "accuracy_after", _pct),
               ("worst weight err", "worst_weight_error", lambda v: f"{v:.4f}")]
    columns = [c for c in columns if any(r.get(c[1]) is not None for r in rows)]
    for title, _, _ in columns:
        table.add_column(title, justify="left" if title == "budget" else "right")
    for r in rows:
        table.add_row(*["-" if r.get(key) is None else fmt(r[key]) for _, key, fmt in columns])
    ui.out.print(table)
    if rows and rows[0].get("accuracy_before") is not None:
        ui.out.print(f"accuracy of the original: {_pct(rows[0]['accuracy_before'])}")
    for kind in ("csv", "plot"):
        if result.get(kind):
            ui.out.print(f"wrote {result[kind]}")
    ui.out.print(Panel(result["caution"], title="caution", title_align="left", border_style="yellow"))


def _pct(v: float) -> str:
    return f"{100 * v:.2f}%"


def _g4(v: float) -> str:
    return f"{v:.4g}"


# ---------------------------------------------------------------------------------------------------------------
# compare


def cmd_compare(args, ui: UI) -> dict:
    from factorize.measure.evaluate import evaluate

    report_path = Path(args.report) if args.report else None
    _check_outputs([report_path], args.force)
    loaded = _load(args, ui)
    if loaded.weights_only:
        raise FactorizeError("compare runs both models, so --model must build one (weights-only files cannot run)",
                             fix="pass --model package.module:callable (with --weights FILE) or a transformers directory")
    other, plan = _load_against(args, loaded, ui)
    inputs = _sample_inputs(args, loaded, ui)
    if inputs is None:
        raise FactorizeError("compare needs sample inputs", fix="pass --inputs FILE (or --random-inputs SHAPE)")
    report = evaluate(loaded.model, other, inputs.batches, labels=inputs.labels, plan=plan,
                      latency_repeats=_repeats(args, 7), title="factorize compare",
                      model_name=f"{loaded.source} vs {args.against}", inputs=inputs.source, notes=inputs.notes,
                      progress=ui.progress)
    if report_path is not None:
        _write_text(report_path, report.to_markdown(), args.force)
    if not ui.json_mode:
        from factorize.measure.report import render_rich

        render_rich(report, ui.out)
    result = {"command": "compare", "model": loaded.source, "against": args.against, "report": report.to_json(),
              "report_file": str(report_path) if report_path else None}
    if args.max_drift is not None and report.drift["relative_l2"] > args.max_drift:
        ui.err.print(f"check failed: relative L2 output drift {report.drift['relative_l2']:.4g} is above "
                     f"--max-drift {args.max_drift:g}", markup=False)
        ui.exit_code = 1
    return result


def _load_against(args, loaded, ui):
    """The second model: a factorize checkpoint or weights for --model's architecture, or another model spec."""
    from factorize.checkpoints.models import (
        PICKLE_SUFFIXES,
        has_plan,
        load_model,
        load_weights,
    )

    spec = Path(args.against)
    is_file = spec.is_file() or spec.suffix.lower() in (".safetensors",) + PICKLE_SUFFIXES
    if is_file and loaded.build is not None:
        fresh = loaded.build()
        if spec.suffix.lower() == ".safetensors" and spec.exists() and has_plan(spec):
            from factorize.checkpoints import files as io

            ui.note(f"against: {spec} (factorize checkpoint, loaded into a fresh {type(fresh).__name__})")
            model = io.load(fresh, spec)
            return model.eval(), io.read_plan(spec)
        ui.note(f"against: {spec} (weights for {type(fresh).__name__})")
        return load_weights(fresh, spec, allow_pickle=args.allow_pickle).eval(), None
    other = load_model(args.against, allow_pickle=args.allow_pickle)
    if other.weights_only:
        raise FactorizeError(f"--against {args.against}: weights-only files need --model's architecture",
                             fix="pass --model as package.module:callable or a transformers directory")
    return other.model, None


# ---------------------------------------------------------------------------------------------------------------
# demo


def cmd_demo(args, ui: UI) -> dict:
    import torch

    from factorize.checkpoints import files as io
    from factorize.default import DigitsMLP, load_default, load_digits_split
    from factorize.measure.evaluate import evaluate
    from factorize.measure.report import CAUTION
    from factorize.model.sites import walk
    from factorize.pipeline import compress
    from factorize.spectra.sites import decompose_sites

    model = load_default()
    x, y = load_digits_split("test")  # held out: never used in training (factorize/default/README.md)
    batches = list(x.split(180))
    found = walk(model)
    spectra = decompose_sites(model, found.sites, progress=ui.progress)
    scan = [_scan_row(s, spectra[s.name], argparse.Namespace(target_energy=SCAN_ENERGY, multiple=1))
            for s in found.sites]
    runs = []
    for budget in sorted(set(args.budgets), reverse=True):
        result = compress(model, budget=budget, spectra=spectra)
        report = evaluate(model, result.model, batches, labels=y, plan=result.plan, latency_repeats=args.repeats,
                          title=f"factorize demo: budget {budget:g}", model_name="embedded digits classifier",
                          inputs=f"held-out digits, {len(y)} samples")
        with tempfile.TemporaryDirectory(prefix="factorize-demo-") as d:  # save, reload, check: nothing stays
            path = io.save(result.model, Path(d) / "digits.factorized.safetensors", plan=result.plan)
            size = path.stat().st_size
            reloaded = io.load(DigitsMLP(), path).eval()
            with torch.no_grad():
                identical = bool(torch.equal(reloaded(x), result.model(x)))
        runs.append({"budget": budget, "report": report.to_json(), "file_bytes": size,
                     "reloaded_outputs_identical": identical, "_report": report})
    result = {"command": "demo", "model": "embedded digits classifier (factorize.default:load_default)",
              "data": "held-out split of the UCI handwritten digits (Alpaydin & Kaynak), as bundled with scikit-learn",
              "scan": scan, "runs": [{k: v for k, v in r.items() if k != "_report"} for r in runs], "caution": CAUTION}
    if not ui.json_mode:
        _render_demo(result, runs, ui)
    return result


def _render_demo(result: dict, runs: list[dict], ui: UI) -> None:
    from rich.panel import Panel
    from rich.table import Table

    from factorize.measure.report import render_rich

    ui.out.print(f"[bold]factorize demo[/]: {result['model']}\ndata: {result['data']}", highlight=False)
    table = Table(title="1. scan: what the spectra allow", title_justify="left")
    for name in ("layer", "shape", "params", "r@90%", "r@99%", "break-even", "spectrum"):
        table.add_column(name, justify="left" if name in ("layer", "shape", "spectrum") else "right", no_wrap=True)
    for r in result["scan"]:
        m, n = r["shape"]
        table.add_row(r["name"], f"{m}x{n}", f"{r['params']:,}", _opt(r["rank_90"]), _opt(r["rank_99"]),
                      str(r["break_even"]), spectrum_sketch(r["spectrum"]))
    ui.out.print(table)
    summary = Table(title="2. shrink: mild and strong budgets, measured on the held-out digits; each saved to a "
                    "temporary file and reloaded", title_justify="left")
    for name in ("budget", "params", "kept", "acc. before", "acc. after", "top-1 agree", "relative L2", "file",
                 "reload"):
        summary.add_column(name, justify="left" if name == "budget" else "right")
    for r in runs:
        rep = r["_report"]
        summary.add_row(f"{r['budget']:g}", f"{rep.params_after:,}", _pct(rep.kept_fraction),
                        _pct(rep.accuracy_before), _pct(rep.accuracy_after), _pct(rep.drift["top1_agreement"]),
                        _g4(rep.drift["relative_l2"]), f"{r['file_bytes'] / 1e3:.1f} kB",
                        "exact" if r["reloaded_outputs_identical"] else "DIFFERS")
    ui.out.print(summary)
    ui.out.print(f"\n3. the full report at the strongest budget ({runs[-1]['budget']:g}):")
    render_rich(runs[-1]["_report"], ui.out, caution=False)  # the caution closes the demo, once
    ui.out.print(Panel(result["caution"], title="caution", title_align="left", border_style="yellow"))


if __name__ == "__main__":
    raise SystemExit(main())
