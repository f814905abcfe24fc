"""The bad-input battery: every case an outside pass found (issue 14) as a fast, in-process command line.

Each case must end with exit code 2, one message naming the right file, flag or layer, no traceback, nothing
written, and every input byte-for-byte as it was. Then: the same shrink twice gives the same bytes, and a
hypothesis fuzz of the plan parser lets only FactorizeError out.
"""

from __future__ import annotations

import contextlib
import copy
import hashlib
import json
import os
import sys
import textwrap
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
import torch
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from factorize.checkpoints import files
from factorize.errors import FactorizeError
from factorize.rewrite.apply import check_plan, validate_plan

from .test_cli import _build_work, _in_process

BAD_MODELS = """
import sys
import torch
from cli_models import Net

def raises():
    raise RuntimeError("boom in the builder")

def exits():
    sys.exit(3)

def zero_dim():
    return torch.nn.Sequential(torch.nn.Linear(0, 5))

def on_meta():
    with torch.device("meta"):
        return Net()

def nan_head():
    net = Net()
    with torch.no_grad():
        net.head.weight[0, 0] = float("nan")
    return net
"""

M = ["-m", "cli_models:build", "-w", "mlp.safetensors"]

# name -> (argv, fragments the message must contain)
CASES: dict[str, tuple[list[str], list[str]]] = {
    # 1. nothing lost: an output naming an input, or another output (--force does not change it)
    "report_is_weights": (["shrink", *M, "-o", "n1.safetensors", "--report", "mlp.safetensors", "--force"],
                          ["--report mlp.safetensors is the --weights file"]),
    "csv_is_weights": (["sweep", *M, "--csv", "mlp.safetensors", "--budgets", "0.5", "--force"],
                       ["--csv mlp.safetensors is the --weights file"]),
    "output_is_inputs": (["shrink", *M, "-i", "x.npz", "-o", "x.npz", "--force"], ["--output x.npz is the --inputs"]),
    "output_is_calibration": (["shrink", *M, "-i", "x.npz", "-c", "x.npz", "-o", "x.npz", "--force"],
                              ["--output x.npz is the --calibration file"]),
    "output_is_model_link": (["shrink", "-m", "mlp.safetensors", "--rank", "4", "-o", "link.safetensors", "--force"],
                             ["--output link.safetensors is the --model file"]),
    "report_is_output": (["shrink", *M, "-o", "n2.safetensors", "--report", "n2.safetensors"],
                         ["--report n2.safetensors is also --output"]),
    "plot_is_csv": (["sweep", *M, "--csv", "n3.out", "--plot", "n3.out", "--budgets", "0.5"],
                    ["--plot n3.out is also --csv"]),
    "report_is_against": (["compare", *M, "--against", "mlp.safetensors", "--random-inputs", "4x20",
                           "--report", "mlp.safetensors", "--force"], ["--report mlp.safetensors is the --against"]),
    "cache_is_weights": (["shrink", *M, "-o", "n4.safetensors", "--cache", "mlp.safetensors"],
                         ["--cache mlp.safetensors is the --weights file"]),
    "output_is_recipe": (["shrink", *M, "--recipe", "r.toml", "-o", "r.toml", "--force"],
                         ["--output r.toml is the --recipe file"]),
    "output_in_shard_dir": (["shrink", "-m", "shards/m.safetensors.index.json", "--rank", "4", "-o",
                             "shards/m-1.safetensors", "--force"], ["is the --model file"]),
    # 3. bad inputs that gave tracebacks or blamed the wrong thing
    "no_2d_tensor": (["shrink", "-m", "no2d.safetensors", "-o", "n5.safetensors"], ["no2d.safetensors", "2-D"]),
    "builder_raises": (["scan", "-m", "bad_models:raises"], ["bad_models:raises", "RuntimeError: boom in the builder"]),
    "builder_exits": (["scan", "-m", "bad_models:exits"], ["bad_models:exits", "sys.exit(3)"]),
    "import_fails": (["scan", "-m", "broken_import:build"], ["broken_import:build", "nonexistent_pkg_zzz"]),
    "syntax_error": (["scan", "-m", "syntax_err:build"], ["syntax_err:build", "SyntaxError", "line 1"]),
    "corrupt_npz": (["shrink", *M, "-i", "corrupt.npz", "-o", "n6.safetensors"], ["corrupt.npz", "not a valid .npz"]),
    "corrupt_npy": (["shrink", *M, "-i", "corrupt.npy", "-o", "n7.safetensors"], ["corrupt.npy", ".npy"]),
    "missing_calibration": (["shrink", *M, "-c", "absent.npz", "-i", "x.npz", "-o", "n8.safetensors"],
                            ["absent.npz", "--calibration"]),
    "seed_huge": (["shrink", *M, "--random-inputs", "4x20", "--seed", str(10**30), "-o", "n9.safetensors"],
                  ["--seed", "out of range"]),
    "seed_negative": (["scan", "-m", "cli_models:build", "--seed", "-1"], []),  # scan has no --seed: usage error
    "random_inputs_huge": (["shrink", *M, "--random-inputs", "100000000000x20", "-o", "n10.safetensors"],
                           ["100000000000x20", "over the limit"]),
    "heal_lr_inf": (["shrink", *M, "-c", "x.npz", "--heal", "2", "--heal-lr", "inf", "-o", "n11.safetensors"],
                    ["--heal-lr", "finite number > 0"]),
    "heal_lr_zero": (["shrink", *M, "-c", "x.npz", "--heal", "2", "--heal-lr", "0", "-o", "n12.safetensors"],
                     ["--heal-lr"]),
    "heal_lr_nan": (["shrink", *M, "-c", "x.npz", "--heal", "2", "--heal-lr", "nan", "-o", "n13.safetensors"],
                    ["--heal-lr", "'nan' is not a number"]),
    "nan_inputs": (["shrink", *M, "-i", "nan.npy", "-o", "n14.safetensors"], ["nan.npy", "NaN or Inf"]),
    "nan_weights_factored": (["shrink", "-m", "bad_models:nan_head", "--random-inputs", "8x20", "-o",
                              "n15.safetensors"], ["head", "NaN or Inf"]),
    "json_usage_missing_model": (["shrink", "--json"], ["--model"]),
    "json_usage_bad_budget": (["shrink", *M, "--budget", "2", "--json"], ["--budget"]),
    "bad_plan_in_against": (["compare", *M, "--against", "badplan.safetensors", "--random-inputs", "4x20"],
                            ["badplan.safetensors", "rank True is not a positive integer"]),
    "deep_plan_in_against": (["compare", *M, "--against", "deepplan.safetensors", "--random-inputs", "4x20"],
                             ["deepplan.safetensors", "nested more than 64 levels"]),
    "overlapping_tensors": (["scan", "-m", "overlap.safetensors"],
                            ["overlap.safetensors: corrupt safetensors header", "overlap", "Fix: "]),
    "zero_size_layer": (["scan", "-m", "bad_models:zero_dim"], ["0: weight of shape (5, 0) has a zero-size"]),
    "meta_device_model": (["shrink", "-m", "bad_models:on_meta", "--rank", "2", "-o", "n16.safetensors"],
                          ["bad_models:on_meta", "meta device", "fc1.weight"]),
    "escape_in_plan_name": (["compare", *M, "--against", "escplan.safetensors", "--random-inputs", "4x20"],
                            ["escplan.safetensors", "\\x1b[31mevil"]),
}
WRITTEN_BY_NONE = [f"n{i}.safetensors" for i in range(1, 17)] + ["n3.out"]


