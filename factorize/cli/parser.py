"""The command line's options: every command's argparse definition, and the parsers of option values.

Imports only torch-free modules (argparse, :mod:`factorize.choices`, :mod:`factorize._version`), so that
``factorize --help`` and usage errors answer without loading torch; :func:`factorize.cli.main` imports the
chosen command's module after parsing.
"""

from __future__ import annotations

import argparse
from collections.abc import Callable
from typing import Any, NamedTuple

from factorize._version import __version__
from factorize.choices import (
    AWARE_METHODS,
    COSTS,
    DRIFT_METRICS,
    HEAL_SCHEDULES,
    METHODS,
    OUTPUT_KINDS,
    POOLINGS,
    PRECISIONS,
    SENSITIVITY_MODES,
)
from factorize.cluster import parse_cluster

PROG = "factorize"
COMMANDS = ("scan", "shrink", "sweep", "compare", "export", "demo")
EXPORT_FORMATS = ("onnx", "pt2")
OUTPUT_DTYPES = ("float16", "bfloat16")
DEFAULT_BUDGETS = (0.9, 0.75, 0.5, 0.3)
DEMO_BUDGETS = (0.3, 0.05)  # mild and strong, chosen from a measured sweep of the embedded default (docs/cli.md)
SCAN_ENERGY = 0.9  # scan suggests the smallest rank keeping this fraction of sum(s^2): relative weight error <= 0.32
OUTPUT_SUFFIX = ".factorized.safetensors"


EXIT_CODES = ("Exit codes: 0 done, 1 a requested check failed (--max-drift, an unreachable --target-drift), 2 bad\n"
              "usage or bad input, 130 interrupted (Ctrl-C; nothing was written).")


class Parser(argparse.ArgumentParser):
    """argparse, except that a usage error is one line and a pointer to ``--help`` (exit 2), not the usage block."""

    def error(self, message: str):  # type: ignore[override]
        self.exit(2, f"{self.prog}: error: {message}\nRun '{self.prog} --help' for the options.\n")


class _Formatter(argparse.RawDescriptionHelpFormatter):
    def __init__(self, prog: str) -> None:
        super().__init__(prog, max_help_position=32, width=100)


def build_parser() -> argparse.ArgumentParser:
    parser = Parser(
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
        + "\nRun 'factorize COMMAND --help' for each command's options.\n" + EXIT_CODES + "\n"
        "Security: --model package.module:callable imports and runs Python code, searching the working directory\n"
        "first; run factorize only where every module it could import is code you trust (pickles are refused).",
    )
    parser.add_argument("--version", action="version", version=f"%(prog)s {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", title="commands")
    parents = _parents()
    _add_scan(sub, parents)
    _add_shrink(sub, parents)
    _add_sweep(sub, parents)
    _add_compare(sub, parents)
    _add_export(sub, parents)
    _add_demo(sub, parents)
    return parser


