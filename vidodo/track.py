"""Robot tracking: the fiducial(s) on the robot become a time-stamped floor pose track.

Per frame: detect the robot's markers with OpenCV's ``ArucoDetector`` in a window
around where they are predicted (falling back to the whole frame), refine the corners
to sub-pixel accuracy, map them to the floor through the frame's registration on the
plane at each marker's height (``FrameRegistration.image_to_floor(..., height_m)``),
and fit the robot's planar pose to all visible corners at once (a rigid least-squares
fit, Umeyama, IEEE TPAMI 13(4):376, 1991, without scale). Each detection is timed at
its frame's presentation time plus the rolling-shutter delay of the rows it sits in.

After the video: the corner noise is estimated from the fit residuals of the whole
run, and a Rauch-Tung-Striebel smoother (:mod:`vidodo.smooth`) turns the detections
into position, velocity and acceleration at every frame time, with a 1-sigma that
adds the registration error. Short gaps are bridged and flagged, long gaps left NaN.
The rolling-shutter readout time is also estimated from the shear it leaves in the
markers of moving frames (:func:`estimate_readout`); it is used when the camera
profile gives none, and a disagreement with the profile is reported.

Only a few frames are held at once (see :class:`vidodo.video.VideoReader`).
"""

from __future__ import annotations

import math
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field, replace

import cv2
import numpy as np
import pandas as pd

from . import apriltag3
from .errors import InputError, TrackingError
from .profiles import marker_corners_local
from .smooth import rts_smooth_signals
from .timings import StageTimes
from .video import VideoReader, VideoTruncatedError, readout_fraction

__all__ = [
    "TRACK_COLUMNS",
    "TrackResult",
    "MarkerDetector",
    "PoseFix",
    "fit_pose",
    "RegistrationPolicy",
    "track_frames",
    "track_video",
    "save_track_csv",
    "load_track_csv",
    "REFINE_METHODS",
    "estimate_readout",
    "CornerNoise",
    "estimate_corner_noise",
]

TRACK_COLUMNS = [
    "t_s", "x_m", "y_m", "heading_rad", "sigma_xy_m", "sigma_heading_rad", "vx_mps",
    "vy_mps", "speed_mps", "omega_radps", "ax_mps2", "ay_mps2", "detected", "interpolated",
]
REGISTRATION_COLUMNS = ["t_s", "ok", "rms_px", "rms_floor_m", "fresh"]

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

MIN_PERIMETER_RATE = 0.01
"""Smallest marker outline examined in a whole-frame search, as a fraction of the
image's larger side (OpenCV's default 0.03 misses a 10 cm tag across a 1080p field)."""

WINDOW_SIDE_FRAC = 0.2
WINDOW_PAD_PX = 8.0
"""Search window around the predicted marker: this share of its side plus this many
pixels on every side (plus 1.5 x the last frame-to-frame step): two cells of quiet
zone and threshold context for a 10-cell tag. The AprilTag quad search costs about
three times less than with 0.3 x side + 12 px at 1080p (floor texture makes quads)."""

CONTEXT_SIDE_FRAC = 0.3
CONTEXT_PAD_PX = 12.0
"""The wider window of the SUBPIX pass (on its own thread): its adaptive threshold
wants context around the outline."""

SHRINK_PER_FRAME = 0.5
"""In a window search, outlines shorter than this share of the last detection's side are
not examined: a marker does not halve its apparent size between nearby frames."""

LOCAL_NOISE_HALF_WINDOW = 15
"""Fits on each side pooled for the local corner noise: with one marker (5 degrees of
freedom a fit) 31 fits give 155, a 1-sigma of about 6% on the local noise estimate."""

MIN_LOCAL_PAIRS = 5
"""Pairs of consecutive fits a window needs for its own lag-1 correlation; with fewer,
the run's is used."""

MIN_NOISE_PAIRS = 20
"""Pairs of consecutive detections needed before the split of the corner noise into a
frame-to-frame persistent and a fresh part is trusted; with fewer, all of it is taken as
persistent (the cautious side: the smoother cannot average it away)."""

REGISTRATION_PARAMS = 8
"""Parameters a floor registration fits: camera pose (6) plus up to two lens terms."""

MIN_CELL_PX = 3.0
"""Marker cell width (square root of the marker's image area / cells across) below
which detection becomes unreliable [px] (common practice; with motion blur, markers of
24 px or less were mostly missed in our measurements, domain notes section 1)."""


# ----------------------------------------------------------------------- results
@dataclass(frozen=True)
class TrackResult:
    """The truth track of one video and how far to trust it."""

    track: pd.DataFrame
    """One row per video frame, columns :data:`TRACK_COLUMNS` (SI units, floor frame;
    ``sigma_xy_m`` is the RMS of the position error magnitude: the smoother's
    uncertainty from the fresh part of the corner noise, plus the persistent part (both
    estimated from the rigid fits' residuals, over the run by
    :func:`estimate_corner_noise` and around each frame by :func:`local_corner_noise`,
    and scaled per signal by the smoother's innovation likelihood), an optional common
    shift of all corners (``corner_bias_px`` per axis) and the registration's
    prediction error, carried to the floor at the marker's image scale;
    ``sigma_heading_rad`` likewise from the fresh and persistent corner noise)."""
    quality: dict
    """Frames, detection fraction, marker cell size [px], gaps, dropped/duplicated
    frames, registration statistics, readout time [s], corner noise [px]."""
    warnings: list = field(default_factory=list)
    """Plain-language warnings about anything that makes the track less certain."""
    registrations: pd.DataFrame | None = None
    """Per frame: t_s, ok, rms_px, rms_floor_m of the registration in effect, and
    ``fresh`` (registered on this very frame)."""
    timings_s: dict = field(default_factory=dict)
    """Seconds per stage (``decode``, ``register``, ``detect``, ``smooth``; see
    :mod:`vidodo.timings`)."""


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
        img, origin = _window(frame, roi, k)
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
        img, (u0, v0) = _window(frame, roi, k)
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


def _window(frame, roi, k):
    """Grey crop of ``frame`` inside ``roi`` (whole frame if None), enlarged ``k`` times;
    returns it with the crop's origin (u0, v0) [px]."""
    u0 = v0 = 0
    img = frame
    if roi is not None:
        u0, v0, u1, v1 = roi
        img = frame[v0:v1, u0:u1]
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


# ------------------------------------------------------------------- pose fitting
@dataclass(frozen=True)
class PoseFix:
    """The robot pose fitted to one frame's marker corners."""

    x_m: float
    y_m: float
    heading_rad: float
    cov_unit: np.ndarray
    """Covariance of (x, y, heading) for 1 px corner noise, shape (3, 3) [m, rad]."""
    chi2_unit: float
    """Sum of squared residuals whitened for 1 px corner noise [px^2]."""
    dof: int
    """Residual degrees of freedom (2 x corners - 3)."""
    scale: float
    """Size of the marker set seen / size in the profile (1 if sizes are right)."""
    m_per_px: float
    """Floor metres per image pixel at the marker (RMS over axes and corners) [m/px]."""
    floor_m: np.ndarray = None
    """Corners mapped to the floor, ndarray of shape (N, 2) [m]."""
    resid_m: np.ndarray = None
    """Observed minus fitted corner positions, ndarray of shape (N, 2) [m]."""
    weight: np.ndarray = None
    """Inverse floor covariance of each corner for 1 px noise, shape (N, 2, 2) [1/m^2]."""
    jac: np.ndarray = None
    """Jacobian of the fitted corners w.r.t. (x, y, heading), shape (N, 2, 3)."""


