"""The one-call API on real architectures: compress, apply a saved plan, merge, bad input."""

from __future__ import annotations

import copy
import json
import warnings

import pytest
import torch
from conftest import CNN, MLP, tiny_bert, tiny_gpt2

import factorize
import factorize.spectra.sites
from factorize import FactorizeError, apply_plan, compress, merge, walk


def _full_rank_plan(model) -> dict:
    """A plan that factors every untied site at full rank (no saving, but exact up to float error)."""
    plan = compress(model, rank=1).plan
    for e in plan["sites"].values():
        if "shared with" not in e["reason"]:
            e.update(rank=min(e["shape"]), action="factor")
    return plan


def _state(model):
    return {k: v.clone() for k, v in model.state_dict().items()}


def test_compress_returns_copy_and_plan(mlp):
    before = _state(mlp)
    result = compress(mlp, budget=0.5)
    assert all(torch.equal(before[k], v) for k, v in mlp.state_dict().items())  # input untouched
    assert result.model is not mlp
    assert json.loads(json.dumps(result.plan)) == result.plan
    assert result.params_after < result.params_before
    assert factorize.factored_layers(result.model)


def test_inplace(mlp):
    result = compress(mlp, rank=4, inplace=True)
    assert result.model is mlp and factorize.is_factored(mlp.fc1)


def test_saved_plan_rebuilds_same_structure_on_fresh_instance():
    torch.manual_seed(0)
    model = MLP().eval()
    result = compress(model, energy=0.8)
    plan = json.loads(json.dumps(result.plan))  # through JSON, as a file would
    fresh = copy.deepcopy(model)
    rebuilt = apply_plan(fresh, plan)
    x = torch.randn(8, 24)
    torch.testing.assert_close(rebuilt(x), result.model(x))
    assert {n: m.rank for n, m in factorize.factored_layers(rebuilt).items()} == factorize.plan_ranks(plan)


@pytest.mark.parametrize("make,inputs", [
    (lambda: MLP().eval(), lambda: (torch.randn(5, 24),)),
    (lambda: CNN().eval(), lambda: (torch.randn(2, 3, 12, 12),)),
    (tiny_bert, lambda: (torch.randint(0, 64, (2, 9)),)),
    (tiny_gpt2, lambda: (torch.randint(0, 64, (2, 9)),)),
])
def test_full_rank_factoring_reproduces_outputs(make, inputs):
    torch.manual_seed(0)
    model = make()
    x = inputs()
    rebuilt = apply_plan(model, _full_rank_plan(model))
    assert factorize.factored_layers(rebuilt)
    with torch.no_grad():
        ref, out = model(*x), rebuilt(*x)
    ref = ref if isinstance(ref, torch.Tensor) else ref[0]
    out = out if isinstance(out, torch.Tensor) else out[0]
    torch.testing.assert_close(out, ref, rtol=1e-4, atol=1e-4)
    with torch.no_grad():
        merged = merge(rebuilt)(*x)
    torch.testing.assert_close(merged if isinstance(merged, torch.Tensor) else merged[0], ref, rtol=1e-4, atol=1e-4)


def test_gpt2_every_projection_factored_and_tied_weights_dense():
    model = tiny_gpt2()  # transformers.GPT2LMHeadModel from a tiny config; lm_head tied to wte (its default)
    result = compress(model, keep=0.5)
    sites = result.plan["sites"]
    for layer in range(2):
        for proj in ("attn.c_attn", "attn.c_proj", "mlp.c_fc", "mlp.c_proj"):
            assert sites[f"transformer.h.{layer}.{proj}"]["action"] == "factor"
    for tied in ("transformer.wte", "lm_head"):
        assert sites[tied]["action"] == "dense" and "shared with" in sites[tied]["reason"]
    assert result.model.lm_head.weight is result.model.transformer.wte.weight  # still tied


def test_bert_every_projection_factored():
    result = compress(tiny_bert(), keep=0.5, exclude="embeddings.*")  # transformers.BertModel, tiny config
    factored = set(factorize.plan_ranks(result.plan))
    expected = {s.name for s in walk(tiny_bert(), exclude="embeddings.*")}
    assert factored == expected


