"""``factorize shrink --cluster``: the weights-only shrink on a Dask cluster, from the terminal.

Outside reference: Dask distributed (a scheduler address answered by a running ``LocalCluster``); the output must
equal, byte for byte, the same command without ``--cluster``.
"""

from __future__ import annotations

import io
import json
import socket

import pytest

from benchmarks.llama_checkpoint import write_llama_checkpoint
from factorize import cluster
from factorize.cli import main

pytest.importorskip("distributed")


def _run(argv: list[str]) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    try:
        rc = main(argv, stdout=out, stderr=err)
    except SystemExit as done:  # argparse usage errors
        rc = done.code
    return rc, out.getvalue(), err.getvalue()


@pytest.fixture(scope="module")
def ckpt(tmp_path_factory):
    d = tmp_path_factory.mktemp("cli-cluster")
    return write_llama_checkpoint(d / "ckpt", scale="tiny", shard_mb=0.1) / "model.safetensors.index.json"


def _files(d):
    return {p.name: p.read_bytes() for p in sorted(d.iterdir())}


def test_cluster_address_gives_the_same_bytes_and_says_where_it_ran(ckpt, dask_engine, tmp_path):
    args = ["shrink", "-m", str(ckpt), "--budget", "0.5", "--exclude", "*embed_tokens*", "-q", "--json"]
    rc, _, err = _run([*args, "-o", str(tmp_path / "here")])
    assert rc == 0, err
    rc, out, err = _run([*args, "-o", str(tmp_path / "there"), "--cluster", dask_engine.address,
                         "--report", str(tmp_path / "there.md")])
    assert rc == 0, err
    done = json.loads(out)
    assert done["ran_on"]["engine"] == "dask (scheduler)" and done["ran_on"]["workers"] == 2
    assert done["redone"] == []
    assert _files(tmp_path / "here") == _files(tmp_path / "there")
    assert dask_engine.address in (tmp_path / "there.md").read_text()


def test_a_scheduler_that_does_not_answer_exits_2_and_writes_nothing(ckpt, tmp_path, monkeypatch):
    monkeypatch.setattr(cluster, "CONNECT_TIMEOUT", 1.0)
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]  # closed again: nothing listens there
    rc, _, err = _run(["shrink", "-m", str(ckpt), "--budget", "0.5", "-o", str(tmp_path / "out"),
                         "--report", str(tmp_path / "r.md"), "--cache", str(tmp_path / "cache"),
                         "--cluster", f"127.0.0.1:{port}"])
    assert rc == 2
    assert f"tcp://127.0.0.1:{port}" in err and "did not answer" in err and "Traceback" not in err
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("value", ["local:0", "local:two", "8786", "http://host:8786"])
def test_a_malformed_cluster_value_is_a_usage_error(ckpt, tmp_path, value):
    rc, _, err = _run(["shrink", "-m", str(ckpt), "-o", str(tmp_path / "out"), "--cluster", value])
    assert rc == 2 and "--cluster" in err and "local:N" in err
    assert list(tmp_path.iterdir()) == []


def test_cluster_with_a_model_to_run_is_refused_before_it_is_built(tmp_path, monkeypatch):
    from factorize.checkpoints import models

    monkeypatch.setattr(models, "_from_callable", lambda spec: pytest.fail("the model was built"))
    rc, _, err = _run(["shrink", "-m", "factorize.default:load_default", "-o", str(tmp_path / "out"),
                       "--cluster", "local:2", "-q"])
    assert rc == 2 and "weights-only" in err and "Traceback" not in err
    assert list(tmp_path.iterdir()) == []


def test_cluster_on_a_transformers_directory_shrinks_its_checkpoint_without_loading_the_model(ckpt, tmp_path,
                                                                                             monkeypatch,
                                                                                             dask_engine):
    from factorize.checkpoints import models

    monkeypatch.setattr(models, "_from_directory", lambda *a, **k: pytest.fail("the whole model was loaded"))
    args = ["shrink", "--budget", "0.5", "--exclude", "*embed_tokens*", "-q", "--cluster", dask_engine.address]
    rc, _, err = _run([*args, "-m", str(ckpt.parent), "-o", str(tmp_path / "by-dir")])
    assert rc == 0, err
    rc, _, err = _run([*args, "-m", str(ckpt), "-o", str(tmp_path / "by-index")])
    assert rc == 0, err
    assert _files(tmp_path / "by-dir") == _files(tmp_path / "by-index")
    assert "config.json" in _files(tmp_path / "by-dir")  # reloadable with load_directory (tests/outofcore)
