"""Feature-based re-registration of a frame to a reference view of the floor.

Two tools, used by :class:`vidodo.registration.registrar.FloorRegistrar` for hand-held footage:

* :func:`match_homography`: scale-invariant keypoints (SIFT, Lowe, IJCV 60(2), 2004;
  or ORB) matched with Lowe's ratio test, a homography fitted with RANSAC (Fischler &
  Bolles, CACM 24(6), 1981) and refined on its inliers. Slow but needs no prior.
* :class:`FloorPatchTracker`: corners picked once on the reference floor (inside the
  field, away from masked pixels) and found again in each new frame by pyramidal
  Lucas-Kanade (Bouguet's implementation in OpenCV) after warping the new frame close
  to the reference view with a predicted homography. Fast and sub-pixel.
"""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np

__all__ = ["HomographyMatch", "MatchSettings", "match_homography", "refine_homography",
           "FloorPatchTracker", "to_grey"]


def to_grey(frame):
    """Greyscale uint8 view of a BGR or grey frame."""
    if frame.ndim == 3:
        return cv2.cvtColor(frame, cv2.COLOR_BGR2GRAY)
    return frame


@dataclass(frozen=True)
class HomographyMatch:
    """A homography fitted to feature matches between two images."""

    H: np.ndarray | None
    """3x3 map from the first image's pixels to the second's, or None on failure."""
    n_matches: int
    """Matches that passed the ratio test."""
    n_inliers: int
    """RANSAC inliers."""
    rms_px: float
    """RMS transfer error of the inliers in the second image [px]."""
    reason: str = ""
    """Why it failed (empty on success)."""


@dataclass(frozen=True)
class MatchSettings:
    """Options of :func:`match_homography`."""

    detector: str = "sift"
    """Keypoint detector and descriptor: 'sift' or 'orb'."""
    max_features: int = 4000
    """Keypoints kept per image."""
    ratio: float = 0.75
    """Lowe's ratio-test threshold."""
    ransac_px: float = 3.0
    """RANSAC inlier threshold [px]."""
    min_inliers: int = 15
    """Fewer inliers than this is a failure."""


def _mask_u8(mask, shape):
    """OpenCV detection mask (255 = use) from a boolean 'ignore these pixels' mask."""
    if mask is None:
        return None
    m = np.asarray(mask)
    if m.shape[:2] != shape[:2]:
        raise ValueError(f"mask shape {m.shape[:2]} differs from the frame's {shape[:2]}")
    return np.where(m.astype(bool), 0, 255).astype(np.uint8)


def match_homography(image_a, image_b, settings=None, *, ignore_a=None, ignore_b=None):
    """Homography from image A to image B by feature matching and RANSAC.

    Parameters
    ----------
    image_a, image_b : ndarray
        BGR or grey images.
    settings : MatchSettings, optional
        Detector ('sift' or 'orb'), keypoints per image, Lowe's ratio, RANSAC threshold
        [px], fewest inliers.
    ignore_a, ignore_b : ndarray of bool, optional
        Pixels to ignore (True), e.g. the robot or everything off the floor.

    Returns
    -------
    HomographyMatch
        Never raises for poor images; failure is ``H is None`` with a reason.
    """
    st = MatchSettings() if settings is None else settings
    detector, max_features, ratio = st.detector, st.max_features, st.ratio
    ransac_px, min_inliers = st.ransac_px, st.min_inliers
    ga, gb = to_grey(image_a), to_grey(image_b)
    if detector == "sift":
        det = cv2.SIFT_create(nfeatures=max_features)
        norm = cv2.NORM_L2
    elif detector == "orb":
        det = cv2.ORB_create(nfeatures=max_features)
        norm = cv2.NORM_HAMMING
    else:
        raise ValueError(f"detector {detector!r}: use 'sift' or 'orb'")
    ka, da = det.detectAndCompute(ga, _mask_u8(ignore_a, ga.shape))
    kb, db = det.detectAndCompute(gb, _mask_u8(ignore_b, gb.shape))
    if da is None or db is None or len(ka) < 4 or len(kb) < 4:
        return HomographyMatch(None, 0, 0, float("nan"), "too few keypoints")
    pairs = cv2.BFMatcher(norm).knnMatch(da, db, k=2)
    good = [p[0] for p in pairs if len(p) == 2 and p[0].distance < ratio * p[1].distance]
    if len(good) < min_inliers:
        return HomographyMatch(None, len(good), 0, float("nan"),
                               f"only {len(good)} feature matches")
    pa = np.float64([ka[m.queryIdx].pt for m in good])
    pb = np.float64([kb[m.trainIdx].pt for m in good])
    H, inl = cv2.findHomography(pa, pb, cv2.RANSAC, ransac_px, maxIters=5000,
                                confidence=0.999)
    if H is None:
        return HomographyMatch(None, len(good), 0, float("nan"), "RANSAC found no model")
    inl = inl.ravel().astype(bool)
    if inl.sum() < min_inliers:
        return HomographyMatch(None, len(good), int(inl.sum()), float("nan"),
                               f"only {int(inl.sum())} RANSAC inliers")
    # Least-squares (Levenberg-Marquardt) refit on the inliers only.
    H, _ = cv2.findHomography(pa[inl], pb[inl], 0)
    proj = cv2.perspectiveTransform(pa[inl].reshape(-1, 1, 2), H).reshape(-1, 2)
    rms = float(np.sqrt(np.mean(np.sum((proj - pb[inl]) ** 2, axis=1))))
    return HomographyMatch(H / H[2, 2], len(good), int(inl.sum()), rms)


