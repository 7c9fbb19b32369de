"""How long ``python -c "import vidodo"`` takes, beside a bare interpreter start.

The package exposes its entry points lazily (``vidodo/__init__.py``), so importing it
should cost next to nothing beyond starting Python; the target is under 0.5 s in all.
Both commands run alternately, seven times each, and the medians are printed with
Python's own ``-X importtime`` figure for the package.

Usage: ``.venv/bin/python benchmarks/import_time.py``
"""

from __future__ import annotations

import statistics
import subprocess
import sys
import time


def _seconds(code: str) -> float:
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-c", code], check=True)
    return time.perf_counter() - t0


def main() -> None:
    bare, pkg = [], []
    for _ in range(7):
        bare.append(_seconds("pass"))
        pkg.append(_seconds("import vidodo"))
    out = subprocess.run([sys.executable, "-X", "importtime", "-c", "import vidodo"],
                         capture_output=True, text=True, check=True).stderr
    own = [line for line in out.splitlines() if line.rstrip().endswith("| vidodo")]
    own_us = int(own[-1].split("|")[1]) if own else -1
    print(f"python -c pass:          median {statistics.median(bare) * 1e3:6.0f} ms")
    print(f"python -c 'import vidodo': median {statistics.median(pkg) * 1e3:6.0f} ms "
          f"[target: under 500 ms]")
    print(f"vidodo's own import (cumulative, -X importtime): {own_us / 1e3:.1f} ms")


if __name__ == "__main__":
    main()
