"""vidodo.tracking.apriltag3: the AprilTag 3 library as a detector, corner order and convention.

Reference: an OpenCV-generated tag (``cv2.aruco.generateImageMarker``) drawn at 4 px a
module with its black square's corners known exactly; OpenCV's own detector (no
refinement) lists them in OpenCV's order (TL, TR, BR, BL).
"""

import cv2
import numpy as np
import pytest

from vidodo.errors import InputError
from vidodo.profiles import Marker
from vidodo.tracking import apriltag3
from vidodo.tracking.detector import MarkerDetector

pytestmark = pytest.mark.skipif(not apriltag3.available(), reason="needs pupil-apriltags")


def _tag(family, tag_id, px=200, border=60):
    d = cv2.aruco.getPredefinedDictionary(getattr(cv2.aruco, family))
    img = cv2.aruco.generateImageMarker(d, tag_id, px)
    img = cv2.copyMakeBorder(img, border, border, border, border, cv2.BORDER_CONSTANT,
                             value=255)
    # the black square spans pixels border .. border + px - 1: its outer corners lie
    # half a pixel outside those pixel centres (OpenCV convention)
    lo, hi = border - 0.5, border + px - 0.5
    return img, np.array([[lo, lo], [hi, lo], [hi, hi], [lo, hi]])


@pytest.mark.parametrize("family", sorted(apriltag3.FAMILIES))
@pytest.mark.parametrize("turn", [0, 1, 2, 3])
def test_corners_in_opencv_order_and_convention(family, turn):
    img, corners = _tag(family, 3)
    img = np.ascontiguousarray(np.rot90(img, turn))
    cv_c, ids, _ = cv2.aruco.ArucoDetector(
        cv2.aruco.getPredefinedDictionary(getattr(cv2.aruco, family))).detectMarkers(img)
    tags = apriltag3.detect_tags(img, family)
    assert [t[0] for t in tags] == [3] and ids.ravel().tolist() == [3]
    ours = tags[0][1]
    # same order as OpenCV's detector (which sits on pixel edges without refinement)
    assert np.abs(ours - cv_c[0].reshape(4, 2)).max() < 1.0
    # and within 0.3 px of the exact corners (the upright case's are known)
    if turn == 0:
        assert np.abs(ours - corners).max() < 0.3


def test_marker_detector_by_option_and_fallback():
    tag = Marker(id=3, family="DICT_APRILTAG_36h11", size_m=0.1)
    img, corners = _tag(tag.family, 3)
    for detector in ("apriltag3", "auto", "opencv"):
        found = MarkerDetector((tag,), detector=detector).detect(img)
        assert len(found) == 1
        assert np.abs(found[0].corners_px - corners).max() < 0.3
    with pytest.raises(ValueError):
        apriltag3.detect_tags(img, "DICT_4X4_50")
    with pytest.raises(InputError, match="detector"):
        MarkerDetector((tag,), detector="other")
