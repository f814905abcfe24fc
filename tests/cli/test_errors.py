"""Errors a user meets read as one message: usage errors in one line with a pointer to --help, warnings at the
caller's line, names escaped, and the last inputs that gave tracebacks (a deeply nested plan, a meta-device or
zero-size model, a refused pickle) as one FactorizeError naming the file or layer and the fix, writing nothing."""

from __future__ import annotations

import io
import json
import os
import warnings
from pathlib import Path

import pytest
import torch
from torch import nn

import factorize
from factorize.checkpoints import files
from factorize.cli import main
from factorize.cli.sweep import plot_title
from factorize.errors import FactorizeError, caller_stacklevel, printable
from factorize.rewrite.apply import check_plan


def _run(argv: list[str]) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    try:
        rc = main(argv, stdout=out, stderr=err)
    except SystemExit as done:  # argparse usage errors
        rc = done.code
    return rc, out.getvalue(), err.getvalue()


def test_usage_error_is_one_line_and_a_pointer_to_help(capsys) -> None:
    with pytest.raises(SystemExit) as done:
        main(["shrink", "-m", "x:build", "--budget", "2"])
    err = capsys.readouterr().err
    assert done.value.code == 2
    first = "factorize shrink: error: argument --budget: 2.0 is outside (0, 1]; --budget takes a fraction such as 0.5"
    assert err.splitlines() == [first, "Run 'factorize shrink --help' for the options."]
    assert "usage:" not in err


def test_help_documents_exit_code_130(capsys) -> None:
    with pytest.raises(SystemExit):
        main(["--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "130 interrupted" in text and "2 bad usage or bad input" in text
    docs = (Path(__file__).resolve().parents[2] / "docs" / "cli.md").read_text()
    assert "| 130 |" in docs


def _library_warns():  # a helper inside the package's namespace, as a library function would be
    warnings.warn("from deep inside", stacklevel=caller_stacklevel())


def test_warnings_point_at_the_callers_line() -> None:
    """caller_stacklevel walks out of every frame whose module is factorize.*; this test's frame is the caller."""
    inner = type(_library_warns)(_library_warns.__code__, {**globals(), "__name__": "factorize.fake"})
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        inner()
    assert caught[0].filename == __file__


def test_calibration_warning_points_at_the_callers_line() -> None:
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(32, 32), nn.ReLU(), nn.Linear(32, 4))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        factorize.compress(model, budget=0.5, calibration=[torch.randn(8, 32)])  # 8 samples < width 32
    few = [w for w in caught if "too few calibration samples" in str(w.message)]
    assert few and few[0].filename == __file__, [(w.filename, w.lineno) for w in caught]


def test_printable_escapes_control_characters() -> None:
    assert printable("a\x1b[2Jb\u200bc\nd") == "a\\x1b[2Jb\\u200bc\nd"


def test_plot_title_is_the_file_name_shortened() -> None:
    assert plot_title("/home/someone/models/all-MiniLM-L6-v2") == "all-MiniLM-L6-v2"
    assert plot_title("mypkg.models:build") == "mypkg.models:build"
    long = plot_title("/a/b/" + "x" * 80 + ".safetensors")
    assert len(long) == 40 and long.endswith(".safetensors") and "..." in long


def _checkpoint(d: Path) -> Path:
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(20, 48), nn.ReLU(), nn.Linear(48, 5))
    result = factorize.compress(model, rank=4, example=torch.randn(2, 20))
    return files.save(result.model, d / "good.safetensors", plan=result.plan)


def test_deeply_nested_plan_is_one_error_from_the_api(tmp_path) -> None:
    from safetensors.torch import load_file

    from factorize.storage import read_header, write_safetensors

    src = _checkpoint(tmp_path)
    meta = dict(read_header(src).metadata)
    meta["factorize.plan"] = meta["factorize.plan"][:-1] + ', "deep": ' + "[" * 5000 + "]" * 5000 + "}"
    write_safetensors(tmp_path / "deep.safetensors", load_file(str(src)), meta)
    with pytest.raises(FactorizeError, match="nested more than 64 levels") as err:
        files.read_plan(tmp_path / "deep.safetensors")
    assert "deep.safetensors" in str(err.value) and err.value.fix


def test_json_depth_ignores_brackets_in_strings() -> None:
    assert files.json_depth('{"a": "[[[[{{{", "b": [[1]]}') == 3
    assert files.json_depth(json.dumps({"k": "\\\"[[["})) == 1


def test_malformed_plan_names_the_layers_in_its_first_line() -> None:
    plan = {"format": "factorize.plan", "version": 1, "sites": {
        f"layer{i}": {"action": "factor", "kind": "linear", "shape": [4, 4], "rank": 0} for i in range(3)}}
    with pytest.raises(FactorizeError) as err:
        check_plan(plan)
    first = str(err.value).splitlines()[0]
    assert "layer0" in first and "layer1" in first and "layer2" in first


def test_meta_device_model_is_refused_up_front() -> None:
    with torch.device("meta"):
        model = nn.Sequential(nn.Linear(20, 48), nn.ReLU(), nn.Linear(48, 5))
    with pytest.raises(FactorizeError, match="meta device") as err:
        factorize.compress(model, rank=4)
    assert "0.weight" in err.value.problems and "to_empty" in err.value.fix


def test_zero_size_layer_is_skipped_with_its_reason() -> None:
    model = nn.Sequential(nn.Linear(0, 5))
    with pytest.raises(FactorizeError, match="no factorizable layer") as err:
        factorize.compress(model, rank=2)
    assert any("0: weight of shape (5, 0) has a zero-size dimension" in p for p in err.value.problems)


def test_refused_pickle_in_a_transformers_folder_is_one_message(tmp_path, monkeypatch) -> None:
    """A pickle that would run code when loaded (here: os.system), with --allow-pickle: torch.load(weights_only=True)
    refuses it (torch's documented behaviour), and the user sees one message naming the file, exit 2."""
    transformers = pytest.importorskip("transformers")
    config = transformers.BertConfig(vocab_size=50, hidden_size=16, num_hidden_layers=1, num_attention_heads=2,
                                     intermediate_size=32)
    d = tmp_path / "bert"
    config.save_pretrained(d)

    class Evil:
        def __reduce__(self):
            return (os.system, (f"echo ran > {tmp_path / 'ran'}",))

    torch.save({"x": Evil()}, d / "pytorch_model.bin")
    before = sorted(p.name for p in tmp_path.rglob("*"))
    monkeypatch.chdir(tmp_path)
    rc, out, err = _run(["shrink", "-m", str(d), "--allow-pickle", "--rank", "2", "-o", "out", "-q"])
    assert rc == 2 and out == ""
    assert "pytorch_model.bin" in err and "refused" in err and "Traceback" not in err
    assert len([line for line in err.splitlines() if line.startswith("error:")]) == 1
    assert not (tmp_path / "ran").exists()  # nothing ran
    assert sorted(p.name for p in tmp_path.rglob("*")) == before  # nothing written
