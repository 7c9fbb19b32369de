"""The independent AprilTag 3 detector (C library through pupil-apriltags), crash-isolated.

The wrapper's ``Detector.__del__`` frees the tag family before the detector whose
destroy call still reads it, which corrupts the heap now and then (pupil-labs/apriltags
issues #34 and #46) and can abort the whole test session much later. So every call runs
in a short-lived child process: a crash there fails one check, never the session.

Corners come back as the library gives them: its pixel centres are at (0.5, 0.5)
(AprilRobotics/apriltag issue #121), OpenCV's at (0, 0).
"""

from __future__ import annotations

import json
import subprocess
import sys
import tempfile
from pathlib import Path

import cv2
import numpy as np
import pytest

_CHILD = r"""
import json, sys
import cv2
import pupil_apriltags
img = cv2.imread(sys.argv[1], cv2.IMREAD_GRAYSCALE)
det = pupil_apriltags.Detector(families=sys.argv[2], quad_decimate=1.0, refine_edges=True)
out = {str(t.tag_id): t.corners.tolist() for t in det.detect(img)}
sys.stdout.write(json.dumps(out))
sys.stdout.flush()
"""


def apriltag3_corners(img, family: str = "tag36h11") -> dict[int, np.ndarray]:
    """Corners found by the AprilTag 3 library, ``{tag_id: ndarray of shape (4, 2)}``.

    Parameters
    ----------
    img : ndarray
        BGR or grey image.
    family : str
        AprilTag family name as the library spells it.
    """
    pytest.importorskip("pupil_apriltags")
    gray = img if img.ndim == 2 else cv2.cvtColor(img, cv2.COLOR_BGR2GRAY)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "frame.png"
        cv2.imwrite(str(path), gray)
        proc = subprocess.run([sys.executable, "-c", _CHILD, str(path), family],
                              capture_output=True, text=True, timeout=120)
    if proc.returncode != 0:
        raise AssertionError(f"AprilTag 3 detector failed (exit {proc.returncode}): "
                             f"{proc.stderr.strip().splitlines()[-1:]}")
    return {int(k): np.asarray(v, float) for k, v in json.loads(proc.stdout).items()}
