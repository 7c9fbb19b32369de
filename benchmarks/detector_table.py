"""Detection rate and corner error against pixels per marker cell, per detector.

Two sources of tags (AprilTag 36h11, 8 cells across the black square):

* **renders**: a tag from ``cv2.aruco.generateImageMarker`` warped onto a grey
  background through a random homography (rotation, up to 35 deg tilt), 4x supersampled
  for anti-aliased edges, a 0.6 px Gaussian blur (optics), noise of 2 grey levels and
  JPEG quality 90; the true corners are known exactly. The error is the mean distance
  of the four corners from the truth [px].
* **real photos**: the three photos of ``../shared/realdata/apriltag-photos/`` (47 tags
  on cubes, 1.6-5.6 px per cell) with the AprilTag 3 library's reference corners
  (``refine_edges = false``); the error is the distance of the tag centre (mean of the
  corners) from the reference centre [px] (the reference is another detector, not the
  truth: its corners sit where that library's quad fit puts them).

Each tag is searched in a window around it (the tracker's window: 0.2 x side + 8 px),
with the other tags of the photo greyed out (all carry id 0). Detectors: OpenCV's ArUco
module with each corner refinement, the AprilTag 3 library, and 'auto' (OpenCV with
the default refinement, the library where OpenCV finds nothing).

Usage: ``.venv/bin/python benchmarks/detector_table.py [--renders 40]``
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import cv2
import numpy as np

from vidodo.profiles import Marker
from vidodo.tracking import apriltag3
from vidodo.tracking.detector import DEFAULT_REFINE, MarkerDetector

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from test_realphotos import real_tags  # noqa: E402  (the tests' real-photo loader)

PHOTOS = Path(__file__).resolve().parents[2] / "shared" / "realdata" / "apriltag-photos"
FAMILY = "DICT_APRILTAG_36h11"
CELLS = 8
BINS = [(1.4, 2.0), (2.0, 2.5), (2.5, 3.0), (3.0, 4.0), (4.0, 6.0), (6.0, 12.0)]
DETECTORS = [(f"opencv {r}", r, "opencv") for r in ("apriltag", "hybrid", "subpix", "contour")]
DETECTORS += [("apriltag3 library", DEFAULT_REFINE, "apriltag3"),
              (f"auto ({DEFAULT_REFINE} + library)", DEFAULT_REFINE, "auto")]


def _side(c):
    a, b = c[2] - c[0], c[3] - c[1]
    return float(np.sqrt(0.5 * abs(a[0] * b[1] - a[1] * b[0])))


def _roi(c, shape):
    pad = 0.2 * _side(c) + 8.0
    lo = np.floor(c.min(0) - pad).astype(int)
    hi = np.ceil(c.max(0) + pad).astype(int)
    return (max(lo[0], 0), max(lo[1], 0), min(hi[0], shape[1]), min(hi[1], shape[0]))


def render_tag(rng, side_px):
    """A tag of about ``side_px``: (grey image, true corners in OpenCV order and
    convention, id)."""
    d = cv2.aruco.getPredefinedDictionary(getattr(cv2.aruco, FAMILY))
    tag_id = int(rng.integers(0, 500))
    src = cv2.aruco.generateImageMarker(d, tag_id, 80)
    src = cv2.copyMakeBorder(src, 20, 20, 20, 20, cv2.BORDER_CONSTANT, value=255)
    s = 4  # supersampling
    w = h = int(side_px * 3 + 60)
    centre = rng.uniform(0.45, 0.55, 2) * w
    ang = rng.uniform(-np.pi, np.pi)
    tilt = np.radians(rng.uniform(0, 35))
    sq = np.array([[-1, -1], [1, -1], [1, 1], [-1, 1]], float) * side_px / 2
    sq[:, 1] *= np.cos(tilt)  # foreshortening of a tilted tag
    sq[:, 0] *= 1 + 0.15 * np.sin(tilt) * np.sign(sq[:, 1])  # a little perspective
    rot = np.array([[np.cos(ang), -np.sin(ang)], [np.sin(ang), np.cos(ang)]])
    corners = sq @ rot.T + centre  # true black-square corners (pixel centres at integers)
    black = np.array([[20, 20], [100, 20], [100, 100], [20, 100]], float) - 0.5
    big = (corners + 0.5) * s - 0.5
    hmat = cv2.getPerspectiveTransform(black.astype(np.float32), big.astype(np.float32))
    img = cv2.warpPerspective(src, hmat, (w * s, h * s), flags=cv2.INTER_LINEAR,
                              borderMode=cv2.BORDER_CONSTANT, borderValue=255)
    bg = np.full_like(img, 110)
    mask = cv2.warpPerspective(np.full_like(src, 255), hmat, (w * s, h * s)) > 127
    img = np.where(mask, img, bg)
    img = cv2.resize(img, (w, h), interpolation=cv2.INTER_AREA).astype(float)
    img = cv2.GaussianBlur(img, (0, 0), 0.6) + rng.normal(0, 2.0, img.shape)
    img = np.clip(np.rint(img), 0, 255).astype(np.uint8)
    ok, enc = cv2.imencode(".jpg", img, [cv2.IMWRITE_JPEG_QUALITY, 90])
    return cv2.imdecode(enc, cv2.IMREAD_GRAYSCALE), corners, tag_id


def measure(cases, centre_only):
    """Per detector and bin: found / total and mean error [px]."""
    rows = {}
    for label, refine, det_name in DETECTORS:
        if det_name != "opencv" and not apriltag3.available():
            continue
        stats = {b: [0, 0, []] for b in BINS}
        for img, truth, tag_id in cases:
            det = MarkerDetector((Marker(id=tag_id, family=FAMILY, size_m=0.1),),
                                 refine=refine, detector=det_name)
            cell = _side(truth) / CELLS
            b = next((b for b in BINS if b[0] <= cell < b[1]), None)
            if b is None:
                continue
            found = det.detect(img, _roi(truth, img.shape))
            stats[b][1] += 1
            if found:
                c = found[0].corners_px
                if centre_only:
                    err = np.linalg.norm(c.mean(0) - truth.mean(0))
                else:  # corners matched by proximity (robust to a rotated corner order)
                    err = np.linalg.norm(c[:, None] - truth[None], axis=2).min(1).mean()
                if err < 3.0:
                    stats[b][0] += 1
                    stats[b][2].append(err)
        rows[label] = stats
    return rows


def table(title, rows):
    print(f"\n== {title}")
    head = "detector".ljust(28) + "".join(f"{lo:.1f}-{hi:.1f} px/cell".rjust(22)
                                         for lo, hi in BINS)
    print(head)
    for label, stats in rows.items():
        cells = []
        for b in BINS:
            found, total, errs = stats[b]
            if total == 0:
                cells.append("-".rjust(22))
                continue
            e = f"{np.mean(errs):.3f}" if errs else "  -  "
            cells.append(f"{found:3d}/{total:<3d} {e} px".rjust(22))
        print(label.ljust(28) + "".join(cells))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--renders", type=int, default=40, help="rendered tags per bin")
    args = ap.parse_args(argv)
    rng = np.random.default_rng(0)
    cases = []
    for lo, hi in BINS:
        for _ in range(args.renders):
            cases.append(render_tag(rng, rng.uniform(lo, hi) * CELLS))
    table("renders: found / tags, mean corner error vs truth [px]",
          measure(cases, centre_only=False))
    if PHOTOS.is_dir():
        real = [(img, ref, 0) for img, ref in real_tags()]
        table(f"real photos ({len(real)} tags): found / tags, mean centre error vs the "
              "AprilTag 3 reference [px]", measure(real, centre_only=True))
    else:
        print(f"\n(real photos not found at {PHOTOS})")


if __name__ == "__main__":
    main()
