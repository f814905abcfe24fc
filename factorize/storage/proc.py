"""What this process can learn about itself from Linux's /proc: single fields, and its peak resident memory.

Every reader degrades gracefully where /proc is missing (other systems): None, False, or the portable fallback.
"""

from __future__ import annotations

import resource


def proc_field(path: str, key: str) -> str | None:
    """The first value of ``key:`` in a Linux /proc file (e.g. ``/proc/meminfo``), or None where there is none."""
    try:
        with open(path, encoding="ascii") as f:
            for line in f:
                if line.startswith(key + ":"):
                    return line.split()[1]
    except OSError:
        pass
    return None


def reset_peak_rss() -> bool:
    """Reset this process's peak resident size (Linux: writing 5 to /proc/self/clear_refs); False where not."""
    try:
        with open("/proc/self/clear_refs", "w", encoding="ascii") as f:
            f.write("5")
        return True
    except OSError:
        return False


def peak_rss() -> int:
    """Peak resident bytes of this process (VmHWM; else ru_maxrss, which Linux gives in KiB)."""
    value = proc_field("/proc/self/status", "VmHWM")
    if value is not None:
        return int(value) * 1024
    return int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss) * 1024


M_TRIM_THRESHOLD = -1  # glibc mallopt parameters (malloc.h)
M_MMAP_THRESHOLD = -3
HEAP_MMAP_THRESHOLD = 1 << 20  # blocks of 1 MiB and more are mapped, and returned to the system when freed


def return_freed_memory() -> bool:
    """Make this process return freed large blocks to the system (glibc only; True when set).

    glibc raises its mmap threshold dynamically as large blocks come and go, after which freed blocks of tens of
    MB stay in the heap: resident, unused, and counted in the peak. A fixed threshold of 1 MiB (what
    ``MALLOC_MMAP_THRESHOLD_=1048576`` sets from the environment; glibc's mallopt(3)) maps every large block
    and unmaps it when freed, and a fixed trim threshold gives the top of the heap back too. Measured on
    block-by-block shrinks (BENCHMARKS.md): 1712 -> 1327 MiB at 1.1B, and flat in depth at 258M. The setting
    is process-wide and cannot be read back, so the out-of-core shrinks set it once when they start; it changes
    speed little (large blocks are mapped either way once the threshold has grown). Elsewhere (musl, macOS) it
    does nothing and returns False.
    """
    import ctypes
    import ctypes.util

    name = ctypes.util.find_library("c")
    try:
        libc = ctypes.CDLL(name or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False
    mallopt.argtypes, mallopt.restype = (ctypes.c_int, ctypes.c_int), ctypes.c_int
    return bool(mallopt(M_MMAP_THRESHOLD, HEAP_MMAP_THRESHOLD)) and bool(mallopt(M_TRIM_THRESHOLD,
                                                                                 2 * HEAP_MMAP_THRESHOLD))
