"""Log reader speed: a 10-minute 200 Hz log (7 encoders, IMU, pose) read by
``vidodo.logs.read_log`` beside a plain ``pandas.read_csv`` of the same file, and the
four odometry sources rebuilt from it. Prints seconds and the ratio."""

import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from vidodo.logs import read_log
from vidodo.odometry import odometry_result
from vidodo.profiles import load_robot

ROOT = Path(__file__).resolve().parents[1]


def main():
    robot = load_robot(ROOT / "fixtures" / "robot_pods.toml")
    n = 200 * 600
    rng = np.random.default_rng(0)
    t = np.round(np.sort(np.arange(n) * 0.005 + rng.normal(0, 2e-4, n)), 6)
    cols = {"t": t}
    for c in ("fl", "fr", "rl", "rr", "pl", "pr", "ps"):
        cols[c] = np.cumsum(rng.integers(-5, 30, n)) % (2**32) - 2**31
    cols["gyro"] = np.cumsum(rng.normal(0, 0.01, n))
    cols["px"] = np.cumsum(rng.normal(0, 1, n))
    cols["py"] = np.cumsum(rng.normal(0, 1, n))
    cols["ph"] = np.cumsum(rng.normal(0, 0.5, n)) % 360 - 180
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "log.csv"
        pd.DataFrame(cols).to_csv(path, index=False)
        print(f"{n} rows, {path.stat().st_size / 1e6:.1f} MB")
        for _ in range(3):
            t0 = time.perf_counter()
            pd.read_csv(path)
            t1 = time.perf_counter()
            log = read_log(path, robot)
            t2 = time.perf_counter()
            res = odometry_result(log, robot)
            t3 = time.perf_counter()
            print(f"pandas.read_csv {t1 - t0:.3f} s | read_log {t2 - t1:.3f} s "
                  f"(x{(t2 - t1) / (t1 - t0):.1f}) | {len(res.tracks)} odometry sources "
                  f"{t3 - t2:.3f} s")


if __name__ == "__main__":
    main()
