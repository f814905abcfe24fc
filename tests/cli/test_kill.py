"""Killed mid-run: no broken output, and the next run clears what the dead writer left."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from factorize.storage import TEMP_SUFFIX, read_header

REPO = Path(__file__).resolve().parents[2]


@pytest.mark.parametrize("delay", [0.6, 1.2, 2.0])
def test_a_killed_shrink_leaves_no_broken_checkpoint(tmp_path, delay):
    out = tmp_path / "digits.safetensors"
    argv = [sys.executable, "-m", "factorize", "shrink", "-m", "factorize.default:load_default", "--budget", "0.3",
            "-o", str(out), "-q", "--repeats", "0"]
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    proc = subprocess.Popen(argv, cwd=tmp_path, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    time.sleep(delay)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    if out.exists():  # finished before the kill: then it must be whole
        read_header(out)
    again = subprocess.run([*argv, "--force"], cwd=tmp_path, env=env, capture_output=True, text=True)
    assert again.returncode == 0, again.stderr
    read_header(out)
    assert not list(tmp_path.glob(f".*{TEMP_SUFFIX}"))  # the dead writer's temp file was removed
