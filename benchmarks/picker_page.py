"""Corner picker page: size and time to make it for a 1080p frame, and how close its
snap targets are to the true tile corners.

Renders (or reuses, cached under .cache/bench) a short run of the default scenario at
1920 x 1080, then measures side by side on its first frame:

* reading the frame and encoding it as the page's JPEG (the floor of any page),
* the whole page (``vidodo.picker.write_picker``: frames, corner candidates, fiducials),

and prints the page size (issue 16 target: under 3 MB, made in under 3 s), the time
ratio, and the distance from each interior tile corner (OpenCV's projection with the
renderer's true camera, truth/meta.json) to the nearest candidate.

    .venv/bin/python benchmarks/picker_page.py [--width 1920 --height 1080]
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))


def _cpu_s() -> float:
    """CPU time of this process and its finished children (ffprobe) [s]."""
    t = os.times()
    return t.user + t.system + t.children_user + t.children_system


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--width", type=int, default=1920)
    ap.add_argument("--height", type=int, default=1080)
    a = ap.parse_args()

    import cv2
    import numpy as np
    from _runs import rendered

    from vidodo.corner_candidates import corner_candidates
    from vidodo.picker import write_picker
    from vidodo.profiles import load_camera, load_field
    from vidodo.video import VideoReader

    run = rendered("default", 0, **{"video.width_px": a.width, "video.height_px": a.height,
                                    "video.max_duration_s": 1.0})
    field = load_field(run / "field.toml")
    with tempfile.TemporaryDirectory(prefix="vidodo-pick-") as tmp:
        t, c = time.perf_counter(), _cpu_s()
        with VideoReader(run / "video.mp4", threaded=False) as reader:
            _, _, frame = next(iter(reader))
        cv2.imencode(".jpg", frame, [cv2.IMWRITE_JPEG_QUALITY, 90])
        floor_s, floor_cpu = time.perf_counter() - t, _cpu_s() - c
        t, c = time.perf_counter(), _cpu_s()
        page = write_picker(run / "video.mp4", field, Path(tmp) / "pick.html")
        page_s, page_cpu = time.perf_counter() - t, _cpu_s() - c
        size_mb = page.stat().st_size / 1e6
    print(f"frame {frame.shape[1]}x{frame.shape[0]} from {run.name}")
    # CPU time too (with the ffprobe children): on a shared machine the wall clock says
    # more about the neighbours
    print(f"read + JPEG      {floor_s:6.2f} s wall, {floor_cpu:6.2f} s CPU")
    print(f"picker page      {page_s:6.2f} s wall, {page_cpu:6.2f} s CPU "
          f"({page_s / floor_s:.1f}x read + JPEG), {size_mb:.2f} MB")

    camera = load_camera(run / "camera.toml")
    meta = json.loads((run / "truth" / "meta.json").read_text())
    s = field.tile_size_m
    ij = [(i, j) for i in range(1, field.tiles_x) for j in range(1, field.tiles_y)]
    floor = np.array([[i * s, j * s, 0.0] for i, j in ij])
    true_px = cv2.projectPoints(floor, np.array(meta["camera"]["rvec"]),
                                np.array(meta["camera"]["tvec"]), camera.matrix,
                                camera.dist_coeffs)[0].reshape(-1, 2)
    # the page's own candidates: from the video's luma plane, as the page makes them
    with VideoReader(run / "video.mp4", threaded=False, grey=True) as reader:
        _, _, grey = next(iter(reader))
    if grey.ndim == 3:
        grey = cv2.cvtColor(grey, cv2.COLOR_BGR2GRAY)
    cand = corner_candidates(grey)
    d = np.min(np.linalg.norm(cand[None] - true_px[:, None], axis=2), axis=1)
    found = d < 1.5
    print(f"interior tile corners with a candidate within 1.5 px: {found.sum()} of {len(ij)}")
    if found.any():
        e = d[found]
        print(f"  distance to the true corner: median {np.median(e):.3f} px, 90 % "
              f"{np.percentile(e, 90):.3f} px, worst {e.max():.3f} px, within 0.3 px: "
              f"{(e <= 0.3).sum()}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