def _body_corners(marker):
    """Marker corners in the body frame, ndarray of shape (4, 2) [m]."""
    loc = marker_corners_local(marker.size_m)
    c, s = math.cos(marker.yaw_rad), math.sin(marker.yaw_rad)
    return loc @ np.array([[c, s], [-s, c]]) + (marker.x_m, marker.y_m)


def fit_pose(detections, markers, registration) -> PoseFix | None:
    """Fit the robot's floor pose to the corners of its markers in one frame.

    Each corner is mapped to the floor on the plane at its marker's height, then the
    body-frame corner layout is fitted to them by rigid least squares (Umeyama 1991
    without scale; the scale is kept only as a diagnostic). The covariance comes from
    the local image-to-floor Jacobian of each corner (finite differences of 1 px).

    Parameters
    ----------
    detections : list of Detection
    markers : sequence of profiles.Marker
    registration : FrameRegistration
        Must provide ``image_to_floor(points_px, height_m)``.

    Returns
    -------
    PoseFix or None
        None if the corners could not be mapped to the floor.
    """
    body, floor, jac = [], [], []
    for d in detections:
        m = markers[d.marker_index]
        pts = np.vstack([d.corners_px, d.corners_px + (1.0, 0.0), d.corners_px + (0.0, 1.0)])
        f = np.asarray(registration.image_to_floor(pts, height_m=m.z_m), dtype=float)
        if f.shape != (12, 2) or not np.all(np.isfinite(f)):
            return None
        body.append(_body_corners(m))
        floor.append(f[:4])
        jac.append(np.stack([f[4:8] - f[:4], f[8:12] - f[:4]], axis=2))  # d floor / d (u, v)
    b = np.vstack(body)
    p = np.vstack(floor)
    J = np.concatenate(jac)  # (N, 2, 2)
    mb, mp = b.mean(0), p.mean(0)
    bc, pc = b - mb, p - mp
    sxx = float(np.sum(bc[:, 0] * pc[:, 0] + bc[:, 1] * pc[:, 1]))
    sxy = float(np.sum(bc[:, 0] * pc[:, 1] - bc[:, 1] * pc[:, 0]))
    th = math.atan2(sxy, sxx)
    c, s = math.cos(th), math.sin(th)
    R = np.array([[c, -s], [s, c]])
    t = mp - R @ mb
    scale = math.hypot(sxx, sxy) / max(float(np.sum(bc * bc)), 1e-300)
    rb = b @ R.T
    resid = rb + t - p
    # Whitened linearised least squares: corner noise 1 px -> floor covariance J J^T.
    cov_pts = J @ J.transpose(0, 2, 1)
    try:
        W = np.linalg.inv(cov_pts)
    except np.linalg.LinAlgError:
        return None
    A = np.zeros((len(b), 2, 3))
    A[:, 0, 0] = A[:, 1, 1] = 1.0
    A[:, 0, 2] = -rb[:, 1]
    A[:, 1, 2] = rb[:, 0]
    info = np.einsum("nji,njk,nkl->il", A, W, A)
    try:
        cov = np.linalg.inv(info)
    except np.linalg.LinAlgError:
        return None
    # chi^2 of the weighted fit: one Gauss-Newton step from the unweighted (Umeyama) fit
    # lowers the whitened sum of squares by g^T info^-1 g, g = sum A^T W r (exact for the
    # linearised model), so chi2 / dof estimates the corner variance without the excess
    # of an unweighted fit.
    g = np.einsum("nji,njk,nk->i", A, W, resid)
    chi2 = max(float(np.einsum("ni,nij,nj->", resid, W, resid)) - float(g @ cov @ g), 0.0)
    m_per_px = math.sqrt(float(np.mean(np.einsum("nii->n", cov_pts))) / 2.0)
    return PoseFix(float(t[0]), float(t[1]), th, cov, chi2, 2 * len(b) - 3, scale, m_per_px,
                   p, -resid, W, A)


# ------------------------------------------------------------ registration policy
class RegistrationPolicy:
    """Decides when to register the floor again and keeps the one in effect.

    ``every`` = int registers every that many frames. ``'auto'`` registers every frame
    until two registrations ``moving_check_s`` apart agree within ``still_px`` (the
    camera is still: a slow hand-held sway moves less than that between consecutive
    frames, so the comparison spans a longer time; a hand holding a phone drifts by
    pixels in a quarter second even at the turn of a sway), then registers only every
    ``still_check_s`` and goes back to every frame as soon as the view has moved by
    ``still_px`` since the last check (a bumped tripod is noticed within that time).
    """

    def __init__(self, registrar, field_profile, every="auto", still_px=0.5, still_check_s=1.0,
                 moving_check_s=0.25):
        self.registrar = registrar
        self.every = every
        self.still_px = still_px
        self.still_check_s = still_check_s
        self.moving_check_s = moving_check_s
        self.current = None
        self.anchor = None
        self.anchor_t = -math.inf
        self.last_index = -(10**9)
        self.last_t = -math.inf
        self.still = False
        self.moved_count = 0
        self.registered = 0
        self.failures: dict[str, int] = {}
        fx, fy = field_profile.size_m
        self._probe = np.array([[0, 0], [fx, 0], [fx, fy], [0, fy], [fx / 2, fy / 2]], float)

    def due(self, index, t_s) -> bool:
        if self.current is None:
            return True
        if self.every != "auto":
            return index - self.last_index >= int(self.every)
        if self.still:
            return t_s - self.last_t >= self.still_check_s
        return True

    def _shift_px(self, a, b) -> float:
        try:
            pa = np.asarray(a.floor_to_image(self._probe), float)
            pb = np.asarray(b.floor_to_image(self._probe), float)
            return float(np.nanmax(np.hypot(*(pa - pb).T)))
        except Exception:  # noqa: BLE001 - a registrar without projection: assume moving
            return float("inf")

    def update(self, frame, index, t_s, mask_fn=None):
        """Register ``frame`` if due; return (registration in effect, fresh?).

        ``mask_fn()`` gives the pixels to ignore (the robot) when a registration is due.
        """
        if not self.due(index, t_s):
            return self.current, False
        mask = mask_fn() if mask_fn is not None else None
        if mask is not None:
            reg = self.registrar.register(frame, t_s, mask=mask)
        else:
            reg = self.registrar.register(frame, t_s)
        self.registered += 1
        self.last_index = index
        self.last_t = t_s
        if not getattr(reg, "ok", False):
            reason = str(getattr(reg, "reason", "") or "registration failed")
            self.failures[reason] = self.failures.get(reason, 0) + 1
            return self.current, False
        if self.every == "auto":
            if self.anchor is None:
                self.anchor, self.anchor_t = reg, t_s
            elif self.still or t_s - self.anchor_t >= self.moving_check_s:
                was_still = self.still
                self.still = self._shift_px(self.anchor, reg) < self.still_px
                if was_still and not self.still:
                    self.moved_count += 1
                self.anchor, self.anchor_t = reg, t_s
        self.current = reg
        return reg, True


