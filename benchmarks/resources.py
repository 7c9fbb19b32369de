"""Resources on hostile inputs (issue 14): peak memory reading a big log, time to refuse
absurd sizes.

1. Peak memory of ``vidodo.logs.read_log`` on a log of ``--mb`` megabytes (default 500:
   about 7 million rows of the default scenario's robot: time, 5 encoders, IMU, pose),
   as the
   peak resident set of a child process minus that of the same child that only imports
   vidodo and loads the profile. Target: under 2 x the file size.
   (Peak resident set from the child's own ``VmHWM``: ``ru_maxrss`` would carry over the
   parent's peak across fork and exec.)
2. Seconds from start to the refusal of a field profile with ``tiles_x = tiles_y =
   1000000``: the profile loader alone, and the whole ``vidodo grade`` command in a
   fresh process (interpreter start included), beside the interpreter start alone.
   Target: under 1 s.

Run: ``.venv/bin/python benchmarks/resources.py [--mb 500]``.
"""

from __future__ import annotations

import argparse
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
ROBOT = ROOT / "fixtures" / "robot_pods.toml"

_CHILD = """
import sys
from vidodo.profiles import load_robot
robot = load_robot(sys.argv[1])
if sys.argv[3] == "read":
    from vidodo.logs import read_log
    log = read_log(sys.argv[2], robot)
    n = len(log.frame)
else:
    import pandas, vidodo.logs
    n = 0
hwm = [ln for ln in open("/proc/self/status") if ln.startswith("VmHWM:")][0]
print(n, hwm.split()[1])
"""


def write_robot(path: Path) -> None:
    """The default scenario's robot profile (10 log columns), as ``vidodo render`` writes."""
    from vidodo.profiles import dump_toml, robot_to_dict
    from vidodo.synth.scenario import load_scenario

    path.write_text(dump_toml(robot_to_dict(load_scenario("default").written_robot)))


def write_log(path: Path, robot_path: Path, mb: float) -> int:
    """Write a log of about ``mb`` megabytes for that robot in chunks; return its rows.

    Values are as compact as a team's logger writes them (milliseconds, whole counts,
    three decimals), about 70 bytes a row: 500 MB is about 7 million rows.
    """
    import pandas as pd

    from vidodo.profiles import load_robot

    robot = load_robot(robot_path)
    rng = np.random.default_rng(0)
    chunk = 500_000
    rows = 0
    nw = len(robot.wheels)
    counts = np.zeros(nw, np.int64)
    heading = 0.0
    with open(path, "w") as fh:
        while fh.tell() < mb * 1e6:
            c = counts + np.cumsum(rng.integers(-2, 6, (chunk, nw)), axis=0)
            counts = c[-1]
            g = heading + np.cumsum(rng.normal(0, 0.05, chunk))
            heading = float(g[-1])
            df = pd.DataFrame({robot.time_column: (rows + np.arange(chunk)) * 10})
            for j, w in enumerate(robot.wheels):
                df[w.column] = c[:, j] % 2**31
            df[robot.imu.column] = np.round((g + 180) % 360 - 180, 3)
            pc = robot.pose
            df[pc.x_column] = np.round(rng.normal(0, 30, chunk), 3)
            df[pc.y_column] = np.round(rng.normal(0, 30, chunk), 3)
            df[pc.heading_column] = df[robot.imu.column]
            df.to_csv(fh, index=False, header=rows == 0)
            rows += chunk
    return rows


def child_peak_mb(log: Path, robot: Path, mode: str) -> tuple[int, float]:
    out = subprocess.run([sys.executable, "-c", _CHILD, str(robot), str(log), mode],
                         capture_output=True, text=True, check=True).stdout.split()
    return int(out[0]), int(out[1]) / 1024.0  # VmHWM (peak resident set) is in KiB


def memory(mb: float) -> None:
    with tempfile.TemporaryDirectory() as d:
        path, robot = Path(d) / "log.csv", Path(d) / "robot.toml"
        write_robot(robot)
        t0 = time.perf_counter()
        rows = write_log(path, robot, mb)
        size_mb = path.stat().st_size / 2**20
        print(f"log: {rows} rows, {size_mb:.0f} MiB (written in "
              f"{time.perf_counter() - t0:.0f} s)")
        _, base = child_peak_mb(path, robot, "import")
        t0 = time.perf_counter()
        n, peak = child_peak_mb(path, robot, "read")
        dt = time.perf_counter() - t0
        extra = peak - base
        print(f"read_log: {n} rows in {dt:.1f} s; peak RSS {peak:.0f} MiB, after imports "
              f"{base:.0f} MiB -> {extra:.0f} MiB for the log = {extra / size_mb:.2f} x the "
              "file size (target < 2)")


def refusal() -> None:
    from vidodo.errors import InputError
    from vidodo.profiles import load_field

    with tempfile.TemporaryDirectory() as d:
        field = Path(d) / "field.toml"
        field.write_text("[floor]\ntiles_x = 1000000\ntiles_y = 1000000\ntile_size_m = 0.6\n")
        t0 = time.perf_counter()
        try:
            load_field(field)
        except InputError as exc:
            msg = str(exc)
        dt_load = time.perf_counter() - t0
        (Path(d) / "log.csv").write_text("t,a\n0,0\n")
        cmd = [sys.executable, "-m", "vidodo.cli_main", "grade", str(ROOT / "cli.py"),
               str(Path(d) / "log.csv"), "--robot", str(ROBOT), "--field", str(field),
               "--out", str(Path(d) / "out")]
        t0 = time.perf_counter()
        p = subprocess.run(cmd, capture_output=True, text=True)
        dt_cmd = time.perf_counter() - t0
        t0 = time.perf_counter()
        subprocess.run([sys.executable, "-c", "import vidodo.cli_main"], check=True)
        dt_start = time.perf_counter() - t0
    print(f"tiles 1e6 x 1e6: load_field refuses in {dt_load * 1e3:.1f} ms ({msg[-70:]!r})")
    print(f"  vidodo grade exits {p.returncode} after {dt_cmd:.2f} s (interpreter start and "
          f"imports alone {dt_start:.2f} s; target < 1 s)")


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--mb", type=float, default=500.0, help="log size [MB]")
    args = ap.parse_args()
    refusal()
    memory(args.mb)
    print(f"(this process: {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} "
          "MiB peak)")


if __name__ == "__main__":
    main()
