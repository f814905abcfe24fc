"""Start-up time of the command line: ``factorize --help`` against a bare interpreter start, interleaved.

The parser imports no torch (factorize/cli/parser.py; tests/cli/test_parser.py checks that), so ``--help`` and
usage errors answer in about the time Python itself takes to start. Target: under 1 s.

    python benchmarks/bench_help.py [--repeats 9]
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import time


def _time(argv: list[str]) -> float:
    start = time.perf_counter()
    subprocess.run(argv, check=True, capture_output=True)
    return time.perf_counter() - start


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=9)
    args = parser.parse_args()
    cases = {"python -c pass": [sys.executable, "-c", "pass"],
             "factorize --help": [sys.executable, "-m", "factorize", "--help"],
             "factorize shrink --help": [sys.executable, "-m", "factorize", "shrink", "--help"]}
    times: dict[str, list[float]] = {k: [] for k in cases}
    for argv in cases.values():  # warm the file cache once
        _time(argv)
    for _ in range(args.repeats):  # interleaved, so a slow spell of the shared machine hits every case alike
        for name, argv in cases.items():
            times[name].append(_time(argv))
    print("| command | median (s) | min (s) | max (s) |\n| --- | ---: | ---: | ---: |")
    for name, t in times.items():
        print(f"| `{name}` | {statistics.median(t):.3f} | {min(t):.3f} | {max(t):.3f} |")


if __name__ == "__main__":
    main()