# ------------------------------------------------------------------ the tracking
@dataclass
class _FrameRecords:
    """Per-frame numbers gathered while streaming (no images)."""

    t: list = field(default_factory=list)
    fix: list = field(default_factory=list)  # PoseFix or None per frame
    frac: list = field(default_factory=list)  # readout fraction of the detection
    cell: list = field(default_factory=list)  # min cell width seen in the frame [px]
    reg_ok: list = field(default_factory=list)
    reg_rms_px: list = field(default_factory=list)
    reg_pred_px: list = field(default_factory=list)
    reg_n: list = field(default_factory=list)
    reg_rms_m: list = field(default_factory=list)
    reg_fresh: list = field(default_factory=list)
    n_markers: list = field(default_factory=list)
    rejected: int = 0
    full_searches: int = 0
    window_searches: int = 0
    repeated: int = 0
    unrefined: int = 0
    upscaled: int = 0
    corner_frac: dict = field(default_factory=dict)  # frame index -> (N,) fractions
    predicted_cells: list = field(default_factory=list)
    times: StageTimes = field(default_factory=StageTimes)


def _roi(last, prev, frame_shape, gap_frames, side_frac=None, pad_px=None):
    """Search window around the corners predicted from the last two detections."""
    if last is None:
        return None
    pred = last
    if prev is not None and prev.shape != last.shape:
        prev = None
    if prev is not None and gap_frames <= 3:
        pred = last + (last - prev) * gap_frames
    side = float(np.max(np.ptp(last, axis=0)))
    step = 0.0 if prev is None else float(np.max(np.abs(last - prev)))
    side_frac = WINDOW_SIDE_FRAC if side_frac is None else side_frac
    pad_px = WINDOW_PAD_PX if pad_px is None else pad_px
    margin = side_frac * side + pad_px + 1.5 * step * gap_frames
    lo = np.floor(np.min(np.vstack([pred, last]), axis=0) - margin).astype(int)
    hi = np.ceil(np.max(np.vstack([pred, last]), axis=0) + margin).astype(int)
    h, w = frame_shape[:2]
    u0, v0 = max(lo[0], 0), max(lo[1], 0)
    u1, v1 = min(hi[0], w), min(hi[1], h)
    if u1 - u0 < 16 or v1 - v0 < 16 or (u1 - u0) * (v1 - v0) > 0.5 * w * h:
        return None
    return (int(u0), int(v0), int(u1), int(v1))


def _far_field_cells(reg, markers, field_profile, cells_across):
    """Predicted cell width [px] of each marker at the field's corners and centre."""
    K = getattr(reg, "camera_matrix", None)
    rvec = getattr(reg, "rvec", None)
    tvec = getattr(reg, "tvec", None)
    if K is None or rvec is None or tvec is None:
        return None
    dist = getattr(reg, "dist_coeffs", None)
    dist = np.zeros(5) if dist is None else np.asarray(dist, float)
    fx, fy = field_profile.size_m
    spots = np.array([[0, 0], [fx, 0], [fx, fy], [0, fy], [fx / 2, fy / 2]], float)
    out = []
    for i, m in enumerate(markers):
        loc = marker_corners_local(m.size_m)
        pts = np.concatenate([
            np.column_stack([loc + s, np.full(4, m.z_m)]) for s in spots
        ])
        img, _ = cv2.projectPoints(pts, np.asarray(rvec, float), np.asarray(tvec, float),
                                   np.asarray(K, float), dist)
        img = img.reshape(-1, 4, 2)
        d1, d2 = img[:, 2] - img[:, 0], img[:, 3] - img[:, 1]
        area = 0.5 * np.abs(d1[:, 0] * d2[:, 1] - d1[:, 1] * d2[:, 0])
        out.append(np.sqrt(area) / cells_across(i))
    return np.array(out)  # (markers, spots)


def _camera_distance(reg, point_m, z_m):
    R, _ = cv2.Rodrigues(np.asarray(reg.rvec, float))
    centre = -R.T @ np.asarray(reg.tvec, float).reshape(3)
    return float(np.linalg.norm(centre - np.array([point_m[0], point_m[1], z_m]))), centre


def track_frames(frames, robot, field_profile, registrar, *, video_info=None,
                 repeated=None, refine=DEFAULT_REFINE, window=True, register_every="auto",
                 max_speed_mps=5.0, max_omega_radps=25.0, progress=None, total=None,
                 acc=None, detector="auto"):
    """Detect and fit the robot pose in a stream of frames (the streaming part).

    Parameters
    ----------
    frames : iterable of (int, float, ndarray)
        ``(index, t_s, frame_bgr)``.
    robot : profiles.RobotProfile
    field_profile : profiles.FieldProfile
    registrar : object with ``register(frame_bgr, t_s)`` -> FrameRegistration
    video_info : video.VideoInfo, optional
        Used for the rolling-shutter scan axis (image height otherwise).
    repeated : callable, optional
        Returns True when the frame just received repeats the previous image.

    Returns
    -------
    _FrameRecords
        Per-frame fixes and statistics (internal; see :func:`track_video`).
    """
    det = MarkerDetector(robot.markers, refine=refine, detector=detector)
    policy = RegistrationPolicy(registrar, field_profile, register_every)
    acc = _FrameRecords() if acc is None else acc
    acc.detector = det
    acc.policy = policy
    last = prev = None
    last_index = -1
    last_fix = None
    last_fix_t = -math.inf
    last_cell = math.inf
    last_side = 0.0
    stream = iter(frames)
    coming = next(stream, None)
    while coming is not None:
        index, t_s, frame = coming
        coming = next(stream, None)
        acc.t.append(float(t_s))
        with acc.times.stage("register"):
            reg, fresh = policy.update(
                frame, index, t_s,
                lambda f=last_fix, shp=frame.shape: _robot_mask(robot, f, policy.current, shp))
        t_detect = time.perf_counter()
        if fresh and not acc.predicted_cells:
            cells = _far_field_cells(reg, robot.markers, field_profile, det.cells_across)
            if cells is not None:
                acc.predicted_cells.append(cells)
                acc.first_registration = reg
        acc.reg_ok.append(bool(reg is not None))
        acc.reg_rms_px.append(float(getattr(reg, "rms_px", np.nan)) if reg else np.nan)
        acc.reg_n.append(int(getattr(reg, "n_points", 0) or 0) if reg else 0)
        acc.reg_rms_m.append(float(getattr(reg, "rms_floor_m", np.nan)) if reg else np.nan)
        acc.reg_pred_px.append(float(getattr(reg, "prediction_px", 0.0)) if reg else 0.0)
        acc.reg_fresh.append(fresh)
        fix = None
        frac = np.nan
        cell = np.nan
        nm = 0
        if repeated is not None and repeated():
            acc.repeated += 1
        elif reg is not None:
            dets = []
            roi = _roi(last, prev, frame.shape, index - last_index) if window else None
            if roi is not None:
                acc.window_searches += 1
                least = SHRINK_PER_FRAME * last_side if index - last_index <= 3 else None
                wide = _context_roi(last, prev, frame.shape, index - last_index)
                dets = det.detect(frame, roi, min_side_px=least, context_roi=wide)
                if not dets and last_cell < 4.0:  # small marker: try a 2x enlarged window
                    dets = det.detect(frame, roi, upscale=2, min_side_px=least,
                                      context_roi=wide)
                    acc.upscaled += bool(dets)
            if not dets:
                acc.full_searches += 1
                found = det.detect(frame, coarse=True)
                if found:
                    around = np.vstack([d.corners_px for d in found])
                    roi = _roi(around, None, frame.shape, 1)
                    dets = det.detect(frame, roi) if roi is not None else det.detect(frame)
                    if not dets:  # refinement failed (tiny or blurred marker): keep coarse
                        dets = found
                        acc.unrefined += 1
            if dets:
                fix = fit_pose(dets, robot.markers, reg)
            if fix is not None and len(dets) > 2:
                fix, dets = _drop_outlier_marker(fix, dets, robot.markers, reg)
            if fix is not None and last_fix is not None:
                dt = t_s - last_fix_t
                jump = math.hypot(fix.x_m - last_fix.x_m, fix.y_m - last_fix.y_m)
                turn = abs(math.remainder(fix.heading_rad - last_fix.heading_rad, math.tau))
                if dt < 0.5 and (jump > max_speed_mps * dt + 0.05
                                 or turn > max_omega_radps * dt + 0.3):
                    acc.rejected += 1
                    fix = None
            if fix is not None:
                allc = np.vstack([d.corners_px for d in dets])
                h = frame.shape[0]
                if video_info is not None:
                    cfrac = readout_fraction(allc[:, 0], allc[:, 1], video_info)
                else:
                    cfrac = allc[:, 1] / h
                frac = float(np.mean(cfrac))
                acc.corner_frac[index] = np.asarray(cfrac, float)
                cell = min(math.sqrt(_area(d.corners_px)) / det.cells_across(d.marker_index)
                           for d in dets)
                nm = len(dets)
                last_cell = cell
                last_side = min(math.sqrt(_area(d.corners_px)) for d in dets)
                prev = last if index - last_index <= 3 else None
                last = allc
                last_index = index
                last_fix, last_fix_t = fix, t_s
        acc.fix.append(fix)
        acc.frac.append(frac)
        acc.cell.append(cell)
        acc.n_markers.append(nm)
        if progress is not None:
            progress(index + 1, total)
        if window and coming is not None and last is not None:
            # Start the next frame's SUBPIX pass while this thread moves on.
            gap = coming[0] - last_index
            det.prefetch(coming[2], _context_roi(last, prev, coming[2].shape, gap),
                         SHRINK_PER_FRAME * last_side if gap <= 3 else None)
        acc.times.add("detect", time.perf_counter() - t_detect)
    return acc


