"""The sequential refit: embeddings fitted from their token counts, and block inputs (a block run alone on its
kept inputs gives the statistics full passes give).

References: transformers' BertModel and LlamaForCausalLM built from tiny configs (random weights; the LLaMA one
hands its blocks a key/value cache object), compared with full passes of both models over the same batches.
"""

from __future__ import annotations

import copy

import pytest
import torch
from torch import nn

from factorize.calibrated.aware import aware_spectra
from factorize.calibrated.sequential import BlockFeeds, agree, compress_sequential, stacked_blocks
from factorize.calibrated.stats import collect_pair_stats, collect_stats, forward_order
from factorize.model.sites import walk
from factorize.plan.ranks import Policy, choose_ranks
from factorize.rewrite.apply import apply_plan

pytestmark = pytest.mark.filterwarnings("ignore:too few calibration samples")
transformers = pytest.importorskip("transformers")


def _bert():
    cfg = transformers.BertConfig(vocab_size=60, hidden_size=16, num_hidden_layers=3, num_attention_heads=2,
                                  intermediate_size=32, max_position_embeddings=24)
    torch.manual_seed(0)
    return transformers.BertModel(cfg).eval()


def _llama():
    cfg = transformers.LlamaConfig(vocab_size=60, hidden_size=16, num_hidden_layers=3, num_attention_heads=2,
                                   num_key_value_heads=1, intermediate_size=32, max_position_embeddings=24)
    torch.manual_seed(0)
    return transformers.LlamaForCausalLM(cfg).eval()


def _batches(padded: bool):
    g = torch.Generator().manual_seed(1)
    out = []
    for _ in range(3):
        ids = torch.randint(0, 60, (4, 10), generator=g)
        mask = torch.ones(4, 10, dtype=torch.long)
        if padded:
            mask[1, 6:] = 0
            mask[3, 3:] = 0
        out.append({"input_ids": ids, "attention_mask": mask})
    return out


def _plan(model, batches):
    """The per-layer plan at keep=0.5, and the whitened spectra it was chosen from."""
    sites = walk(model).sites
    spectra = aware_spectra(model, sites, collect_stats(model, sites, batches))
    return choose_ranks(sites, spectra, Policy(keep=0.5)), spectra


def test_stacked_blocks_are_the_outermost_list_elements():
    model = _bert()
    found = stacked_blocks(model, [s.name for s in walk(model).sites])
    assert found["encoder.layer.1.attention.self.query"] == "encoder.layer.1"
    assert found["encoder.layer.2.output.dense"] == "encoder.layer.2"
    assert "pooler.dense" not in found and "embeddings.word_embeddings" not in found


@pytest.mark.parametrize("build,padded", [(_bert, True), (_llama, False)])
def test_block_fed_statistics_equal_full_passes(build, padded):
    model, batches = build(), _batches(padded)
    current = build()
    with torch.no_grad():  # a "partly compressed" model: every weight perturbed, so its inputs differ
        for p in current.parameters():
            p.add_(0.05 * torch.randn_like(p))
    sites = {s.name: s for s in walk(model).sites}
    order, calls = forward_order(model, list(sites.values()), batches[0])
    feeds = BlockFeeds(model, current, batches, order, calls)
    inside = [n for n in order if n in feeds.block_of]
    assert len(inside) >= 12  # every linear of the three blocks
    for name in inside[:2] + inside[-3:]:
        fed = feeds.pair_stats(sites[name], "input", stop_early=True)
        full = collect_pair_stats(model, current, sites[name], batches)
        assert agree(fed, full, tol=1e-6)
        assert not agree(fed, collect_pair_stats(model, copy.deepcopy(model), sites[name], batches))
    assert feeds.checked and feeds.block_of  # the check passed, so block inputs stayed on


def test_sequential_refit_gives_the_same_model_with_and_without_block_inputs():
    model, batches = _bert(), _batches(True)
    plan, _ = _plan(model, batches)
    fast, _ = compress_sequential(model, plan, batches)
    slow, _ = compress_sequential(model, plan, batches, block_inputs=False)
    with torch.no_grad():
        for b in batches:
            torch.testing.assert_close(fast(**b).last_hidden_state, slow(**b).last_hidden_state, rtol=1e-4,
                                       atol=1e-5)


class _Scale:
    factor = 2.0


class _Block(nn.Module):
    def __init__(self):
        super().__init__()
        self.fc = nn.Linear(8, 8)

    def forward(self, x, ctx):
        return x + ctx.factor * torch.tanh(self.fc(x))


class _Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.inp = nn.Linear(8, 8)
        self.blocks = nn.ModuleList(_Block() for _ in range(3))

    def forward(self, x):
        h, ctx = self.inp(x), _Scale()
        for block in self.blocks:
            h = block(h, ctx)
        return h


def test_a_block_that_needs_an_object_falls_back_to_full_passes():
    # the block's context object is passed as None when run alone, which fails: full passes take over, same result
    torch.manual_seed(0)
    model = _Net().eval()
    batches = [torch.randn(32, 8) for _ in range(2)]
    plan, _ = _plan(model, batches)
    sites = {s.name: s for s in walk(model).sites}
    order, calls = forward_order(model, list(sites.values()), batches[0])
    feeds = BlockFeeds(model, copy.deepcopy(model), batches, order, calls)
    assert feeds.block_of
    fed = feeds.pair_stats(sites["blocks.1.fc"], "input", stop_early=True)
    assert not feeds.block_of
    assert agree(fed, collect_pair_stats(model, copy.deepcopy(model), sites["blocks.1.fc"], batches))
    fast, _ = compress_sequential(model, plan, batches)
    slow, _ = compress_sequential(model, plan, batches, block_inputs=False)
    torch.testing.assert_close(fast(batches[0]), slow(batches[0]))


def test_sequential_mode_fits_embeddings_from_their_token_counts():
    # An embedding's input is the token ids, which compression never changes: sequential mode fits it exactly as
    # the per-layer path does (it used to refuse, so `shrink --sequential` failed on any transformers model whose
    # embeddings were in the plan).
    model, batches = _bert(), _batches(True)
    plan, spectra = _plan(model, batches)
    per_layer = apply_plan(model, plan, spectra=spectra)
    seq, seq_spectra = compress_sequential(model, plan, batches)
    emb = "embeddings.word_embeddings"
    assert plan["sites"][emb]["action"] == "factor" and emb in seq_spectra
    ids = torch.arange(60)
    with torch.no_grad():
        torch.testing.assert_close(seq.get_submodule(emb)(ids), per_layer.get_submodule(emb)(ids),
                                   rtol=1e-4, atol=1e-5)
        assert torch.isfinite(seq(**batches[0]).last_hidden_state).all()
