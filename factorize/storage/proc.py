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
