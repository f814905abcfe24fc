"""torch's thread count, pinned for a block of work and restored afterwards: the one way factorize sets it.

torch's intra-op thread count is process-wide. Results of BLAS/LAPACK calls may depend on it, so every place that
needs a fixed count (a task on an engine, a small factorisation run serially, the terminal's ``--threads``) pins it
with :func:`torch_threads`. torch is imported only when a count is actually set, so torch-free modules (the
cluster layer) can use it.
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator


@contextlib.contextmanager
def torch_threads(count: int | None) -> Iterator[None]:
    """Run the block with torch's (process-wide) thread count set to ``count``, restored on exit; ``None`` or the
    current count changes nothing."""
    if count is None:
        yield
        return
    import torch

    before = torch.get_num_threads()
    if count == before:
        yield
        return
    torch.set_num_threads(count)
    try:
        yield
    finally:
        torch.set_num_threads(before)