def _context_roi(last, prev, frame_shape, gap_frames):
    """The wider window of the SUBPIX pass (see :data:`CONTEXT_SIDE_FRAC`)."""
    return _roi(last, prev, frame_shape, gap_frames, CONTEXT_SIDE_FRAC, CONTEXT_PAD_PX)


def _robot_mask(robot, fix, reg, shape):
    """Pixels the robot may cover (to keep it out of the floor registration), or None.

    The robot's box (profile length, width, height, grown by the marker offsets and
    20%) at its last pose is projected through the registration in effect.
    """
    if fix is None or reg is None or getattr(reg, "rvec", None) is None:
        return None
    reach = max(robot.length_m, robot.width_m) / 2.0 + max(
        math.hypot(m.x_m, m.y_m) + m.size_m for m in robot.markers)
    reach *= 1.2
    top = max([robot.height_m] + [m.z_m for m in robot.markers]) + 0.05
    sq = np.array([[-1, -1], [1, -1], [1, 1], [-1, 1]], float) * reach + (fix.x_m, fix.y_m)
    pts = np.vstack([np.column_stack([sq, np.zeros(4)]), np.column_stack([sq, np.full(4, top)])])
    try:
        dist = getattr(reg, "dist_coeffs", None)
        img, _ = cv2.projectPoints(pts, np.asarray(reg.rvec, float), np.asarray(reg.tvec, float),
                                   np.asarray(reg.camera_matrix, float),
                                   None if dist is None else np.asarray(dist, float))
    except cv2.error:
        return None
    img = img.reshape(-1, 2)
    if not np.all(np.isfinite(img)):
        return None
    h, w = shape[:2]
    img = np.clip(img, -4 * w, 4 * w)
    mask = np.zeros((h, w), np.uint8)
    cv2.fillConvexPoly(mask, cv2.convexHull(np.round(img).astype(np.int32)), 1)
    return mask.astype(bool)


def _drop_outlier_marker(fix, dets, markers, reg):
    """With three or more markers, drop one whose removal cuts the misfit sharply."""
    best = (fix, dets)
    for k in range(len(dets)):
        sub = dets[:k] + dets[k + 1:]
        f = fit_pose(sub, markers, reg)
        if f is not None and f.dof > 0 and fix.dof > 0 and \
                f.chi2_unit / f.dof < 0.1 * fix.chi2_unit / fix.dof and \
                fix.chi2_unit / fix.dof > 25.0:
            best = (f, sub)
    return best


def estimate_readout(fixes, corner_frac, vx, vy, omega, sigma_px, *, min_speed_mps=0.05):
    """Rolling-shutter readout time from the shear of the markers in moving frames.

    A corner read a fraction ``f`` of the readout later than the marker's mean row is
    displaced by its velocity times ``(f - mean f) * readout``. That shear is what the
    rigid fit leaves in its residuals; regressing the residuals on the predicted shear
    (with the rigid part projected out) gives the readout time by weighted least
    squares (model: Ringaby & Forssen, IJCV 96:335, 2012, row-wise exposure).

    Parameters
    ----------
    fixes : list of PoseFix
        Fits of the frames with detections.
    corner_frac : list of ndarray
        Readout fraction of each corner of each fix.
    vx, vy, omega : ndarray
        Floor velocity [m/s] and yaw rate [rad/s] at each fix (from a first smoothing).
    sigma_px : float
        Corner noise [px].

    Returns
    -------
    tuple of float
        ``(readout_s, sigma_s, frames_used)``; NaN when no frame moved enough.
    """
    num = den = 0.0
    used = 0
    for f, cf, u, v, w in zip(fixes, corner_frac, vx, vy, omega, strict=True):
        if f.floor_m is None or not np.isfinite(u) or math.hypot(u, v) < min_speed_mps:
            continue
        rel = f.floor_m - (f.x_m, f.y_m)
        vel = np.column_stack([u - w * rel[:, 1], v + w * rel[:, 0]])
        g = vel * (cf - cf.mean())[:, None]
        A, W = f.jac, f.weight
        info = np.einsum("nji,njk,nkl->il", A, W, A)
        try:
            inv = np.linalg.inv(info)
        except np.linalg.LinAlgError:
            continue

        def perp(vec, A=A, W=W, inv=inv):
            coef = inv @ np.einsum("nji,njk,nk->i", A, W, vec)
            return vec - np.einsum("nij,j->ni", A, coef)

        gp, dp = perp(g), perp(f.resid_m)
        num += float(np.einsum("ni,nij,nj->", gp, W, dp))
        den += float(np.einsum("ni,nij,nj->", gp, W, gp))
        used += 1
    if den <= 0:
        return float("nan"), float("nan"), used
    return num / den, sigma_px / math.sqrt(den), used


