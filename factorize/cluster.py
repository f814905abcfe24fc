"""Where independent tasks run: in this process, or on a Dask distributed cluster.

Every job that spreads out (the per-matrix decompositions of a checkpoint, the per-slice calibration
statistics) is written as a list of tasks ``fn(item)`` whose inputs and outputs live on storage every worker can
read (the checkpoint's shards, a work directory). An :class:`Engine` runs them and returns the results in the
order of the items, so the caller combines them in a fixed order whatever ran where: that order, and tasks that
pin their own thread count, make a distributed result byte-identical to the single-process one.

This module is torch-free and imports ``distributed`` only when a cluster is asked for (optional extra
``factorize[cluster]``).
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Sequence
from typing import Any


class Engine:
    """Runs ``fn`` over items; results come back in item order."""

    name = "engine"
    workers = 1

    def map(self, fn: Callable[[Any], Any], items: Sequence[Any], *, label: str = "tasks") -> list[Any]:
        raise NotImplementedError

    def close(self) -> None:
        pass

    def __enter__(self) -> Engine:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


class LocalEngine(Engine):
    """This process, one task after another (the reference every other engine must match byte for byte)."""

    name = "local"

    def map(self, fn: Callable[[Any], Any], items: Iterable[Any], *, label: str = "tasks") -> list[Any]:
        return [fn(item) for item in items]


def open_engine(cluster: Any = None) -> Engine:
    """The engine for a ``cluster`` argument: ``None`` runs here; an :class:`Engine` is used as given."""
    if cluster is None:
        return LocalEngine()
    if isinstance(cluster, Engine):
        return cluster
    raise NotImplementedError("distributed engines are not built yet")
