"""Where independent tasks run: in this process, or on a Dask distributed cluster.

Every job that spreads out (the per-matrix decompositions of a checkpoint, the per-slice calibration
statistics) is written as a list of tasks ``fn(item)`` whose inputs and outputs live on storage every worker can
read (the checkpoint's shards, a work directory). An :class:`Engine` runs them and returns the results in the
order of the items, so the caller combines them in a fixed order whatever ran where: that order, and tasks that
pin their own thread count, make a distributed result byte-identical to the single-process one.

Every engine runs each task with torch's intra-op thread count set to ``threads`` (default 1) and restores it
afterwards, so the arithmetic of a task is the same in this process and on any worker. (Measured on the
development machine, torch 2.13 with MKL: exact, Gram and randomized spectra of bfloat16 matrices up to 1024 x 1024
came out bit-identical at 1, 2 and 4 threads, but BLAS/LAPACK libraries make no such promise -- reductions may
be split differently per thread count -- so the count is pinned rather than trusted.)

Why Dask distributed and not Ray (both on PyPI, both run a local cluster in CI): ``distributed`` is pure Python
on top of ``dask``, a small install; ``LocalCluster`` starts worker processes in about a second; tasks are plain
picklable functions and a worker that dies is restarted by its nanny and its tasks rescheduled. Ray's wheel is
far larger and runs its own daemons (raylet, object store), which is more machinery than independent tasks over
shared files need.

This module is torch-free at import and imports ``distributed`` only when a cluster is asked for (optional extra
``factorize[cluster]``).
"""

from __future__ import annotations

import re
import uuid
from collections.abc import Callable, Iterable, Sequence
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from typing_extensions import Self

from factorize.errors import FactorizeError, printable
from factorize.threads import torch_threads

INSTALL_FIX = 'pip install ".[cluster]" (in a checkout of factorize; it installs Dask distributed)'
CONNECT_TIMEOUT = 10.0  # seconds to wait for a scheduler address to answer
_LOCAL = re.compile(r"local:(\d+)")
_ADDRESS = re.compile(r"(?:(tcp|tls|ucx|inproc)://)?(\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9_.-]+):(\d{1,5})")


class TasksFailed(FactorizeError):
    """Some tasks never finished because the cluster gave up on them (their worker kept dying).

    ``unfinished`` holds the indices (into the items) of the tasks without a result; the caller names them."""

    def __init__(self, message: str, unfinished: Sequence[int], fix: str | None = None) -> None:
        super().__init__(message, fix=fix)
        self.unfinished = list(unfinished)

    def __reduce__(self):
        return (type(self), (self.message, self.unfinished, self.fix))


def _pinned(fn: Callable[[Any], Any], threads: int | None, item: Any) -> Any:
    """``fn(item)`` with torch's intra-op thread count set to ``threads`` (restored afterwards)."""
    with torch_threads(threads):  # torch is imported only when a count is set: this module stays torch-free
        return fn(item)


class _Pinned:
    """A picklable ``fn`` that runs with a pinned thread count (what every engine submits)."""

    def __init__(self, fn: Callable[[Any], Any], threads: int | None) -> None:
        self.fn, self.threads = fn, threads

    def __call__(self, item: Any) -> Any:
        return _pinned(self.fn, self.threads, item)


class Engine:
    """Runs ``fn`` over items; results come back in item order.

    ``fn`` must be picklable (a module-level function, or an instance of a module-level class) for a
    distributed engine; items and results travel between processes, so keep them small (paths, names, options;
    statistics of one slice) and put large data on shared storage."""

    name = "engine"
    workers = 1
    threads: int | None = 1

    def map(self, fn: Callable[[Any], Any], items: Sequence[Any], *, label: str = "tasks",
            progress: bool = False) -> list[Any]:
        """``[fn(item) for item in items]``, run wherever this engine runs tasks (``progress``: a bar on stderr)."""
        raise NotImplementedError

    def describe(self) -> dict:
        """Where tasks run, for reports: engine name, address, worker count, threads per task."""
        return {"engine": self.name, "address": None, "workers": self.workers, "threads_per_task": self.threads}

    def close(self) -> None:
        pass

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