def _plan_file(src: Path, dst: Path, mutate) -> None:
    """A copy of a factorize checkpoint with its plan changed by ``mutate`` (header rewritten, tensors kept)."""
    from safetensors.torch import load_file

    from factorize.storage import read_header, write_safetensors

    meta = dict(read_header(src).metadata)
    plan = json.loads(meta["factorize.plan"])
    mutate(plan)
    meta["factorize.plan"] = json.dumps(plan)
    write_safetensors(dst, load_file(str(src)), meta)


def _overlapping_file(dst: Path) -> None:
    """A safetensors file whose second tensor's bytes overlap the first's (the header rewritten, same length)."""
    import struct

    from safetensors.torch import save_file

    save_file({"a.weight": torch.randn(4, 4), "b.weight": torch.randn(4, 4)}, str(dst))
    blob = dst.read_bytes()
    (n,) = struct.unpack("<Q", blob[:8])
    header = json.loads(blob[8:8 + n])
    header["b.weight"]["data_offsets"] = [32, 96]  # a.weight holds [0, 64)
    text = json.dumps(header, separators=(",", ":")).encode()
    assert len(text) <= n
    dst.write_bytes(struct.pack("<Q", n) + text.ljust(n) + blob[8 + n:])


def _deep_plan_file(src: Path, dst: Path, depth: int) -> None:
    """A factorize checkpoint whose plan holds a list nested ``depth`` levels deep (written as text: json.dumps
    itself would recurse that deep)."""
    from safetensors.torch import load_file

    from factorize.storage import read_header, write_safetensors

    meta = dict(read_header(src).metadata)
    meta["factorize.plan"] = meta["factorize.plan"][:-1] + ', "deep": ' + "[" * depth + "]" * depth + "}"
    write_safetensors(dst, load_file(str(src)), meta)


