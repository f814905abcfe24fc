"""Rank and stored precision together in the block-by-block shrink (``cost="bytes"``), checked against transformers'
own model classes built from tiny configs (tests/outofcore/families.py) and factorize's in-memory calibrated
functions on the whole model:

- the plan (every projection's form, precision and rank) is the joint plan of the in-memory calibrated pricing:
  hook statistics on transformers' whole model, the whitened spectra without centring (as block by block), every
  candidate priced in the metric trace(dW C' dW^T) (:func:`factorize.calibrated.precision.metric_of`), the same
  joint solver under the same byte budget;
- the written directory reloads into the family's class and computes what that plan gives in memory
  (``apply_plan`` with error-feedback rounding on the same input moments);
- the stored bytes are within the budget, and a Dask local cluster of 2 worker processes writes the same bytes
  as one process.
"""

from __future__ import annotations

import io
import json
from pathlib import Path

import numpy as np
import pytest
import torch

import factorize
from factorize.calibrated.aware import aware_spectra
from factorize.calibrated.precision import metric_of
from factorize.calibrated.stats import collect_stats
from factorize.errors import FactorizeError
from factorize.model.sites import walk
from factorize.outofcore.blockwise import shrink_blockwise
from factorize.plan.forms import joint_plan, layer_budget, price_sites
from factorize.plan.policy import resolve_policy
from factorize.rewrite.apply import apply_plan
from tests.outofcore.families import VOCAB, configs, family_getter, outputs, padded_calibration

transformers = pytest.importorskip("transformers")

# (family, budget, allowed precisions): factored bfloat16 and dense bfloat16 (Llama), factored and dense int8
# (GPT-2: transposed projections with biases), 4-bit groups and factors (BERT: an encoder with padding); which
# forms each case chooses is checked below, so every form the tiny layers can take is exercised
CASES = [("llama", 0.3, ("float32", "bfloat16")), ("gpt2", 0.2, ("float32", "int8")),
         ("bert", 0.12, ("float32", "int4g32"))]
FORMS = {"llama": {("factor", "bfloat16"), ("dense", "bfloat16")}, "gpt2": {("factor", "int8"), ("dense", "int8")},
         "bert": {("dense", "int4g32"), ("factor", "int4g32"), ("factor", "float32")}}


def _calibration():
    return padded_calibration(VOCAB, (5, 4))


@pytest.fixture(scope="module")
def checkpoints(tmp_path_factory):
    return family_getter(transformers, tmp_path_factory.mktemp("families"), ("bert",))


@pytest.fixture(scope="module")
def shrunk(checkpoints, tmp_path_factory):
    root = tmp_path_factory.mktemp("shrunk")
    done: dict[str, tuple] = {}

    def get(kind: str, budget: float, precisions: tuple[str, ...]):
        if kind not in done:
            out = root / kind
            done[kind] = out, shrink_blockwise(checkpoints(kind), out, cost="bytes", budget=budget,
                                               precisions=precisions, calibration=_calibration(), threads=1)
        return done[kind]

    return get


def _in_memory(kind: str, directory: Path, names, budget: float, precisions):
    """The whole original model, hook statistics, whitened spectra, every candidate priced in the calibrated metric,
    the joint plan under the same byte budget, and the plan applied with error-feedback rounding."""
    original = configs(transformers)[kind][0].from_pretrained(directory, dtype=torch.float32).eval()
    sites = [s for s in walk(original).sites if s.name in names]
    stats = collect_stats(original, sites, _calibration())
    spectra = aware_spectra(original, sites, stats, method="whiten", center=False, solver="gram")
    policy = resolve_policy(None, {"cost": "bytes", "budget": budget, "precisions": precisions})
    priced = price_sites(original, sites, spectra, policy,
                         metrics={s.name: metric_of(spectra[s.name], stats[s.name]) for s in sites})
    plan = joint_plan(sites, priced, spectra, layer_budget(sites, priced, policy), policy=policy.to_dict(),
                      method="whiten")
    model = apply_plan(original, plan, spectra=spectra, hessians={s.name: stats[s.name].moment() for s in sites})
    return original, plan, model


def _form(e: dict) -> tuple:
    return e["action"], e.get("precision"), e.get("rank"), e.get("correction_rank")


