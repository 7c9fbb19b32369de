"""Time of the smoother's break search on a long run with many stops.

A synthetic 3-minute series at 30 fps (5400 samples, three signals: x, y in metres with
1 mm noise, heading in radians with 0.2 deg noise), each driving off and stopping every
4.5 s (40 times) (stalls at 15 m/s^2 and hits at 150 m/s^2, invented demo values). Smoothed with
the windowed trial evaluation (:func:`vidodo.tracking.smooth._trial_gain`: each trial
break filtered from the baseline's state only until it rejoins the baseline) and, side
by side in the same process, with every trial filtered over the whole run (the
definition of the likelihood gain, and the search before the windows). Prints both
times, their ratio, whether the breaks placed are identical and the largest difference
between the smoothed values in units of their 1-sigma. Times are CPU seconds of this
process (the machine is shared).

Usage: ``nice -n 10 .venv/bin/python benchmarks/break_search_speed.py [--seconds 180]``
"""

from __future__ import annotations

import argparse
import time
from unittest import mock

import numpy as np

from vidodo.tracking import smooth


def stop_series(seconds, rng, fps=30.0, period_s=4.5):
    """Times (M,), values (M, 3) and their 1-sigma (M, 3) of three signals that start
    and stop every ``period_s`` each (demo data)."""
    t = np.arange(0.0, seconds, 1.0 / fps)
    fine = np.arange(0.0, seconds, 1.0 / (20 * fps))
    stops = int(seconds // period_s)
    period = period_s
    cols, sig = [], []
    for unit_sigma, v_max in ((1e-3, 1.5), (1e-3, 1.5), (np.radians(0.2), 3.0)):
        v = np.zeros(fine.size)
        for n in range(stops):
            t0 = n * period + rng.uniform(0.0, 0.2 * period)
            t_hit = t0 + rng.uniform(0.5, 0.7) * period
            top = rng.uniform(0.2, 1.0) * v_max * rng.choice([-1.0, 1.0])
            decel = rng.choice([15.0, 150.0]) * v_max / 1.5
            run = (fine >= t0) & (fine < t_hit)
            v[run] = top * np.minimum((fine[run] - t0) / 0.5, 1.0)
            v_hit = top * min((t_hit - t0) / 0.5, 1.0)
            tail = (fine >= t_hit) & (fine < (n + 1) * period)
            v[tail] = np.sign(v_hit) * np.maximum(abs(v_hit) - decel * (fine[tail] - t_hit),
                                                  0.0)
        x = np.interp(t, fine, np.cumsum(v) / (20 * fps))
        cols.append(x + rng.normal(0.0, unit_sigma, t.size))
        sig.append(np.full(t.size, unit_sigma))
    return t, np.column_stack(cols), np.column_stack(sig)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=180.0)
    args = ap.parse_args(argv)
    t, z, s = stop_series(args.seconds, np.random.default_rng(0))
    results, times = {}, {}
    for name, gain in (("windowed", smooth._trial_gain),
                       ("whole run", smooth._trial_gain_whole_run)):
        with mock.patch.object(smooth, "_trial_gain", gain):
            t0 = time.process_time()
            results[name] = smooth.rts_smooth_signals(t, z, s, t)
            times[name] = time.process_time() - t0
    same = all(a.breaks_s == b.breaks_s for a, b in zip(results["windowed"],
                                                        results["whole run"], strict=True))
    dev = max(float(np.max(np.abs(a.value - b.value) / a.sigma_value))
              for a, b in zip(results["windowed"], results["whole run"], strict=True))
    n_breaks = [len(r.breaks_s) for r in results["windowed"]]
    print(f"{t.size} samples, breaks per signal {n_breaks}")
    print(f"smoothing (CPU time): windowed {times['windowed']:.2f} s, whole run "
          f"{times['whole run']:.2f} s, ratio {times['whole run'] / times['windowed']:.1f}x")
    print(f"breaks identical: {same}; largest value difference {dev:.2e} sigma")


if __name__ == "__main__":
    main()
