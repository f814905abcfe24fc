"""A transformers directory, its ``*.safetensors.index.json`` and its single ``.safetensors`` file name the same
checkpoint in every out-of-core mode of ``factorize shrink``.

Outside reference: the sharded-checkpoint layout transformers writes (``config.json`` beside the shards and the
index, ``weight_map``: tensor name -> shard; common practice) and transformers' ``LlamaForCausalLM`` reading the
outputs back through ``factorize.load_directory``.
"""

from __future__ import annotations

import io
import json

import numpy as np
import pytest

from benchmarks.llama_checkpoint import write_llama_checkpoint
from factorize.cli import main

transformers = pytest.importorskip("transformers")


def _run(argv: list[str]) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    try:
        rc = main(argv, stdout=out, stderr=err)
    except SystemExit as done:
        rc = done.code
    return rc, out.getvalue(), err.getvalue()


def _files(d):
    return {p.name: p.read_bytes() for p in sorted(d.iterdir()) if p.is_file()}


@pytest.fixture(scope="module")
def ckpt(tmp_path_factory):
    return write_llama_checkpoint(tmp_path_factory.mktemp("paths") / "tiny", scale="tiny", shard_mb=0.1)


def test_blockwise_takes_the_directory_or_its_index_alike(ckpt, tmp_path):
    np.save(tmp_path / "ids.npy", np.random.default_rng(0).integers(0, 256, (4, 12)))
    args = ["shrink", "--calibration", str(tmp_path / "ids.npy"), "--blockwise", "--budget", "0.5", "-q"]
    rc, _, err = _run([*args, "-m", str(ckpt), "-o", str(tmp_path / "by-dir")])
    assert rc == 0, err
    rc, _, err = _run([*args, "-m", str(ckpt / "model.safetensors.index.json"), "-o", str(tmp_path / "by-index")])
    assert rc == 0, err
    assert _files(tmp_path / "by-dir") == _files(tmp_path / "by-index")
    # a shard is not the checkpoint the directory holds: refused, naming what to pass
    rc, _, err = _run([*args, "-m", str(ckpt / "model-00001-of-00003.safetensors"), "-o", str(tmp_path / "x")])
    assert rc == 2 and "index or single weights file" in err and "Traceback" not in err
    assert not (tmp_path / "x").exists()


def test_weights_only_directory_output_by_default_beside_the_input_and_reloadable(ckpt, tmp_path):
    import shutil

    src = tmp_path / "model"
    shutil.copytree(ckpt, src)
    rc, out, err = _run(["shrink", "-m", str(src), "--cluster", "local:1", "--rank", "8", "--exclude",
                         "*embed_tokens*", "-q", "--json"])
    assert rc == 0, err
    done = json.loads(out)
    assert done["output"] == str(tmp_path / "model.factorized")
    import factorize

    model = factorize.load_directory(tmp_path / "model.factorized")
    assert isinstance(model, transformers.LlamaForCausalLM)


def test_a_directory_without_config_is_its_bare_checkpoint(ckpt, tmp_path):
    import shutil

    bare = tmp_path / "bare"
    bare.mkdir()
    for p in ckpt.iterdir():
        if p.name != "config.json":
            shutil.copy(p, bare / p.name)
    args = ["shrink", "--rank", "8", "--exclude", "*embed_tokens*", "-q", "--json"]
    rc, out, err = _run([*args, "-m", str(bare), "-o", str(tmp_path / "by-dir")])
    assert rc == 0, err
    rc, _, err = _run([*args, "-m", str(bare / "model.safetensors.index.json"), "-o", str(tmp_path / "by-index")])
    assert rc == 0, err
    assert _files(tmp_path / "by-dir") == _files(tmp_path / "by-index")
    assert "config.json" not in _files(tmp_path / "by-dir")  # no config to carry: not a transformers directory
    assert json.loads(out)["report"]["title"] == "factorize shrink (weights-only)"
