"""Floor fiducials: the field profile's markers found in a frame (``cv2.aruco``)."""

from __future__ import annotations

import cv2
import numpy as np

from ..errors import InputError
from ..profiles import FieldProfile

__all__ = ["detect_floor_markers"]


def _detector_for(family):
    if not hasattr(cv2.aruco, family):
        raise InputError(f"floor marker family {family!r} is not a cv2.aruco dictionary "
                         "name; use e.g. DICT_4X4_50 or DICT_APRILTAG_36h11")
    params = cv2.aruco.DetectorParameters()
    params.cornerRefinementMethod = cv2.aruco.CORNER_REFINE_SUBPIX
    return cv2.aruco.ArucoDetector(cv2.aruco.getPredefinedDictionary(
        getattr(cv2.aruco, family)), params)


def detect_floor_markers(grey, field_profile: FieldProfile, *, detectors=None, ignore=None):
    """Find the field profile's floor fiducials in a frame.

    Returns
    -------
    (ndarray (N, 2), ndarray (N, 2), list of int)
        Corner pixels [px], their floor positions [m], and the marker ids seen.
    """
    detectors = detectors if detectors is not None else {}
    px, fl, seen = [], [], []
    by_family = {}
    for m in field_profile.floor_markers:
        by_family.setdefault(m.family, {})[m.id] = m
    for family, markers in by_family.items():
        det = detectors.get(family)
        if det is None:
            det = detectors[family] = _detector_for(family)
        corners, ids, _rej = det.detectMarkers(grey)
        if ids is None:
            continue
        for c, i in zip(corners, ids.ravel(), strict=True):
            m = markers.get(int(i))
            if m is None:
                continue
            c = c.reshape(4, 2).astype(float)
            if ignore is not None:
                ui = np.clip(c[:, 0].round().astype(int), 0, grey.shape[1] - 1)
                vi = np.clip(c[:, 1].round().astype(int), 0, grey.shape[0] - 1)
                if np.asarray(ignore, bool)[vi, ui].any():
                    continue
            px.append(c)
            fl.append(m.corners_floor_m())
            seen.append(int(i))
    if not px:
        return np.zeros((0, 2)), np.zeros((0, 2)), []
    return np.vstack(px), np.vstack(fl), seen


