"""Errors raised for bad input.

Every user-facing problem raises :class:`FactorizeError`: the command line turns it into one clear message and
exit code 2, with no traceback. Where several layers or files are wrong at once, the error lists all of them
(``problems``) so the user fixes everything in one pass.
"""

from __future__ import annotations

from collections.abc import Iterable


class FactorizeError(ValueError):
    """Bad input: says what was expected, what was found, where, and how to fix it."""

    def __init__(self, message: str, problems: Iterable[str] = (), fix: str | None = None) -> None:
        self.message = message
        self.problems = list(problems)
        self.fix = fix
        text = message
        if self.problems:
            text += "\n" + "\n".join(f"  - {p}" for p in self.problems)
        if fix:
            text += f"\nFix: {fix}"
        super().__init__(text)

    def __reduce__(self):  # pickled whole (message, problems, fix), e.g. when raised on a cluster worker
        return (type(self), (self.message, self.problems, self.fix))


class StatisticsMemoryError(FactorizeError):
    """Calibration statistics that would not fit in memory, refused before anything large is allocated."""


class DriftLimitExceeded(RuntimeError):
    """A requested check failed (for example measured drift above ``--max-drift``); exit code 1."""


class UnverifiedModelWarning(UserWarning):
    """A compressed model was returned without running it once (no sample input was at hand to run it on)."""


def printable(text: object, limit: int | None = None) -> str:
    """``text`` with control characters (terminal escape sequences among them) escaped as ``\\x1b``, ``\\u200b``;
    line breaks stay. Names in messages and tables come from files and user code, and must not drive the
    terminal: every name factorize prints or puts in an error passes through here (the one escaping helper).
    With ``limit``, a longer result is cut to ``limit`` characters ending in ``...``."""
    shown = "".join(c if c.isprintable() or c == "\n" else _escape(c) for c in str(text))
    return shown if limit is None or len(shown) <= limit else shown[:max(limit - 3, 0)] + "..."


def _escape(c: str) -> str:
    code = ord(c)
    return f"\\x{code:02x}" if code < 0x100 else f"\\u{code:04x}" if code < 0x10000 else f"\\U{code:08x}"


def caller_stacklevel() -> int:
    """The ``stacklevel`` for :func:`warnings.warn` that names the first frame outside the factorize package:
    the user's line that called the library, however deep inside factorize the warning is raised.

    Call it in the function that calls ``warnings.warn`` (its frame counts as level 1)."""
    import sys

    frame = sys._getframe(1)  # the caller of this helper: level 1 for warnings.warn
    level = 1
    while frame is not None and _inside_package(frame.f_globals.get("__name__", "")):
        frame = frame.f_back
        level += 1
    return level


def _inside_package(module: str) -> bool:
    return module == "factorize" or module.startswith("factorize.")
