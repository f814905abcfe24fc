"""How an out-of-core shrink runs: small frozen option records, and the keyword sugar that fills them.

Both shrinks take ``(src, dst, policy, options)``; their documented keywords (``force=True``, ``cluster=4``,
``threads=1``, ...) still work: :func:`split_keywords` moves the run options among the keywords into the option
record and leaves the rest for :func:`factorize.plan.policy.resolve_policy` (budget, rank, include, ...).
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, TypeVar

from factorize.errors import FactorizeError

DEFAULT_SLICES = 8
TOKENS_PER_PASS = 2048  # tokens per forward pass inside a task: bounds the block's intermediate activations


@dataclass(frozen=True)
class StreamOptions:
    """Run options of the weights-only shrink (:func:`factorize.outofcore.weights_only.shrink_checkpoint`).

    ``precision`` as in :func:`factorize.spectra.decompose.decompose`; ``cache_dir`` a spectrum cache directory
    (or :class:`~factorize.spectra.cache.SpectrumCache`) to reuse decompositions across runs (and the work
    directory a rerun resumes from); ``cluster`` where the per-matrix tasks run
    (:func:`factorize.cluster.open_engine`); ``threads`` torch threads per task (pinned in every engine so the
    arithmetic is the same everywhere; None leaves torch's setting alone)."""

    precision: str | None = None
    force: bool = False
    cache_dir: Any = None
    metadata: Mapping[str, str] | None = None
    progress: bool = False
    cluster: Any = None
    threads: int | None = 1


@dataclass(frozen=True)
class BlockwiseOptions:
    """Run options of the block-by-block shrink (:func:`factorize.outofcore.blockwise.shrink_blockwise`).

    ``work_dir`` where the intermediate files go (a fresh folder inside it, removed at the end; default: beside
    the output); ``slices`` how many slices the calibration sequences are cut into (fixed, so results do not depend
    on how many workers run them); ``threads`` torch threads per task and for the client's decompositions
    (default: this process's count; the same count gives the same bytes); ``tokens_per_pass`` tokens run through
    a block at once inside a task; ``ridge`` / ``precision`` as for
    :func:`factorize.calibrated.aware.decompose_aware`; ``sequential`` refits each block to the outputs of the
    already compressed blocks upstream, as ``compress(..., sequential=True)`` does in memory (ranks from the first
    pass; see docs/scale.md)."""

    cluster: Any = None
    work_dir: str | os.PathLike | None = None
    slices: int = DEFAULT_SLICES
    threads: int | None = None
    tokens_per_pass: int = TOKENS_PER_PASS
    ridge: float | None = None
    precision: str | None = None
    force: bool = False
    metadata: Mapping[str, str] | None = None
    progress: bool = False
    sequential: bool = False


OptionsT = TypeVar("OptionsT", StreamOptions, BlockwiseOptions)


def split_keywords(kind: type[OptionsT], options: OptionsT | None,
                   keywords: Mapping[str, Any]) -> tuple[OptionsT, dict[str, Any]]:
    """(the options with the run keywords among ``keywords`` applied, the remaining (policy) keywords)."""
    if options is not None and not isinstance(options, kind):
        raise FactorizeError(f"options={type(options).__name__}: expected a {kind.__name__}",
                             fix=f"pass factorize.outofcore.options.{kind.__name__}(...), or its fields as keywords")
    names = {f.name for f in dataclasses.fields(kind)}
    run = {k: v for k, v in keywords.items() if k in names}
    rest = {k: v for k, v in keywords.items() if k not in names}
    return dataclasses.replace(options if options is not None else kind(), **run), rest


def check_blockwise(policy: Any, options: BlockwiseOptions) -> None:
    """The block-by-block shrink's refusals of a policy (a :class:`~factorize.plan.policy.Policy`) and options,
    before anything is read or written."""
    if policy.cost not in ("params", "bytes"):
        raise FactorizeError(f"cost={policy.cost!r} is not available block by block: the whole model never runs "
                             "here, so its time and multiply-accumulates are not measured",
                             fix="use cost='params' (the default) or cost='bytes'")
    if policy.cost == "bytes" and options.sequential:
        raise FactorizeError("sequential=True refits factors in their own precision; it cannot be combined with "
                             "stored precisions (a budget in bytes)", fix="drop sequential=True, or use cost='params'")
    slices, tokens_per_pass = options.slices, options.tokens_per_pass
    if not isinstance(slices, int) or isinstance(slices, bool) or slices < 1:
        raise FactorizeError(f"slices={slices!r}: expected a positive integer", fix="use e.g. slices=8")
    if not isinstance(tokens_per_pass, int) or tokens_per_pass < 1:
        raise FactorizeError(f"tokens_per_pass={tokens_per_pass!r}: expected a positive integer")
