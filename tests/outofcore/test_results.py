"""The typed results of the out-of-core shrinks and their option records: one dict form, keyword sugar kept.

The key lists below are the ones the shrinks returned as plain dicts before they became dataclasses (the CLI's
--json and the benchmarks read them); the tiny checkpoint is invented data for the demo.
"""

from __future__ import annotations

import dataclasses

import pytest
import torch
from safetensors.torch import save_file

from factorize.errors import FactorizeError
from factorize.outofcore.options import BlockwiseOptions, StreamOptions, split_keywords
from factorize.outofcore.results import BlockwiseShrink, CheckpointShrink
from factorize.outofcore.weights_only import shrink_checkpoint

STREAM_KEYS = ["plan", "tensors", "passed_over", "files", "bytes_before", "bytes_after", "params_before",
               "params_after", "passes", "cache", "engine", "redone"]
BLOCKWISE_KEYS = ["plan", "tensors", "files", "output", "params_before", "params_after", "kept_fraction",
                  "bytes_before", "bytes_after", "blocks", "sequences", "tokens", "slices", "threads", "engine",
                  "seconds", "peak_rss_bytes", "peak_reset", "block_bytes", "activation_bytes", "bound_bytes",
                  "bound_met"]


def test_the_result_records_keep_the_keys_of_the_former_dicts():
    assert [f.name for f in dataclasses.fields(CheckpointShrink)] == STREAM_KEYS
    assert [f.name for f in dataclasses.fields(BlockwiseShrink)] == BLOCKWISE_KEYS


def test_a_weights_only_result_is_frozen_and_its_dict_and_report_agree(tmp_path):
    g = torch.Generator().manual_seed(0)
    src = tmp_path / "in.safetensors"
    save_file({"fc.weight": torch.randn(12, 8, generator=g), "fc.bias": torch.randn(12, generator=g)}, str(src))
    done = shrink_checkpoint(src, tmp_path / "out.safetensors", rank=2, force=False, threads=1)
    assert isinstance(done, CheckpointShrink)
    with pytest.raises(dataclasses.FrozenInstanceError):
        done.passes = 3  # type: ignore[misc]
    as_dict = done.to_dict()
    assert list(as_dict) == STREAM_KEYS and as_dict["plan"] is done.plan
    report = done.report("in.safetensors")
    assert report.params_before == done.params_before == 12 * 8 + 12
    assert report.params_after == done.params_after == 2 * (12 + 8) + 12
    assert [layer.rank for layer in report.layers] == [2]


def test_run_keywords_fill_the_option_record_and_the_rest_stays_for_the_policy():
    options, rest = split_keywords(StreamOptions, None, {"force": True, "threads": 2, "budget": 0.5})
    assert options == StreamOptions(force=True, threads=2) and rest == {"budget": 0.5}
    base = BlockwiseOptions(slices=3)
    options, rest = split_keywords(BlockwiseOptions, base, {"ridge": 0.1})
    assert options == BlockwiseOptions(slices=3, ridge=0.1) and rest == {} and base.ridge is None  # not modified
    with pytest.raises(FactorizeError, match="expected a StreamOptions"):
        split_keywords(StreamOptions, BlockwiseOptions(), {})


def _blockwise_result(**changes) -> BlockwiseShrink:
    """A result with invented numbers (a demo record: only the report's wording is checked)."""
    values = dict(plan={"policy": {"budget": 0.5}, "calibration": {"method": "whiten"}, "sites": {}}, tensors={},
                  files=["out/model.safetensors.index.json"], output="out", params_before=10, params_after=5,
                  kept_fraction=0.5, bytes_before=40, bytes_after=20, blocks=2, sequences=4, tokens=64, slices=1,
                  threads=1, engine={"engine": "local"}, seconds=1.0, peak_rss_bytes=2**20, peak_reset=True,
                  block_bytes=2**10, activation_bytes=2**10, bound_bytes=2**30, bound_met=True)
    return BlockwiseShrink(**{**values, **changes})


def test_reports_that_measured_no_drift_say_so_and_how_to_measure_it(tmp_path):
    from factorize.measure.report import CAUTION

    report = _blockwise_result().report("llama-dir", "ids.npy")
    caution = report.caution
    assert caution != CAUTION and "Drift was measured" not in caution
    assert "No output drift was measured" in caution and "factorize compare" in caution and "--against out" in caution
    # the user's rule holds in every report: samples are no guarantee, safety-relevant uses need re-validation
    assert "no guarantee" in caution and "safety-relevant" in caution
    assert caution in report.to_markdown()
    g = torch.Generator().manual_seed(0)
    src = tmp_path / "in.safetensors"
    save_file({"fc.weight": torch.randn(12, 8, generator=g)}, str(src))
    weights_only = shrink_checkpoint(src, tmp_path / "out.safetensors", rank=2).report("in.safetensors").caution
    assert "No output drift was measured" in weights_only and "safety-relevant" in weights_only