def _add_scan(sub, p: _Parents) -> None:
    sub.add_parser(
        "scan", parents=[p.common, p.model, _scan_options()], formatter_class=_Formatter,
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


def _add_shrink(sub, p: _Parents) -> None:
    sub.add_parser(
        "shrink", parents=[p.common, p.model, p.inputs, p.policy, p.out, _check_options(),
                           _quality_options(shrink=True), _device_options(dtype=True), _alternatives_option()],
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


def _add_sweep(sub, p: _Parents) -> None:
    sub.add_parser(
        "sweep", parents=[p.common, p.model, p.inputs, _sweep_policy(), _sweep_options(),
                          _quality_options(shrink=False), _device_options(dtype=False)],
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


def _add_compare(sub, p: _Parents) -> None:
    sub.add_parser(
        "compare", parents=[p.common, p.model, p.inputs, _compare_options(), _check_options(),
                            _device_options(dtype=False), _alternatives_option()],
        formatter_class=_Formatter,
        help="output drift between two models on sample inputs",
        description="Run two models on the same sample inputs and report the drift between their outputs.\n"
        "--against may be a compressed checkpoint written by 'factorize shrink' (loaded into a fresh\n"
        "instance of --model's architecture), a plain weights file for that architecture, or any\n"
        "other model (callable or transformers directory).",
        epilog=_examples(
            "factorize compare --model factorize.default:load_default --against load_default.factorized.safetensors",
            "factorize compare --model mypkg.models:build --weights a.safetensors --against b.safetensors "
            "--inputs x.npz",
        ),
    )


def _add_export(sub, p: _Parents) -> None:
    sub.add_parser(
        "export", parents=[p.common, p.model, _export_options()], formatter_class=_Formatter,
        help="write a (compressed) model as ONNX or a torch.export program (.pt2)",
        description="Trace the model on one sample batch and write it as ONNX (run anywhere onnxruntime runs) or as\n"
        "a torch.export program (.pt2, reload with torch.export.load). --weights may be a checkpoint from\n"
        "'factorize shrink' (loaded into a fresh instance of --model's architecture) or plain weights. The\n"
        "written file is run on the batch and the largest output difference to torch is reported.",
        epilog=_examples(
            "factorize export --model mypkg.models:build --weights model.factorized.safetensors \\\n"
            "    --inputs x.npz -o model.onnx",
            "factorize export --model factorize.default:load_default --random-inputs 4x64 --format pt2 -o digits.pt2",
        ),
    )


def _add_demo(sub, p: _Parents) -> None:
    sub.add_parser(
        "demo", parents=[p.common, _demo_options()], formatter_class=_Formatter,
        help="the whole job on the embedded digits classifier",
        description="Scan, shrink at a mild and a strong budget, measure accuracy on the held-out part of the\n"
        "handwritten-digits data (Alpaydin & Kaynak, UCI; as bundled with scikit-learn) before and after,\n"
        "measure drift, save and reload the compressed model. Writes nothing to disk.",
        epilog=_examples("factorize demo", "factorize demo --json", "factorize demo --budgets 0.6,0.2"),
    )


def _examples(*lines: str) -> str:
    return "examples:\n" + "\n".join(f"  {line}" for line in lines)


class _Parents(NamedTuple):
    """The option groups several commands share (argparse parents)."""

    common: argparse.ArgumentParser
    model: argparse.ArgumentParser
    inputs: argparse.ArgumentParser
    policy: argparse.ArgumentParser
    out: argparse.ArgumentParser


def _parents() -> _Parents:
    common = argparse.ArgumentParser(add_help=False)
    g = common.add_argument_group("output")
    g.add_argument("--json", action="store_true", help="print one JSON object on stdout and nothing else there")
    g.add_argument("--quiet", "-q", action="store_true", help="no progress bars or notes on stderr")

    model = argparse.ArgumentParser(add_help=False)
    g = model.add_argument_group("model")
    g.add_argument("--model", "-m", required=True, metavar="SPEC",
                   help="package.module:callable that builds the model, a transformers directory (config.json + "
                   "safetensors), or a bare .safetensors file (weights-only mode). A callable IMPORTS AND RUNS "
                   "CODE, from the working directory first: name only code you trust")
    g.add_argument("--weights", "-w", metavar="FILE",
                   help="a .safetensors state dict to load into the callable's model")
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
    g.add_argument("--labels-key", default="labels", metavar="KEY",
                   help="key of the labels in --inputs (default: labels)")
    g.add_argument("--batch-size", type=int, default=64, metavar="N", help="samples per forward pass (default: 64)")
    g.add_argument("--max-samples", type=int, metavar="N", help="use at most N samples")
    g.add_argument("--repeats", type=int, default=None, metavar="N",
                   help="timed forward passes per model for the median latency (0: do not time)")
    g.add_argument("--seed", type=_seed, default=0, metavar="N", help="seed for random inputs and randomized SVD")
    g.add_argument("--pooling", choices=POOLINGS,
                   help="judge per-token outputs by one vector per sample: mean (over the attention mask, as sentence "
                   "encoders embed), cls (first token) or last (last real token); default: the outputs as they are")
    g.add_argument("--output-kind", choices=OUTPUT_KINDS,
                   help="what the model's outputs hold, so drift is judged as their users judge them: logits (a "
                   "classifier: top-1 agreement and KL), scores (top-1 only), features (relative L2 and cosine), "
                   "embeddings (cosine, nearest neighbours, no argmax); default: embeddings with --pooling, next-token "
                   "logits for a causal language model, else from the output's shape")

    policy = argparse.ArgumentParser(add_help=False)
    g = policy.add_argument_group("rank policy (one of --budget/--rank/--energy/--keep; default --budget 0.5)")
    g.add_argument("--budget", type=_fraction("--budget"), metavar="F",
                   help="the selected layers together keep fraction F of their parameters, in (0, 1]")
    g.add_argument("--rank", type=_positive_int("--rank"), metavar="N", help="the same rank N in every layer")
    g.add_argument("--energy", type=_fraction("--energy"), metavar="T",
                   help="per layer, the smallest rank keeping fraction T of the sum of squared singular values")
    g.add_argument("--keep", type=_fraction("--keep"), metavar="F",
                   help="each layer keeps fraction F of its parameters")
    _selection(g)
    g.add_argument("--recipe", metavar="FILE.toml", help="a TOML recipe (recipes/*.toml); options given here win")

    out = argparse.ArgumentParser(add_help=False)
    g = out.add_argument_group("files")
    g.add_argument("--output", "-o", metavar="FILE",
                   help=f"compressed checkpoint to write (default: next to the input, suffix {OUTPUT_SUFFIX})")
    g.add_argument("--report", metavar="FILE.md", help="also write the report as Markdown")
    g.add_argument("--force", "-f", action="store_true", help="replace existing output files")
    return _Parents(common, model, inputs, policy, out)


def _selection(g) -> None:
    g.add_argument("--include", action="append", metavar="GLOB",
                   help="only layers whose name matches (repeatable; fnmatch rules, '*' crosses dots)")
    g.add_argument("--exclude", action="append", metavar="GLOB", help="never factor matching layers (repeatable)")
    g.add_argument("--method", choices=METHODS + AWARE_METHODS,
                   help="how to decompose: exact (LAPACK SVD), gram (eigensolve of the smaller Gram matrix), "
                   "randomized (Halko et al. 2011), auto (the library's choice; default); with --calibration: "
                   "whiten (reduced-rank regression on the layer inputs; the default there) or scale (per-channel "
                   "activation scaling)")
    g.add_argument("--multiple", type=_positive_int("--multiple"), metavar="N", help="round ranks to a multiple of N")
    g.add_argument("--cost", choices=COSTS,
                   help="what the budget counts: params (default), macs (needs sample inputs) or bytes (stored bytes: "
                   "rank and stored precision chosen together per layer)")
    g.add_argument("--precisions", type=_precisions, metavar="P,P,...",
                   help="with --cost bytes: the stored precisions a layer may take, some of " + ",".join(PRECISIONS)
                   + " (default: float32,bfloat16,int8,int4g64)")


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


def _quality_options(*, shrink: bool):
    """Activation-aware factors, healing and speed options (shrink has them all, sweep the decomposition ones)."""
    p = argparse.ArgumentParser(add_help=False)
    g = p.add_argument_group("activation-aware factors" + (", healing" if shrink else "") + " and speed")
    g.add_argument("--calibration", "-c", metavar="FILE",
                   help="sample inputs (same formats as --inputs) the factors are fitted to: each layer keeps its "
                   "outputs on them (whitening); keep them apart from --inputs, where drift is measured. Without "
                   "it, a model with a tokenizer is fitted to built-in English calibration sentences (none of them "
                   "among the built-in held-out ones)")
    g.add_argument("--no-calibration", action="store_true",
                   help="plain truncated SVD: no calibration inputs, not even the built-in sentences a model with a "
                   "tokenizer is otherwise fitted to")
    g.add_argument("--sequential", action=argparse.BooleanOptionalAction, default=None,
                   help="with calibration: factor layers in forward order, each fitted to the inputs the partly "
                   "compressed model gives it (default for a budget in parameters or MACs; "
                   + ("the sweep uses per-layer factors unless given; " if not shrink else "")
                   + "with --blockwise: block after block, ranks from a first pass, off unless given); "
                   "--no-sequential: per-layer factors, about half the build time")
    g.add_argument("--sensitivity", nargs="?", const=True, default=None, choices=SENSITIVITY_MODES,
                   metavar="HOW",
                   help="with --calibration, how each layer's effect on the final output is measured to allocate the "
                   "budget; without this option: gradients (one forward and two backward passes per batch, any "
                   "depth); HOW: gradients, probes (truncation probes, two passes per layer), both (the default "
                   "of a bare --sensitivity: gradients, then probes; slower, sometimes better), none (each layer's "
                   "own error)")
    g.add_argument("--cache", metavar="DIR",
                   help="keep spectra in DIR so a later run on the same weights skips the SVD")
    g.add_argument("--workers", type=_positive_int("--workers"), default=1, metavar="N",
                   help="decompose N layers at a time (threads; results equal a serial run)")
    if shrink:
        g.add_argument("--cluster", type=_cluster, metavar="ADDRESS|local:N",
                       help="run the out-of-core shrink's per-matrix work as tasks on a Dask cluster: the weights-only "
                       "shrink of a checkpoint (a .safetensors file, its index, or their directory, which is then "
                       "read as its bare checkpoint and never loaded whole), or with --blockwise the block-by-block "
                       "one. local:N starts N worker processes here, tcp://HOST:PORT uses a running scheduler (the "
                       "checkpoint, and --cache if given, must be at the same path on every worker); needs "
                       "the cluster extra (pip install \".[cluster]\" in a checkout). The output is byte-identical to "
                       "a run without it")
        g.add_argument("--target-drift", type=_nonnegative("--target-drift"), metavar="X",
                       help="with --calibration: the smallest budget whose relative L2 drift on --inputs stays <= X "
                       "(exit 1 with the closest budget when none does)")
        g.add_argument("--drift-metric", choices=DRIFT_METRICS, default="relative_l2",
                       help="what --target-drift limits: relative_l2 (default, over all outputs), cosine (1 - mean "
                       "cosine per sample), or the tail: relative_l2_p95 (95th percentile of per-sample relative "
                       "L2), cosine_p5 (1 - the 5th percentile of per-sample cosine)")
        g.add_argument("--heal", type=_positive_int("--heal"), metavar="STEPS",
                       help="after compressing, fine-tune the factors for STEPS steps to match the original on "
                       "--calibration (distillation); the best state on --inputs is kept, judged as the report "
                       "judges the model (perplexity for a causal language model, pooled cosine with --pooling or "
                       "for an encoder, relative L2 otherwise)")
        g.add_argument("--heal-lr", type=_positive_finite("--heal-lr"), default=None, metavar="LR",
                       help="peak learning rate for --heal (default 3e-4)")
        g.add_argument("--heal-schedule", choices=HEAL_SCHEDULES, default=None,
                       help="learning-rate schedule for --heal: cosine (the default: a 5%% linear warm-up, then a "
                       "half cosine down to zero) or constant")
        g.add_argument("--blockwise", action="store_true",
                       help="with --calibration and a transformers directory, its index or its single weights file "
                       "(GPT-2, Llama, Mistral, Qwen2, Phi, Gemma, BERT and other models with one list of blocks; "
                       "others are refused naming what is missing): load, calibrate and factor one block at a time "
                       "from the (sharded) checkpoint, for models larger than memory; writes a directory of shards "
                       "(with --sequential, each block is refitted to the compressed blocks upstream)")
        g.add_argument("--speed-check", action="store_true",
                       help="time each factored layer against its dense form here (batch 1 and 32) and keep dense "
                       "the ones that are slower")
    return p


def _check_options():
    p = argparse.ArgumentParser(add_help=False)
    g = p.add_argument_group("checks")
    g.add_argument("--max-drift", type=_nonnegative("--max-drift"), metavar="X",
                   help="exit 1 when the relative L2 output drift is above X (shrink then writes no checkpoint)")
    return p


def _alternatives_option():
    p = argparse.ArgumentParser(add_help=False)
    g = p.add_argument_group("alternatives")
    g.add_argument("--no-alternatives", action="store_true",
                   help="do not build and measure the plain alternatives at the same stored size (every layer "
                   "rounded to int8; rank alone; rank and precision together) that the report shows by default")
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
    g = p.add_argument_group("drift")
    g.add_argument("--drift-samples", type=int, metavar="N",
                   help="measure every budget's drift on N of the sample inputs, drawn at random (--seed), the same N "
                   "for every budget: about N/all of the forward passes; the mean cosine then shows its 95%% "
                   "interval (default: every sample input, as shrink measures)")
    return p


def _compare_options():
    p = argparse.ArgumentParser(add_help=False)
    g = p.add_argument_group("the other model")
    g.add_argument("--against", "-a", required=True, metavar="SPEC",
                   help="a checkpoint from 'factorize shrink' or a weights file for --model's architecture, or "
                   "another model spec")
    g.add_argument("--report", metavar="FILE.md", help="also write the report as Markdown")
    g.add_argument("--force", "-f", action="store_true", help="replace an existing report file")
    g.add_argument("--non-strict", action="store_true",
                   help="load a factorize checkpoint given as --against tolerating missing and unexpected keys "
                   "(listed in a warning) and casting "
                   "dtypes, e.g. a transformers directory's extra buffers; shapes must still match")
    return p


def _device_options(*, dtype: bool):
    p = argparse.ArgumentParser(add_help=False)
    g = p.add_argument_group("device and threads")
    g.add_argument("--device", type=_device, default=None, metavar="DEV",
                   help="compute on cpu, cuda or cuda:N (cuda only where torch sees a GPU; default: where the model "
                   "is, i.e. cpu)")
    if dtype:
        g.add_argument("--dtype", choices=OUTPUT_DTYPES, default=None,
                       help="store the compressed checkpoint in this dtype (default: the model's own); drift is "
                       "measured before the cast")
    g.add_argument("--threads", type=_positive_int("--threads"), default=None, metavar="N",
                   help="CPU threads torch may use (torch.set_num_threads; default: torch's choice)")
    return p


def _device(text: str) -> str:
    """cpu, cuda or cuda:N (syntax only; whether a GPU is there is checked when the command runs)."""
    name, _, index = text.strip().lower().partition(":")
    if (name == "cpu" and not index) or (name == "cuda" and (not index or index.isdigit())):
        return text.strip().lower()
    raise argparse.ArgumentTypeError(f"{text!r} is not a device; --device takes cpu, cuda or cuda:N")


def _export_options():
    p = argparse.ArgumentParser(add_help=False)
    g = p.add_argument_group("the batch the model is traced on")
    g.add_argument("--inputs", "-i", metavar="FILE",
                   help="sample inputs (as for shrink); the first --batch-size samples are used")
    g.add_argument("--random-inputs", metavar="SHAPE", help="seeded random inputs, e.g. 4x64")
    g.add_argument("--labels-key", default="labels", metavar="KEY", help="key of labels in --inputs (ignored)")
    g.add_argument("--batch-size", type=int, default=2, metavar="N", help="samples in the traced batch (default: 2)")
    g.add_argument("--max-samples", type=int, metavar="N", help=argparse.SUPPRESS)
    g.add_argument("--seed", type=int, default=0, metavar="N", help="seed for --random-inputs")
    g = p.add_argument_group("the file")
    g.add_argument("--output", "-o", required=True, metavar="FILE", help="the file to write (.onnx or .pt2)")
    g.add_argument("--format", choices=EXPORT_FORMATS, default=None,
                   help="onnx or pt2 (default: from the --output suffix)")
    g.add_argument("--opset", type=_positive_int("--opset"), default=None, metavar="N",
                   help="ONNX opset version (default: the exporter's)")
    g.add_argument("--fixed-batch", action="store_true",
                   help="keep the traced batch size fixed (default: any batch size; needs >= 2 samples)")
    g.add_argument("--force", "-f", action="store_true", help="replace an existing output file")
    return p


def _demo_options():
    p = argparse.ArgumentParser(add_help=False)
    g = p.add_argument_group("demo")
    g.add_argument("--budgets", type=_fractions, default=DEMO_BUDGETS, metavar="F,F",
                   help="budgets to shrink at (default: " + ",".join(map(str, DEMO_BUDGETS)) + ")")
    g.add_argument("--repeats", type=int, default=7, metavar="N", help="timed passes for latency (0: do not time)")
    return p


def _checked(flag: str, kind: type, takes: str, ok: Callable[[Any], bool], bad: str,
             wants: str | None = None) -> Callable[[str], Any]:
    """An argparse type: ``kind(text)`` that passes ``ok``; the messages say what ``flag`` takes."""
    def parse(text: str):
        try:
            v = kind(text)
        except ValueError:
            noun = "an integer" if kind is int else "a number"
            raise argparse.ArgumentTypeError(f"{text!r} is not {noun}; {flag} takes {takes}") from None
        if v != v:  # NaN passes no comparison, and "nan is negative" would be wrong
            raise argparse.ArgumentTypeError(f"{text!r} is not a number; {flag} takes {wants or takes}")
        if not ok(v):
            raise argparse.ArgumentTypeError(f"{v} {bad}; {flag} takes {wants or takes}")
        return v

    return parse


def _fraction(flag: str) -> Callable[[str], float]:
    return _checked(flag, float, "a fraction in (0, 1]", lambda v: 0 < v <= 1, "is outside (0, 1]",
                    "a fraction such as 0.5")


def _fractions(text: str) -> tuple[float, ...]:
    parse = _fraction("--budgets")
    values = tuple(parse(t.strip()) for t in text.split(",") if t.strip())
    if not values:
        raise argparse.ArgumentTypeError("give at least one budget, e.g. 0.9,0.5")
    return values


def _precisions(text: str) -> tuple[str, ...]:
    names = tuple(t.strip() for t in text.split(",") if t.strip())
    bad = [n for n in names if n not in PRECISIONS]
    if bad or not names:
        raise argparse.ArgumentTypeError(f"unknown precision {', '.join(map(repr, bad)) or 'none given'}; "
                                         f"--precisions takes some of {','.join(PRECISIONS)}")
    return names


def _cluster(text: str):
    try:
        return parse_cluster(text)
    except ValueError as e:  # FactorizeError: the message says what --cluster takes
        raise argparse.ArgumentTypeError(str(e).replace("\nFix: ", "; ")) from None


def _positive_int(flag: str) -> Callable[[str], int]:
    return _checked(flag, int, "an integer >= 1", lambda v: v >= 1, "is below 1")


def _nonnegative(flag: str) -> Callable[[str], float]:
    return _checked(flag, float, "a number >= 0", lambda v: v >= 0, "is negative")


def _positive_finite(flag: str) -> Callable[[str], float]:
    return _checked(flag, float, "a finite number > 0", lambda v: 0 < v < float("inf"), "is not a finite number > 0")


_seed = _checked("--seed", int, "an integer from 0 to 2**63 - 1", lambda v: 0 <= v < 2**63, "is out of range")