@pytest.fixture(scope="module")
def battery(tmp_path_factory):
    d = tmp_path_factory.mktemp("battery")
    _build_work(d)
    (d / "bad_models.py").write_text(textwrap.dedent(BAD_MODELS))
    (d / "broken_import.py").write_text("import nonexistent_pkg_zzz\n\ndef build():\n    pass\n")
    (d / "syntax_err.py").write_text("def build(:\n")
    (d / "corrupt.npz").write_bytes(b"PK\x03\x04 not really a zip archive" * 8)
    (d / "corrupt.npy").write_bytes(b"\x93NUMPY not really an array" * 8)
    (d / "r.toml").write_text('description = "a recipe"\nbudget = 0.5\n')
    (d / "link.safetensors").symlink_to(d / "mlp.safetensors")
    from safetensors.torch import save_file

    save_file({"a.bias": torch.zeros(3)}, str(d / "no2d.safetensors"))
    np.save(d / "nan.npy", np.full((8, 20), np.nan, dtype=np.float32))
    cwd = os.getcwd()
    os.chdir(d)
    try:
        ok = _in_process(["shrink", *M, "--rank", "4", "-o", "good.safetensors", "-q"])
        assert ok.rc == 0, ok
        _plan_file(d / "good.safetensors", d / "badplan.safetensors", lambda p: p["sites"]["fc1"].update(rank=True))
        _plan_file(d / "good.safetensors", d / "escplan.safetensors", lambda p: p["sites"].update(
            {"\x1b[31mevil": {"action": "factor", "kind": "linear", "shape": [2, 2], "rank": 1}}))
        _deep_plan_file(d / "good.safetensors", d / "deepplan.safetensors", 3000)
        _overlapping_file(d / "overlap.safetensors")
        before = _digests(d)
        runs = {name: _in_process(argv) for name, (argv, _) in CASES.items()}
        after = _digests(d)
    finally:
        os.chdir(cwd)
        sys.modules.pop("bad_models", None)
    return {"dir": d, "runs": runs, "before": before, "after": after}


