"""The command line with budgets in stored bytes: --cost bytes, --precisions, the plain alternatives in shrink,
compare and sweep, and --target-drift over the same candidates (in-process runs of ``factorize.cli.main``)."""

from __future__ import annotations

import csv
import io
import json
import textwrap

import numpy as np
import pytest
import torch
from safetensors.torch import load_file

import factorize
from factorize.cli import main
from tests.cli.user_code import NET

MODULE = NET + """
def build():
    torch.manual_seed(0)
    return Net()
"""


@pytest.fixture(scope="module")
def work(tmp_path_factory):
    d = tmp_path_factory.mktemp("bytes")
    (d / "bytes_models.py").write_text(textwrap.dedent(MODULE))
    g = np.random.default_rng(0)
    np.savez(d / "x.npz", x=g.normal(size=(64, 20)).astype(np.float32))
    np.savez(d / "calib.npz", x=g.normal(size=(128, 20)).astype(np.float32))
    return d


def _run(work, monkeypatch, *argv):
    monkeypatch.chdir(work)
    monkeypatch.syspath_prepend(str(work))
    out, err = io.StringIO(), io.StringIO()
    try:
        rc = main(list(argv), stdout=out, stderr=err)
    except SystemExit as done:  # argparse usage errors
        rc = done.code
    return rc, out.getvalue(), err.getvalue()


MODEL = ("--model", "bytes_models:build", "--inputs", "x.npz", "--repeats", "0")


def test_shrink_cost_bytes_reports_forms_and_alternatives_and_reloads_bit_for_bit(work, monkeypatch):
    rc, out, err = _run(work, monkeypatch, "shrink", *MODEL, "--cost", "bytes", "--precisions", "int8,int4g64",
                        "--budget", "0.3", "-o", "small.safetensors", "--report", "small.md", "--json", "--force")
    assert rc == 0, err
    data = json.loads(out)
    rep, plan = data["report"], data["plan"]
    assert plan["policy"]["cost"] == "bytes" and plan["policy"]["precisions"] == ["int8", "int4g64"]
    assert {e["precision"] for e in plan["sites"].values()} <= {"float32", "int8", "int4g64"}
    assert rep["stored_bytes_after"] <= 0.3 * rep["stored_bytes_before"]
    assert [(a["name"], a["this_plan"]) for a in rep["alternatives"]] == [("int8", False), ("rank", False),
                                                                         ("joint", True)]
    assert all(a["drift"]["relative_l2"] is not None for a in rep["alternatives"])
    assert rep["alternatives_verdict"] and rep["alternatives"][2]["drift"] == rep["drift"]
    assert all(layer["precision"] and layer["bytes_after"] for layer in rep["layers"])
    md = (work / "small.md").read_text()
    assert "| int8 rounding alone |" in md and rep["alternatives_verdict"] in md and "Stored forms:" in md
    # the checkpoint reads back bit for bit (safetensors file against the loaded model), and runs as reported
    model = factorize.load(_fresh(), work / "small.safetensors")
    saved = load_file(str(work / "small.safetensors"))
    state = model.state_dict()
    assert set(saved) == set(state)
    assert all(torch.equal(saved[k], state[k]) for k in saved)
    x = torch.from_numpy(np.load(work / "x.npz")["x"])
    with torch.no_grad():
        reference, after = _fresh()(x), model(x)
    rel = float(torch.linalg.norm(after - reference) / torch.linalg.norm(reference))  # relative L2, as reported
    assert rel == pytest.approx(rep["drift"]["relative_l2"], rel=1e-5)


def _fresh():
    import bytes_models  # the fixture's module, on sys.path while the test runs

    return bytes_models.build().eval()


def test_shrink_on_screen_shows_the_tables_and_the_sentence(work, monkeypatch):
    monkeypatch.setenv("COLUMNS", "200")
    rc, out, err = _run(work, monkeypatch, "shrink", *MODEL, "--cost", "bytes", "--budget", "0.2",
                        "-o", "screen.safetensors", "--force")
    assert rc == 0, err
    text = " ".join(out.split())
    assert "stored forms" in text and "stored bytes, layers in the plan" in text
    assert "plain alternatives at the chosen size" in text and "rank and precision (this plan)" in text
    assert "int8 rounding alone" in text and ("This plan is" in text or "drifts" in text or "smaller at drift" in text)


