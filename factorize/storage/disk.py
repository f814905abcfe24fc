"""Free disk space, checked before anything large is written, and byte counts written for people."""

from __future__ import annotations

import os
import shutil

from factorize.errors import FactorizeError

DISK_MARGIN_BYTES = 16 * 2**20  # keep this much free beyond the bytes we write


def check_free_space(directory: str | os.PathLike, nbytes: int, what: str) -> None:
    """Fail before writing when ``directory``'s filesystem has less than ``nbytes`` (+ a margin) free."""
    free = shutil.disk_usage(directory).free
    if free < nbytes + DISK_MARGIN_BYTES:
        raise FactorizeError(
            f"not enough free disk space in {directory} for {what}: needs {human_bytes(nbytes)}, "
            f"{human_bytes(free)} free",
            fix="free some space or write the output to another disk",
        )


def human_bytes(n: float) -> str:
    """A byte count for people: 1.5 GB."""
    for unit in ("B", "KB", "MB", "GB", "TB"):
        if abs(n) < 1024 or unit == "TB":
            return f"{n:.1f} {unit}" if unit != "B" else f"{int(n)} B"
        n /= 1024
    return f"{n} B"