def _digests(d: Path) -> dict[str, str]:
    return {str(p.relative_to(d)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in d.rglob("*") if p.is_file() and "__pycache__" not in p.parts}


@pytest.mark.parametrize("name", list(CASES))
def test_bad_input_is_one_clean_exit_2(battery, name) -> None:
    r = battery["runs"][name]
    assert r.rc == 2, r
    assert "Traceback" not in r.err and "\x1b[31m" not in r.err, r
    for text in CASES[name][1]:
        assert text in r.err, (text, r)
    if "--json" in r.argv:
        err = r.json()  # one JSON object on stdout, usage errors included
        assert err["exit_code"] == 2 and err["error"]
    else:
        assert r.out == "", r


def test_no_input_modified_and_nothing_written(battery) -> None:
    d = battery["dir"]
    changed = [k for k, v in battery["before"].items() if battery["after"].get(k) != v]
    assert changed == []
    assert [n for n in WRITTEN_BY_NONE if (d / n).exists()] == []
    assert list(d.glob(".*factorize-tmp")) == []


def test_nan_weights_in_an_excluded_layer_are_named_and_the_report_says_so(battery, monkeypatch) -> None:
    monkeypatch.chdir(battery["dir"])
    r = _in_process(["shrink", "-m", "bad_models:nan_head", "--random-inputs", "8x20", "--exclude", "head",
                     "--repeats", "0", "-o", "nanx.safetensors", "--json", "-q"])
    sys.modules.pop("bad_models", None)
    assert r.rc == 0, r
    assert "head.weight (1)" in r.err  # the warning names the tensor
    rep = r.json()["report"]
    assert any("NON-FINITE OUTPUTS" in n for n in rep["notes"]) and rep["advice"][0].startswith("Non-finite drift")


# --- 2. byte-identical outputs --------------------------------------------------------------------------------


@pytest.mark.parametrize("mode", ["model_heal", "weights_only"])
def test_the_same_shrink_twice_gives_the_same_bytes(battery, mode, monkeypatch) -> None:
    monkeypatch.chdir(battery["dir"])
    outs = []
    for i in range(2):
        out = f"same-{mode}-{i}.safetensors"
        if mode == "model_heal":
            argv = ["shrink", *M, "-c", "x.npz", "-i", "x.npz", "--heal", "3", "--repeats", "0", "-o", out, "-q"]
        else:
            argv = ["shrink", "-m", "mlp.safetensors", "--rank", "4", "-o", out, "-q"]
        r = _in_process(argv)
        assert r.rc == 0, r
        outs.append(Path(out).read_bytes())
    assert outs[0] == outs[1]
    if mode == "model_heal":
        plan = files.read_plan(f"same-{mode}-0.safetensors")
        assert "heal" in plan and "seconds" not in plan["heal"]  # timings go to the report, not the file


# --- 3. the plan parser under fuzz ----------------------------------------------------------------------------

SCALARS = st.none() | st.booleans() | st.integers(-3, 10**20) | st.floats(allow_nan=True) | st.text(max_size=8)
JSON = st.recursive(SCALARS,
                    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=6), inner, max_size=4),
                    max_leaves=20)
GOOD_PLAN = {"format": "factorize.plan", "version": 1, "method": "exact", "policy": {"rank": 4},
             "sites": {"fc1": {"action": "factor", "kind": "linear", "shape": [48, 24], "rank": 4},
                       "fc2": {"action": "dense", "kind": "linear", "shape": [48, 48], "reason": "x"}}}
FIELDS = st.sampled_from(["action", "kind", "shape", "rank", "params", "reason"])


@st.composite
def mutated_plans(draw):
    plan = copy.deepcopy(GOOD_PLAN)
    for _ in range(draw(st.integers(1, 3))):
        where = draw(st.sampled_from(["top", "site", "field", "name"]))
        if where == "top":
            plan[draw(st.sampled_from(["format", "version", "sites", "policy"]))] = draw(JSON)
        elif where == "site" and isinstance(plan.get("sites"), dict):
            plan["sites"][draw(st.sampled_from(["fc1", "fc2", "head"]))] = draw(JSON)
        elif where == "field" and isinstance(plan.get("sites"), dict) and isinstance(plan["sites"].get("fc1"), dict):
            plan["sites"]["fc1"][draw(FIELDS)] = draw(JSON)
        elif isinstance(plan.get("sites"), dict):
            plan["sites"][draw(st.text(max_size=10))] = copy.deepcopy(GOOD_PLAN["sites"]["fc1"])
    return plan


def _only_factorize_errors(fn) -> None:
    with contextlib.suppress(FactorizeError):
        fn()


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(plan=st.one_of(JSON, mutated_plans()))
def test_plan_parser_lets_only_factorize_errors_out(plan) -> None:
    from tests.conftest import MLP  # the shared small model (d_in 24, hidden 48)

    _only_factorize_errors(lambda: check_plan(plan))
    _only_factorize_errors(lambda: validate_plan(MLP(), plan))
    meta = {"factorize.format": "factorize.checkpoint", "factorize.format_version": "1",
            "factorize.plan": json.dumps(plan, allow_nan=True)}
    _only_factorize_errors(lambda: files._plan_and_aliases(SimpleNamespace(metadata=meta), "fuzz.safetensors"))