@dataclass(frozen=True)
class CornerNoise:
    """Corner noise of one run, estimated from the misfit of the rigid marker layout."""

    sigma_px: float
    """1-sigma per corner coordinate, all of it [px]: sqrt(chi^2 / dof) of the rigid fits."""
    fresh_px: float
    """Part that is new in every frame (the smoother averages it) [px]."""
    persistent_px: float
    """Part that stays from one frame to the next (blur, sampling, print; the smoother
    cannot average it) [px]."""
    lag1_corr: float
    """Correlation of the whitened corner residuals of consecutive frames, in [0, 1]."""
    dof: int
    """Residual degrees of freedom summed over the run."""
    pairs: int
    """Pairs of consecutive frames behind ``lag1_corr``."""


def _whitened(fix):
    """Residuals of a fix whitened to 1 px units, ndarray of shape (N, 2)."""
    L = np.linalg.cholesky(fix.weight)  # W = L L^T, so r^T W r = |L^T r|^2
    return np.einsum("nji,nj->ni", L, fix.resid_m)


def estimate_corner_noise(fixes, frame_index=None, *, floor_px=0.02) -> CornerNoise:
    """Estimate the run's corner noise from the residuals of the rigid marker fits.

    With Gaussian corner noise of 1-sigma s per coordinate, the whitened sum of squared
    residuals of a least-squares fit of p parameters to n observations follows
    s^2 chi^2(n - p), so sum(chi2) / sum(dof) is an unbiased estimate of s^2 (e.g. Draper
    & Smith, *Applied Regression Analysis*, 3rd ed., section 2.6; here n = 2 x corners
    and p = 3 for x, y, heading). The share that persists between consecutive frames is
    the lag-1 correlation of the whitened residuals (residuals of frame k and k + 1 in
    the same corner order): persistent^2 = rho s^2, fresh^2 = (1 - rho) s^2.

    Parameters
    ----------
    fixes : sequence of PoseFix
        Fits of the detected frames, in frame order.
    frame_index : sequence of int, optional
        Frame number of each fix; consecutive numbers form the pairs for the
        correlation. Without it no split is made (all noise counted as persistent).
    floor_px : float
        Smallest ``sigma_px`` returned [px] (a fit of exact corners is not exact in
        the image: quantisation alone is 1/sqrt(12) px per pixel edge, common practice).

    Returns
    -------
    CornerNoise
    """
    dof = int(sum(f.dof for f in fixes))
    if dof <= 0:
        raise ValueError("estimate_corner_noise: no residual degrees of freedom")
    s2 = sum(f.chi2_unit for f in fixes) / dof
    num = den = 0.0
    pairs = 0
    if frame_index is not None:
        frame_index = list(frame_index)
        for k in range(len(fixes) - 1):
            a, b = fixes[k], fixes[k + 1]
            if frame_index[k + 1] != frame_index[k] + 1 or a.resid_m.shape != b.resid_m.shape:
                continue
            ra, rb = _whitened(a), _whitened(b)
            num += float(np.sum(ra * rb))
            den += 0.5 * float(np.sum(ra * ra) + np.sum(rb * rb))
            pairs += 1
    rho = float(np.clip(num / den, 0.0, 1.0)) if pairs >= MIN_NOISE_PAIRS and den > 0 else 1.0
    sigma = max(math.sqrt(s2), floor_px)
    return CornerNoise(sigma, sigma * math.sqrt(1.0 - rho), sigma * math.sqrt(rho), rho, dof,
                       pairs)


def _window_sums(values, half_window):
    """Sum of ``values`` over the ``half_window`` entries on each side of each entry."""
    m = len(values)
    k = np.arange(m)
    lo, hi = np.maximum(k - int(half_window), 0), np.minimum(k + int(half_window) + 1, m)
    c = np.concatenate([[0.0], np.cumsum(values)])
    return c[hi] - c[lo]


def local_corner_noise(fixes, frame_index, noise, *, half_window=LOCAL_NOISE_HALF_WINDOW):
    """Corner noise around each fix: variance relative to the run's, and persistent share.

    The noise changes along a run (distance, blur, viewing angle), and so does the share
    that persists from frame to frame (all of it while the robot stands still). Both are
    estimated as in :func:`estimate_corner_noise`, pooled over the ``half_window`` fits
    (and pairs of consecutive fits) on each side of each fix. The persistent share is
    never taken below the run's (the cautious side: a lower local correlation while
    moving would let the smoother average more).

    Parameters
    ----------
    fixes : sequence of PoseFix
    frame_index : sequence of int
        Frame number of each fix (consecutive numbers form the pairs).
    noise : CornerNoise
        The run's estimate (``sigma_px`` and ``lag1_corr``).

    Returns
    -------
    var_scale : ndarray (M,)
        Local chi^2 / dof over ``noise.sigma_px^2`` [-] (ones if that is 0).
    lag1_corr : ndarray (M,)
        Persistent share of the variance, in [``noise.lag1_corr``, 1].
    """
    m = len(fixes)
    scale = np.ones(m)
    rho = np.full(m, float(noise.lag1_corr))
    if m < 2:
        return scale, rho
    if noise.sigma_px > 0:
        chi2 = np.array([f.chi2_unit for f in fixes], float)
        dof = np.array([f.dof for f in fixes], float)
        scale = (_window_sums(chi2, half_window)
                 / np.maximum(_window_sums(dof, half_window), 1.0) / noise.sigma_px**2)
    num, den, pair = np.zeros(m), np.zeros(m), np.zeros(m)
    fi = list(frame_index)
    for k in range(m - 1):
        a, b = fixes[k], fixes[k + 1]
        if fi[k + 1] != fi[k] + 1 or a.resid_m.shape != b.resid_m.shape:
            continue
        ra, rb = _whitened(a), _whitened(b)
        num[k] = float(np.sum(ra * rb))
        den[k] = 0.5 * float(np.sum(ra * ra) + np.sum(rb * rb))
        pair[k] = 1.0
    pn, pd_, pc = (_window_sums(v, half_window) for v in (num, den, pair))
    with np.errstate(divide="ignore", invalid="ignore"):
        local = np.clip(pn / pd_, 0.0, 1.0)
    rho = np.where((pc >= MIN_LOCAL_PAIRS) & (pd_ > 0), np.maximum(local, rho), rho)
    return scale, rho


def _segments(detected_idx, t, max_gap_s):
    """Split detected frame indices into runs whose gaps are at most ``max_gap_s``."""
    segs = []
    start = detected_idx[0]
    for a, b in zip(detected_idx[:-1], detected_idx[1:], strict=True):
        if t[b] - t[a] > max_gap_s:
            segs.append((start, a))
            start = b
    segs.append((start, detected_idx[-1]))
    return segs


