"""Start-up time: `benchctl --help` against `python -c "import pyvisa"`, as a ratio.

Each command is started fresh N times; the best of each is compared (the machine is
shared and noisy, the minimum is the least disturbed measurement).

    python benchmarks/startup.py [--repeat 10]
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import time


def best_of(cmd: list[str], repeat: int) -> float:
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        subprocess.run(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=True)
        best = min(best, time.perf_counter() - t0)
    return best


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeat", type=int, default=10)
    args = ap.parse_args()
    pyvisa_s = best_of([sys.executable, "-c", "import pyvisa"], args.repeat)
    help_s = best_of([sys.executable, "-m", "benchctl.cli", "--help"], args.repeat)
    print(f"python -c 'import pyvisa': {pyvisa_s * 1e3:.0f} ms")
    print(f"benchctl --help          : {help_s * 1e3:.0f} ms")
    print(f"ratio = {help_s / pyvisa_s:.2f}  (target <= 1.2)")


if __name__ == "__main__":
    main()
