"""The command line's activation-aware, target-drift, healing, cache and worker options, on the embedded digits
classifier and the held-out part of scikit-learn's digits data (Alpaydin & Kaynak, UCI)."""

from __future__ import annotations

import io
import json

import pytest

from factorize.cli import main
from tests.cli.digits import write_digits_splits

MODEL = "factorize.default:load_default"


def _run(argv):
    out, err = io.StringIO(), io.StringIO()
    rc = main(argv, stdout=out, stderr=err)
    return rc, out.getvalue(), err.getvalue()


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    d = tmp_path_factory.mktemp("quality")
    write_digits_splits(d)
    return d


def _shrink(data, *extra):
    argv = ["shrink", "-m", MODEL, "-i", str(data / "test.safetensors"), "-o", str(data / "out.safetensors"),
            "--force", "--json", "-q", "--repeats", "0", *extra]
    rc, out, err = _run(argv)
    return rc, (json.loads(out) if out.strip() else None), err


def test_calibrated_shrink_beats_plain_at_a_strong_budget(data):
    rc, plain, _ = _shrink(data, "--budget", "0.05")
    assert rc == 0
    rc, aware, _ = _shrink(data, "--budget", "0.05", "-c", str(data / "calibration.safetensors"))
    assert rc == 0 and aware["plan"]["calibration"]["method"] == "whiten"
    # Held-out digits accuracy (Alpaydin & Kaynak, UCI): fitting each layer to its real inputs keeps more.
    assert aware["report"]["accuracy_after"] > plain["report"]["accuracy_after"]
    assert aware["report"]["drift"]["relative_l2"] < plain["report"]["drift"]["relative_l2"]


@pytest.mark.parametrize("flag, mode", [(["--sensitivity"], "both"), (["--sensitivity", "probes"], "probes"),
                                        (["--sensitivity", "gradients"], "gradients")])
def test_sensitivity_modes_reach_the_plan(data, flag, mode):
    rc, done, _ = _shrink(data, "--budget", "0.1", "-c", str(data / "calibration.safetensors"), *flag)
    assert rc == 0 and done["plan"]["calibration"]["sensitivity"] == mode


def test_unknown_sensitivity_mode_is_a_usage_error(data, capsys):
    with pytest.raises(SystemExit) as info:  # argparse's usage error: exit 2 with a message, no traceback
        main(["shrink", "-m", MODEL, "-c", str(data / "calibration.safetensors"), "--sensitivity", "hessian"])
    assert info.value.code == 2 and "invalid choice: 'hessian'" in capsys.readouterr().err


def test_target_drift_meets_the_limit_or_exits_1(data):
    calib = str(data / "calibration.safetensors")
    rc, done, _ = _shrink(data, "-c", calib, "--target-drift", "0.05")
    assert rc == 0 and done["report"]["drift"]["relative_l2"] <= 0.05
    assert any("budgets tried" in n for n in done["report"]["notes"])
    rc, failed, _ = _shrink(data, "-c", calib, "--target-drift", "1e-9")
    assert rc == 1 and failed["exit_code"] == 1 and "closest" in failed["error"]


def test_target_drift_can_limit_the_tail(data):
    rc, done, _ = _shrink(data, "-c", str(data / "calibration.safetensors"), "--target-drift", "0.1",
                          "--drift-metric", "relative_l2_p95")
    search = done["plan"]["search"]
    assert rc == 0 and search["metric"] == "relative_l2_p95" and search["drift"] <= 0.1
    # the report's own tail, on the other part of --inputs, is shown beside the mean
    assert done["report"]["drift"]["sample_l2_p95"] <= done["report"]["drift"]["sample_l2_max"]


def test_heal_keeps_the_best_held_out_state(data):
    rc, done, _ = _shrink(data, "--budget", "0.05", "-c", str(data / "calibration.safetensors"), "--heal", "30")
    assert rc == 0
    heal = done["plan"]["heal"]
    assert heal["best_drift"] <= heal["initial_drift"]  # healing never worsens held-out drift
    assert abs(done["report"]["drift"]["relative_l2"] - heal["best_drift"]) < 1e-4


def test_heal_schedule_is_passed_through_and_recorded(data):
    rc, done, _ = _shrink(data, "--budget", "0.05", "-c", str(data / "calibration.safetensors"), "--heal", "20",
                          "--heal-lr", "1e-3", "--heal-schedule", "cosine")
    assert rc == 0
    heal = done["plan"]["heal"]
    assert heal["schedule"] == "cosine" and heal["lr"] == 1e-3
    assert heal["best_drift"] <= heal["initial_drift"]
    assert any("cosine schedule" in n for n in done["report"]["notes"])


@pytest.mark.parametrize("flags,match", [
    (["--heal", "5"], "--heal needs --calibration"),
    (["--sequential"], "--sequential needs --calibration"),
    (["--method", "whiten"], "needs --calibration"),
])
def test_calibration_only_options_say_so(data, flags, match):
    rc, out, _ = _shrink(data, *flags)
    assert rc == 2 and match in out["error"] and "--calibration" in out["fix"]


def test_sweep_with_calibration_and_with_cache(data):
    rc, out, _ = _run(["sweep", "-m", MODEL, "-c", str(data / "calibration.safetensors"), "--budgets", "0.3,0.1",
                       "--json", "-q"])
    assert rc == 0 and [r["budget"] for r in json.loads(out)["rows"]] == [0.3, 0.1]
    cache = data / "cache"
    first = _run(["sweep", "-m", MODEL, "--budgets", "0.3,0.1", "--cache", str(cache), "--workers", "2", "--json",
                  "-q"])
    again = _run(["sweep", "-m", MODEL, "--budgets", "0.3,0.1", "--cache", str(cache), "--json", "-q"])
    assert first[0] == again[0] == 0 and any(cache.iterdir())
    rows = lambda r: [(x["budget"], x["params_after"], x["relative_l2"]) for x in json.loads(r[1])["rows"]]  # noqa: E731
    assert rows(first) == rows(again)


def test_workers_reach_the_calibrated_path_with_the_same_result(data):
    calib = ["-c", str(data / "calibration.safetensors"), "--budget", "0.3"]
    rc1, one, _ = _shrink(data, *calib)
    rc2, two, _ = _shrink(data, *calib, "--workers", "2")
    assert rc1 == rc2 == 0
    ranks = lambda d: {k: v.get("rank") for k, v in d["plan"]["sites"].items()}  # noqa: E731
    assert ranks(one) == ranks(two) and one["report"]["drift"] == two["report"]["drift"]


def test_a_recipe_counting_macs_measures_them_on_the_inputs(data, tmp_path):
    recipe = tmp_path / "macs.toml"
    recipe.write_text('recipe = 1\ncost = "macs"\n\n[policy]\nbudget = 0.5\n')
    rc, done, err = _shrink(data, "--recipe", str(recipe))
    assert rc == 0, err
    assert done["plan"]["policy"]["cost"] == "macs"
    report = done["report"]  # the MACs kept, counted by the report's own hooks, stay within the budget
    assert report["macs_after"] <= 0.5 * report["macs_before"] + 1
