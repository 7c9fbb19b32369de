"""Whole ``vidodo grade`` (tracking, grading, plots, HTML report, replay) against plain
OpenCV decoding of the same clip, side by side, as whole processes.

For each clip and ``--repeat`` times, alternating: (a) a process decoding every frame
with ``cv2.VideoCapture.read`` and (b) ``vidodo grade`` with the report and the replay
(process start included). Printed: both wall times (best of the repeats and the spread),
the ratio (target <= 4 for a tripod 1080p clip), the ``timings_s`` table of the grade's
``summary.json`` and the grade's peak resident memory (target < 500 MB for a 3-minute
clip: ``--long`` also grades the clip looped to about 3 minutes with ffmpeg).
``--track-only`` times ``vidodo track`` instead (target <= 1.5 tripod, <= 3 hand-held).
Each command's CPU seconds (user + system, all threads) are printed beside its wall
time, and the load average before and after: the machine may be shared, and the
ratios (pairs run back to back) are fairer than the absolute times.

``--seconds S`` renders the scenario driven round in laps to S seconds of video
(``_runs.looped``) instead of its own short path: the clip lengths issue 17 names are
60 s (tripod 1080p60 grade), 44 s (``--scenario default``, tripod 720p) and 33 s
(``--handheld-1080p``). The 9 s ``fullhd60`` clip is mostly fixed costs (process start,
imports, the first registration from scratch, smoothing).

Usage: ``.venv/bin/python benchmarks/grade_speed.py [--scenario fullhd60] [--seconds 60]
[--repeat 3] [--long] [--track-only] [--replay-scale 1] [--handheld-1080p]``
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _runs import looped, rendered  # noqa: E402

DECODE = r"""
import sys, cv2
cap = cv2.VideoCapture(sys.argv[1]); n = 0
while cap.read()[0]:
    n += 1
print(n)
"""

HANDHELD_1080P = {"video.width_px": 1920, "video.height_px": 1080}


# Each measured command runs under its own small parent process, whose RUSAGE_CHILDREN
# peak is that command's alone (this process's counter keeps the largest child so far,
# e.g. the renderer's, and cannot see a later, smaller peak).
_PEAK_WRAPPER = (
    "import resource, subprocess, sys; r = subprocess.run(sys.argv[1:]); "
    "u = resource.getrusage(resource.RUSAGE_CHILDREN); "
    "print(u.ru_utime + u.ru_stime, u.ru_maxrss, file=sys.stderr); "
    "sys.exit(r.returncode)"
)


def _child(cmd) -> tuple[float, float, float]:
    """Wall time [s], CPU time [s] and peak resident memory [MB] of one child process."""
    t0 = time.perf_counter()
    done = subprocess.run([sys.executable, "-c", _PEAK_WRAPPER, *map(str, cmd)],
                          capture_output=True, text=True)
    wall = time.perf_counter() - t0
    lines = done.stderr.strip().splitlines()
    if done.returncode not in (0, 4):
        print(f"  (exit {done.returncode}: {lines[-2:-1]})")
    cpu, peak = lines[-1].split()
    return wall, float(cpu), float(peak) / 1024


def _load() -> str:
    return "/".join(f"{v:.1f}" for v in os.getloadavg())


def _grade_cmd(run, video, out, args):
    exe = [sys.executable, "-m", "vidodo.cli_main"]
    common = ["--robot", str(run / "robot.toml"), "--field", str(run / "field.toml"),
              "--camera", str(run / "camera.toml"), "--quiet"]
    if args.track_only:
        return [*exe, "track", str(video), *common, "-o", str(out / "track.csv")]
    extra = [] if args.replay_scale is None else ["--replay-scale", str(args.replay_scale)]
    return [*exe, "grade", str(video), str(run / "log.csv"), *common, "-o", str(out),
            *extra]


def measure(run, video, args, label):
    dec, grd, mem, cpu = [], [], [], []
    timings = None
    load0 = _load()
    with tempfile.TemporaryDirectory(prefix="vidodo-grade-speed-") as tmp:
        for k in range(args.repeat):
            wall, dcpu, _ = _child([sys.executable, "-c", DECODE, str(video)])
            dec.append(wall)
            out = Path(tmp) / f"g{k}"
            out.mkdir()
            wall, gcpu, peak = _child(_grade_cmd(run, video, out, args))
            grd.append(wall)
            mem.append(peak)
            cpu.append((dcpu, gcpu))
            s = out / "summary.json"
            if s.is_file():
                timings = json.loads(s.read_text())["timings_s"]
    ratios = [g / d for g, d in zip(grd, dec, strict=True)]
    what = "track" if args.track_only else "grade"
    print(f"{label}: decode {min(dec):.1f} s [{min(dec):.1f}-{max(dec):.1f}], {what} "
          f"{min(grd):.1f} s [{min(grd):.1f}-{max(grd):.1f}]; ratio per pair "
          f"{', '.join(f'{r:.2f}' for r in ratios)} (min {min(ratios):.2f}, median "
          f"{sorted(ratios)[len(ratios) // 2]:.2f}); peak memory {max(mem):.0f} MB")
    print("  CPU s (decode, " + what + ") per pair: "
          + ", ".join(f"{d:.1f}/{g:.1f} ({g / d:.1f}x)" for d, g in cpu)
          + f"; load average {load0} before, {_load()} after")
    if timings:
        print("  timings_s: " + ", ".join(f"{k} {v:.2f}" for k, v in timings.items()
                                         if v is not None))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scenario", default="fullhd60")
    ap.add_argument("--handheld-1080p", action="store_true",
                    help="the mecanum-handheld scenario at 1920x1080")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--long", action="store_true")
    ap.add_argument("--track-only", action="store_true")
    ap.add_argument("--replay-scale", type=float, default=None)
    ap.add_argument("--seconds", type=float, default=None,
                    help="drive the scenario round in laps to this many seconds of video")
    args = ap.parse_args(argv)
    name, over = ("mecanum-handheld", HANDHELD_1080P) if args.handheld_1080p else (
        args.scenario, {})
    run = rendered(name, **over) if args.seconds is None else looped(name, args.seconds, **over)
    video = run / "video.mp4"
    measure(run, video, args, f"{run.name} ({video.stat().st_size / 1e6:.0f} MB)")
    if args.long:
        long_video = run / "long.mp4"
        if not long_video.exists():
            subprocess.run(["ffmpeg", "-loglevel", "error", "-y", "-stream_loop", "20",
                            "-i", str(video), "-t", "180", "-c", "copy", str(long_video)],
                           check=True)
        args.repeat = 1
        measure(run, long_video, args, "3-minute loop")


if __name__ == "__main__":
    main()
