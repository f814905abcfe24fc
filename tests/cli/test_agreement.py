"""One code path: ``sweep`` at a budget gives the plan ``shrink`` gives at that budget, with calibration too,
and both honour everything a recipe says (cost, method). Measured on the embedded digits classifier and the
held-out part of scikit-learn's digits data (Alpaydin & Kaynak, UCI)."""

from __future__ import annotations

import io
import json

import pytest

from factorize.cli import main
from factorize.cli.common import options
from factorize.cli.parser import build_parser
from factorize.cli.render import UI
from tests.cli.digits import write_digits_splits

DIGITS = "factorize.default:load_default"


def _json(argv: list[str]) -> dict:
    out, err = io.StringIO(), io.StringIO()
    rc = main([*argv, "--json", "-q"], stdout=out, stderr=err)
    assert rc == 0, (argv, out.getvalue(), err.getvalue())
    return json.loads(out.getvalue())


@pytest.fixture(scope="module")
def work(tmp_path_factory):
    d = tmp_path_factory.mktemp("agree")
    write_digits_splits(d)
    (d / "macs.toml").write_text('recipe = 1\ncost = "macs"\n[policy]\nbudget = 0.5\n')
    (d / "no_method.toml").write_text('recipe = 1\n[policy]\nbudget = 0.5\n')
    return d


def _shrink_and_sweep(work, model: str, budget: float, *extra: str) -> tuple[dict, dict]:
    shrink = _json(["shrink", "-m", model, "--budget", str(budget), "-o", str(work / "out.safetensors"), "--force",
                    "--repeats", "0", *extra])
    sweep = _json(["sweep", "-m", model, "--budgets", str(budget), *extra])
    return shrink["report"], sweep["rows"][0]


@pytest.mark.parametrize("extra", [[], ["--sensitivity", "probes"]], ids=["plain", "probes"])
def test_calibrated_sweep_and_shrink_give_the_same_plan(work, extra) -> None:
    # --method auto: both route it the way factorize.compress does (one mapping, factorize.choices), and probes are
    # measured at the fractions a single compress call uses for that budget
    data = ["-i", str(work / "test.safetensors"), "-c", str(work / "calibration.safetensors"), "--method", "auto"]
    report, row = _shrink_and_sweep(work, DIGITS, 0.3, *data, *extra)
    assert row["params_after"] == report["params_after"]
    assert row["relative_l2"] == pytest.approx(report["drift"]["relative_l2"], rel=1e-9, abs=1e-12)
    assert row["accuracy_after"] == report["accuracy_after"]


def test_calibrated_sweep_counts_the_recipes_cost(work) -> None:
    # every policy a sweep builds (calibrated or not) comes from the one Options.policy, which carries the cost
    args = build_parser().parse_args(["sweep", "-m", DIGITS, "--recipe", str(work / "macs.toml"), "-c", "c.npz"])
    opts = options(args, UI(json_mode=True, quiet=True, stdout=io.StringIO(), stderr=io.StringIO()),
                   default_budget=None)
    assert opts.policy(budget=0.3).cost == "macs"
    # end to end, with calibration: the sweep row equals shrink's result at the same budget under the recipe.
    # (Today the library counts a layer's MACs like its parameters, since no walker fills Site.macs_per_sample,
    # so this comparison alone could not tell the two costs apart; the policy check above can.)
    data = ["-i", str(work / "test.safetensors"), "-c", str(work / "calibration.safetensors")]
    report, row = _shrink_and_sweep(work, DIGITS, 0.3, *data, "--recipe", str(work / "macs.toml"))
    assert row["params_after"] == report["params_after"]
    assert row["relative_l2"] == pytest.approx(report["drift"]["relative_l2"], rel=1e-9, abs=1e-12)
    assert report["policy"]["cost"] == "macs"


def test_a_recipe_without_a_method_gets_the_library_default(work) -> None:
    out = str(work / "out.safetensors")
    plain = _json(["shrink", "-m", DIGITS, "--budget", "0.5", "-o", out, "--force", "--repeats", "0"])
    recipe = _json(["shrink", "-m", DIGITS, "--recipe", str(work / "no_method.toml"), "-o", out, "--force",
                    "--repeats", "0"])
    assert recipe["plan"]["method"] == plain["plan"]["method"]  # what compress chooses when told nothing
    assert recipe["plan"]["sites"] == plain["plan"]["sites"]