class FloorPatchTracker:
    """Find reference floor corners again in later frames.

    Parameters
    ----------
    ref_grey : ndarray of shape (H, W), uint8
        The reference frame.
    usable : ndarray of bool, shape (H, W)
        Pixels where floor corners may be picked (True): the field, minus the robot.
    max_points : int
        Corners to pick.
    cells : (int, int)
        The usable region's bounding box is cut into this many columns and rows, and
        each cell gets its share of the corners (feature bucketing, common practice in
        visual odometry): the strong texture and printed markers near the camera do
        not take every corner, so the far floor, which fixes the camera's tilt, is
        tracked too.
    """

    def __init__(self, ref_grey, usable, *, max_points=500, min_distance_px=None,
                 cells=(8, 6)):
        self.ref = ref_grey
        h, w = ref_grey.shape
        md = min_distance_px or max(8, int(0.01 * max(h, w)))
        usable_u8 = usable.astype(np.uint8) * 255
        # Keep corners away from the usable region's border (the robot, the field edge).
        usable_u8 = cv2.erode(usable_u8, np.ones((15, 15), np.uint8))
        self.ref_px = _bucketed_corners(ref_grey, usable_u8, max_points, md, cells)
        self.win = (15, 15)
        self.levels = 2
        # Only this box of the reference holds corners (with room for the pyramid's
        # windows); frames are warped into it alone. Its corner on multiples of
        # 2^levels keeps the pyramid's pixel grid that of the whole frame.
        self._roi = _corner_box(self.ref_px, ref_grey.shape, 2 ** self.levels,
                                2 ** self.levels * (self.win[0] + 4))
        x0, y0, x1, y1 = self._roi
        self._ref_roi = np.ascontiguousarray(ref_grey[y0:y1, x0:x1])

    @property
    def n_points(self) -> int:
        """Corners held."""
        return len(self.ref_px)

    def is_unmoved(self, grey, previous_px, *, tolerance_px=0.1, n_check=120):
        """Cheap test that the view has not moved since ``previous_px`` were found.

        A spread subset of the corners is tracked with one pyramid level and a small
        window from the reference straight into ``grey``; the view counts as unmoved when
        their median shift from ``previous_px`` is below ``tolerance_px`` and three
        quarters are within three times that.
        """
        prev = np.asarray(previous_px, float)
        idx = np.nonzero(np.all(np.isfinite(prev), axis=1))[0]
        if len(idx) < 12:
            return False
        idx = idx[np.linspace(0, len(idx) - 1, min(n_check, len(idx))).round().astype(int)]
        p0 = self.ref_px[idx].astype(np.float32).reshape(-1, 1, 2)
        start = prev[idx].astype(np.float32).reshape(-1, 1, 2)
        crit = (cv2.TERM_CRITERIA_EPS | cv2.TERM_CRITERIA_COUNT, 10, 0.01)
        p1, st, _err = cv2.calcOpticalFlowPyrLK(self.ref, grey, p0, start.copy(),
                                                winSize=(15, 15), maxLevel=0, criteria=crit,
                                                flags=cv2.OPTFLOW_USE_INITIAL_FLOW)
        ok = st.ravel() == 1
        if ok.sum() < 0.6 * len(idx):
            return False
        shift = np.linalg.norm(p1.reshape(-1, 2)[ok] - prev[idx][ok], axis=1)
        return bool(np.median(shift) < tolerance_px
                    and np.percentile(shift, 75) < 3 * tolerance_px)

    def _track_both_ways(self, warped, p0, *, quick):
        """Lucas-Kanade from the reference into ``warped`` (the reference's region of
        interest) and back: new positions, status (1 = found both ways) and the
        forward-backward error [px] per corner."""
        crit = (cv2.TERM_CRITERIA_EPS | cv2.TERM_CRITERIA_COUNT, 30, 0.005)
        # quick: the guess is close, so start there on the full-resolution level only
        levels, start, flags = (0, p0.copy(), cv2.OPTFLOW_USE_INITIAL_FLOW) if quick \
            else (self.levels, None, 0)
        p1, st, _err = cv2.calcOpticalFlowPyrLK(self._ref_roi, warped, p0, start,
                                                winSize=self.win, maxLevel=levels,
                                                criteria=crit, flags=flags)
        # Forward-backward check (Kalal et al., ICPR 2010) rejects patches that drifted:
        # tracked back from where it was found, a corner must return to where it was.
        p0b, st_b, _ = cv2.calcOpticalFlowPyrLK(warped, self._ref_roi, p1, None,
                                                winSize=self.win, maxLevel=levels,
                                                criteria=crit)
        fb = np.linalg.norm(p0b.reshape(-1, 2) - p0.reshape(-1, 2), axis=1)
        return p1, (st.ravel() == 1) & (st_b.ravel() == 1), fb

    def locate(self, grey, H_guess=None, *, ignore=None, quick=False):
        """Where the reference corners are in ``grey``.

        Parameters
        ----------
        grey : ndarray of shape (H, W), uint8
            The new frame.
        H_guess : ndarray of shape (3, 3), optional
            Approximate map from reference pixels to new-frame pixels; None: identity.
        ignore : ndarray of bool, optional
            New-frame pixels to ignore (the robot).
        quick : bool
            ``H_guess`` is a close prediction (within a pixel or two): track on the
            full-resolution level only, starting at the guess, and fall back to the
            image pyramid when that does not hold (see ``_quick_pass_held``).

        Returns
        -------
        (ndarray of shape (N, 2), ndarray of bool (N,))
            New-frame pixel of every reference corner [px], and which were found.
        """
        n = len(self.ref_px)
        if n == 0:
            return np.full((0, 2), np.nan), np.zeros(0, bool)
        if H_guess is None:
            H_guess = np.eye(3)
        H_guess = np.asarray(H_guess, float)
        x0, y0, x1, y1 = self._roi
        if np.allclose(H_guess, np.eye(3), atol=1e-9):
            warped = grey[y0:y1, x0:x1]
        else:  # only the part of the reference view that holds corners
            shift = np.array([[1.0, 0.0, x0], [0.0, 1.0, y0], [0.0, 0.0, 1.0]])
            warped = cv2.warpPerspective(grey, H_guess @ shift, (x1 - x0, y1 - y0),
                                         flags=cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP)
        p0 = (self.ref_px - (x0, y0)).astype(np.float32).reshape(-1, 1, 2)
        p1, st, fb = self._track_both_ways(warped, p0, quick=quick)
        if quick and not _quick_pass_held(p0, p1, st, fb):
            p1, st, fb = self._track_both_ways(warped, p0, quick=False)
        ok = (st.ravel() == 1) & (fb < FB_LIMIT_PX)
        p1 = p1.reshape(-1, 2) + (x0, y0)
        found = cv2.perspectiveTransform(p1.reshape(-1, 1, 2).astype(np.float64),
                                         H_guess).reshape(-1, 2)
        inside = ((found[:, 0] >= 0) & (found[:, 0] <= grey.shape[1] - 1)
                  & (found[:, 1] >= 0) & (found[:, 1] <= grey.shape[0] - 1))
        ok &= inside
        if ignore is not None:
            ui = np.clip(np.round(found[:, 0]).astype(int), 0, grey.shape[1] - 1)
            vi = np.clip(np.round(found[:, 1]).astype(int), 0, grey.shape[0] - 1)
            ok &= ~np.asarray(ignore, bool)[vi, ui]
        found[~ok] = np.nan
        return found, ok