def test_no_alternatives_skips_them(work, monkeypatch):
    rc, out, err = _run(work, monkeypatch, "shrink", *MODEL, "--budget", "0.5", "--no-alternatives", "--json",
                        "-o", "plain.safetensors", "--force")
    assert rc == 0, err
    rep = json.loads(out)["report"]
    assert rep["alternatives"] == [] and rep["alternatives_verdict"] is None


def test_compare_shows_the_alternatives_of_a_checkpoint(work, monkeypatch):
    rc, _, err = _run(work, monkeypatch, "shrink", *MODEL, "--budget", "0.5", "--no-alternatives",
                      "-o", "rank.safetensors", "--force", "--json")
    assert rc == 0, err
    rc, out, err = _run(work, monkeypatch, "compare", *MODEL, "--against", "rank.safetensors", "--json")
    assert rc == 0, err
    rep = json.loads(out)["report"]
    assert [(a["name"], a["this_plan"]) for a in rep["alternatives"]] == [("int8", False), ("rank", True),
                                                                         ("joint", False)]
    assert rep["alternatives_verdict"]


@pytest.mark.parametrize("argv, words", [
    (("--cost", "bytes", "--precisions", "int8,int3"), ("--precisions", "int3")),
    (("--cost", "bytes", "--precisions", ""), ("--precisions",)),
    (("--cost", "kilobytes"), ("--cost", "kilobytes")),
])
def test_bad_precision_or_cost_names_exit_2_with_one_line(work, monkeypatch, argv, words):
    rc, _, err = _run(work, monkeypatch, "shrink", *MODEL, *argv, "-o", "never.safetensors")
    assert rc == 2 and "Traceback" not in err and not (work / "never.safetensors").exists()
    first, *rest = err.strip().splitlines()
    assert all(w in first for w in words), err
    assert rest == ["Run 'factorize shrink --help' for the options."]


def test_precisions_without_a_bytes_budget_is_refused(work, monkeypatch):
    rc, _, err = _run(work, monkeypatch, "shrink", *MODEL, "--precisions", "int8", "-o", "never.safetensors")
    assert rc == 2 and "Traceback" not in err and "cost='bytes'" in err
    assert not (work / "never.safetensors").exists()


def test_sweep_cost_bytes_table_with_reference_curves(work, monkeypatch):
    rc, out, err = _run(work, monkeypatch, "sweep", *MODEL, "--cost", "bytes", "--budgets", "0.5,0.15",
                        "--csv", "sweep.csv", "--plot", "sweep.png", "--json", "--force")
    assert rc == 0, err
    data = json.loads(out)
    rows = data["rows"]
    assert [r["budget"] for r in rows] == [0.5, 0.15]
    for r in rows:
        assert r["bytes_fraction"] <= r["budget"] + 1e-9
        assert r["rank_only_bytes_fraction"] <= r["bytes_fraction"] * 1.01 and r["rank_only_relative_l2"] > 0
    assert rows[0]["relative_l2"] <= rows[1]["relative_l2"]
    int8 = data["references"]["int8"]
    assert 0.25 < int8["bytes_fraction"] < 0.3 and int8["drift"]["relative_l2"] < rows[1]["relative_l2"]
    with open(work / "sweep.csv", newline="") as f:
        table = list(csv.DictReader(f))
    assert float(table[1]["bytes_fraction"]) == pytest.approx(rows[1]["bytes_fraction"])
    assert float(table[1]["rank_only_relative_l2"]) == pytest.approx(rows[1]["rank_only_relative_l2"])
    assert (work / "sweep.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    monkeypatch.setenv("COLUMNS", "200")
    rc, out, err = _run(work, monkeypatch, "sweep", *MODEL, "--cost", "bytes", "--budgets", "0.5")
    assert rc == 0, err
    text = " ".join(out.split())
    assert "bytes kept" in text and "rank alone, same bytes" in text and "rounded to int8 and not factored" in text


def test_target_drift_searches_bytes_budgets(work, monkeypatch):
    rc, out, err = _run(work, monkeypatch, "shrink", *MODEL, "--calibration", "calib.npz", "--cost", "bytes",
                        "--target-drift", "0.05", "-o", "target.safetensors", "--json", "--force")
    assert rc == 0, err
    data = json.loads(out)
    plan, rep = data["plan"], data["report"]
    assert plan["policy"]["cost"] == "bytes" and all("precision" in e for e in plan["sites"].values())
    assert plan["search"]["drift"] <= 0.05 and len(plan["search"]["curve"]) >= 2
    assert rep["alternatives"][2]["this_plan"] and "error-feedback" in rep["alternatives"][0]["note"]