def test_half_precision_weights_keep_their_dtype():
    torch.manual_seed(0)
    model = MLP().half()
    result = compress(model, rank=4)
    assert result.model.fc1.first.weight.dtype == torch.float16
    assert result.spectra["fc1"].S.dtype == torch.float32  # decomposed in float32


def test_randomized_method(mlp):
    result = compress(mlp, rank=4, method="randomized")
    assert result.plan["method"] == "randomized" and result.spectra["fc2"].method == "randomized"
    exact = compress(mlp, rank=4)
    assert result.spectra["fc2"].error(4) <= 1.02 * exact.spectra["fc2"].error(4)


def test_spectra_reuse_skips_decomposition(mlp, monkeypatch):
    first = compress(mlp, budget=0.5)
    calls = []
    monkeypatch.setattr(factorize.spectra.sites, "decompose", lambda *a, **k: calls.append(1))
    monkeypatch.setattr(factorize.rewrite.apply, "decompose", lambda *a, **k: calls.append(1))
    second = compress(mlp, budget=0.3, spectra=first.spectra)
    assert not calls and second.params_after < first.params_after


def test_bad_input_errors(mlp):
    with pytest.raises(FactorizeError, match=r"expected a torch\.nn\.Module"):
        compress("model.pt", budget=0.5)
    with pytest.raises(FactorizeError, match="no factorizable layer"):
        compress(torch.nn.Sequential(torch.nn.ReLU()), budget=0.5)
    with pytest.raises(FactorizeError, match="unknown method"):
        compress(mlp, budget=0.5, method="magic")
    with pytest.raises(FactorizeError, match="fraction in"):
        compress(mlp, budget=1.5)
    broken = copy.deepcopy(mlp)
    with torch.no_grad():
        broken.fc2.weight[0, 0] = float("inf")
    with pytest.raises(FactorizeError, match="fc2"):
        compress(broken, budget=0.5)


def test_plan_for_other_model_lists_every_offender(mlp):
    plan = compress(mlp, rank=2).plan
    plan["sites"]["ghost"] = {"kind": "linear", "shape": [3, 3], "rank": 1, "action": "factor"}
    plan["sites"]["fc1"]["shape"] = [99, 24]
    with pytest.raises(FactorizeError) as info:
        apply_plan(mlp, plan)
    assert {p.split(":")[0] for p in info.value.problems} == {"ghost", "fc1"}
    with pytest.raises(FactorizeError, match="not a factorize plan"):
        apply_plan(mlp, {"sites": {}})


def test_failed_rewrite_leaves_model_as_it_was(mlp, monkeypatch):
    plan = compress(mlp, rank=2).plan
    real = factorize.rewrite.apply.factor_module
    calls = []

    def flaky(*args, **kwargs):
        calls.append(1)
        if len(calls) == 2:
            raise RuntimeError("simulated failure")
        return real(*args, **kwargs)

    monkeypatch.setattr(factorize.rewrite.apply, "factor_module", flaky)
    before = {n: type(m) for n, m in mlp.named_modules()}
    with pytest.raises(RuntimeError, match="simulated failure"):  # the injected failure, not some other error
        apply_plan(mlp, plan, inplace=True)
    assert {n: type(m) for n, m in mlp.named_modules()} == before


def test_parallel_decomposition_equals_serial():
    # Issue requirement: concurrent layers give results identical to a serial run.
    torch.manual_seed(0)
    model = torch.nn.Sequential(*[torch.nn.Linear(40, 40) for _ in range(6)])
    serial = compress(model, budget=0.4, workers=1)
    parallel = compress(model, budget=0.4, workers=3)
    assert serial.plan == parallel.plan
    for name, spec in serial.spectra.items():
        assert torch.equal(spec.U, parallel.spectra[name].U) and torch.equal(spec.S, parallel.spectra[name].S)
    for a, b in zip(serial.model.state_dict().values(), parallel.model.state_dict().values()):
        assert torch.equal(a, b)


