"""Batch grading of 10 rendered runs, one with a corrupt video (issue 8 acceptance).

Renders (or reuses, cached under .cache/bench_batch) N short runs of the default
scenario with different seeds, destroys the header of one run's video, then runs
``vidodo batch`` over them with 1 worker and with 2 workers, side by side, and prints
the wall time of each, their ratio, the exit codes and the table's statuses.

    .venv/bin/python benchmarks/batch_ten.py [--runs 10] [--seconds 3] [--jobs 2]
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import time
from pathlib import Path

import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
CACHE = ROOT / ".cache" / "bench_batch"


def render(seed: int, seconds: float) -> Path:
    from vidodo.synth.scenario import load_scenario
    from vidodo.synth.simulate import run_cache_key, simulate_run

    sc = load_scenario("default", **{"video.max_duration_s": seconds})
    key = run_cache_key(sc, seed)
    folder = CACHE / f"seed{seed}-{key}"
    if not (folder / ".complete").exists():
        shutil.rmtree(folder, ignore_errors=True)
        simulate_run(sc, seed, folder)
        (folder / ".complete").write_text(key)
    return folder


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=10)
    ap.add_argument("--seconds", type=float, default=3.0, help="length of each run [s]")
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--keep", type=Path, default=None, help="copy the outputs here")
    a = ap.parse_args()

    from vidodo.cli_main import main as vidodo

    t0 = time.perf_counter()
    sources = [render(100 + i, a.seconds) for i in range(a.runs)]
    print(f"rendered/reused {a.runs} runs of {a.seconds:.1f} s in "
          f"{time.perf_counter() - t0:.1f} s")
    with tempfile.TemporaryDirectory(prefix="vidodo-batch-") as tmp:
        season = Path(tmp) / "season"
        for i, src in enumerate(sources):
            shutil.copytree(src, season / f"2026-01-{i + 1:02d}",
                            ignore=shutil.ignore_patterns(".complete"))
        bad = season / "2026-01-04" / "video.mp4"
        data = bad.read_bytes()
        bad.write_bytes(b"\0" * 64 + data[64:2000])  # header gone, stream cut short
        results = {}
        for jobs in (1, a.jobs):
            out = Path(tmp) / f"out-{jobs}"
            t = time.perf_counter()
            code = vidodo(["batch", str(season), "--out", str(out), "--jobs", str(jobs),
                           "--quiet", "--no-report"])
            results[jobs] = (time.perf_counter() - t, code, pd.read_csv(out / "batch.csv"))
        for jobs, (secs, code, table) in results.items():
            counts = table["status"].value_counts().to_dict()
            print(f"--jobs {jobs}: {secs:6.1f} s  exit {code}  statuses {counts}")
        s1, s2 = results[1][0], results[a.jobs][0]
        print(f"speed-up with {a.jobs} workers: {s1 / s2:.2f}x (wall time ratio)")
        table = results[a.jobs][2]
        for _, row in table[table["status"] != "graded"].iterrows():
            print(f"failed: {row['run']}: {row['error']}")
        cols = [c for c in table.columns if c.endswith("_final_err_m")]
        print(table[["run", "status", *cols]].to_string(index=False))
        if a.keep is not None:
            shutil.copytree(Path(tmp) / f"out-{a.jobs}", a.keep, dirs_exist_ok=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