class LocalEngine(Engine):
    """This process, one task after another (the reference every other engine must match byte for byte)."""

    name = "local"

    def __init__(self, threads: int | None = 1) -> None:
        self.threads = threads

    def map(self, fn: Callable[[Any], Any], items: Iterable[Any], *, label: str = "tasks",
            progress: bool = False) -> list[Any]:
        from tqdm.auto import tqdm

        return [_pinned(fn, self.threads, item)
                for item in tqdm(list(items), desc=printable(label), unit="task", disable=not progress, leave=False)]


class DaskEngine(Engine):
    """Tasks on a Dask distributed cluster: a scheduler at an address, a local cluster of worker processes, or a
    ``distributed.Client`` the caller already holds (then closing the engine leaves the client open)."""

    name = "dask"

    def __init__(self, client: Any, *, cluster: Any = None, owned: bool = False, threads: int | None = 1) -> None:
        self.client, self.cluster, self.owned, self.threads = client, cluster, owned, threads
        self.address = client.scheduler.address if client.scheduler is not None else None

    @property
    def workers(self) -> int:  # type: ignore[override]
        return len(self.client.scheduler_info().get("workers", {}))

    def describe(self) -> dict:
        kind = "local cluster" if self.cluster is not None else "scheduler"
        return {"engine": f"dask ({kind})", "address": self.address, "workers": self.workers,
                "threads_per_task": self.threads}

    def map(self, fn: Callable[[Any], Any], items: Sequence[Any], *, label: str = "tasks",
            progress: bool = False) -> list[Any]:
        from distributed import KilledWorker, as_completed
        from tqdm.auto import tqdm

        items = list(items)
        if not items:
            return []
        token = uuid.uuid4().hex  # keys unique across clients of one scheduler: no two runs share a result
        futures = self.client.map(_Pinned(fn, self.threads), items, pure=False,
                                  key=[f"factorize-{label}-{i}-{token}" for i in range(len(items))])
        index = {f.key: i for i, f in enumerate(futures)}
        results: list[Any] = [None] * len(items)
        lost: list[int] = []
        causes: list[str] = []
        bar = tqdm(total=len(items), desc=printable(label), unit="task", disable=not progress, leave=False)
        try:
            for future in as_completed(futures):
                bar.update()
                i = index[future.key]
                if future.status == "finished":
                    results[i] = future.result()
                    continue
                error = future.exception()
                if isinstance(error, KilledWorker):  # the scheduler gave up on this task; keep the others going
                    lost.append(i)
                    causes.append(str(error))
                    continue
                raise error
        finally:
            bar.close()
            for f in futures:
                f.cancel()  # what is still queued (after an error) stops; finished results are released
        if lost:
            raise TasksFailed(f"{len(lost)} of {len(items)} {label} never finished: the cluster gave up on them after "
                              f"their worker died repeatedly ({causes[0]})", sorted(lost))
        return results

    def close(self) -> None:
        if self.owned:
            self.client.close()
            if self.cluster is not None:
                self.cluster.close()


def parse_cluster(value: Any) -> int | str | None:
    """The normalised ``cluster`` argument: None, a worker count (``2``, ``"local:2"``) or a scheduler address
    (``"tcp://host:8786"``, ``"host:8786"``). Raises :class:`FactorizeError` for anything else."""
    if value is None or isinstance(value, Engine):
        return value
    if isinstance(value, bool):
        pass
    elif isinstance(value, int):
        if value >= 1:
            return value
    elif isinstance(value, str):
        text = value.strip()
        m = _LOCAL.fullmatch(text)
        if m and int(m.group(1)) >= 1:
            return int(m.group(1))
        m = _ADDRESS.fullmatch(text)
        if m and not m.group(0).startswith("local:") and 0 < int(m.group(3)) < 65536:
            return text if m.group(1) else f"tcp://{text}"
    elif type(value).__name__ == "Client" and type(value).__module__.startswith("distributed"):
        return value
    raise FactorizeError(f"cluster {value!r} is neither a local cluster nor a scheduler address",
                         fix="pass local:N (N worker processes here, N >= 1), a scheduler address such as "
                             "tcp://host:8786, or a distributed.Client")