def test_cache_directory_skips_decomposition_on_second_run(mlp, tmp_path, monkeypatch):
    first = compress(mlp, budget=0.5, cache=tmp_path / "cache")
    calls = []
    monkeypatch.setattr(factorize.spectra.cache, "decompose", lambda *a, **k: calls.append(1))
    # the budget route computes values, then the kept vectors (factorize.spectra.sites): neither may run again
    monkeypatch.setattr(factorize.spectra.sites, "values_only", lambda *a, **k: calls.append(1))
    monkeypatch.setattr(factorize.spectra.sites, "leading", lambda *a, **k: calls.append(1))
    second = compress(mlp, budget=0.5, cache=tmp_path / "cache")
    assert not calls and second.plan == first.plan
    for name, spec in first.spectra.items():
        assert torch.equal(spec.U, second.spectra[name].U)


# ---------------------------------------------------------------------------------------------------------------
# the front door: a Policy or keywords, parsed in one place


def test_policy_object_and_keywords_give_the_same_plan(mlp):
    by_keywords = compress(mlp, budget=0.5, exclude="head", overrides=[{"pattern": "fc1", "rank": 3}], seed=1)
    policy = factorize.Policy.from_keywords(budget=0.5, exclude="head", overrides=[{"pattern": "fc1", "rank": 3}],
                                            seed=1)
    assert compress(mlp, policy).plan == by_keywords.plan
    with pytest.raises(FactorizeError, match="both given"):
        compress(mlp, policy, rank=4)


def test_unknown_keyword_names_it_and_lists_the_accepted_ones(mlp):
    with pytest.raises(FactorizeError, match="unknown keyword: bugdet") as info:
        compress(mlp, bugdet=0.5)
    assert "budget" in info.value.fix and "speed_check" in info.value.fix and "max_drift" in info.value.fix


def test_no_factorizable_layer_is_one_error_on_both_paths():
    model = torch.nn.Sequential(torch.nn.ReLU())
    with pytest.raises(FactorizeError) as plain:
        compress(model, budget=0.5)
    with pytest.raises(FactorizeError) as calibrated:
        compress(model, budget=0.5, calibration=[torch.randn(2, 3)])
    assert str(plain.value) == str(calibrated.value)
    assert str(plain.value).startswith("no factorizable layer found")


class StridedCNN(torch.nn.Module):
    """Three conv stages at 16x16, 8x8 and 4x4 output positions (stride 2), then a linear head."""

    def __init__(self) -> None:
        super().__init__()
        self.c1 = torch.nn.Conv2d(3, 16, 3, padding=1)
        self.c2 = torch.nn.Conv2d(16, 32, 3, stride=2, padding=1)
        self.c3 = torch.nn.Conv2d(32, 32, 3, stride=2, padding=1)
        self.fc = torch.nn.Linear(32, 10)

    def forward(self, x):  # (B, 3, 16, 16)
        h = torch.relu(self.c3(torch.relu(self.c2(torch.relu(self.c1(x))))))
        return self.fc(h.mean((-2, -1)))


def _weight_macs(model, x) -> int:
    """Multiply-accumulates per sample of every Conv2d / Linear leaf, counted with forward hooks: each output
    number of a conv costs in_channels/groups * prod(kernel) MACs, of a linear in_features (common practice)."""
    total = [0]

    def hook(module, args, out):
        per_output = (module.in_channels // module.groups * module.kernel_size[0] * module.kernel_size[1]
                      if isinstance(module, torch.nn.Conv2d) else module.in_features)
        total[0] += out.numel() // x.shape[0] * per_output

    leaves = [m for m in model.modules() if isinstance(m, (torch.nn.Conv2d, torch.nn.Linear))]
    handles = [m.register_forward_hook(hook) for m in leaves]
    with torch.no_grad():
        model(x)
    for h in handles:
        h.remove()
    return total[0]


