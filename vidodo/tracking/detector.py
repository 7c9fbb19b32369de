"""Marker detection: the robot's fiducials found in a frame (or a window of it).

OpenCV's ``ArucoDetector`` with sub-pixel corner refinement (:data:`REFINE_METHODS`), the
AprilTag 3 library (:mod:`vidodo.tracking.apriltag3`) where OpenCV finds nothing, and one
side thread shared by every detector for the SUBPIX pass of the next frame.
"""

from __future__ import annotations

import math
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import cv2
import numpy as np

from ..errors import InputError
from . import apriltag3

__all__ = ["DEFAULT_REFINE", "DETECTORS", "PIXEL_LOCK_PX", "REFINE_BIAS_PX", "REFINE_METHODS",
           "ROTATION_EXCESS", "Detection", "MarkerDetector", "refine_bias_sigma_px"]

DEFAULT_REFINE = "apriltag"
"""Default corner refinement, chosen on real photos and renders together (DEVELOPERS.md,
"Truth track"; ``benchmarks/detector_table.py`` and ``track_accuracy.py --methods``)."""

DETECTORS = ("auto", "opencv", "apriltag3")
"""Marker detectors: OpenCV's ArUco module; the AprilTag 3 library (:mod:`vidodo.
apriltag3`, AprilTag families only); 'auto' = OpenCV, and the AprilTag 3 library where
OpenCV finds none of the robot's markers (when the library is installed)."""

REFINE_METHODS = {
    "none": cv2.aruco.CORNER_REFINE_NONE,
    "subpix": cv2.aruco.CORNER_REFINE_SUBPIX,
    "contour": cv2.aruco.CORNER_REFINE_CONTOUR,
    "apriltag": cv2.aruco.CORNER_REFINE_APRILTAG,
    "hybrid": cv2.aruco.CORNER_REFINE_APRILTAG,
}

REFINE_BIAS_PX = {"apriltag": 0.09}
"""Largest shift common to all four corners of a marker that a refinement method makes
[px per image axis], where it makes one. OpenCV's AprilTag refinement (after the -0.5 px
change of convention) puts the corners of a tag with sharp, unblurred edges about
0.09 px up and left of their true place, 0.06 px at 0.5 px of blur, none from about
1.5 px of blur up; 'hybrid', 'subpix' and the AprilTag 3 library show no such shift
(within 0.01 px). Measured on a tag drawn with exact pixel-area coverage, independent of
the project's renderer (``tests/test_corner_bias.py``). The tracker cannot see the
blur-dependent part (a common shift leaves no fit residual), so it is carried as
uncertainty, :func:`refine_bias_sigma_px`."""

ROTATION_EXCESS = 1.5
"""How much larger the rotation of a refined corner outline is than the rigid fit's
residuals imply (ratio of 1-sigmas) [-]. The refinement fits a line to each edge; what
biases it (the sub-pixel place of the edge, the tag's own black and white cells a cell
width inside the border, blur) moves the points along one edge together, so the
errors of the four corners are not independent and their share that turns the whole
outline is larger than independent corner noise of the residuals' size would give.
Measured on tags drawn with exact pixel-area coverage, independent of the project's
renderer, 3-8 px per cell, sharp to 1 px blur, random turn and foreshortening (OpenCV's
AprilTag refinement): 1.3 (1.5 at 5-8 px per cell, 1.7 with 1 px of blur, about 1 from
8 px per cell up, where the turn is below 0.03 degrees);
``tests/test_corner_bias.py`` guards it. A standing robot keeps its outline's error
for the whole stop, so the persistent part of the heading noise is carried this much
larger (:func:`vidodo.tracking.finish.finish_track`); measured for 'apriltag' (and
'hybrid', which keeps its shape), assumed for the other methods."""

PIXEL_LOCK_PX = {"apriltag": 0.2, "subpix": 0.06, "hybrid": 0.06}
"""RMS of the shift common to all four corners of a marker whose edges run exactly along
the pixel rows and columns, over the edges' sub-pixel phases [px per image axis]
(pixel locking, :mod:`vidodo.tracking.pixel_lock`). Measured on 55 px tags drawn with
exact pixel-area coverage, independent of the project's renderer
(``tests/test_corner_bias.py``): OpenCV's AprilTag refinement 0.19 px sharp or blurred
by 0.7 px, 0.11 px with the edges turned 0.5 deg, 0.01 px at 2 deg; SUBPIX (and
'hybrid', which takes SUBPIX's centre) 0.06 px. Methods not listed are not measured
and carry none."""

MIN_PERIMETER_RATE = 0.01
"""Smallest marker outline examined in a whole-frame search, as a fraction of the
image's larger side (OpenCV's default 0.03 misses a 10 cm tag across a 1080p field)."""


