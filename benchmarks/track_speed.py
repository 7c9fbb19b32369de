"""Tracking speed against plain OpenCV decoding of the same 1080p clip, side by side.

Prints the wall time of (a) decoding every frame with ``cv2.VideoCapture.read`` and
(b) the whole ``track_video`` (decoding in a background thread, registration,
detection, smoothing), their ratio (issue 17's target: <= 1.5 on a tripod clip), and
the peak resident memory of a separate tracking process (target < 500 MB for a 3-minute
clip; ``--long`` loops the clip with ffmpeg to about 3 minutes first). ``--seconds S``
drives the scenario round in laps to S seconds of video (``_runs.looped``): the 9 s
``fullhd60`` clip is mostly fixed costs. ``grade_speed.py --track-only`` times the same
as whole processes (process start included), with CPU seconds and the load average.

Usage: ``.venv/bin/python benchmarks/track_speed.py [--seconds 60] [--long] [--repeat 2]``
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time
from pathlib import Path

import cv2

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _runs import looped, rendered  # noqa: E402

CHILD = r"""
import json, sys, time
from vidodo.profiles import load_camera, load_field, load_robot
from vidodo.registration.registrar import FloorRegistrar
from vidodo.tracking.tracker import track_video
run, video = sys.argv[1], sys.argv[2]
robot = load_robot(run + "/robot.toml"); field = load_field(run + "/field.toml")
camera = load_camera(run + "/camera.toml")
registrar = FloorRegistrar(field, camera)
spent = []
plain_register = registrar.register
def timed_register(*a, **k):
    t = time.perf_counter()
    try:
        return plain_register(*a, **k)
    finally:
        spent.append(time.perf_counter() - t)
registrar.register = timed_register
t0 = time.perf_counter()
res = track_video(video, robot, field, camera, registrar=registrar)
wall = time.perf_counter() - t0
hwm = [ln for ln in open("/proc/self/status") if ln.startswith("VmHWM")][0]
print(json.dumps({"wall_s": wall, "frames": len(res.track), "reg_s": sum(spent),
                  "reg_first_s": spent[0] if spent else 0.0, "reg_calls": len(spent),
                  "detected": float(res.track.detected.mean()),
                  "peak_mb": int(hwm.split()[1]) / 1024}))
"""


def decode_only(video) -> tuple[float, int]:
    t0 = time.perf_counter()
    cap = cv2.VideoCapture(str(video))
    n = 0
    while True:
        ok, _frame = cap.read()
        if not ok:
            break
        n += 1
    cap.release()
    return time.perf_counter() - t0, n


def track_child(run, video) -> dict:
    out = subprocess.run([sys.executable, "-c", CHILD, str(run), str(video)], check=True,
                         capture_output=True, text=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scenario", default="fullhd60")
    ap.add_argument("--repeat", type=int, default=2, help="alternate decode/track this often")
    ap.add_argument("--long", action="store_true", help="also a ~3-minute looped clip")
    ap.add_argument("--seconds", type=float, default=None,
                    help="drive the scenario round in laps to this many seconds of video")
    args = ap.parse_args(argv)
    run = rendered(args.scenario) if args.seconds is None else looped(args.scenario,
                                                                       args.seconds)
    video = run / "video.mp4"
    cap = cv2.VideoCapture(str(video))
    size = (int(cap.get(cv2.CAP_PROP_FRAME_WIDTH)), int(cap.get(cv2.CAP_PROP_FRAME_HEIGHT)))
    cap.release()
    print(f"clip: {video} ({size[0]}x{size[1]}), cv2 threads {cv2.getNumThreads()}")
    dec, trk = [], []
    for _ in range(args.repeat):
        d, n = decode_only(video)
        dec.append(d)
        r = track_child(run, video)
        trk.append(r)
    d = min(dec)
    t = min(r["wall_s"] for r in trk)
    print(f"decode only: {d:.2f} s for {n} frames ({1000 * d / n:.1f} ms/frame)")
    print(f"tracking:    {t:.2f} s ({1000 * t / n:.1f} ms/frame), marker found in "
          f"{100 * trk[0]['detected']:.1f}% of frames")
    print(f"ratio tracking / decoding: {t / d:.2f} (target <= 1.5)")
    best = min(trk, key=lambda r: r["wall_s"])
    print(f"  of which floor registration {best['reg_s']:.2f} s in {best['reg_calls']} calls "
          f"(first, from scratch: {best['reg_first_s']:.2f} s); without the one-off first "
          f"registration the ratio is {(t - best['reg_first_s']) / d:.2f}")
    print(f"peak memory of the tracking process: {max(r['peak_mb'] for r in trk):.0f} MB")
    if args.long:
        long_video = run / "long.mp4"
        if not long_video.exists():
            loops = max(int(180.0 / max(n / 60.0, 1.0)), 1)
            subprocess.run(["ffmpeg", "-loglevel", "error", "-y", "-stream_loop", str(loops),
                            "-i", str(video), "-c", "copy", str(long_video)], check=True)
        d, n = decode_only(long_video)
        r = track_child(run, long_video)
        print(f"long clip: {n} frames; decode {d:.1f} s, tracking {r['wall_s']:.1f} s "
              f"(ratio {r['wall_s'] / d:.2f}; registration {r['reg_s']:.1f} s, first "
              f"{r['reg_first_s']:.1f} s); peak memory {r['peak_mb']:.0f} MB "
              "(target < 500 MB)")
    print(f"(this process peak: {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f}"
          " MB)")


if __name__ == "__main__":
    main()
