"""Pre-flight check on a 1080p clip: how long it takes, beside plain decoding of the clip.

Renders the default scenario at 1920x1080 (cached), then times side by side in one run:
`vidodo.preflight.preflight` with the video (first 3 s read), without and with the lens
profile, and decoding every frame of the same clip with OpenCV (what any analysis has
to pay at least). On a shared machine read the ratios: absolute seconds follow the load. Target: the
pre-flight check under 10 s and well under the plain decode of the whole clip.

Usage: ``.venv/bin/python benchmarks/preflight_speed.py [--repeat 2]``
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

import cv2

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _runs import rendered  # noqa: E402

from vidodo.preflight import preflight  # noqa: E402


def decode_all(path: Path) -> int:
    cap = cv2.VideoCapture(str(path))
    n = 0
    while cap.grab():
        cap.retrieve()
        n += 1
    cap.release()
    return n


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=2)
    args = ap.parse_args(argv)
    run = rendered("default", 0, **{"video.width_px": 1920, "video.height_px": 1080})
    best_pf = best_lens = best_dec = float("inf")
    for _ in range(args.repeat):
        t0 = time.perf_counter()
        res = preflight(run / "robot.toml", run / "field.toml", run / "log.csv",
                        run / "video.mp4")
        best_pf = min(best_pf, time.perf_counter() - t0)
        t0 = time.perf_counter()
        res_lens = preflight(run / "robot.toml", run / "field.toml", run / "log.csv",
                             run / "video.mp4", run / "camera.toml")
        best_lens = min(best_lens, time.perf_counter() - t0)
        t0 = time.perf_counter()
        n = decode_all(run / "video.mp4")
        best_dec = min(best_dec, time.perf_counter() - t0)
    print(f"1920x1080 clip, {n} frames; load average {os.getloadavg()[0]:.1f} on "
          f"{os.cpu_count()} cores")
    for label, t, r in (("preflight without a lens profile", best_pf, res),
                        ("preflight with the lens profile", best_lens, res_lens)):
        print(f"{label}: {t:.2f} s, ratio to plain decoding {t / best_dec:.2f} (status "
              f"{r.status}; " + ", ".join(f"{c.name} {c.status}" for c in r.checks) + ")")
    print(f"plain decoding of every frame: {best_dec:.2f} s")
    ok = best_pf < 10.0 and res.status == "pass" and res_lens.status == "pass"
    print("target (< 10 s, correct run passes): " + ("met" if ok else "NOT met"))
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