@settings(max_examples=60, deadline=None)
@given(version=st.text(max_size=12), aliases=JSON)
def test_checkpoint_metadata_fuzz_lets_only_factorize_errors_out(version, aliases) -> None:
    meta = {"factorize.format": "factorize.checkpoint", "factorize.format_version": version,
            "factorize.plan": json.dumps(GOOD_PLAN), "factorize.aliases": json.dumps(aliases)}
    _only_factorize_errors(lambda: files._plan_and_aliases(SimpleNamespace(metadata=meta), "fuzz.safetensors"))


# --- 4. honest latency: spread, threads, and a note when the spread is too wide ---------------------------------


class _Jittery(torch.nn.Module):
    """A forward pass costing the next of ``costs`` milliseconds on a fake clock (no machine timing); only the
    timer's passes (run under torch.inference_mode) spend, the passes that collect outputs do not."""

    def __init__(self, clock, costs, name):
        super().__init__()
        self.fc, self.clock, self.costs, self.label = torch.nn.Linear(4, 3), clock, iter(costs), name

    def forward(self, x):
        if torch.is_inference_mode_enabled():
            self.clock.spend(self.label, next(self.costs))
        return self.fc(x)


@pytest.mark.parametrize("before, after, conclusive", [
    ([2.0] * 3 + [2.0, 2.1, 1.9, 2.0, 2.2, 1.8], [1.0] * 3 + [1.0, 1.1, 0.9, 1.0, 1.05, 0.95], True),
    ([2.0] * 3 + [1.0, 3.0, 1.5, 2.5, 2.0, 1.2], [1.0] * 3 + [1.8, 1.0, 2.6, 1.4, 2.2, 0.9], False),
])
def test_latency_reports_its_spread_threads_and_whether_it_concludes(before, after, conclusive) -> None:
    from factorize.measure.evaluate import evaluate
    from factorize.measure.report import render_rich
    from tests.measure.fakeclock import FakeClock

    clock = FakeClock()
    a, b = _Jittery(clock, before, "a"), _Jittery(clock, after, "b")
    b.load_state_dict(a.state_dict())
    rep = evaluate(a, b, [torch.randn(5, 4)], latency_repeats=6, clock=clock)
    timed = sorted(before[3:])  # three warm-up passes are not timed
    # quartiles with linear interpolation between order statistics: numpy.percentile's default (numpy reference)
    assert rep.latency_iqr_before == pytest.approx(list(np.percentile(timed, [25, 75])))
    assert rep.latency_range_before == pytest.approx([timed[0], timed[-1]])
    assert rep.latency_threads == torch.get_num_threads() and rep.latency_conclusive is conclusive
    text = rep.to_markdown()
    n = torch.get_num_threads()
    assert f"{n} thread" + ("s" if n != 1 else "") in text and "interquartile range" in text
    assert ("Latency is inconclusive" in text) is (not conclusive)
    assert rep.to_json()["latency_conclusive"] is conclusive
    import io

    from rich.console import Console

    buf = io.StringIO()
    render_rich(rep, Console(file=buf, width=200))
    assert ("overlap: inconclusive" in buf.getvalue()) is (not conclusive)


# --- 5. a terminal that guides ----------------------------------------------------------------------------------

LONG = "encoder.layer_with_a_rather_long_descriptive_name.attention.output_projection_block"


def _first_column(text: str) -> str:
    """The first column of every rich table row in ``text``, fragments joined (a folded name spans lines)."""
    return "".join(line.split("│")[1].strip() for line in text.splitlines() if line.startswith("│"))


@pytest.mark.parametrize("command", ["scan", "shrink"])
def test_long_layer_names_are_shown_in_full_at_120_columns(tmp_path, monkeypatch, command) -> None:
    attr = LONG.split(".", 1)[1].replace(".", "_")
    (tmp_path / "longnames.py").write_text(textwrap.dedent(f"""
        import torch
        from torch import nn

        class Block(nn.Module):
            def __init__(self):
                super().__init__()
                self.{attr} = nn.Sequential(nn.Linear(32, 64), nn.ReLU(), nn.Linear(64, 32))

            def forward(self, x):
                return self.{attr}(x)

        class Net(nn.Module):
            def __init__(self):
                super().__init__()
                self.encoder = Block()

            def forward(self, x):
                return self.encoder(x)

        def build():
            torch.manual_seed(0)
            return Net()
        """))
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("COLUMNS", raising=False)  # into a pipe: 120 columns
    argv = [command, "-m", "longnames:build", "-q"] + (["--random-inputs", "8x32", "--repeats", "0",
                                                        "-o", "o.safetensors"] if command == "shrink" else [])
    r = _in_process(argv)
    sys.modules.pop("longnames", None)
    assert r.rc == 0, r
    name = "encoder." + LONG.split(".", 1)[1].replace(".", "_") + ".0"
    assert len(name) > 60 and "…" not in r.out
    # whole: a row of the table (folded cells joined) or, when the table is wider than the console, a record's
    # first line (measure/layout.py)
    assert name in _first_column(r.out) or name in [line.strip() for line in r.out.splitlines()], r.out
    if command == "shrink":
        assert "next steps:" in r.out and "factorize compare" in r.out


