"""Tests for factorize/cluster.py: where tasks run (this process, or a Dask local cluster of worker processes).

Outside reference: Dask distributed's own ``LocalCluster`` and ``Client`` (the engine must hand back results in item
order whatever worker ran them, and report a task's exception as raised there).
"""

from __future__ import annotations

import pickle
import socket
import sys

import pytest
import torch

from factorize.cluster import LocalEngine, TasksFailed, open_engine, parse_cluster
from factorize.errors import FactorizeError


def square(x: int) -> int:
    return x * x


def threads_seen(_item) -> int:
    return torch.get_num_threads()


def refuse(x: int) -> int:
    if x == 3:
        raise FactorizeError(f"item {x} is bad", ["first reason"], fix="use another item")
    return x


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_local_engine_keeps_item_order_and_pins_threads_then_restores():
    before = torch.get_num_threads()
    engine = open_engine(None)
    assert isinstance(engine, LocalEngine) and engine.describe()["engine"] == "local"
    assert engine.map(square, [3, 1, 2]) == [9, 1, 4]
    assert engine.map(threads_seen, [0, 1]) == [1, 1]  # pinned to one thread per task
    assert LocalEngine(threads=None).map(threads_seen, [0]) == [before]  # None: torch's own setting
    assert torch.get_num_threads() == before  # the caller's setting is restored
    assert open_engine(engine) is engine


@pytest.mark.parametrize("value, expected", [
    (None, None), (2, 2), ("local:3", 3), (" local:1 ", 1), ("tcp://10.0.0.5:8786", "tcp://10.0.0.5:8786"),
    ("scheduler.example:8786", "tcp://scheduler.example:8786"), ("tls://[::1]:8786", "tls://[::1]:8786"),
])
def test_cluster_values_accepted(value, expected):
    assert parse_cluster(value) == expected


@pytest.mark.parametrize("value", [0, -1, True, 2.0, "local:0", "local:", "local:x", "8786", "host", "host:0",
                                   "host:70000", "http://host:8786", ""])
def test_cluster_values_refused_with_the_accepted_forms(value):
    with pytest.raises(FactorizeError, match="local:N") as e:
        parse_cluster(value)
    assert "tcp://host:8786" in e.value.fix


def test_missing_distributed_says_how_to_install(monkeypatch):
    monkeypatch.setitem(sys.modules, "distributed", None)  # import fails as if not installed
    with pytest.raises(FactorizeError, match="not installed") as e:
        open_engine("local:2")
    assert 'pip install ".[cluster]"' in e.value.fix  # the extra, installed from a checkout


def test_factorize_error_survives_pickling_whole():
    e = pickle.loads(pickle.dumps(FactorizeError("what", ["a", "b"], fix="how")))
    assert (e.message, e.problems, e.fix, str(e)) == ("what", ["a", "b"], "how", "what\n  - a\n  - b\nFix: how")
    t = pickle.loads(pickle.dumps(TasksFailed("lost", [4, 1], fix="rerun")))
    assert t.unfinished == [4, 1] and t.fix == "rerun"


def test_address_that_does_not_answer_is_a_clear_error():
    pytest.importorskip("distributed")
    address = f"tcp://127.0.0.1:{_free_port()}"  # nothing listens there
    with pytest.raises(FactorizeError, match="did not answer") as e:
        open_engine(address, timeout=1)
    assert address in str(e.value) and "dask scheduler" in e.value.fix


def test_dask_engine_results_in_item_order_with_pinned_threads(dask_engine):
    assert dask_engine.describe() == {"engine": "dask (local cluster)", "address": dask_engine.address,
                                      "workers": 2, "threads_per_task": 1}
    items = list(range(20))
    assert dask_engine.map(square, items, label="squares") == [x * x for x in items]
    assert dask_engine.map(threads_seen, [0, 1, 2]) == [1, 1, 1]
    assert dask_engine.map(square, []) == []


def test_dask_engine_raises_the_task_error_as_raised_on_the_worker(dask_engine):
    with pytest.raises(FactorizeError, match="item 3 is bad") as e:
        dask_engine.map(refuse, list(range(6)))
    assert e.value.problems == ["first reason"] and e.value.fix == "use another item"
    assert dask_engine.map(square, [5]) == [25]  # the engine is still usable afterwards


def test_an_existing_client_is_used_and_left_open(dask_engine):
    engine = open_engine(dask_engine.client)
    assert engine.map(square, [2, 3]) == [4, 9]
    engine.close()
    assert dask_engine.client.status == "running"


def _listener(reply: bytes | None):
    """A TCP listener on 127.0.0.1 (never another host) that accepts connections and either stays silent or sends
    ``reply`` at once; returns (address, stop)."""
    import threading

    server = socket.socket()
    server.bind(("127.0.0.1", 0))
    server.listen(4)
    server.settimeout(0.2)
    done = threading.Event()
    held = []

    def serve():
        while not done.is_set():
            try:
                conn, _ = server.accept()
            except OSError:
                continue
            held.append(conn)
            if reply is not None:
                conn.sendall(reply)

    thread = threading.Thread(target=serve, daemon=True)
    thread.start()

    def stop():
        done.set()
        thread.join(2)
        for c in held:
            c.close()
        server.close()

    return f"tcp://127.0.0.1:{server.getsockname()[1]}", stop


@pytest.mark.parametrize("reply, said", [(None, "sent nothing within 1 s"),
                                         (b"HTTP/1.0 400 Bad Request\r\nServer: x\r\n\r\n", "not as a Dask scheduler")])
def test_an_address_that_answers_wrongly_or_not_at_all_ends_within_the_timeout(reply, said):
    # a port that accepts and never answers used to hang; one that talks HTTP made the client read its reply as a
    # frame length (an allocation of exabytes); both now end within the connect timeout with one message
    import time

    address, stop = _listener(reply)
    try:
        start = time.monotonic()
        with pytest.raises(FactorizeError) as err:
            open_engine(address, timeout=1.0)
        assert time.monotonic() - start < 5
    finally:
        stop()
    assert address in str(err.value) and said in str(err.value)
    if reply:
        assert "HTTP/1.0 400" in str(err.value)
