"""Annotated replay speed against plain decoding and plain re-encoding of the same clip.

Renders (or reuses, cached under .cache/bench_replay) one run of the default scenario,
grades it, then times side by side on the same footage:

* decoding every frame (the floor of any per-frame work),
* decoding and re-encoding with the project's encoder (no drawing, no registration),
* the annotated replay (floor registration per frame, drawing, encoding),

and prints frames per second and the ratios.

    .venv/bin/python benchmarks/replay_speed.py [--seconds 6]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=6.0)
    a = ap.parse_args()

    import batch_ten  # the same cached rendering helper

    from vidodo.batch import grade_run_folder
    from vidodo.encode import write_video
    from vidodo.report.build import load_grade_dir
    from vidodo.video import VideoReader

    batch_ten.CACHE = ROOT / ".cache" / "bench_replay"
    run = batch_ten.render(7, a.seconds)
    with tempfile.TemporaryDirectory(prefix="vidodo-replay-") as tmp:
        grade = Path(tmp) / "grade"
        grade_run_folder(run, grade, replay=False)
        data = load_grade_dir(grade)

        t = time.perf_counter()
        times = []
        with VideoReader(run / "video.mp4") as reader:
            for _, t_s, _ in reader:
                times.append(t_s)
        decode_s = time.perf_counter() - t
        n = len(times)

        t = time.perf_counter()

        def frames():
            with VideoReader(run / "video.mp4") as reader:
                for _, _, f in reader:
                    yield f

        write_video(Path(tmp) / "plain.mp4", frames(), [x - times[0] for x in times])
        reencode_s = time.perf_counter() - t

        from vidodo.report.replay import replay_from_grade

        t = time.perf_counter()
        replay_from_grade(data, Path(tmp) / "replay.mp4")
        replay_s = time.perf_counter() - t

    print(f"{n} frames from {run.name}")
    for name, secs in (("decode only", decode_s), ("decode + encode", reencode_s),
                       ("annotated replay", replay_s)):
        print(f"{name:18s} {secs:7.2f} s  {n / secs:7.1f} frames/s  "
              f"{secs / decode_s:5.2f}x decode time")
    print(f"replay / (decode + encode): {replay_s / reencode_s:.2f}x")
    return 0


if __name__ == "__main__":
    sys.exit(main())