def _smooth(t, idx, ok, segs, t_meas, x, y, th, cov_unit, reg_err, mpp, fresh_px,
            persistent_px, keep, corner_bias_px):
    """Smooth each segment of detections onto its frame times; NaN elsewhere.

    ``fresh_px`` and ``persistent_px`` are the corner noise parts of each fix [px];
    ``keep`` is the run's 1 - lag-1 correlation.
    """
    n = t.size
    out = {c: np.full(n, np.nan) for c in TRACK_COLUMNS}
    out["t_s"] = t
    interpolated = np.zeros(n, bool)
    fits = []
    for a, b in segs:
        m = (idx >= a) & (idx <= b)
        rows = np.arange(a, b + 1)
        # Fresh corner noise goes through the smoother (averaged over frames) ...
        unit = cov_unit[m]
        sx, sy, sh = rts_smooth_signals(
            t_meas[m], np.column_stack([x[m], y[m], th[m]]),
            fresh_px[m, None] * np.sqrt(np.diagonal(unit, axis1=1, axis2=2)), t[rows])
        fits.append((sx.q, sx.r_scale, sy.q, sy.r_scale, sh.q, sh.r_scale,
                     sx.innovation_lag1, sy.innovation_lag1, sh.innovation_lag1))
        out["x_m"][rows] = sx.value
        out["y_m"][rows] = sy.value
        out["heading_rad"][rows] = sh.value
        out["vx_mps"][rows] = sx.rate
        out["vy_mps"][rows] = sy.rate
        out["omega_radps"][rows] = sh.rate
        out["ax_mps2"][rows] = sx.accel
        out["ay_mps2"][rows] = sy.accel
        # ... the persistent part is not averaged: added per sample, independent per corner.
        # The innovations of each signal tell how much larger the noise in the pose
        # direction is than the fit residuals show (r_scale, maximum likelihood). Fed
        # only the fresh part, the innovations also carry the persistent part, which
        # alone makes r_scale = 1 / (1 - lag-1 correlation); only the excess beyond that
        # enlarges the persistent part.
        pv = persistent_px[m] ** 2 * np.diagonal(unit, axis1=1, axis2=2).T  # (3, M)
        vx = max(1.0, sx.r_scale * keep) * np.interp(rows, idx[m], pv[0])
        vy = max(1.0, sy.r_scale * keep) * np.interp(rows, idx[m], pv[1])
        reg_var = np.nan_to_num(reg_err[rows]) ** 2 + 2.0 * (corner_bias_px * mpp[rows]) ** 2
        out["sigma_xy_m"][rows] = np.sqrt(sx.sigma_value**2 + sy.sigma_value**2 + vx + vy
                                          + reg_var)
        hv = max(1.0, sh.r_scale * keep) * np.interp(rows, idx[m], pv[2])
        out["sigma_heading_rad"][rows] = np.sqrt(sh.sigma_value**2 + hv)
        interpolated[rows] = ~ok[rows]
    return out, interpolated, fits


def _finish(acc, robot, video_info, timing, *, readout_s, readout_source, max_gap_s,
            corner_sigma_px, field_profile, warnings, corner_bias_px=0.0):
    """Smooth the per-frame fixes into the truth track and gather the quality."""
    n = len(acc.t)
    t = np.asarray(timing.t_s if timing is not None else acc.t, dtype=float)[:n]
    ok = np.array([f is not None for f in acc.fix], dtype=bool)
    det = acc.detector
    seen = {f"{fam}:{i}": c for (fam, i), c in sorted(det.ids_seen.items())}
    if not ok.any():
        wanted = ", ".join(f"{m.family} id {m.id}" for m in robot.markers)
        why = ""
        if not any(acc.reg_ok):
            why = (" and the floor could not be registered in any frame ("
                   + "; ".join(acc.policy.failures) + ")")
        raise TrackingError(
            f"the robot's marker ({wanted}) was never found in {n} frames{why}; "
            f"IDs seen: {', '.join(seen) if seen else 'none'} - check the marker id and "
            "family in the robot profile"
        )
    idx = np.flatnonzero(ok)
    fixes = [acc.fix[i] for i in idx]
    # Corner noise of this run from the rigid fits' residuals (chi^2 / dof), split into
    # a fresh and a persistent part by the residuals' frame-to-frame correlation.
    noise = estimate_corner_noise(fixes, idx)
    sigma_source = "fit residuals"
    if corner_sigma_px is not None:
        g = float(corner_sigma_px)
        noise = CornerNoise(g, g * math.sqrt(1.0 - noise.lag1_corr),
                            g * math.sqrt(noise.lag1_corr), noise.lag1_corr, noise.dof,
                            noise.pairs)
        sigma_source = "given"
    sigma_px = noise.sigma_px
    x = np.array([f.x_m for f in fixes])
    y = np.array([f.y_m for f in fixes])
    th = np.unwrap(np.array([f.heading_rad for f in fixes]))
    cov_unit = np.array([f.cov_unit for f in fixes])
    # The corner noise and its persistent share change along a run: per fix, from the
    # fits around it (a given sigma is kept as given).
    scale, rho = local_corner_noise(fixes, idx, noise)
    if sigma_source == "given":
        scale = np.ones_like(scale)
    fresh_px = np.maximum(sigma_px * np.sqrt(scale * (1.0 - rho)), 1e-3 * sigma_px)
    persistent_px = sigma_px * np.sqrt(scale * rho)
    keep = 1.0 - noise.lag1_corr
    frac = np.nan_to_num(np.asarray(acc.frac, float)[idx])
    t_meas = t[idx] + frac * readout_s
    # Registration error at the robot: a least-squares fit of p parameters to n
    # observations with residual sigma predicts with mean variance sigma^2 p / n (the
    # trace of the hat matrix; e.g. Draper & Smith, Applied Regression Analysis, 3rd
    # ed., section 8.1). Carried to the floor through the image scale at the marker.
    mpp = np.interp(np.arange(n), idx, [f.m_per_px for f in fixes])
    reg_px = np.asarray(acc.reg_rms_px, float)
    reg_n = np.maximum(np.asarray(acc.reg_n, float), REGISTRATION_PARAMS)
    reg_err = reg_px * np.sqrt(REGISTRATION_PARAMS / reg_n) * mpp
    reg_err = np.where(np.isfinite(reg_err), reg_err, np.asarray(acc.reg_rms_m, float))
    # ... or, where larger, the error the registration showed at clicked points it was
    # not fitted to (held out one at a time): it holds the lens and pose error the
    # residuals alone do not show (an unmodelled lens is a systematic error).
    reg_err = np.fmax(reg_err, np.asarray(acc.reg_pred_px, float) * mpp)
    segs = _segments(idx, t, max_gap_s)
    first = _smooth(t, idx, ok, segs, t_meas, x, y, th, cov_unit, reg_err, mpp, fresh_px,
                    persistent_px, keep, corner_bias_px)
    est, est_sigma, est_frames = estimate_readout(
        fixes, [acc.corner_frac.get(int(i), np.zeros(0)) for i in idx],
        first[0]["vx_mps"][idx], first[0]["vy_mps"][idx], first[0]["omega_radps"][idx],
        sigma_px)
    usable = (math.isfinite(est) and est_sigma < 0.004 and est > 3 * est_sigma
              and est < 0.1)
    if readout_source == "none" and usable:
        readout_s, readout_source = est, "estimated"
        t_meas = t[idx] + frac * readout_s
        first = _smooth(t, idx, ok, segs, t_meas, x, y, th, cov_unit, reg_err, mpp,
                        fresh_px, persistent_px, keep, corner_bias_px)
    out, interpolated, fits = first
    detected = ok.copy()
    gaps = []

    # Long gaps: between segments and at the ends.
    bounds = [(-1, segs[0][0])] + [(segs[k][1], segs[k + 1][0]) for k in range(len(segs) - 1)]
    bounds.append((segs[-1][1], n))
    for a, b in bounds:
        if b - a > 1:
            t0 = t[a] if a >= 0 else t[0]
            t1 = t[b] if b < n else t[-1]
            gaps.append({"first_frame": a + 1, "last_frame": b - 1,
                         "t_start_s": float(t0), "t_end_s": float(t1)})
    # Heading continuous across long gaps: keep each segment's unwrapped value.
    out["speed_mps"] = np.hypot(out["vx_mps"], out["vy_mps"])
    track = pd.DataFrame(out, columns=TRACK_COLUMNS)
    track["detected"] = detected
    track["interpolated"] = interpolated

    cells = np.asarray(acc.cell, float)[idx]
    cells = cells[np.isfinite(cells)]
    quality = {
        "frames": n,
        "detected_frames": int(ok.sum()),
        "detected_fraction": float(ok.mean()),
        "interpolated_frames": int(interpolated.sum()),
        "long_gaps": gaps,
        "short_gap_max_s": max_gap_s,
        "marker_cell_px_min": float(cells.min()) if cells.size else float("nan"),
        "marker_cell_px_median": float(np.median(cells)) if cells.size else float("nan"),
        "marker_scale_median": float(np.median([f.scale for f in fixes])),
        "corner_sigma_px": sigma_px,
        "corner_sigma_source": sigma_source,
        "corner_bias_px": corner_bias_px,
        "corner_fresh_px": noise.fresh_px,
        "corner_persistent_px": noise.persistent_px,
        "corner_lag1_corr": noise.lag1_corr,
        "corner_noise_pairs": noise.pairs,
        "readout_s": readout_s,
        "readout_source": readout_source,
        "readout_estimate_s": est,
        "readout_estimate_sigma_s": est_sigma,
        "readout_estimate_frames": est_frames,
        "rejected_jumps": acc.rejected,
        "window_searches": acc.window_searches,
        "full_frame_searches": acc.full_searches,
        "unrefined_detections": acc.unrefined,
        "upscaled_window_detections": acc.upscaled,
        "ids_seen": seen,
        "smoother": [dict(zip(("q_x", "r_x", "q_y", "r_y", "q_heading", "r_heading",
                                         "innovation_lag1_x", "innovation_lag1_y",
                                         "innovation_lag1_heading"), f,
                              strict=True)) for f in fits],
        "dropped_frames": [] if timing is None else [list(d) for d in timing.dropped],
        "duplicated_frames": [] if timing is None else list(timing.duplicated),
        "repeated_images_skipped": acc.repeated,
        "frame_interval_s": None if timing is None else timing.interval_s,
        "registration": {
            "registered_frames": acc.policy.registered,
            "frames_with_registration": int(np.sum(acc.reg_ok)),
            "rms_px_median": _nanmedian(acc.reg_rms_px),
            "rms_floor_m_median": _nanmedian(acc.reg_rms_m),
            "camera_still": bool(acc.policy.still),
            "camera_moved_count": acc.policy.moved_count,
            "failures": dict(acc.policy.failures),
        },
    }
    if video_info is not None:
        quality["orientation_deg"] = video_info.orientation_deg
        quality["size_px"] = [video_info.width_px, video_info.height_px]
    if timing is not None:
        warnings.extend(timing.warnings)
    _size_warnings(acc, robot, field_profile, quality, warnings)
    if ok.mean() < 0.9 or gaps:
        listed = ", ".join(f"{g['t_start_s']:.2f}-{g['t_end_s']:.2f} s" for g in gaps[:10])
        more = f" (+{len(gaps) - 10} more)" if len(gaps) > 10 else ""
        warnings.append(
            f"marker found in {ok.sum()} of {n} frames ({100 * ok.mean():.1f}%); "
            f"untracked gaps longer than {max_gap_s:.2f} s: {listed or 'none'}{more}"
        )
    if abs(quality["marker_scale_median"] - 1.0) > 0.01:
        warnings.append(
            f"the marker measures {100 * quality['marker_scale_median']:.1f}% of the size "
            "in the robot profile (with the marker height as given); check size_m and z_m"
        )
    if readout_source == "estimated":
        warnings.append(
            f"rolling-shutter readout estimated from the marker shear: {1000 * est:.1f} "
            f"+- {1000 * est_sigma:.1f} ms (none in the camera profile); put the right value "
            "in the camera profile (readout_s) if known"
        )
    elif readout_source != "none" and usable and abs(est - readout_s) > 4 * est_sigma + 0.003:
        warnings.append(
            f"the marker shear suggests a readout of {1000 * est:.1f} +- {1000 * est_sigma:.1f}"
            f" ms, not the {1000 * readout_s:.1f} ms used; check readout_s"
        )
    if readout_source == "none":
        warnings.append(
            "no rolling-shutter readout time known (camera profile readout_s = 0): detection "
            "times are the frame times; a phone's readout of 10-30 ms shifts fast motion"
        )
    return TrackResult(
        track=track,
        quality=quality,
        warnings=warnings,
        registrations=pd.DataFrame({
            "t_s": t, "ok": np.asarray(acc.reg_ok, bool),
            "rms_px": np.asarray(acc.reg_rms_px, float),
            "rms_floor_m": np.asarray(acc.reg_rms_m, float),
            "fresh": np.asarray(acc.reg_fresh, bool),
        }, columns=REGISTRATION_COLUMNS),
    )


