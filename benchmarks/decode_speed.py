"""Decoding speed: PyAV (bundled FFmpeg, luma plane handed over, frame threads) against
OpenCV, side by side on the same clips (720p and 1080p, H.264 and HEVC).

For each clip, in one process and alternating, ``--repeat`` times:

* ``opencv bgr``: ``cv2.VideoCapture.read`` (colour frames, what a plain reader does),
* ``opencv luma``: OpenCV handing out the raw luma plane (``CAP_PROP_CONVERT_RGB`` 0,
  what ``vidodo.video.VideoReader(grey=True)`` uses for tracking),
* ``pyav luma``: PyAV decoding with frame threads, the Y plane as a numpy view,
* ``pyav bgr``: PyAV with frame threads, converted to BGR by its own swscale,
* ``opencv luma 1t`` and ``pyav luma 1t``: the luma plane from a decoder limited to one
  thread, as the tracker decodes (its decoding thread runs beside the frame loop on a
  2-core machine, ``tracking.tracker``).

Printed per way: wall seconds (best of the repeats and the spread), the ratio to
``opencv bgr``, and CPU seconds of this process (all threads; steadier than wall time
when the machine is shared); the load average before and after each clip.
PyAV is an optional package here (``pip install av``); without it only OpenCV is timed.
The clips are cut from the benchmark's 60 s rendered 1080p60 run (``_runs.looped``) with
the system ffmpeg (first ``--seconds`` s, scaled to 720p and re-encoded to HEVC for the
other cases).

Usage: ``.venv/bin/python benchmarks/decode_speed.py [--seconds 20] [--repeat 3]``
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import time
from pathlib import Path

import cv2
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _runs import CACHE, looped  # noqa: E402


def clips(seconds: float) -> dict[str, Path]:
    """The four test clips, made once and cached beside the rendered run."""
    src = looped("fullhd60", 60.0) / "video.mp4"
    out = {}
    for height in (720, 1080):
        for codec, lib in (("h264", "libx264"), ("hevc", "libx265")):
            p = CACHE / f"decode-{height}p-{codec}-{seconds:g}s.mp4"
            if not p.exists():
                subprocess.run(["ffmpeg", "-v", "error", "-y", "-i", str(src), "-t",
                                f"{seconds}", "-vf", f"scale=-2:{height}", "-c:v", lib,
                                "-preset", "fast", "-pix_fmt", "yuv420p", "-an",
                                *(["-x265-params", "log-level=error"] if codec == "hevc"
                                  else []), str(p)], check=True)
            out[f"{height}p {codec}"] = p
    return out


def opencv(path: Path, raw: bool, threads: int | None = None) -> int:
    params = [cv2.CAP_PROP_CONVERT_RGB, 0] if raw else []
    if threads:
        params += [cv2.CAP_PROP_N_THREADS, threads]
    cv2.utils.logging.setLogLevel(cv2.utils.logging.LOG_LEVEL_ERROR)  # raw-frame notice
    cap = cv2.VideoCapture(str(path), cv2.CAP_FFMPEG, params)
    n = 0
    while True:
        ok, frame = cap.read()
        if not ok:
            break
        _ = cap.get(cv2.CAP_PROP_POS_MSEC)
        n += 1
    cap.release()
    return n


def pyav(path: Path, luma: bool, threads: int | None = None) -> int:
    import av

    n = 0
    with av.open(str(path)) as container:
        stream = container.streams.video[0]
        if threads:
            stream.thread_count = threads
        stream.thread_type = "AUTO"
        for frame in container.decode(stream):
            if luma:
                plane = frame.planes[0]
                img = np.frombuffer(plane, np.uint8).reshape(-1, plane.line_size)
                img = img[:frame.height, :frame.width]
            else:
                img = frame.to_ndarray(format="bgr24")
            _ = frame.time
            n += int(img.size > 0)
    return n


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=20.0)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args(argv)
    try:
        import av  # noqa: F401
        have_av = True
    except ImportError:
        have_av = False
        print("PyAV not installed: OpenCV only")
    ways = {"opencv bgr": lambda p: opencv(p, False), "opencv luma": lambda p: opencv(p, True),
            "opencv luma 1t": lambda p: opencv(p, True, 1)}
    if have_av:
        ways.update({"pyav luma": lambda p: pyav(p, True), "pyav bgr": lambda p: pyav(p, False),
                     "pyav luma 1t": lambda p: pyav(p, True, 1)})
    print(f"cv2 threads {cv2.getNumThreads()}; best of {args.repeat} [spread], ways "
          "alternated within each repeat")
    for name, path in clips(args.seconds).items():
        times = {w: [] for w in ways}
        cpu = {w: [] for w in ways}
        counts = {}
        load0 = os.getloadavg()[0]
        for _ in range(args.repeat):
            for w, fn in ways.items():
                t0, c0 = time.perf_counter(), time.process_time()
                counts[w] = fn(path)
                times[w].append(time.perf_counter() - t0)
                cpu[w].append(time.process_time() - c0)
        base = min(times["opencv bgr"])
        print(f"{name}: {counts['opencv bgr']} frames; load average {load0:.1f} -> "
              f"{os.getloadavg()[0]:.1f}")
        for w, ts in times.items():
            print(f"  {w:14s} {min(ts):6.2f} s [{min(ts):.2f}-{max(ts):.2f}]  "
                  f"{min(ts) / base:5.2f}x opencv bgr  CPU {min(cpu[w]):6.2f} s  "
                  f"({counts[w]} frames)")


if __name__ == "__main__":
    main()
