"""Peak scratch of one block-by-block calibrated shrink: the bytes under its work directory, polled every 2 ms.

    python benchmarks/llama_checkpoint.py /tmp/small --scale small
    flock /work/bench.lock python benchmarks/bench_blockwise_scratch.py /tmp/small [SEQUENCES] [LENGTH]

One torch thread; random token ids (seed 0); budget 0.5. Prints the peak scratch, the wall time of the call and
the kept fraction. Run it on two checkouts (PYTHONPATH) to compare them, interleaved.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import sys
import tempfile
import threading
import time
from pathlib import Path

import torch

from factorize.outofcore.blockwise import shrink_blockwise


def _size(root: Path) -> int:
    total = 0
    for where, _, files in os.walk(root):
        for f in files:
            with contextlib.suppress(OSError):  # removed while walking
                total += os.path.getsize(os.path.join(where, f))
    return total


def main() -> None:
    torch.set_num_threads(1)
    ckpt = sys.argv[1]
    sequences = int(sys.argv[2]) if len(sys.argv) > 2 else 4
    length = int(sys.argv[3]) if len(sys.argv) > 3 else 64
    parent = Path(tempfile.mkdtemp(prefix="bench-scratch-"))
    work = parent / "work"
    work.mkdir()
    peak, stop = [0], threading.Event()

    def poll() -> None:
        while not stop.is_set():
            peak[0] = max(peak[0], _size(work))
            time.sleep(0.002)

    watcher = threading.Thread(target=poll, daemon=True)
    watcher.start()
    calibration = torch.randint(0, 8192, (sequences, length), generator=torch.Generator().manual_seed(0))
    started = time.perf_counter()
    try:
        done = shrink_blockwise(ckpt, parent / "out", budget=0.5, calibration=calibration, threads=1, work_dir=work)
    finally:
        stop.set()
        watcher.join()
    seconds = time.perf_counter() - started
    print(f"peak scratch {peak[0] / 2**20:.1f} MiB, {seconds:.1f} s, kept {done.kept_fraction:.3f}")
    shutil.rmtree(parent)


if __name__ == "__main__":
    main()