def test_speed_check_works_on_the_digits_model_and_names_the_layers(tmp_path, monkeypatch) -> None:
    monkeypatch.chdir(tmp_path)
    r = _in_process(["shrink", "-m", "factorize.default:load_default", "--speed-check", "--repeats", "0",
                     "-o", "d.safetensors", "--json", "-q"])
    assert r.rc == 0, r  # it used to exit 2 when slow layers made the budget unaffordable
    data = r.json()
    for name, e in data["plan"]["sites"].items():  # every layer kept dense for speed is named in a note
        if "measured slower" in str(e.get("reason", "")):
            assert any(n.startswith(f"speed check: {name}: ") for n in data["report"]["notes"])


def test_help_warns_that_a_callable_runs_code(capsys) -> None:
    from factorize.cli import main

    for argv in (["--help"], ["shrink", "--help"]):
        with pytest.raises(SystemExit):
            main(argv)
        text = " ".join(capsys.readouterr().out.split())
        assert "imports and runs" in text.lower() and "working directory" in text
    doc = (Path(__file__).resolve().parents[2] / "docs" / "cli.md").read_text()
    assert "Code execution warning" in doc


def test_compare_non_strict_loads_a_checkpoint_with_an_extra_key(battery, monkeypatch) -> None:
    """A checkpoint holding a key the architecture lacks (as a transformers position_ids buffer would)."""
    from safetensors.torch import load_file

    from factorize.storage import read_header, write_safetensors

    d = battery["dir"]
    monkeypatch.chdir(d)
    tensors = load_file(str(d / "good.safetensors"))
    tensors["position_ids"] = torch.arange(4)
    if not (d / "extra.safetensors").exists():
        write_safetensors(d / "extra.safetensors", tensors, read_header(d / "good.safetensors").metadata)
    base = ["compare", *M, "--against", "extra.safetensors", "--random-inputs", "4x20", "--repeats", "0", "-q"]
    strict = _in_process(base)
    assert strict.rc == 2 and "position_ids" in strict.err and "Traceback" not in strict.err, strict
    loose = _in_process([*base, "--non-strict", "--json"])
    assert loose.rc == 0, loose
    assert "position_ids" in loose.err  # the warning lists what was ignored


def test_target_drift_chooses_on_one_half_and_reports_on_the_other(tmp_path, monkeypatch) -> None:
    """Held-out digits (Alpaydin & Kaynak, UCI, as bundled with scikit-learn): 540 samples in 9 batches of 64."""
    from safetensors.torch import save_file

    from factorize.default import load_digits_split

    monkeypatch.chdir(tmp_path)
    for split in ("calibration", "test"):
        x, y = load_digits_split(split)
        save_file({"inputs": x.contiguous(), "labels": y.contiguous()}, f"{split}.safetensors")
    r = _in_process(["shrink", "-m", "factorize.default:load_default", "-c", "calibration.safetensors",
                     "-i", "test.safetensors", "--target-drift", "0.05", "--repeats", "0", "-o", "t.safetensors",
                     "--json", "-q"])
    assert r.rc == 0, r
    rep = r.json()["report"]
    chosen = 4 * 64  # the first 4 of the 9 batches
    assert rep["samples"] == 540 - chosen  # the report's drift is on the samples the search never saw
    assert any(f"first {chosen} samples" in n and f"other {540 - chosen}" in n for n in rep["notes"])
    assert rep["accuracy_after"] is not None  # labels were split with the batches
