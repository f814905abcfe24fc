"""The option definitions: torch-free, and offering exactly the values the library accepts."""

from __future__ import annotations

import argparse
import subprocess
import sys

import pytest

from factorize import choices
from factorize.cli.parser import build_parser


def _action(command: str, dest: str) -> argparse.Action:
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction)).choices[command]
    return next(a for a in sub._actions if a.dest == dest)


@pytest.mark.parametrize("command", ["shrink", "sweep"])
def test_value_lists_are_the_ones_the_library_checks(command) -> None:
    from factorize.calibrated.options import SENSITIVITY_MODES
    from factorize.plan.policy import AWARE_METHODS
    from factorize.spectra.decompose import METHODS
    from factorize.training.schedule import SCHEDULES

    assert tuple(_action(command, "method").choices) == METHODS + AWARE_METHODS
    assert tuple(_action(command, "sensitivity").choices) == SENSITIVITY_MODES
    if command == "shrink":
        assert tuple(_action(command, "heal_schedule").choices) == SCHEDULES
    # defined once: the library's names are the very tuples of factorize.choices, not copies that could drift
    assert METHODS is choices.METHODS and AWARE_METHODS is choices.AWARE_METHODS
    assert SENSITIVITY_MODES is choices.SENSITIVITY_MODES and SCHEDULES is choices.HEAL_SCHEDULES


def test_the_parser_and_main_import_neither_torch_nor_numpy() -> None:
    # what makes 'factorize --help' quick: only the chosen command's module imports the library (and torch)
    code = ("import sys; import factorize.cli; from factorize.cli.parser import build_parser; "
            "build_parser().format_help(); "
            "heavy = sorted(m for m in ('torch', 'numpy') if m in sys.modules); print(heavy); assert not heavy")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, check=False)
    assert done.returncode == 0, done.stdout + done.stderr
