"""The weights-only shrink on a Dask local cluster of 2 worker processes equals the single-process run byte for byte.

Outside references: Dask distributed's ``LocalCluster`` (real worker processes; a worker that dies is restarted by
its nanny and its task rescheduled, or given up with ``KilledWorker``); the reference reader ``safetensors.safe_open``
for every file compared; the sharded-checkpoint layout of transformers (``*.safetensors.index.json``, common
practice) as written by ``benchmarks/llama_checkpoint.py``.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from safetensors import safe_open

from benchmarks.llama_checkpoint import write_llama_checkpoint
from factorize.errors import FactorizeError
from factorize.model.sites import Site
from factorize.outofcore.tasks import ExitOnFirstAttempt, MatrixTask, values_task
from factorize.outofcore.weights_only import shrink_checkpoint

pytest.importorskip("distributed")

VICTIM = "model.layers.0.mlp.up_proj.weight"


@pytest.fixture(scope="module")
def llama(tmp_path_factory) -> Path:
    """A tiny Llama-shaped bfloat16 checkpoint in several shards (random weights with decaying spectra)."""
    d = tmp_path_factory.mktemp("llama")
    write_llama_checkpoint(d / "ckpt", scale="tiny", shard_mb=0.1)
    assert len(list((d / "ckpt").glob("*.safetensors"))) > 1
    return d / "ckpt"


@pytest.fixture(scope="module")
def reference(llama, tmp_path_factory) -> dict[str, bytes]:
    """The single-process result at budget 0.5 (every output file's bytes)."""
    out = tmp_path_factory.mktemp("ref") / "out"
    shrink_checkpoint(llama, out, budget=0.5, exclude=["*embed_tokens*"])
    return _files(out)


def _files(directory: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(directory.iterdir())}


def _check_readable(directory: Path) -> None:
    index = json.loads((directory / "model.safetensors.index.json").read_text())
    for name, shard in index["weight_map"].items():
        with safe_open(str(directory / shard), framework="pt") as f:
            assert name in f.keys()  # noqa: SIM118 - a safe_open handle, not a dict


def test_budget_shrink_on_two_workers_equals_one_process_byte_for_byte(llama, reference, dask_engine, tmp_path):
    out = tmp_path / "out"
    done = shrink_checkpoint(llama, out, budget=0.5, exclude=["*embed_tokens*"], cluster=dask_engine)
    assert _files(out) == reference  # every shard and the index, byte for byte
    _check_readable(out)
    assert done.engine["engine"] == "dask (local cluster)" and done.engine["workers"] == 2
    assert done.redone == [] and done.passes == 2
    assert any(row["action"] == "factor" for row in done.tensors.values())
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]  # the work directory is gone


def test_per_layer_policy_on_the_cluster_equals_one_process(llama, dask_engine, tmp_path):
    shrink_checkpoint(llama, tmp_path / "a", rank=8, include=["*mlp*"])
    shrink_checkpoint(llama, tmp_path / "b", rank=8, include=["*mlp*"], cluster=dask_engine)
    assert _files(tmp_path / "a") == _files(tmp_path / "b")


def test_a_worker_dying_mid_run_is_redone_and_named(llama, reference, dask_engine, tmp_path):
    # the worker running VICTIM's factor task exits (os._exit) on its first attempt; Dask restarts the worker and
    # reschedules the task, whose attempt marker then says it is the second attempt
    out = tmp_path / "out"
    done = shrink_checkpoint(llama, out, budget=0.5, exclude=["*embed_tokens*"], cluster=dask_engine,
                             _fault=ExitOnFirstAttempt(VICTIM))
    assert done.redone == [VICTIM]
    assert _files(out) == reference
    assert any(VICTIM in note for note in done.report("ckpt").notes)


def test_cluster_giving_up_names_the_matrix_and_a_rerun_resumes_from_the_cache(llama, reference, dask_engine,
                                                                              tmp_path):
    scheduler = dask_engine.cluster.scheduler  # the local cluster's scheduler runs in this process
    allowed = scheduler.allowed_failures
    scheduler.allowed_failures = 0  # give up on a task at its worker's first death
    out, cache = tmp_path / "out", tmp_path / "cache"
    try:
        with pytest.raises(FactorizeError, match="never finished") as e:
            shrink_checkpoint(llama, out, budget=0.5, exclude=["*embed_tokens*"], cluster=dask_engine,
                              cache_dir=cache, _fault=ExitOnFirstAttempt(VICTIM))
    finally:
        scheduler.allowed_failures = allowed
    # the victim, and any task queued on the same worker when it died (Dask gives up on those too)
    unfinished = e.value.problems
    assert VICTIM in unfinished and len(unfinished) < 4 and "same cache directory resumes" in e.value.fix
    assert not out.exists()  # nothing written
    done = shrink_checkpoint(llama, out, budget=0.5, exclude=["*embed_tokens*"], cluster=dask_engine,
                             cache_dir=cache)
    assert VICTIM in done.redone and set(done.redone) <= set(unfinished)  # its attempt marker survived
    # every matrix finished before the failure is reused; one queued with the victim may also have stored its
    # result before Dask gave up on it (then it is reused too); the victim itself is recomputed
    total = len(done.tensors)
    assert total - len(unfinished) <= done.cache["results_reused"] <= total - 1
    assert _files(out) == reference


def test_a_shard_the_worker_cannot_read_is_named(dask_engine, tmp_path):
    missing = tmp_path / "elsewhere" / "model-00001-of-00002.safetensors"
    task = MatrixTask(kind="values", shard=str(missing), name="w.weight",
                      site=Site(name="w", kind="linear", shape=(4, 4), params=16, has_bias=False, dtype="float32"),
                      method="exact", k=None, seed=0, precision=None, work_dir=str(tmp_path), cache_dir=None)
    with pytest.raises(FactorizeError, match="cannot read this shard") as e:
        dask_engine.map(values_task, [task])
    assert str(missing) in str(e.value) and "every worker can read" in e.value.fix


def test_an_unreachable_scheduler_writes_nothing(llama, tmp_path, monkeypatch):
    from factorize import cluster

    monkeypatch.setattr(cluster, "CONNECT_TIMEOUT", 1.0)
    with pytest.raises(FactorizeError, match="did not answer"):
        shrink_checkpoint(llama, tmp_path / "out", budget=0.5, cluster="tcp://127.0.0.1:9", cache_dir=tmp_path / "c")
    assert list(tmp_path.iterdir()) == []
