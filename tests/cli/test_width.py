"""Every command's output reads at any width: at 60, 80 and 200 columns and into a pipe, no word is split across
lines, every layer name appears whole, and a line runs past the width only when it holds one word longer than
the line (a path or a name, kept whole). The reference for "a word" is the same run at 2000 columns, where
nothing wraps: a word split in two would leave pieces that the wide run does not have.

Models: a tiny model of our own with long, nested layer names (invented for this test, as transformers-style
names run long), and the embedded digits classifier of ``factorize demo``.
"""

from __future__ import annotations

import io
import re
import textwrap

import numpy as np
import pytest
import torch
from safetensors.torch import save_file

from factorize.cli import main

LONG_NAMES = """
import torch
from torch import nn

class Attention(nn.Module):
    def __init__(self):
        super().__init__()
        self.query = nn.Linear(16, 16)
        self.key = nn.Linear(16, 16)
        self.a_rather_long_output_projection_name_for_the_width_tests = nn.Linear(16, 16)

    def forward(self, x):
        return self.a_rather_long_output_projection_name_for_the_width_tests(torch.relu(self.query(x) + self.key(x)))

class Layer(nn.Module):
    def __init__(self):
        super().__init__()
        self.attention = Attention()

    def forward(self, x):
        return x + self.attention(x)

class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.encoder = nn.Module()
        self.encoder.layer = nn.ModuleList([Layer(), Layer()])
        self.classifier = nn.Linear(16, 4)

    def forward(self, x):
        for layer in self.encoder.layer:
            x = layer(x)
        return self.classifier(x)

def build():
    torch.manual_seed(0)
    return Net()
"""

WIDTHS = (60, 80, 200, None)  # None: into a pipe (no COLUMNS; the console is 120 columns there)
REFERENCE = 2000
BOX = re.compile(r"[\s\u2500-\u257f]+")  # whitespace and box-drawing characters separate words
NAMES = [f"encoder.layer.{i}.attention.{n}" for i in range(2)
         for n in ("query", "key", "a_rather_long_output_projection_name_for_the_width_tests")] + ["classifier"]


@pytest.fixture(scope="module")
def work(tmp_path_factory):
    d = tmp_path_factory.mktemp("width")
    (d / "long_names.py").write_text(textwrap.dedent(LONG_NAMES))
    gen = np.random.default_rng(0)
    np.savez(d / "x.npz", x=gen.normal(size=(32, 16)).astype(np.float32))
    return d


def _run(argv: list[str], columns: int | None, monkeypatch) -> str:
    if columns is None:
        monkeypatch.delenv("COLUMNS", raising=False)
    else:
        monkeypatch.setenv("COLUMNS", str(columns))
    out, err = io.StringIO(), io.StringIO()  # not a terminal: what a pipe or a file receives
    rc = main(argv, stdout=out, stderr=err)
    assert rc == 0, err.getvalue()
    return out.getvalue()


def _words(text: str) -> set[str]:
    return {w.strip(";:,") for w in BOX.split(text) if w.strip(";:,")}


def _check(text: str, reference: str, width: int, names: list[str]) -> None:
    assert "\x1b" not in text  # plain text: no terminal codes into a pipe or file
    split = _words(text) - _words(reference)
    assert not split, f"words split across lines at {width} columns: {sorted(split)[:10]}"
    for name in names:
        assert name in text, f"{name} does not appear whole at {width} columns"
    for line in text.splitlines():  # past the width only for one word longer than the line
        assert len(line) <= width or len(line.split()) == 1, f"{len(line)} > {width}: {line!r}"


COMMANDS = {
    "scan": ["scan", "--model", "long_names:build"],
    "shrink": ["shrink", "--model", "long_names:build", "--inputs", "x.npz", "--budget", "0.5", "--repeats", "0",
               "-o", "out.safetensors", "--force"],
    "sweep": ["sweep", "--model", "long_names:build", "--inputs", "x.npz", "--budgets", "0.6,0.3", "--repeats", "0"],
    "compare": ["compare", "--model", "long_names:build", "--against", "long_names:build", "--inputs", "x.npz",
                "--repeats", "0"],
}


@pytest.mark.parametrize("command", list(COMMANDS))
def test_every_command_reads_at_any_width(command, work, monkeypatch) -> None:
    monkeypatch.chdir(work)
    monkeypatch.syspath_prepend(str(work))
    argv = [*COMMANDS[command], "--quiet"]
    reference = _run(argv, REFERENCE, monkeypatch)
    for columns in WIDTHS:
        text = _run(argv, columns, monkeypatch)
        _check(text, reference, columns or 120, NAMES if command in ("scan", "shrink") else [])


@pytest.mark.slow
def test_demo_reads_at_any_width(monkeypatch) -> None:
    argv = ["demo", "--budgets", "0.3", "--repeats", "0", "--quiet"]
    reference = _run(argv, REFERENCE, monkeypatch)
    for columns in WIDTHS:
        _check(_run(argv, columns, monkeypatch), reference, columns or 120, ["fc1", "fc2", "fc3", "fc4"])


def test_narrow_tables_become_records_with_every_value(work, monkeypatch) -> None:
    """Below the table's width each layer is a record: its name on a line, then every column as 'name: value'."""
    monkeypatch.chdir(work)
    monkeypatch.syspath_prepend(str(work))
    text = _run(["scan", "--model", "long_names:build", "--quiet"], 60, monkeypatch)
    lines = text.splitlines()
    i = lines.index("encoder.layer.0.attention.query")
    record = " ".join(lines[i + 1:i + 4])
    for column in ("kind: linear", "shape: 16x16", "params: 256", "break-even: 8"):
        assert column in record


def test_control_characters_in_names_are_escaped(tmp_path, monkeypatch) -> None:
    """A crafted checkpoint's tensor names (clear screen, colour) reach the terminal escaped, in scan and in the
    weights-only shrink alike."""
    evil = "evil\x1b[2J\x1b[31m"
    save_file({f"{evil}.weight": torch.randn(24, 24), "ok.weight": torch.randn(24, 24)},
              str(tmp_path / "evil.safetensors"))
    monkeypatch.chdir(tmp_path)
    for argv in (["scan", "--model", "evil.safetensors"],
                 ["shrink", "--model", "evil.safetensors", "--rank", "2", "-o", "small.safetensors"]):
        out, err = io.StringIO(), io.StringIO()
        assert main([*argv, "--quiet"], stdout=out, stderr=err) == 0, err.getvalue()
        text = out.getvalue() + err.getvalue()
        assert "\x1b" not in text
        assert "evil\\x1b[2J\\x1b[31m.weight" in text or "evil\\x1b[2J\\x1b[31m" in text
