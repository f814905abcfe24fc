"""The ``factorize`` command line: scan, shrink, sweep, compare, export, demo.

Output rules: tables (rich) and the report go to stdout; progress bars (tqdm) and warnings go to stderr, and
progress vanishes with ``--quiet``. With ``--json`` stdout holds exactly one JSON object and nothing else (on
failure too: ``{"error": ...}``). Exit codes: 0 done, 1 a requested check failed (``--max-drift``), 2 bad usage
or bad input -- one clear message on stderr, no traceback -- and 130 interrupted (nothing written).

Layout: :mod:`.parser` (options; torch-free, so ``--help`` is quick), one module per command (``run(args, ui)``,
importing the library at its top), :mod:`.common` (model, policy, inputs, output files) and :mod:`.render`
(the reporting layer). :func:`main` imports the chosen command's module only after parsing.
"""

from __future__ import annotations

import contextlib
import importlib
import io
import json
import sys
import warnings
from collections.abc import Iterator, Sequence
from typing import IO

from safetensors import SafetensorError

from factorize.errors import DriftLimitExceeded, FactorizeError
from factorize.threads import torch_threads

from .parser import build_parser
from .render import UI


def main(argv: Sequence[str] | None = None, *, stdout: IO[str] | None = None, stderr: IO[str] | None = None) -> int:
    """Run the command line; returns the exit code. ``stdout``/``stderr`` (default: the process streams) receive
    everything the run writes, the library's progress bars and warnings included."""
    with _streams(stdout, stderr):
        parser = build_parser()
        args = _parse(parser, list(sys.argv[1:] if argv is None else argv))
        if not getattr(args, "command", None):
            parser.print_help(sys.stderr)
            return 2
        return _dispatch(args, UI(json_mode=args.json, quiet=args.quiet))


def _parse(parser, argv: list[str]):
    """argparse, except that with --json a usage error is also one JSON object on stdout (exit 2), as every
    other error is; the usage text still goes to stderr."""
    if "--json" not in argv:
        return parser.parse_args(argv)
    caught = io.StringIO()
    try:
        with contextlib.redirect_stderr(caught):
            return parser.parse_args(argv)
    except SystemExit as done:
        text = caught.getvalue()
        sys.stderr.write(text)
        if done.code not in (0, None):
            lines = [line for line in text.splitlines() if ": error: " in line]
            message = lines[-1].split(": error: ", 1)[-1] if lines else "usage error"
            payload = {"error": message, "problems": [], "fix": "see 'factorize COMMAND --help'", "exit_code": 2}
            sys.stdout.write(json.dumps(payload) + "\n")
        raise


@contextlib.contextmanager
def _streams(stdout: IO[str] | None, stderr: IO[str] | None) -> Iterator[None]:
    with contextlib.ExitStack() as stack:
        if stdout is not None:
            stack.enter_context(contextlib.redirect_stdout(stdout))
        if stderr is not None:
            stack.enter_context(contextlib.redirect_stderr(stderr))
        yield


def _dispatch(args, ui: UI) -> int:
    """Run one command; turn the library's errors into exit codes and one clear message."""
    try:
        with ui.capture_stdout(), warnings.catch_warnings():
            warnings.showwarning = lambda message, *_a, **_k: ui.warn(str(message))  # one line, no source echo
            command = importlib.import_module(f"{__name__}.{args.command}")  # the one lazy import: torch etc.
            with torch_threads(getattr(args, "threads", None)):  # --threads, restored when the command ends
                result = command.run(args, ui)
    except DriftLimitExceeded as err:
        return ui.fail(str(err), 1)
    except FactorizeError as err:
        return ui.fail(str(err), 2, problems=err.problems, fix=err.fix)
    except (FileNotFoundError, PermissionError, IsADirectoryError, NotADirectoryError) as err:
        where = f"{err.filename}: " if err.filename else ""
        return ui.fail(f"{where}{err.strerror or err}", 2, fix="check the path and its permissions")
    except SafetensorError as err:  # the safetensors library's own check (e.g. overlapping tensors)
        return ui.fail(f"{_safetensors_inputs(args)}not a valid safetensors file: {err}", 2,
                       fix="the file is damaged or was not written by a safetensors writer; copy or save it again")
    except KeyboardInterrupt:
        ui.err.print("interrupted; nothing was written")
        return 130
    return ui.finish(result)


def _safetensors_inputs(args) -> str:
    """'a.safetensors, b.safetensors: ' -- the safetensors files this command reads, for a message about one."""
    from .common import input_paths

    names = [str(p) for paths in input_paths(args).values() for p in paths if p.suffix == ".safetensors"]
    return ", ".join(dict.fromkeys(names)) + ": " if names else ""


if __name__ == "__main__":
    raise SystemExit(main())