@pytest.mark.parametrize(("kind", "budget", "precisions"), CASES)
def test_the_plan_and_the_outputs_equal_the_in_memory_calibrated_bytes_plan(kind, budget, precisions, checkpoints,
                                                                            shrunk):
    out, done = shrunk(kind, budget, precisions)
    original, plan, in_memory = _in_memory(kind, checkpoints(kind), set(done.plan["sites"]), budget, precisions)
    assert {n: _form(e) for n, e in done.plan["sites"].items()} == {n: _form(e) for n, e in plan["sites"].items()}
    assert {(e["action"], e["precision"]) for e in done.plan["sites"].values()} == FORMS[kind]
    sel = done.plan["selection"]
    assert sel["cost"] == "bytes" and sel["bytes"] <= sel["budget_bytes"]
    loaded = factorize.load_directory(out)
    assert isinstance(loaded, configs(transformers)[kind][0])
    heldout = torch.randint(0, VOCAB, (3, 20), generator=torch.Generator().manual_seed(7))
    want, got, dense = outputs(in_memory, heldout), outputs(loaded.float(), heldout), outputs(original, heldout)
    assert torch.isfinite(got).all()
    # float32 statistics summed in another order can move a rounded code across a rounding boundary
    assert float((got - want).norm() / want.norm()) < 1e-3, kind
    assert float((got - dense).norm() / dense.norm()) > 1e-3  # the stored forms did change the model


@pytest.mark.parametrize(("kind", "budget", "precisions"), CASES)
def test_the_written_projections_take_the_bytes_the_plan_says(kind, budget, precisions, shrunk):
    _out, done = shrunk(kind, budget, precisions)
    from safetensors import safe_open

    files = [Path(f) for f in done.files if f.endswith(".safetensors")]
    stored: dict[str, int] = {}
    for f in files:
        with safe_open(f, framework="pt") as h:
            for key in h.keys():  # noqa: SIM118 - a safe_open handle
                for name in done.plan["sites"]:
                    if key.startswith(name + ".") and not key.endswith("bias"):
                        t = h.get_tensor(key)
                        stored[name] = stored.get(name, 0) + t.numel() * t.element_size()
    for name, e in done.plan["sites"].items():
        assert stored[name] == int(e["bytes_after"]), name


@pytest.mark.slow  # the cluster's start-up and three runs
@pytest.mark.parametrize(("kind", "budget", "precisions"), CASES)
def test_byte_identical_on_a_local_cluster_of_two_workers(kind, budget, precisions, shrunk, checkpoints, tmp_path,
                                                          dask_engine):
    out, _ = shrunk(kind, budget, precisions)
    other = tmp_path / "cluster"
    done = shrink_blockwise(checkpoints(kind), other, cost="bytes", budget=budget, precisions=precisions,
                            calibration=_calibration(), threads=1, cluster=dask_engine)
    assert done.engine["workers"] == 2
    names = sorted(p.name for p in out.iterdir())
    assert names == sorted(p.name for p in other.iterdir())
    for n in names:
        assert (out / n).read_bytes() == (other / n).read_bytes(), (kind, n)


def test_sequential_and_time_budgets_are_refused_before_anything_is_written(checkpoints, tmp_path):
    d = checkpoints("llama")
    with pytest.raises(FactorizeError, match="sequential"):
        shrink_blockwise(d, tmp_path / "a", cost="bytes", budget=0.3, sequential=True, calibration=_calibration())
    with pytest.raises(FactorizeError, match="cost='latency'"):
        shrink_blockwise(d, tmp_path / "b", cost="latency", budget=0.3, calibration=_calibration())
    assert list(tmp_path.iterdir()) == []


def test_command_line_bytes_budget_block_by_block(checkpoints, tmp_path):
    from factorize.cli import main

    np.save(tmp_path / "ids.npy", np.random.default_rng(0).integers(0, VOCAB, (6, 20)))
    out, err = io.StringIO(), io.StringIO()
    rc = main(["shrink", "--model", str(checkpoints("llama")), "--calibration", str(tmp_path / "ids.npy"),
               "--blockwise", "--cost", "bytes", "--budget", "0.3", "--precisions", "float32,bfloat16",
               "-o", str(tmp_path / "small"), "--json", "-q"], stdout=out, stderr=err)
    assert rc == 0, err.getvalue() + out.getvalue()
    plan = json.loads(out.getvalue())["plan"]
    assert plan["selection"]["cost"] == "bytes" and plan["policy"]["precisions"] == ["float32", "bfloat16"]
    assert {e["precision"] for e in plan["sites"].values()} == {"bfloat16"}
    assert isinstance(factorize.load_directory(tmp_path / "small"), transformers.LlamaForCausalLM)
