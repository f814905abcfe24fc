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


class DriftLimitExceeded(RuntimeError):
    """A requested check failed (for example measured drift above ``--max-drift``); exit code 1."""


class UnverifiedModelWarning(UserWarning):
    """A compressed model was returned without running it once (no sample input was at hand to run it on)."""