FB_LIMIT_PX = 0.5
"""Largest forward-backward error of a corner found again [px]."""
QUICK_SHIFT_PX = 2.0
"""A quick (full-resolution) pass holds when the corners' median shift from the guess
is below this [px] ..."""
QUICK_FOUND = 0.7
"""... and at least this share of the corners was found both ways."""


def _quick_pass_held(p0, p1, st, fb):
    """Whether a full-resolution pass from the guess can be trusted: most corners found
    both ways, moved little from the guess (a larger move is beyond the reach of one
    level and means the guess was poor)."""
    good = st & (fb < FB_LIMIT_PX)
    if good.sum() < QUICK_FOUND * len(good):
        return False
    shift = np.linalg.norm(p1.reshape(-1, 2)[good] - p0.reshape(-1, 2)[good], axis=1)
    return bool(np.median(shift) < QUICK_SHIFT_PX)


def _corner_box(px, shape, step, margin):
    """(x0, y0, x1, y1) around points ``px`` with ``margin`` [px], inside an image of
    ``shape``, x0 and y0 multiples of ``step``; the whole image without points."""
    h, w = shape[:2]
    if len(px) == 0:
        return 0, 0, w, h
    lo = np.floor((px.min(axis=0) - margin) / step).astype(int) * step
    hi = np.ceil(px.max(axis=0) + margin).astype(int)
    return (max(int(lo[0]), 0), max(int(lo[1]), 0), min(int(hi[0]), w), min(int(hi[1]), h))


