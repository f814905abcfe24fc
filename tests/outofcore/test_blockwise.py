"""Block-by-block calibrated shrink of a sharded Llama checkpoint, checked against transformers' own
LlamaForCausalLM (built from the checkpoint's tiny config) and numpy's SVD."""

from __future__ import annotations

import importlib.util
import io
import json
import threading
from pathlib import Path

import numpy as np
import pytest
import torch
from safetensors import safe_open

from factorize.calibrated.stats import add_gram, collect_stats
from factorize.cluster import Engine, LocalEngine
from factorize.errors import FactorizeError
from factorize.outofcore import blockwise, slice_stats
from factorize.outofcore.architecture import check_source
from factorize.outofcore.block_tasks import read_stats
from factorize.outofcore.blockwise import shrink_blockwise
from factorize.outofcore.candidates import select
from factorize.outofcore.options import BlockwiseOptions
from factorize.outofcore.tokens import token_batches
from factorize.plan.policy import resolve_policy
from factorize.spectra import tridiagonal
from tests.outofcore.families import padded_calibration

transformers = pytest.importorskip("transformers")

ROOT = Path(__file__).resolve().parents[2]
BUDGET = 0.5


def _writer():
    spec = importlib.util.spec_from_file_location("llama_checkpoint", ROOT / "benchmarks" / "llama_checkpoint.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod.write_llama_checkpoint


def _calibration():
    return padded_calibration(256, (7, 5))


@pytest.fixture(scope="module")
def ckpt(tmp_path_factory):
    return _writer()(tmp_path_factory.mktemp("src") / "tiny", scale="tiny", shard_mb=0.1, seed=0)


@pytest.fixture(scope="module")
def shrunk(ckpt, tmp_path_factory):
    out = tmp_path_factory.mktemp("out") / "small"
    done = shrink_blockwise(ckpt, out, budget=BUDGET, calibration=_calibration(), threads=1)
    return out, done


def _reference(ckpt):
    # transformers' own model, whole, in float32 (the block-by-block path computes in float32 too)
    return transformers.LlamaForCausalLM.from_pretrained(ckpt, dtype=torch.float32).eval()


class ReverseThreads(Engine):
    """Runs the tasks in reverse order on two threads at once: results must not depend on the order."""

    name = "reverse-threads"

    def map(self, fn, items, *, label="tasks"):
        items = list(items)
        out = [None] * len(items)
        order = list(reversed(range(len(items))))

        def work(ks):
            for k in ks:
                out[k] = fn(items[k])

        threads = [threading.Thread(target=work, args=(order[i::2],)) for i in range(2)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        if any(o is None for o in out):
            raise RuntimeError("a task failed")
        return out


def test_statistics_equal_hooks_on_the_whole_transformers_model(ckpt, tmp_path):
    # reference: every linear's input second moment from forward hooks on transformers' whole LlamaForCausalLM
    # (factorize.calibrated.stats.collect_stats, which leaves padded positions out by the attention mask)
    model = _reference(ckpt)
    batches = _calibration()
    names = [n for n, m in model.named_modules() if isinstance(m, torch.nn.Linear) and ".layers." in n]
    ref = collect_stats(model, names, batches)
    arch = check_source(Path(ckpt))
    policy = resolve_policy(None, {"budget": BUDGET})
    chosen = [c for c in select(arch.ckpt, include=names)[0] if c.module in names]
    work = tmp_path / "work"
    work.mkdir()
    options = BlockwiseOptions(slices=3, threads=torch.get_num_threads(), tokens_per_pass=40)
    run = blockwise._Run(arch, token_batches(batches, 256), names, chosen, LocalEngine(), work, policy, "whiten",
                         "gram", options)
    _, samples, groups = blockwise._statistics(run)
    for name in names:
        st = read_stats(groups[name], name)
        C_ref = ref[name].second_moment
        assert st.count == ref[name].count == 7 * 24 + 16 * 5 - 4 - 7  # padded positions left out
        assert samples[name] == st.count
        scale = float(C_ref.abs().max())
        assert float((st.second_moment - C_ref).abs().max()) <= 1e-5 * scale, name  # float32 forward rounding
        assert torch.allclose(st.total, ref[name].total, rtol=1e-5, atol=1e-5 * float(ref[name].total.abs().max()))
    # q/k/v share one input, gate/up another: one statistic each
    assert groups["model.layers.0.self_attn.q_proj"] == groups["model.layers.0.self_attn.v_proj"]
    assert groups["model.layers.0.mlp.gate_proj"] == groups["model.layers.0.mlp.up_proj"]
    assert groups["model.layers.0.mlp.down_proj"] != groups["model.layers.0.mlp.up_proj"]


def test_output_loads_into_transformers_llama_and_factors_are_the_whitened_truncation(ckpt, shrunk):
    import factorize

    out, done = shrunk
    loaded = factorize.load_directory(out)
    assert isinstance(loaded, transformers.LlamaForCausalLM)
    original = _reference(ckpt)
    g = torch.Generator().manual_seed(7)
    heldout = torch.randint(0, 256, (4, 20), generator=g)
    with torch.no_grad():
        ref = original(heldout).logits
        got = loaded.float()(heldout).logits
    assert torch.isfinite(got).all()
    drift = float((got - ref).norm() / ref.norm())
    assert 0 < drift < 0.5, drift  # a sanity range only; the benchmark prints the measured drift

    # each factored layer: B A = U_r U_r^T W with U_r the top left singular vectors of W L, L L^T = C + lam I
    # (reduced-rank regression, Izenman 1975; Eckart-Young), computed here with numpy's SVD from hook statistics
    model = _reference(ckpt)
    factored = [n for n, e in done.plan["sites"].items() if e["action"] == "factor"]
    assert factored
    stats = collect_stats(model, factored, _calibration())
    shards = _Shards(out)
    for name in factored:
        r = done.plan["sites"][name]["rank"]
        W = model.get_submodule(name).weight.detach().double().numpy()
        C = stats[name].second_moment.numpy()
        lam = 1e-6 * np.mean(np.diag(C))  # the default relative ridge of factorize.calibrated.aware
        L = np.linalg.cholesky(C + lam * np.eye(C.shape[0]))
        U = np.linalg.svd(W @ L)[0][:, :r]
        expect = U @ (U.T @ W)
        B = shards.get(name + ".second.weight").double().numpy()
        A = shards.get(name + ".first.weight").double().numpy()
        assert A.shape == (r, W.shape[1]) and B.shape == (W.shape[0], r)
        err = np.linalg.norm(B @ A - expect) / np.linalg.norm(W)
        assert err < 2e-2, (name, err)  # bfloat16 storage of the factors
        # the output error on the calibration inputs is no worse than plain truncated SVD at the same rank
        # (Eckart-Young in the whitened norm); 1 % margin for bfloat16 storage
        Uw, s, Vt = np.linalg.svd(W)
        plain = (Uw[:, :r] * s[:r]) @ Vt[:r]
        assert np.linalg.norm((W - B @ A) @ L) <= 1.01 * np.linalg.norm((W - plain) @ L), name


class _Shards:
    """Read tensors from a sharded output by name."""

    def __init__(self, directory: Path) -> None:
        self.d = directory
        self.map = json.loads((directory / "model.safetensors.index.json").read_text())["weight_map"]

    def get(self, name: str) -> torch.Tensor:
        with safe_open(str(self.d / self.map[name]), "pt") as f:
            return f.get_tensor(name)


def test_byte_identical_across_engines_and_task_orders(ckpt, shrunk, tmp_path):
    out, _ = shrunk
    other = tmp_path / "other"
    work = tmp_path / "work"
    work.mkdir()
    shrink_blockwise(ckpt, other, budget=BUDGET, calibration=_calibration(), threads=1, cluster=ReverseThreads(),
                     work_dir=work)
    names = sorted(p.name for p in out.iterdir())
    assert names == sorted(p.name for p in other.iterdir())
    for n in names:
        assert (out / n).read_bytes() == (other / n).read_bytes(), n
    assert list(work.iterdir()) == []  # the work files are removed


def test_byte_identical_on_a_local_cluster_of_two_workers(ckpt, shrunk, tmp_path, dask_engine):
    """Issue 15's CI check for the calibrated path: slice statistics and factors as tasks on 2 Dask worker
    processes give the same files, byte for byte, as the single-process run."""
    out, _ = shrunk
    other = tmp_path / "cluster"
    done = shrink_blockwise(ckpt, other, budget=BUDGET, calibration=_calibration(), threads=1, cluster=dask_engine)
    assert done.engine["engine"].startswith("dask") and done.engine["workers"] == 2
    names = sorted(p.name for p in out.iterdir())
    assert names == sorted(p.name for p in other.iterdir())
    for n in names:
        assert (out / n).read_bytes() == (other / n).read_bytes(), n


def test_kept_fraction_meets_the_budget(shrunk):
    out, done = shrunk
    plan = done.plan
    dense = sum(e["params"] for e in plan["sites"].values())
    # count what the written shards really hold for the block linears
    shards = _Shards(out)
    stored = 0
    for name in plan["sites"]:
        keys = [k for k in shards.map if k.startswith(name + ".")]
        stored += sum(shards.get(k).numel() for k in keys)
    assert stored <= BUDGET * dense
    assert stored == pytest.approx(done.kept_fraction * dense)
    assert done.kept_fraction > 0.4  # the allocation uses the budget rather than leaving most of it
    assert set(plan["sites"]) == {f"model.layers.{i}.{m}" for i in range(2) for m in (
        "self_attn.q_proj", "self_attn.k_proj", "self_attn.v_proj", "self_attn.o_proj", "mlp.gate_proj",
        "mlp.up_proj", "mlp.down_proj")}
    assert done.peak_rss_bytes > 0 and done.bound_bytes == 2 * done.block_bytes + \
        done.activation_bytes + 2**30
    assert done.activation_bytes == (7 * 24 + 5 * 16) * 64 * 4


def _left_behind(parent: Path) -> list[str]:
    return sorted(p.name for p in parent.iterdir() if "factorize" in p.name)


def test_bad_inputs_are_refused_before_anything_is_written(ckpt, tmp_path):
    # an encoder-decoder (transformers' T5, tiny config invented here): two lists of blocks, which the
    # block-by-block shrink does not handle; the error names the model type and what it looked for
    t5 = tmp_path / "t5"
    t5.mkdir()
    (t5 / "config.json").write_text(json.dumps({"model_type": "t5", "architectures": ["T5ForConditionalGeneration"],
                                                "d_model": 32, "num_layers": 2, "num_heads": 4, "d_kv": 8,
                                                "d_ff": 48, "vocab_size": 64}))
    cases = [
        (t5, r"model_type 't5' \(T5ForConditionalGeneration\): 2 \(encoder.block, decoder.block\) list of "
             r"num_hidden_layers=2 blocks"),
        (tmp_path, "config.json"),
    ]
    for src, words in cases:
        with pytest.raises(FactorizeError, match=words):
            shrink_blockwise(src, tmp_path / "o1", budget=BUDGET, calibration=_calibration())
    with pytest.raises(FactorizeError, match="outside the vocabulary") as err:
        shrink_blockwise(ckpt, tmp_path / "o2", budget=BUDGET, calibration=[torch.tensor([[1, 2, 300]])])
    assert err.value.problems == ["batch 0: token ids from 1 to 300, outside the vocabulary 0..255"]
    existing = tmp_path / "exists"
    existing.mkdir()
    with pytest.raises(FactorizeError, match="already exists"):
        shrink_blockwise(ckpt, existing, budget=BUDGET, calibration=_calibration())
    with pytest.raises(FactorizeError, match="integer token ids"):
        shrink_blockwise(ckpt, tmp_path / "o3", budget=BUDGET, calibration=torch.randn(2, 5))
    assert not (tmp_path / "o1").exists() and not (tmp_path / "o2").exists() and not (tmp_path / "o3").exists()
    assert _left_behind(tmp_path) == []


def test_a_failure_midway_leaves_nothing(ckpt, tmp_path):
    class FailOnFactors(LocalEngine):
        def map(self, fn, items, *, label="tasks"):
            if label.endswith("factors"):  # the factor step runs block by block ("block 0 factors", ...)
                raise RuntimeError("worker lost")
            return super().map(fn, items, label=label)

    with pytest.raises(RuntimeError, match="worker lost"):
        shrink_blockwise(ckpt, tmp_path / "out", budget=BUDGET, calibration=_calibration(), cluster=FailOnFactors())
    assert not (tmp_path / "out").exists()
    assert _left_behind(tmp_path) == []


def test_command_line_blockwise(ckpt, tmp_path):
    from factorize.cli import main

    np.save(tmp_path / "ids.npy", np.random.default_rng(0).integers(0, 256, (6, 20)))
    out, err = io.StringIO(), io.StringIO()
    rc = main(["shrink", "--model", str(ckpt), "--calibration", str(tmp_path / "ids.npy"), "--blockwise",
               "--budget", "0.5", "-o", str(tmp_path / "small"), "--json", "-q"], stdout=out, stderr=err)
    assert rc == 0, err.getvalue() + out.getvalue()
    result = json.loads(out.getvalue())
    assert result["memory"]["peak_rss_bytes"] > 0
    import factorize

    assert isinstance(factorize.load_directory(tmp_path / "small"), transformers.LlamaForCausalLM)
    out, err = io.StringIO(), io.StringIO()
    rc = main(["shrink", "--model", str(ckpt), "--calibration", str(tmp_path / "ids.npy"), "--blockwise",
               "--inputs", str(tmp_path / "ids.npy"), "-o", str(tmp_path / "x"), "--json", "-q"], stdout=out,
              stderr=err)
    assert rc == 2 and "--inputs" in json.loads(out.getvalue())["error"]


class CountMoments(LocalEngine):
    """Records, at each factor step, which moment files the scratch holds and which ones the step reads."""

    def __init__(self) -> None:
        super().__init__()
        self.steps: list[tuple[set[str], set[str]]] = []

    def map(self, fn, items, *, label="tasks"):
        items = list(items)
        if label.endswith("factors"):
            held = {p.name for p in Path(items[0].moment).parent.iterdir()}
            self.steps.append((held, {Path(t.moment).name for t in items}))
            with safe_open(items[0].moment, framework="pt") as f:
                self.stored = set(f.keys())
        return super().map(fn, items, label=label)


def test_the_scratch_holds_only_the_moments_not_yet_consumed(ckpt, tmp_path):
    engine = CountMoments()
    shrink_blockwise(ckpt, tmp_path / "counted", budget=BUDGET, calibration=_calibration(), threads=1, cluster=engine)
    assert len(engine.steps) == 2  # one factor step per block of the tiny Llama
    for k, (held, _) in enumerate(engine.steps):
        # exactly the moments this step and the later ones read: a block's go once its factors are written, and
        # those of groups whose members all stay dense go as soon as the plan is known
        assert held == set().union(*(reads for _, reads in engine.steps[k:])), k
    assert len(engine.steps[0][0]) > len(engine.steps[1][0])
    assert all(n.startswith("model.layers.1.") for n in engine.steps[1][0])
    assert engine.stored == {"moment.upper", "total", "abs_total"}  # the symmetric moment's upper triangle only


def test_packed_moments_are_numpys_upper_triangle_and_unpack_bit_for_bit():
    from factorize.outofcore.block_tasks import packed_upper, unpacked_upper

    x = torch.randn(50, 30, dtype=torch.float64, generator=torch.Generator().manual_seed(0))
    C = x.T @ x + (x.T @ x).T  # exactly symmetric
    packed = packed_upper(C)
    np.testing.assert_array_equal(packed.numpy(), C.numpy()[np.triu_indices(30)])  # numpy's row-major triangle
    assert torch.equal(unpacked_upper(packed, 30), C)
    C[2, 7] += 1e-9  # not symmetric: stored whole
    assert packed_upper(C) is None


def _full_decomposition(W, stats, fit, *, execution, name, keep_reduction=False):
    """The statistics pass before values first: the whole whitened decomposition, its vectors then dropped (no
    reduction kept: the factor step then decomposes again, the route before the kept reduction)."""
    return blockwise.decompose_aware(W, stats, method="whiten", solver="gram", ridge=fit.ridge,
                                     precision=execution.precision, name=name).without_vectors()


def test_values_first_gives_the_plan_and_bytes_of_the_full_decomposition(ckpt, shrunk, tmp_path, monkeypatch):
    out, done = shrunk
    monkeypatch.setattr(blockwise, "whitened_values", _full_decomposition)
    full = tmp_path / "full"
    before = shrink_blockwise(ckpt, full, budget=BUDGET, calibration=_calibration(), threads=1)
    sites, old = done.plan["sites"], before.plan["sites"]
    assert sites.keys() == old.keys()
    for name, entry in sites.items():
        assert entry.keys() == old[name].keys()
        for key, value in entry.items():
            if isinstance(value, float):  # eigvalsh and eigh round differently: the energies agree to rounding
                assert value == pytest.approx(old[name][key], rel=1e-9, abs=1e-12), (name, key)
            else:
                assert value == old[name][key], (name, key)
    shards = _Shards(out)
    other = _Shards(full)
    assert shards.map == other.map

    for key in shards.map:  # the written tensors: byte for byte, the factors to their dtype's rounding
        got, want = shards.get(key), other.get(key)
        if got.view(torch.uint8).equal(want.view(torch.uint8)):
            continue
        # the kept vectors come from the values pass's tridiagonal reduction (calibrated.reduced), not a second
        # full eigendecomposition: the same factors up to a few units in the last place of the stored dtype
        assert key.rsplit(".", 2)[-2] in ("first", "second"), key
        tol = 8 * torch.finfo(want.dtype).eps * float(want.float().abs().max())
        torch.testing.assert_close(got.float(), want.float(), rtol=0, atol=tol, msg=key)


def test_whitened_values_are_the_squared_singular_values_of_w_l(ckpt):
    # numpy's SVD of W L, L L^T = C + lambda I (Cholesky), as in decompose_aware's module docstring
    from factorize.calibrated.aware import whitened_values

    model = _reference(ckpt)
    name = "model.layers.0.mlp.down_proj"
    stats = collect_stats(model, [name], _calibration())[name]
    W = model.get_submodule(name).weight.detach()
    got = whitened_values(W, stats, name=name)
    C = stats.second_moment.numpy()
    L = np.linalg.cholesky(C + 1e-6 * np.mean(np.diag(C)) * np.eye(C.shape[0]))
    s = np.linalg.svd(W.double().numpy() @ L, compute_uv=False)
    assert got.vector_rank == 0 and got.computed_rank == s.size
    np.testing.assert_allclose(got.energies(), s**2, rtol=1e-7, atol=1e-9 * s[0] ** 2)
    assert got.total_energy == pytest.approx(float((s**2).sum()), rel=1e-10)


def test_slices_sum_their_packed_moments_as_the_whole_matrices(tmp_path):
    # The slices store their (exactly symmetric) moments as upper triangles; summing the triangles must give the
    # same bits as summing the whole matrices in slice order, and a slice stored whole (not exactly symmetric)
    # must still be summed right. Reference: the plain sum of the whole matrices, in slice order.
    from factorize.outofcore.block_tasks import packed_upper, save_work_file

    g = torch.Generator().manual_seed(0)
    leader, n = "model.layers.0.self_attn.q_proj", 300
    whole = []
    for _ in range(3):
        X = torch.randn(40, n, generator=g, dtype=torch.float64)
        C = torch.zeros(n, n, dtype=torch.float64)
        add_gram(C, X)
        whole.append(C)
    asym = whole[1] + torch.triu(torch.full((n, n), 1e-9, dtype=torch.float64), 1)  # not symmetric: kept whole
    for case, mats in (("packed", whole), ("mixed", [whole[0], asym, whole[2]])):
        files = []
        for j, C in enumerate(mats):
            upper = packed_upper(C)
            tensors = {"self_attn.q_proj.moment" if upper is None else "self_attn.q_proj.moment.upper":
                       C if upper is None else upper,
                       "self_attn.q_proj.total": torch.ones(n, dtype=torch.float64),
                       "self_attn.q_proj.abs_total": torch.ones(n, dtype=torch.float64)}
            files.append(str(tmp_path / f"{case}{j}.safetensors"))
            save_work_file(tensors, files[-1], {"counts": json.dumps({"self_attn.q_proj": 40})})
        st, upper = slice_stats.summed_slices(leader, files, 3)
        want = (mats[0] + mats[1]) + mats[2]
        assert torch.equal(st.second_moment, want), case
        assert st.count == 120 and torch.equal(st.total, torch.full((n,), 3.0, dtype=torch.float64))
        assert (upper is None) == (case == "mixed")


def test_the_factor_step_takes_the_kept_vectors_from_the_values_pass(ckpt, shrunk, tmp_path, monkeypatch):
    # Every factored linear of the default run gets its vectors from the values pass's reduction, and a failed
    # guard falls back to the full decomposition: both outputs are checked against the activation-aware optimum
    # by the tests above (same plan); here the route itself and the fallback's output.
    from factorize.outofcore import block_tasks

    if not tridiagonal.available():
        pytest.skip("the tridiagonal route needs scipy")
    used = []
    real = block_tasks.factors_from_reduction
    monkeypatch.setattr(block_tasks, "factors_from_reduction", lambda *a, **k: used.append(1) or real(*a, **k))
    out = tmp_path / "again"
    done = shrink_blockwise(ckpt, out, budget=BUDGET, calibration=_calibration(), threads=1)
    assert len(used) == sum(1 for e in done.plan["sites"].values() if e.get("action") == "factor") > 0
    monkeypatch.setattr(block_tasks, "factors_from_reduction", lambda *a, **k: None)  # the guard fails everywhere
    fallback = shrink_blockwise(ckpt, tmp_path / "fallback", budget=BUDGET, calibration=_calibration(), threads=1)
    assert fallback.plan["sites"] == done.plan["sites"]
    a, b = _Shards(out), _Shards(tmp_path / "fallback")
    for key in a.map:
        got, want = a.get(key), b.get(key)
        tol = 8 * torch.finfo(want.dtype).eps * float(want.float().abs().max())
        torch.testing.assert_close(got.float(), want.float(), rtol=0, atol=tol, msg=key)
