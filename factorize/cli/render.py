"""What the command line shows: the reporting layer (stdout console or one JSON object, stderr console, progress
on/off) and the small formatters and tables the commands share. Torch-free (rich and the standard library)."""

from __future__ import annotations

import contextlib
import json
import math
import os
import sys
from collections.abc import Sequence
from typing import IO, Any

from rich.console import Console
from rich.panel import Panel

from factorize.errors import printable
from factorize.measure.layout import print_table, print_words

__all__ = ["UI", "g4", "opt", "pct", "print_table", "print_words", "printable", "spectrum_profile", "spectrum_sketch"]

SKETCH_LEVELS = " ▁▂▃▄▅▆▇█"  # spectrum sketch: one character per slice of the singular values, height = s / s_max
SKETCH_WIDTH = 12


class UI:
    """The one reporting layer: stdout console (or one JSON object), stderr console, progress on/off.

    ``stdout``/``stderr`` default to the process streams at construction time; pass others to capture a run.
    """

    def __init__(self, *, json_mode: bool, quiet: bool, stdout: IO[str] | None = None,
                 stderr: IO[str] | None = None) -> None:
        self.json_mode, self.quiet = json_mode, quiet
        self.stdout = stdout if stdout is not None else sys.stdout
        self.stderr = stderr if stderr is not None else sys.stderr
        self.out = Console(file=self.stdout, width=_width(self.stdout), highlight=False)
        self.err = Console(file=self.stderr, stderr=True, highlight=False, width=_width(self.stderr))
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
        with contextlib.redirect_stdout(self.stderr):
            yield

    def warn(self, text: str) -> None:
        print_words(self.err, text, prefix="warning: ", prefix_style="yellow")

    def note(self, text: str) -> None:
        if not self.quiet:
            print_words(self.err, text)

    def line(self, text: str) -> None:
        """One paragraph on stdout, wrapped between words only (control characters escaped)."""
        print_words(self.out, text)

    def steps(self, text: str) -> None:
        """'next steps: a; b; c' as one heading and one wrapped line per step, so a command stays together."""
        head, _, rest = text.partition(": ")
        print_words(self.out, head + ":")
        for step in rest.split("; "):
            print_words(self.out, f"  - {step}")

    def table(self, table) -> None:
        """A rich Table on stdout: whole when it fits, one record per row when not (see measure/layout.py)."""
        print_table(self.out, table)

    def fail(self, message: str, code: int, *, problems: Sequence[str] = (), fix: str | None = None) -> int:
        message, problems = printable(message), [printable(p) for p in problems]
        fix = None if fix is None else printable(fix)
        prefix = "error: " if code == 2 else "check failed: "
        print_words(self.err, message, prefix=prefix, prefix_style="bold red")
        if fix and f"Fix: {fix}" not in message:  # a FactorizeError's text carries its fix already
            print_words(self.err, f"Fix: {fix}")
        if self.json_mode:
            payload = {"error": message.splitlines()[0], "problems": list(problems), "fix": fix, "exit_code": code}
            self.stdout.write(json.dumps(payload) + "\n")
        return code

    def finish(self, result: dict | None) -> int:
        if self.json_mode and result is not None:
            self.stdout.write(json.dumps(_finite(result), allow_nan=False) + "\n")
        return self.exit_code

    def caution(self, text: str) -> None:
        self.out.print(Panel(text, title="caution", title_align="left", border_style="yellow"))


def _width(stream) -> int | None:
    """Terminal width on a terminal or when COLUMNS is set (rich reads both); 120 columns into a pipe or file."""
    isatty = getattr(stream, "isatty", lambda: False)()
    return None if isatty or os.environ.get("COLUMNS") else 120


def _finite(value: Any) -> Any:
    """JSON has no NaN or infinity: they become null."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {str(k): _finite(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_finite(v) for v in value]
    return value


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


def pct(v: float) -> str:
    return f"{100 * v:.2f}%"


def g4(v: float) -> str:
    return f"{v:.4g}"


def opt(v) -> str:
    return "-" if v is None else str(v)