def open_engine(cluster: Any = None, *, threads: int | None = 1, timeout: float | None = None) -> Engine:
    """The engine for a ``cluster`` argument.

    ``None`` runs in this process (:class:`LocalEngine`); an :class:`Engine` is used as given; ``N`` or
    ``"local:N"`` starts a Dask ``LocalCluster`` of N worker processes with one thread each; ``"tcp://host:port"``
    or ``"host:port"`` connects to a running scheduler (``timeout`` seconds, default :data:`CONNECT_TIMEOUT`); a
    ``distributed.Client`` is used as given. Every task runs with torch's thread count pinned to ``threads``.

    Raises :class:`FactorizeError` (before anything is written) when ``distributed`` is not installed or the
    address does not answer.
    """
    spec = parse_cluster(cluster)
    if spec is None:
        return LocalEngine(threads)
    if isinstance(spec, Engine):
        return spec
    try:
        import distributed
    except ImportError:
        raise FactorizeError(f"cluster {cluster!r} needs Dask distributed, which is not installed",
                             fix=INSTALL_FIX) from None
    if isinstance(spec, distributed.Client):
        return DaskEngine(spec, owned=False, threads=threads)
    if isinstance(spec, int):
        try:
            local = distributed.LocalCluster(n_workers=spec, threads_per_worker=1, processes=True,
                                             dashboard_address=":0")
        except Exception as e:  # noqa: BLE001 - any failure to start is reported the same way
            raise FactorizeError(f"could not start a local cluster of {spec} worker processes ({e})",
                                 fix="check free memory and that this machine allows child processes; or run "
                                     "without a cluster") from None
        return DaskEngine(distributed.Client(local), cluster=local, owned=True, threads=threads)
    wait = CONNECT_TIMEOUT if timeout is None else timeout
    probe_scheduler(spec, wait)
    try:
        client = distributed.Client(spec, timeout=wait)
    except Exception as e:  # noqa: BLE001 - whatever the address did, the user gets one message naming it
        raise FactorizeError(f"the cluster scheduler at {spec} did not answer within {wait:g} s "
                             f"({type(e).__name__}: {e})", fix=SCHEDULER_FIX) from None
    return DaskEngine(client, owned=True, threads=threads)


SCHEDULER_FIX = ("start the scheduler and its workers (dask scheduler; dask worker ADDRESS), check the address and "
                 "port, or use local:N for worker processes on this machine")
GREETING_LIMIT = 1 << 26  # a Dask handshake is a few hundred bytes; a larger announced length is not Dask


def probe_scheduler(address: str, wait: float) -> None:
    """Check that ``address`` (tcp://host:port) greets like a Dask scheduler within ``wait`` seconds, before a
    client is made: a Dask scheduler sends its handshake as soon as a connection is accepted, framed by a
    little-endian 8-byte length (distributed's TCP comm). An address that refuses, accepts but stays silent (a
    stalled process, an HTTP server waiting for a request), or sends something else is a
    :class:`FactorizeError` naming the address and what was found there -- instead of a hang, or of a client
    that reads an HTTP reply as a frame length and tries to allocate exabytes."""
    import socket

    m = _ADDRESS.fullmatch(address)
    if m is None or (m.group(1) or "tcp") != "tcp":
        return  # other transports greet differently; the client's own timeout applies
    host, port = m.group(2).strip("[]"), int(m.group(3))
    try:
        with socket.create_connection((host, port), timeout=wait) as sock:
            sock.settimeout(wait)
            greeting = sock.recv(16)
    except TimeoutError:
        raise FactorizeError(f"the address {address} accepted a connection but sent nothing within {wait:g} s: "
                             "no Dask scheduler answers there (a stalled process, or another kind of server)",
                             fix=SCHEDULER_FIX) from None
    except OSError as e:
        raise FactorizeError(f"the cluster scheduler at {address} did not answer ({e})", fix=SCHEDULER_FIX) from None
    announced = int.from_bytes(greeting[:8].ljust(8, b"\0"), "little")
    if len(greeting) < 8 or announced == 0 or announced > GREETING_LIMIT:
        shown = "".join(c if c.isprintable() else "." for c in greeting.decode("latin-1"))
        raise FactorizeError(f"the address {address} answered, but not as a Dask scheduler (it sent {shown!r})",
                             fix=SCHEDULER_FIX)
