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
    # shrink refits sequentially by default and the sweep, to save time, only when asked: asked here
    sweep = _json(["sweep", "-m", model, "--budgets", str(budget), "--sequential", *extra])
    return shrink["report"], sweep["rows"][0]


def test_the_sweep_uses_per_layer_factors_unless_asked_and_says_so(work) -> None:
    data = ["-i", str(work / "test.safetensors"), "-c", str(work / "calibration.safetensors")]
    shrink = _json(["shrink", "-m", DIGITS, "--budget", "0.3", "-o", str(work / "out.safetensors"), "--force",
                    "--repeats", "0", "--no-sequential", *data])
    out, err = io.StringIO(), io.StringIO()
    assert main(["sweep", "-m", DIGITS, "--budgets", "0.3", "--json", *data], stdout=out, stderr=err) == 0
    assert "--sequential sweeps that way" in " ".join(err.getvalue().split())
    row = json.loads(out.getvalue())["rows"][0]
    assert row["relative_l2"] == pytest.approx(shrink["report"]["drift"]["relative_l2"], rel=1e-9, abs=1e-12)
    assert shrink["report"]["setup"].count("per-layer factors") == 1


@pytest.mark.parametrize("extra", [[], ["--sensitivity", "probes"]], ids=["plain", "probes"])
def test_calibrated_sweep_and_shrink_give_the_same_plan(work, extra) -> None:
    # --method auto: both route it the way factorize.compress does (one mapping, factorize.choices), and probes are
    # measured at the fractions a single compress call uses for that budget
    data = ["-i", str(work / "test.safetensors"), "-c", str(work / "calibration.safetensors"), "--method", "auto"]
    report, row = _shrink_and_sweep(work, DIGITS, 0.3, *data, *extra)
    assert "(sequential refit)" in report["setup"]
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



def test_each_sweep_row_is_one_budget_compressed_and_evaluated_alone(work) -> None:
    # The sweep shares work between budgets (one decomposition, the original's outputs and output positions found
    # once, a copy of the model that shares its weights): none of that may change a row. Each row is checked
    # against compress + evaluate of that budget alone, on a deep copy with a fresh evaluation (nothing shared but
    # the spectra, which are the same by construction), on the held-out digits split (Alpaydin & Kaynak, UCI).
    import torch

    from factorize.default import load_default
    from factorize.measure.evaluate import evaluate
    from factorize.measure.inputs import load_inputs, prepare
    from factorize.pipeline import compress, sweep_spectra
    from factorize.plan.policy import Policy
    from factorize.plan.ranks import plan_summary

    budgets = (0.6, 0.4, 0.25)
    rows = _json(["sweep", "-m", DIGITS, "--budgets", ",".join(map(str, budgets)), "--repeats", "0",
                  "-i", str(work / "test.safetensors")])["rows"]
    model = load_default()
    before = {k: v.clone() for k, v in model.state_dict().items()}
    inputs = prepare(load_inputs(work / "test.safetensors"), model)
    spectra = sweep_spectra(model, [Policy.from_keywords(budget=b) for b in budgets])
    assert [r["budget"] for r in rows] == sorted(budgets, reverse=True)
    for row in rows:
        result = compress(model, budget=row["budget"], spectra=spectra, example=inputs.batches[0])
        rep = evaluate(model, result.model, inputs.batches, labels=inputs.labels, plan=result.plan,
                       latency_repeats=0)
        assert row["params_after"] == result.params_after
        assert row["factored_layers"] == plan_summary(result.plan)["factored"]
        for key in ("relative_l2", "cosine_mean", "cosine_min", "top1_agreement", "kl"):
            assert row[key] == pytest.approx(rep.drift[key], rel=1e-9, abs=1e-12), key
        for key in ("accuracy_before", "accuracy_after", "macs_before", "macs_after"):
            assert row[key] == getattr(rep, key), key
        assert row["worst_weight_error"] == pytest.approx(rep.worst_weight_error, rel=1e-9)
        # and a shrink of that budget alone (its own decomposition) allocates the same parameters
        alone = _json(["shrink", "-m", DIGITS, "--budget", str(row["budget"]), "-o", str(work / "one.safetensors"),
                       "--force", "--repeats", "0", "-i", str(work / "test.safetensors")])
        assert alone["report"]["params_after"] == row["params_after"]
    assert all(torch.equal(before[k], v) for k, v in model.state_dict().items())  # nothing wrote into the original


def test_the_sweeps_copy_shares_weights_and_leaves_the_original_alone(work) -> None:
    # Each budget is applied to a copy of the module tree that shares the original's tensors (no weight copy per
    # budget); rewriting it swaps modules in the copy only.
    import torch

    from factorize.cli.sweep import sharing_copy
    from factorize.default import load_default
    from factorize.pipeline import compress
    from factorize.rewrite.layers import factored_layers

    model = load_default()
    before = {k: v.clone() for k, v in model.state_dict().items()}
    modules = dict(model.named_modules())
    copy = sharing_copy(model)
    assert all(a is b for a, b in zip(copy.parameters(), model.parameters()))
    result = compress(copy, budget=0.3, inplace=True, example=torch.zeros(1, 64))
    assert result.model is copy and factored_layers(copy)
    assert not factored_layers(model) and dict(model.named_modules()) == modules
    assert all(torch.equal(before[k], v) for k, v in model.state_dict().items())


def _counting_copies(monkeypatch, fail: bool = False) -> list:
    """Make every copy the sweep compresses count its forward passes (or fail them)."""
    from factorize.cli import sweep

    copies, original = [], sweep.sharing_copy

    def counted(model):
        copy = original(model)
        copy.calls = 0

        def hook(module, args):
            if fail:
                raise RuntimeError("boom in forward")
            module.calls += 1

        copy.register_forward_pre_hook(hook)
        copies.append(copy)
        return copy

    monkeypatch.setattr(sweep, "sharing_copy", counted)
    return copies


def test_each_budget_runs_its_compressed_copy_once_per_batch(work, monkeypatch) -> None:
    # The drift measurement's compressed pass is the copy's check run: no second pass on the first batch.
    from factorize.measure.inputs import load_inputs

    copies = _counting_copies(monkeypatch)
    _json(["sweep", "-m", DIGITS, "--budgets", "0.6,0.3", "--repeats", "0", "-i", str(work / "test.safetensors")])
    batches = len(load_inputs(work / "test.safetensors", batch_size=64).batches)
    assert [c.calls for c in copies] == [batches, batches]


def test_a_compressed_copy_that_cannot_run_ends_with_a_clear_error(work, monkeypatch) -> None:
    _counting_copies(monkeypatch, fail=True)
    out, err = io.StringIO(), io.StringIO()
    rc = main(["sweep", "-m", DIGITS, "--budgets", "0.5", "--repeats", "0", "-i", str(work / "test.safetensors")],
              stdout=out, stderr=err)
    assert rc == 2
    assert "budget 0.5 could not be run on the sample inputs: boom in forward" in err.getvalue()
    assert "Traceback" not in err.getvalue()