@pytest.mark.filterwarnings("ignore:too few calibration samples")
def test_macs_budget_counts_output_positions():
    torch.manual_seed(0)
    model = StridedCNN().eval()
    x = torch.randn(2, 3, 16, 16)
    by_params = compress(model, budget=0.4)
    by_macs = compress(model, budget=0.4, cost="macs", example=x)
    ranks_params, ranks_macs = factorize.plan_ranks(by_params.plan), factorize.plan_ranks(by_macs.plan)
    assert ranks_macs != ranks_params
    # the last, 4x4 stage costs fewest MACs per parameter, so a MACs budget can afford it a higher rank
    assert ranks_macs["c3"] > ranks_params["c3"]
    kept = _weight_macs(by_macs.model, x) / _weight_macs(model, x)
    assert kept <= 0.4 + 1e-9
    assert _weight_macs(by_params.model, x) / _weight_macs(model, x) > 0.4  # params budget overshoots in MACs
    assert by_macs.plan["policy"]["cost"] == "macs"
    calibrated = compress(model, budget=0.4, cost="macs", calibration=[x])  # the calibration batch counts MACs
    assert _weight_macs(calibrated.model, x) / _weight_macs(model, x) <= 0.4 + 1e-9


def test_macs_budget_without_an_example_is_refused(mlp):
    with pytest.raises(FactorizeError, match="needs a sample input"):
        compress(mlp, budget=0.5, cost="macs")
    # example= alone is accepted: besides counting MACs it is the batch the result is run on (tested below)


def test_compress_runs_the_result_and_keeps_breaking_layers_dense():
    # a parent that reads its child's weight as a stored Parameter breaks once the child is factored: compress,
    # given a sample batch, must return a model that runs, with exactly those layers dense and the reason named
    from tests.rewrite.test_verify import _model

    model = _model()
    batch = torch.randn(4, 32)
    result = factorize.compress(model, rank=4, example=batch)
    assert result.model(batch).shape == (4, 8)  # it runs
    dense = {k for k, e in result.plan["sites"].items() if e["action"] == "dense"}
    assert dense == {"1.fc", "3.fc"}
    assert all("failed to run" in result.plan["sites"][k]["reason"] for k in dense)
    assert factorize.is_factored(result.model[0]) and result.params_after == factorize.count_parameters(result.model)
    calibrated = factorize.compress(model, rank=4, calibration=[batch, torch.randn(4, 32)])
    assert calibrated.model(batch).shape == (4, 8)  # the first calibration batch serves as the check run
    with pytest.raises(FactorizeError, match=r"1\.fc"):
        factorize.compress(model, rank=4, example=batch, on_break="raise")


def test_compress_without_any_sample_input_warns_that_nothing_ran(mlp):
    from factorize.errors import UnverifiedModelWarning

    with pytest.warns(UnverifiedModelWarning, match="was not run"):
        factorize.compress(mlp, budget=0.5)
    with warnings.catch_warnings():
        warnings.simplefilter("error", UnverifiedModelWarning)
        factorize.compress(mlp, budget=0.5, example=torch.randn(2, 24))  # a batch at hand: checked, no warning


def test_conv3d_and_conv_transpose_models_compress_plain_and_calibrated():
    # Conv3d and ConvTranspose2d are sites; the calibrated path (input rows per position, output-gradient rows by
    # the im2col adjoint) runs on them, and the result keeps the output shape.
    from torch import nn

    torch.manual_seed(0)
    model = nn.Sequential(nn.Conv3d(2, 16, 3, padding=1), nn.ReLU(), nn.Flatten(1, 2),
                          nn.ConvTranspose2d(64, 6, 4, stride=2, padding=1))
    batches = [torch.randn(4, 2, 4, 6, 6) for _ in range(3)]
    kinds = {s.name: s.kind for s in factorize.walk(model)}
    assert kinds == {"0": "conv3d", "3": "conv_transpose2d"}
    for calibration in (None, batches):
        result = factorize.compress(model, budget=0.6, calibration=calibration)
        assert result.plan["sites"]["3"]["action"] == "factor"
        with torch.no_grad():
            assert result.model(batches[0]).shape == model(batches[0]).shape
