"""The memory check behind calibration: statistics that would not fit are refused before they are allocated."""

from __future__ import annotations

import os

from factorize.errors import StatisticsMemoryError
from factorize.storage import human_bytes, proc_field

MEMORY_SHARE = 0.5  # statistics may take at most this share of the memory available when collection starts


def available_memory() -> int:
    """Bytes of memory available to this process now (MemAvailable on Linux; else the free physical pages)."""
    value = proc_field("/proc/meminfo", "MemAvailable")  # in kB
    if value is not None:
        return int(value) * 1024
    try:
        return os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (ValueError, OSError, AttributeError):
        return 2**63 - 1  # unknown: do not refuse


def check_memory(needs: dict[str, int], what: str, *, limit: int | None = None) -> None:
    """Refuse, before anything is allocated, statistics whose matrices would not fit in memory.

    ``needs``: bytes per layer. ``limit``: the bytes allowed (default: MEMORY_SHARE of the memory available now).
    The error names every layer that alone exceeds the limit, with its bytes, and the way out.
    """
    source = "the limit given" if limit is not None else "half of the memory available now"
    limit = int(MEMORY_SHARE * available_memory()) if limit is None else limit
    total = sum(needs.values())
    if total <= limit:
        return
    big = sorted(((b, n) for n, b in needs.items() if b > limit / 4), reverse=True) or \
        sorted(((b, n) for n, b in needs.items()), reverse=True)[:5]
    raise StatisticsMemoryError(
        f"the {what} of {len(needs)} layers would need {human_bytes(total)}, more than the {human_bytes(limit)} "
        f"allowed ({source})",
        [f"{name}: {human_bytes(b)}" for b, name in big],
        fix="leave the widest layers out of calibration (exclude=[...] / --exclude, or compress them without "
        "calibration in a second call), compress fewer layers per call (include=...), or free memory",
    )
