"""The AprilTag 3 C library as a second marker detector (optional extra ``apriltag3``).

OpenCV's ArUco module needs about 3 px per marker cell to find a tag; the AprilTag 3
library (Krogius et al., IROS 2019), reached through the ``pupil-apriltags`` wrapper,
still finds tags of 36h11 at about 1.6 px per cell (real photos, ``benchmarks/
detector_table.py``). Far-side detection decides how large a field one phone covers,
so :class:`vidodo.tracking.detector.MarkerDetector` calls this library where OpenCV finds nothing
(``detector='auto'``, the default, when the library is installed) or always
(``detector='apriltag3'``). Only AprilTag families are covered: OpenCV's
``DICT_APRILTAG_16h5``, ``25h9`` and ``36h11`` are the library's ``tag16h5``,
``tag25h9`` and ``tag36h11`` with the same codes and ids.

It is an optional extra (``pip install 'vidodo[apriltag3]'``), not a core dependency:
it helps only robots that carry AprilTag markers, and the wrapper's destructor frees
the tag family before the detector that still reads it (pupil-labs/apriltags issues
#34 and #46), which can corrupt the heap. Detectors made here are therefore kept for
the life of the process and never destroyed (one per family, a few kilobytes).

Corners are returned in OpenCV's order (TL, TR, BR, BL as printed) and pixel
convention (pixel centres at integers; the library puts them at 0.5, AprilRobotics/
apriltag issue #121).
"""

from __future__ import annotations

import threading

import numpy as np

__all__ = ["FAMILIES", "available", "supports", "detect_tags"]

FAMILIES = {
    "DICT_APRILTAG_16h5": "tag16h5",
    "DICT_APRILTAG_25h9": "tag25h9",
    "DICT_APRILTAG_36h11": "tag36h11",
}
"""OpenCV dictionary name -> the library's family name."""

# The library lists the printed tag's corners as TR, TL, BL, BR (checked on OpenCV
# generated tags in tests/test_apriltag3.py); OpenCV's order is TL, TR, BR, BL.
_TO_OPENCV_ORDER = [1, 0, 3, 2]

_KEPT: dict[str, object] = {}
_LOCK = threading.RLock()


def available() -> bool:
    """True when the ``pupil-apriltags`` wrapper can be imported."""
    try:
        import pupil_apriltags  # noqa: F401
    except ImportError:
        return False
    return True


def supports(family: str) -> bool:
    """True when ``family`` (an OpenCV dictionary name) is an AprilTag 3 family."""
    return family in FAMILIES


def _detector(family: str):
    with _LOCK:
        if family not in _KEPT:
            import pupil_apriltags

            class _Kept(pupil_apriltags.Detector):
                """Never destroyed: see the module notes."""

                def __del__(self):
                    pass

            # quad_decimate 1: full resolution, needed for the small tags this is for;
            # refine_edges snaps the quad's sides to the strongest gradient.
            _KEPT[family] = _Kept(families=FAMILIES[family], nthreads=1,
                                  quad_decimate=1.0, refine_edges=1)
        return _KEPT[family]


def detect_tags(grey, family: str) -> list[tuple[int, np.ndarray]]:
    """Detect tags of one family in a grey image.

    Parameters
    ----------
    grey : ndarray of uint8, shape (H, W)
        The image (or a window of it).
    family : str
        OpenCV dictionary name, one of :data:`FAMILIES`.

    Returns
    -------
    list of (int, ndarray of shape (4, 2))
        ``(id, corners_px)`` per tag, corners in OpenCV's order and convention [px].

    Raises
    ------
    ImportError
        The library is not installed (see :func:`available`).
    ValueError
        ``family`` is not an AprilTag 3 family.
    """
    if family not in FAMILIES:
        raise ValueError(f"{family} is not an AprilTag 3 family; use one of {sorted(FAMILIES)}")
    img = np.ascontiguousarray(grey, dtype=np.uint8)
    with _LOCK:  # one C detector object per family: not re-entrant
        tags = _detector(family).detect(img)
    return [(int(t.tag_id), np.asarray(t.corners, float)[_TO_OPENCV_ORDER] - 0.5)
            for t in tags]