def _nanmedian(values):
    a = np.asarray(values, float)
    return float(np.nanmedian(a)) if np.isfinite(a).any() else float("nan")


def _size_warnings(acc, robot, field_profile, quality, warnings):
    """Warn when marker cells get too small to detect, with what would fix it."""
    measured = quality["marker_cell_px_min"]
    pred = acc.predicted_cells[0] if acc.predicted_cells else None
    worst = measured
    where = "where the robot drove"
    if pred is not None:
        quality["marker_cell_px_field_min"] = float(np.min(pred))
        quality["marker_cell_px_field"] = {
            f"{m.family}:{m.id}": [float(v) for v in pred[i]]
            for i, m in enumerate(robot.markers)
        }
        if float(np.min(pred)) < worst or not math.isfinite(worst):
            worst = float(np.min(pred))
            where = "at the far side of the field"
    if not math.isfinite(worst) or worst >= MIN_CELL_PX:
        return
    ratio = MIN_CELL_PX / worst
    m = min(robot.markers, key=lambda mk: mk.size_m)
    advice = (f"use a marker of at least {m.size_m * ratio * 1000:.0f} mm "
              f"(now {m.size_m * 1000:.0f} mm)")
    reg = getattr(acc, "first_registration", None)
    if reg is not None and pred is not None:
        fx, fy = field_profile.size_m
        spots = np.array([[0, 0], [fx, 0], [fx, fy], [0, fy], [fx / 2, fy / 2]], float)
        k = int(np.argmin(pred.min(axis=0)))
        dist, centre = _camera_distance(reg, spots[k], m.z_m)
        advice += (f", or bring the camera within {dist / ratio:.2f} m of that spot (now "
                   f"{dist:.2f} m; camera {centre[2]:.2f} m above the floor)")
    warnings.append(
        f"marker cells are only {worst:.1f} px wide {where} (measured minimum "
        f"{measured:.1f} px over the run; detection needs about {MIN_CELL_PX:.0f} px): {advice}"
    )