def refine_bias_sigma_px(refine: str) -> float:
    """1-sigma per image axis of the common corner shift of refinement ``refine`` [px]:
    the shift lies between 0 and :data:`REFINE_BIAS_PX` depending on the edges'
    blur, which the tracker does not know; the RMS of a uniform spread over that range
    is ``max / sqrt(3)``.

    >>> round(refine_bias_sigma_px("apriltag"), 3), refine_bias_sigma_px("hybrid")
    (0.052, 0.0)
    """
    return REFINE_BIAS_PX.get(refine, 0.0) / 3.0 ** 0.5


# --------------------------------------------------------------------- detection
@dataclass(frozen=True)
class Detection:
    """One robot marker found in one frame."""

    marker_index: int
    """Index into ``robot.markers``."""
    corners_px: np.ndarray
    """Corners in OpenCV order (TL, TR, BR, BL), ndarray of shape (4, 2) [px]."""


def _dictionary(family: str):
    code = getattr(cv2.aruco, family, None) if family.startswith("DICT_") else None
    if code is None:
        raise InputError(
            f"marker family {family!r} is not an OpenCV predefined dictionary; use a name "
            "like 'DICT_4X4_50' or 'DICT_APRILTAG_36h11' in the robot profile"
        )
    return cv2.aruco.getPredefinedDictionary(code)