_BLOCK = 7  # Shi-Tomasi block size [px]


def _bucketed_corners(grey, usable_u8, max_points, min_distance_px, cells):
    """Shi-Tomasi corners spread over a grid of cells, (N, 2) float64 [px].

    Each cell with usable pixels gets an equal share of ``max_points``; the quality level
    is relative to the strongest corner of that cell. A low level: floor grain is faint
    next to printed markers.
    """
    ys, xs = np.nonzero(usable_u8)
    if len(xs) == 0:
        return np.zeros((0, 2))
    x0, x1, y0, y1 = xs.min(), xs.max() + 1, ys.min(), ys.max() + 1
    nx, ny = (max(1, int(c)) for c in cells)
    ex = np.linspace(x0, x1, nx + 1).round().astype(int)
    ey = np.linspace(y0, y1, ny + 1).round().astype(int)
    boxes = [(ex[i], ex[i + 1], ey[j], ey[j + 1]) for j in range(ny) for i in range(nx)
             if usable_u8[ey[j]:ey[j + 1], ex[i]:ex[i + 1]].any()]
    if not boxes:
        return np.zeros((0, 2))
    share = max(1, max_points // len(boxes))
    out = []
    h, w = grey.shape[:2]
    # Each cell is searched in its own crop with a margin wider than the corner
    # measure's reach (7 px block, 3 px derivative), so the corners are those of a
    # search over the whole image masked to the cell, at a 48th of the cost.
    pad = _BLOCK // 2 + 3
    for a, b, c, d in boxes:
        u0, v0, u1, v1 = max(a - pad, 0), max(c - pad, 0), min(b + pad, w), min(d + pad, h)
        cell_mask = np.zeros((v1 - v0, u1 - u0), np.uint8)
        cell_mask[c - v0:d - v0, a - u0:b - u0] = usable_u8[c:d, a:b]
        pts = cv2.goodFeaturesToTrack(grey[v0:v1, u0:u1], share, 0.01, min_distance_px,
                                      mask=cell_mask, blockSize=_BLOCK)
        if pts is not None:
            out.append(pts.reshape(-1, 2) + (u0, v0))
    if not out:
        return np.zeros((0, 2))
    return np.vstack(out).astype(np.float64)


def refine_homography(image_a, image_b, H, *, ignore_a=None, ignore_b=None, iterations=2,
                      ransac_px=1.0, tracker=None):
    """Sharpen a homography A -> B by sub-pixel patch tracking through it.

    Corners of A are found in B with :class:`FloorPatchTracker` after warping B by the
    current estimate, and the homography is refitted (RANSAC, then least squares on the
    inliers). Returns a :class:`HomographyMatch`; ``H is None`` when too few corners
    were found.
    """
    ga, gb = to_grey(image_a), to_grey(image_b)
    if tracker is None:
        usable = np.ones(ga.shape, bool) if ignore_a is None else ~np.asarray(ignore_a, bool)
        tracker = FloorPatchTracker(ga, usable)
    H = np.asarray(H, float)
    result = HomographyMatch(None, tracker.n_points, 0, float("nan"), "no corners")
    for _ in range(iterations):
        found, ok = tracker.locate(gb, H, ignore=ignore_b)
        if ok.sum() < 8:
            return HomographyMatch(None, tracker.n_points, int(ok.sum()), float("nan"),
                                   f"only {int(ok.sum())} corners found again")
        pa, pb = tracker.ref_px[ok], found[ok]
        Hn, inl = cv2.findHomography(pa, pb, cv2.RANSAC, ransac_px, maxIters=2000)
        if Hn is None or inl.sum() < 8:
            return HomographyMatch(None, tracker.n_points, 0, float("nan"),
                                   "corners found again do not agree on one plane")
        inl = inl.ravel().astype(bool)
        Hn, _ = cv2.findHomography(pa[inl], pb[inl], 0)
        proj = cv2.perspectiveTransform(pa[inl].reshape(-1, 1, 2), Hn).reshape(-1, 2)
        rms = float(np.sqrt(np.mean(np.sum((proj - pb[inl]) ** 2, axis=1))))
        H = Hn / Hn[2, 2]
        result = HomographyMatch(H, tracker.n_points, int(inl.sum()), rms)
    return result