def track_video(video_path, robot, field, camera=None, *, registrar=None, progress=None,
                refine=DEFAULT_REFINE, readout_s=None, max_gap_s=0.25, corner_sigma_px=None,
                corner_bias_px=0.0, window=True, threaded=True, register_every="auto",
                max_speed_mps=5.0, detector="auto"):
    """Track the robot through a video: the truth track with its 1-sigma.

    Parameters
    ----------
    video_path : str or Path
        The footage.
    robot : profiles.RobotProfile
        Its ``markers`` give family, id, size, offset and height of each marker.
    field : profiles.FieldProfile
    camera : profiles.CameraProfile, optional
        Lens and rolling-shutter readout time; without it the registrar must cope.
    registrar : object, optional
        Anything with ``register(frame_bgr, t_s)`` -> FrameRegistration; default
        ``registrar.FloorRegistrar(field, camera)``.
    progress : callable, optional
        ``progress(frames_done, frames_total)``.
    refine : {'apriltag', 'hybrid', 'subpix', 'contour', 'none'}
        Corner refinement (see :class:`MarkerDetector`; ``benchmarks/track_accuracy.py``
        measures their accuracy).
    detector : {'auto', 'opencv', 'apriltag3'}
        Marker detector (see :data:`DETECTORS`).
    readout_s : float, optional
        Rolling-shutter readout time [s]; default the camera profile's (0 if none).
    max_gap_s : float
        Gaps up to this long are bridged by the smoother and flagged ``interpolated``;
        longer ones are left NaN and reported [s].
    corner_sigma_px : float, optional
        Corner noise [px]; default estimated from the fit residuals of the run. Either
        way it is split into a fresh and a persistent part by the residuals'
        frame-to-frame correlation (:func:`estimate_corner_noise`).
    corner_bias_px : float
        1-sigma of a shift common to all corners of a marker (blur, sampling, print),
        which fit residuals cannot reveal; it is not averaged down by the smoother [px].
        Default 0: nothing is added that the footage itself does not show (a value
        such as 0.1 px suits markers printed or mounted with visible defects).
    window : bool
        Search a window around the predicted marker position first.
    threaded : bool
        Decode in a background thread.
    register_every : 'auto' or int
        Floor registration policy (see ``RegistrationPolicy``).
    max_speed_mps : float
        Detections implying a faster jump than this are rejected [m/s].

    Returns
    -------
    TrackResult

    Raises
    ------
    TrackingError
        The marker was never found (the message lists the IDs that were seen).
    vidodo.video.VideoTruncatedError
        The video stopped early; ``.partial`` holds the TrackResult up to there.
    """
    if registrar is None:
        from .registration.registrar import FloorRegistrar

        registrar = FloorRegistrar(field, camera=camera)
    if readout_s is None:
        readout_s = float(camera.readout_s) if camera is not None else 0.0
        source = "camera profile" if readout_s > 0 else "none"
    else:
        readout_s = float(readout_s)
        source = "given"
    warnings: list[str] = []
    acc = _FrameRecords()
    # Detection runs on small windows: OpenCV's own thread pool costs more than it gives
    # there and competes with the decoder's threads, so it is paused while tracking.
    threads = cv2.getNumThreads()
    cv2.setNumThreads(1)
    try:
        result = _track_video(video_path, robot, field, camera, registrar, progress, refine,
                              readout_s, source, max_gap_s, corner_sigma_px, corner_bias_px,
                              window, threaded, register_every, max_speed_mps, warnings, acc,
                              detector)
    finally:
        cv2.setNumThreads(threads)
    return _placed(result, registrar)


def _placed(result: TrackResult, registrar) -> TrackResult:
    """The track placed by the start tile and checked against the field (see
    :func:`vidodo.registration.selfcheck.place_track`); states what positions are
    relative to."""
    from .registration.selfcheck import place_track

    track, statement = place_track(result.track, result.quality, registrar)
    if not statement:
        return result
    quality = dict(result.quality, positions_relative_to=statement)
    warnings = list(result.warnings)
    if not statement.startswith("the field origin"):
        warnings.append(f"the field's place in the tile pattern is not fixed by the view and "
                        f"no start tile was given: positions are relative to {statement}; "
                        "drift is unaffected (give --start-tile for field positions)")
    return replace(result, track=track, quality=quality, warnings=warnings)


def _track_video(video_path, robot, field, camera, registrar, progress, refine, readout_s,
                 source, max_gap_s, corner_sigma_px, corner_bias_px, window, threaded,
                 register_every, max_speed_mps, warnings, acc, detector):
    truncated = None
    with VideoReader(video_path, threaded=threaded, grey=True,
                     decoder_threads=1 if threaded else None) as reader:
        info = reader.info
        if not info.start_known:
            warnings.append(
                "ffprobe not found: frame times count from the video stream's start, not "
                "the container's times; a --clock-offset measured against the file's "
                "times must subtract the stream's start time (install ffmpeg to avoid this)")
        if camera is not None and (camera.width_px, camera.height_px) != (
                info.width_px, info.height_px):
            warnings.append(
                f"camera profile is {camera.width_px}x{camera.height_px} px but the video "
                f"is {info.width_px}x{info.height_px} px; use a profile made in this mode"
            )
        try:
            track_frames(reader, robot, field, registrar, video_info=info,
                         repeated=lambda: reader.last_frame_repeated, refine=refine,
                         window=window, register_every=register_every,
                         max_speed_mps=max_speed_mps, progress=progress,
                         total=info.frame_count or None, acc=acc, detector=detector)
        except VideoTruncatedError as exc:
            truncated = exc
        timing = reader.timing()
        acc.times.add("decode", reader.decode_s)
    kw = dict(readout_s=readout_s, readout_source=source, max_gap_s=max_gap_s,
              corner_sigma_px=corner_sigma_px, field_profile=field, warnings=warnings,
              corner_bias_px=corner_bias_px)
    if truncated is not None:
        partial = None
        if acc.t:
            warnings.append(f"video truncated: {truncated}")
            try:
                partial = _finish(acc, robot, info, timing, **kw)
            except TrackingError:
                partial = None
        raise VideoTruncatedError(str(truncated), frames_read=truncated.frames_read,
                                  t_last_s=truncated.t_last_s, partial=partial) from None
    if camera is None and acc.policy.registered > 1 and not acc.policy.still:
        warnings.append(
            "the camera moved and there is no camera profile: the lens is estimated from "
            "the tile seams of each view, good to about a centimetre on the floor; "
            "calibrate it once with 'vidodo lens' for millimetres")
    with acc.times.stage("smooth"):
        result = _finish(acc, robot, info, timing, **kw)
    return replace(result, timings_s=acc.times.as_dict())


# ------------------------------------------------------------------------- files
def save_track_csv(result, path):
    """Write the truth track as CSV (columns :data:`TRACK_COLUMNS`, SI units)."""
    track = result.track if isinstance(result, TrackResult) else result
    track.to_csv(path, index=False, columns=TRACK_COLUMNS, float_format="%.9g")


def load_track_csv(path) -> pd.DataFrame:
    """Read a truth track written by :func:`save_track_csv`.

    Raises
    ------
    InputError
        If the file is missing or a column is absent.
    """
    try:
        df = pd.read_csv(path)
    except FileNotFoundError:
        raise InputError(f"{path}: track file not found; run 'vidodo track' first") from None
    missing = [c for c in TRACK_COLUMNS if c not in df.columns]
    if missing:
        raise InputError(f"{path}: column '{missing[0]}' missing; is this a vidodo track CSV?")
    for c in ("detected", "interpolated"):
        df[c] = df[c].astype(str).str.lower().isin(("true", "1"))
    return df[TRACK_COLUMNS]