class MarkerDetector:
    """Finds a robot's markers in frames, ignoring every other ID.

    Parameters
    ----------
    markers : sequence of profiles.Marker
        The robot's markers (any mix of families).
    refine : {'apriltag', 'hybrid', 'subpix', 'contour', 'none'}
        OpenCV corner refinement. ``useAruco3Detection`` is never enabled, because it
        silently skips refinement. The AprilTag refinement returns corners in the
        AprilTag convention (pixel centres at 0.5, AprilRobotics/apriltag issue 121);
        they are shifted by -0.5 px to OpenCV's convention. 'apriltag' is the default
        (:data:`DEFAULT_REFINE`): on real photos its tag centres lie 0.05 px from the
        AprilTag 3 library's (SUBPIX 0.37, CONTOUR 0.18, 'hybrid' 0.29 px;
        ``benchmarks/detector_table.py``), and on renders it is as accurate as any
        (``benchmarks/track_accuracy.py --methods``). 'hybrid' keeps the AprilTag-refined
        shape but places it at the centre of the SUBPIX-refined corners.
    detector : {'auto', 'opencv', 'apriltag3'}
        See :data:`DETECTORS`; the AprilTag 3 library's corners come refined by the
        library itself (``refine`` does not apply to them).
    """

    def __init__(self, markers, *, refine=DEFAULT_REFINE, detector="auto"):
        if not markers:
            raise InputError("the robot profile lists no [[marker]]; add the robot's marker")
        if refine not in REFINE_METHODS:
            raise InputError(f"refine = {refine!r}; use one of {sorted(REFINE_METHODS)}")
        if detector not in DETECTORS:
            raise InputError(f"detector = {detector!r}; use one of {list(DETECTORS)}")
        if detector == "apriltag3" and not apriltag3.available():
            raise InputError("detector 'apriltag3' needs the AprilTag 3 library: "
                             "pip install 'vidodo[apriltag3]'")
        self.markers = tuple(markers)
        self.refine = refine
        self.detector = detector
        self._at3 = set()
        """Families the AprilTag 3 library is asked for: always ('apriltag3') or where
        OpenCV finds none of the robot's markers ('auto', when installed)."""
        if detector != "opencv" and (detector == "apriltag3" or apriltag3.available()):
            self._at3 = {m.family for m in markers if apriltag3.supports(m.family)}
        self._lookup = {}
        self._detectors = {}
        self._coarse = {}
        self._subpix = {}
        self.cells = {}
        self._shift = -0.5 if refine in ("apriltag", "hybrid") else 0.0
        for i, m in enumerate(self.markers):
            key = (m.family, int(m.id))
            if key in self._lookup:
                raise InputError(
                    f"marker {m.family} id {m.id} is listed twice in the robot profile")
            self._lookup[key] = i
            if m.family not in self._detectors:
                d = _dictionary(m.family)
                params = cv2.aruco.DetectorParameters()
                params.cornerRefinementMethod = REFINE_METHODS[refine]
                params.useAruco3Detection = False
                params.minMarkerPerimeterRate = MIN_PERIMETER_RATE
                self._detectors[m.family] = cv2.aruco.ArucoDetector(d, params)
                sp = cv2.aruco.DetectorParameters()
                sp.cornerRefinementMethod = cv2.aruco.CORNER_REFINE_SUBPIX
                sp.minMarkerPerimeterRate = MIN_PERIMETER_RATE
                self._subpix[m.family] = cv2.aruco.ArucoDetector(d, sp)
                coarse = cv2.aruco.DetectorParameters()
                coarse.minMarkerPerimeterRate = MIN_PERIMETER_RATE
                self._coarse[m.family] = cv2.aruco.ArucoDetector(d, coarse)
                self.cells[m.family] = d.markerSize + 2 * params.markerBorderBits
        self.ids_seen: dict[tuple[str, int], int] = {}
        """Every (family, id) seen so far with its frame count, robot's or not."""
        self._sized: dict[tuple[str, str, int], object] = {}
        self._prefetched = None  # (frame, roi, least, futures, origin), see prefetch
        self.lut = None
        """Look-up table mapping the frames' pixels to the grey levels detected on
        (``VideoReader.raw_lut``), applied to each window only; None: frames as given."""

    def _sized_detector(self, kind, family, min_perimeter_px, image_px):
        """A copy of a detector that skips outlines shorter than ``min_perimeter_px``.

        OpenCV's contour candidates obey ``minMarkerPerimeterRate`` (a fraction of the
        image's larger side ``image_px``); its AprilTag quad candidates ignore that and
        obey ``aprilTagMinClusterPixels`` instead, edge pixels counted on both sides of
        the outline (about twice the perimeter). Bounds are rounded down (rates to 1/50,
        clusters to 8 px) so that a handful of cached detectors serve a whole run.
        """
        base = {"refined": self._detectors, "subpix": self._subpix,
                "coarse": self._coarse}[kind][family]
        quads = kind == "refined" and self.refine in ("apriltag", "hybrid")
        if quads:
            step = int(2.0 * min_perimeter_px // 8) * 8
        else:
            step = int(math.floor(min_perimeter_px / max(image_px, 1) * 50.0))
        if step <= 0:
            return base
        key = (kind, family, step)
        if key not in self._sized:
            params = base.getDetectorParameters()
            if quads:
                params.aprilTagMinClusterPixels = max(step, params.aprilTagMinClusterPixels)
            else:
                params.minMarkerPerimeterRate = max(step / 50.0, MIN_PERIMETER_RATE)
            self._sized[key] = cv2.aruco.ArucoDetector(base.getDictionary(), params)
        return self._sized[key]

    def _centre_from_subpix(self, subpix_result, marker_id, corners, offset=(0.0, 0.0)):
        """Keep the AprilTag-refined shape, move it to the SUBPIX-refined centre.

        ``subpix_result`` is the output of the SUBPIX detector's ``detectMarkers`` (run
        beside the AprilTag pass, see :meth:`detect`) on an image whose pixels sit
        ``offset`` from those of ``corners`` [px].
        """
        sub, ids, _ = subpix_result
        if ids is None:
            return corners
        for c, i in zip(sub, ids.ravel(), strict=True):
            if int(i) == marker_id:
                centre = c.reshape(4, 2).astype(np.float64).mean(axis=0) + offset
                if np.linalg.norm(centre - corners.mean(axis=0)) < 2.0:
                    return corners - corners.mean(axis=0) + centre
        return corners

    def _submit_subpix(self, frame, roi, least, k):
        """Start the SUBPIX pass of every family on the side thread."""
        img, origin = _window(frame, roi, k, self.lut)
        futures = {}
        for family in self._detectors:
            sub = self._sized_detector("subpix", family, least, max(img.shape[:2]))
            futures[family] = _side_pool().submit(sub.detectMarkers, img)
        return futures, origin

    def prefetch(self, frame, context_roi, min_side_px=None):
        """Start the SUBPIX pass of a coming :meth:`detect` call now (same ``frame``
        object, same ``context_roi`` and ``min_side_px``, no upscale), so that it runs
        while the caller finishes the previous frame. A mismatched call ignores it."""
        if self.refine != "hybrid" or context_roi is None:
            return
        least = 4.0 * float(min_side_px) if min_side_px else 0.0
        futures, origin = self._submit_subpix(frame, context_roi, least, 1)
        self._prefetched = (frame, context_roi, least, futures, origin)

    def _take_prefetch(self, frame, roi, least, k):
        pre, self._prefetched = self._prefetched, None
        if pre is not None and pre[0] is frame and pre[1] == roi and pre[2] == least \
                and k == 1:
            return pre[3], pre[4]
        return None, (0, 0)

    def cells_across(self, marker_index: int) -> int:
        """Cells across the black square of a marker (bits + 2 border cells)."""
        return self.cells[self.markers[marker_index].family]

    def detect(self, frame, roi=None, *, coarse=False, upscale=1, min_side_px=None,
               context_roi=None):
        """Detect the robot's markers in ``frame`` (optionally only inside ``roi``).

        Parameters
        ----------
        frame : ndarray
            BGR or grey image.
        roi : tuple of int, optional
            ``(u0, v0, u1, v1)`` window to search [px].
        coarse : bool
            Skip corner refinement (a fast whole-frame search to find a window).
        upscale : int
            Enlarge the window this many times (bicubic) before detecting, which finds
            markers whose cells are only 2-3 px wide.
        min_side_px : float, optional
            Smallest side a robot marker can have in this frame [px] (e.g. half the
            last detection's). Outlines shorter than that are not examined, which is
            most of the detector's work in a small window full of floor texture.
        context_roi : tuple of int, optional
            A wider window for the SUBPIX pass of 'hybrid' (its adaptive threshold
            places the outline a little differently when the window is cut close).

        Returns
        -------
        list of Detection
            At most one per robot marker (the largest if an ID appears twice).
        """
        k = max(int(upscale), 1)
        img, (u0, v0) = _window(frame, roi, k, self.lut)
        found: dict[int, np.ndarray] = {}
        shift = 0.0 if coarse else self._shift
        least = 4.0 * float(min_side_px) * k if min_side_px else 0.0
        kind = "coarse" if coarse else "refined"
        # The SUBPIX pass of 'hybrid' runs on a second thread beside the AprilTag pass
        # (OpenCV releases the interpreter lock while it detects).
        side_pass = {}
        offset = np.zeros(2)
        if self.refine == "hybrid" and not coarse:
            wide = context_roi if context_roi is not None else roi
            side_pass, origin = self._take_prefetch(frame, wide, least, k)
            if side_pass is None:
                side_pass, origin = self._submit_subpix(frame, wide, least, k)
            offset = (np.asarray(origin, float) - (u0, v0)) * k
        for family in self._detectors:
            own = None
            if self.detector != "apriltag3" or family not in self._at3:
                det = self._sized_detector(kind, family, least, max(img.shape[:2]))
                corners, ids, _rej = det.detectMarkers(img)
                own = self._keep(found, family, corners, ids, shift, (u0, v0), k,
                                 side_pass.get(family), offset)
            if family in self._at3 and not own:
                tags = apriltag3.detect_tags(img if img.ndim == 2 else
                                             cv2.cvtColor(img, cv2.COLOR_BGR2GRAY), family)
                # the same smallest outline as OpenCV's pass (perimeter [px])
                tags = [(i, c) for i, c in tags
                        if np.linalg.norm(np.roll(c, 1, axis=0) - c, axis=1).sum() >= least]
                self._keep(found, family, [c for _i, c in tags],
                           np.array([i for i, _c in tags]) if tags else None, 0.0,
                           (u0, v0), k, None, offset)
        return [Detection(i, found[i]) for i in sorted(found)]

    def _keep(self, found, family, corners, ids, shift, origin, k, side_pass, offset):
        """Record one family's detections in ``found`` (marker index -> corners in
        frame pixels), the largest where an ID repeats; returns how many were the
        robot's."""
        if ids is None:
            return 0
        own = 0
        for c, mid in zip(corners, np.ravel(ids), strict=True):
            key = (family, int(mid))
            self.ids_seen[key] = self.ids_seen.get(key, 0) + 1
            idx = self._lookup.get(key)
            if idx is None:
                continue
            own += 1
            c = np.reshape(c, (4, 2)).astype(np.float64) + shift
            if side_pass is not None:
                c = self._centre_from_subpix(side_pass.result(), int(mid), c, offset)
            # Pixel centres at integers at both scales: x = (x_k + 0.5) / k - 0.5.
            pts = (c + 0.5) / k - 0.5 + origin
            if idx in found and _area(found[idx]) >= _area(pts):
                continue
            found[idx] = pts
        return own


def _window(frame, roi, k, lut=None):
    """Grey crop of ``frame`` inside ``roi`` (whole frame if None), mapped by ``lut`` (if
    given), enlarged ``k`` times; returns it with the crop's origin (u0, v0) [px]."""
    u0 = v0 = 0
    img = frame
    if roi is not None:
        u0, v0, u1, v1 = roi
        img = frame[v0:v1, u0:u1]
    if lut is not None:
        img = cv2.LUT(img, lut)
    if img.ndim == 3:
        img = cv2.cvtColor(img, cv2.COLOR_BGR2GRAY)
    if k > 1:
        img = cv2.resize(img, None, fx=k, fy=k, interpolation=cv2.INTER_CUBIC)
    return img, (u0, v0)


_POOL: list = []


def _side_pool() -> ThreadPoolExecutor:
    """One worker thread shared by every detector of the process (made on first use)."""
    if not _POOL:
        _POOL.append(ThreadPoolExecutor(max_workers=1, thread_name_prefix="vidodo-subpix"))
    return _POOL[0]


def _area(pts):
    a, b = pts[2] - pts[0], pts[3] - pts[1]
    return 0.5 * abs(float(a[0] * b[1] - a[1] * b[0]))

