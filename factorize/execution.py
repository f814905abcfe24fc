"""How work runs, apart from what it computes: one small frozen object built at the edge and passed whole.

:class:`Execution` carries the settings that change how a run is carried out but never what it means: the
compute dtype of the SVD (``precision``), how many layers are decomposed at once (``workers``), the seed of
randomized solvers (``seed``), progress bars on stderr (``progress``) and torch's thread count per task
(``threads``). It is built once where keywords or command-line flags arrive (``compress``'s
:func:`factorize.pipeline.parse_options`, :class:`factorize.calibrated.options.CalibrationOptions`, the command
line's ``cli/common.py``) and handed down unchanged to the spectra (:mod:`factorize.spectra.sites`) and the
calibrated code (:mod:`factorize.calibrated`). Functions that still accept the loose keywords
(``precision=``, ``workers=``, ``seed=``, ``progress=``) turn them into one with :func:`resolve_execution`, the
only place they are read.

Base layer: imports nothing of torch, so the command line can build one before torch is loaded.
"""

from __future__ import annotations

import dataclasses
import numbers
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from factorize.errors import FactorizeError

PRECISIONS = ("float32", "float64")  # compute dtypes of a decomposition (None: float32, float64 for float64 weights)


@dataclass(frozen=True)
class Execution:
    """How a run is carried out; none of it changes a result's meaning, and results are byte-identical for any
    ``workers`` and ``progress`` (see :func:`factorize.spectra.sites.per_site`).

    Attributes:
        precision: compute dtype of the SVD, ``"float32"`` or ``"float64"`` (None: float32, or float64 for
            float64 weights).
        workers: decompose this many layers at once (threads); 1 runs them one after the other.
        seed: seed of randomized decompositions (explicit ``torch.Generator``; the Policy's ``seed``).
        progress: progress bars on stderr.
        threads: torch threads per task for the out-of-core shrinks (None: this process's count).
    """

    precision: str | None = None
    workers: int = 1
    seed: int = 0
    progress: bool = False
    threads: int | None = None

    def __post_init__(self) -> None:
        if self.precision is not None and self.precision not in PRECISIONS:
            raise FactorizeError(f"unknown precision {self.precision!r}", fix="use 'float32' or 'float64'")
        for name, value in (("workers", self.workers), ("threads", self.threads)):
            if value is None and name == "threads":
                continue
            if isinstance(value, bool) or not isinstance(value, numbers.Integral) or value < 1:
                raise FactorizeError(f"{name}= must be an integer >= 1, got {value!r}", fix=f"e.g. {name}=1")
        if isinstance(self.seed, bool) or not isinstance(self.seed, numbers.Integral):
            raise FactorizeError(f"seed= must be an integer, got {self.seed!r}", fix="e.g. seed=0")

    def replace(self, **changes: Any) -> Execution:
        """A copy with ``changes`` (validated again)."""
        return dataclasses.replace(self, **changes)


EXECUTION_KEYWORDS = tuple(f.name for f in dataclasses.fields(Execution))


def resolve_execution(execution: Execution | None, keywords: Mapping[str, Any]) -> tuple[Execution, dict[str, Any]]:
    """(the Execution, the keywords that are not its fields): ``execution`` as given, or one built from the
    keywords named like its fields; giving both is an error naming the keywords."""
    mine = {k: v for k, v in keywords.items() if k in EXECUTION_KEYWORDS}
    rest = {k: v for k, v in keywords.items() if k not in EXECUTION_KEYWORDS}
    if execution is not None and mine:
        raise FactorizeError("an Execution and its keywords were both given", [f"{k}=" for k in mine],
                             fix="put them into the Execution (execution.replace(...)) or pass keywords only")
    return (execution if execution is not None else Execution(**mine)), rest
