"""Lens calibration: intrinsics and distortion from views of a flat calibration board.

A checkerboard (inner corners ``cols x rows``) or a ChArUco board is photographed from
several angles; :func:`calibrate_images` finds the board in every view and fits the
pinhole model with OpenCV's radial-tangential distortion (``cv2.calibrateCamera``,
after Zhang, "A flexible new technique for camera calibration", IEEE PAMI 22(11),
2000). The result is a :class:`vidodo.profiles.CameraProfile` plus a
:class:`LensReport` saying how well it fits and which views were left out.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import cv2
import numpy as np

from .errors import CalibrationError, InputError
from .profiles import CameraProfile

__all__ = [
    "LensReport",
    "BoardSpec",
    "LensModel",
    "board_points_m",
    "find_board",
    "calibrate_views",
    "calibrate_images",
    "calibrate_video",
    "read_image",
    "IMAGE_SUFFIXES",
]

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".bmp", ".tif", ".tiff", ".webp")

#: Fewest views with a found board that a calibration accepts.
MIN_VIEWS = 3


@dataclass(frozen=True)
class BoardSpec:
    """A flat calibration board.

    For a checkerboard, ``cols x rows`` are the *inner* corners; for a ChArUco board
    (``dictionary`` set) they are the number of *squares*.
    """

    cols: int
    rows: int
    square_m: float
    """Side of one board square [m]."""
    dictionary: str | None = None
    """cv2.aruco predefined dictionary name for a ChArUco board; None: checkerboard."""
    marker_m: float | None = None
    """Side of the ChArUco markers [m] (default 0.7 * square_m)."""

    def validate(self):
        """Raise InputError for impossible board sizes."""
        if self.cols < 2 or self.rows < 2:
            raise InputError(f"board {self.cols}x{self.rows}: need at least 2x2; "
                             "give the inner corners of a checkerboard")
        if not self.square_m > 0:
            raise InputError(f"board square size {self.square_m} m must be positive")
        if self.dictionary is not None and not hasattr(cv2.aruco, self.dictionary):
            raise InputError(f"unknown marker dictionary {self.dictionary!r}; "
                             "use a cv2.aruco name such as DICT_4X4_50")


@dataclass(frozen=True)
class LensReport:
    """How a lens calibration went."""

    image_size_px: tuple[int, int]
    """(width, height) of the views [px]."""
    n_views: int
    """Views offered."""
    n_used: int
    """Views in which the board was found and that were used."""
    rms_px: float
    """RMS reprojection error over all corners of the used views [px]."""
    per_view_rms_px: tuple[float, ...]
    """RMS reprojection error of each used view [px]."""
    used: tuple[str, ...]
    """Names of the used views."""
    skipped: tuple[tuple[str, str], ...] = ()
    """(name, reason) of each view left out."""
    flags: tuple[str, ...] = ()
    """cv2.calibrateCamera flags in force."""
    warnings: list[str] = field(default_factory=list)
    """Things the user should know (few views, high error)."""

    def lines(self) -> list[str]:
        """The report as short human-readable lines."""
        out = [
            f"views: {self.n_used} used of {self.n_views}",
            f"reprojection error: {self.rms_px:.3f} px RMS",
        ]
        if self.per_view_rms_px:
            worst = int(np.argmax(self.per_view_rms_px))
            out.append(f"worst view: {self.used[worst]} "
                       f"({self.per_view_rms_px[worst]:.3f} px RMS)")
        out += [f"skipped {name}: {why}" for name, why in self.skipped]
        out += [f"warning: {w}" for w in self.warnings]
        return out


def read_image(path, *, grey=False):
    """Read one image file; raise InputError naming the file if it cannot be read."""
    p = Path(path)
    if not p.is_file():
        raise InputError(f"{p}: image not found; check the path")
    img = cv2.imread(str(p), cv2.IMREAD_GRAYSCALE if grey else cv2.IMREAD_COLOR)
    if img is None or img.size == 0:
        raise InputError(f"{p}: cannot be read as an image; give a PNG or JPEG file")
    return img


def board_points_m(board: BoardSpec):
    """Checkerboard inner corners on the board plane, row by row.

    Returns
    -------
    ndarray of shape (cols*rows, 3)
        Corner positions, z = 0 [m].
    """
    gx, gy = np.meshgrid(np.arange(board.cols), np.arange(board.rows))
    pts = np.column_stack([gx.ravel(), gy.ravel(), np.zeros(gx.size)])
    return pts.astype(np.float64) * board.square_m


def _charuco_board(board: BoardSpec):
    dictionary = cv2.aruco.getPredefinedDictionary(getattr(cv2.aruco, board.dictionary))
    marker_m = board.marker_m if board.marker_m else 0.7 * board.square_m
    return cv2.aruco.CharucoBoard((board.cols, board.rows), board.square_m, marker_m,
                                  dictionary)


def find_board(grey, board: BoardSpec, *, charuco_detector=None):
    """Find the board's corners in one greyscale view.

    Parameters
    ----------
    grey : ndarray of shape (H, W), uint8
    board : BoardSpec
    charuco_detector : cv2.aruco.CharucoDetector, optional
        Reused between views for speed (ChArUco boards only).

    Returns
    -------
    (object_points, image_points) or None
        ndarray of shape (N, 3) [m] and (N, 2) [px], or None when not found.
    """
    if board.dictionary is None:
        size = (board.cols, board.rows)
        found, corners = cv2.findChessboardCorners(
            grey, size, flags=cv2.CALIB_CB_ADAPTIVE_THRESH | cv2.CALIB_CB_NORMALIZE_IMAGE)
        if not found:
            return None
        crit = (cv2.TERM_CRITERIA_EPS + cv2.TERM_CRITERIA_MAX_ITER, 50, 1e-3)
        corners = cv2.cornerSubPix(grey, corners, (11, 11), (-1, -1), crit)
        return board_points_m(board), corners.reshape(-1, 2).astype(np.float64)
    det = charuco_detector or cv2.aruco.CharucoDetector(_charuco_board(board))
    ch_corners, ch_ids, _mc, _mi = det.detectBoard(grey)
    if ch_ids is None or len(ch_ids) < 6:
        return None
    obj = det.getBoard().getChessboardCorners()[ch_ids.ravel()]
    return np.asarray(obj, np.float64), ch_corners.reshape(-1, 2).astype(np.float64)


@dataclass(frozen=True)
class LensModel:
    """Which lens parameters the calibration fits."""

    fix_aspect: bool = False
    """Force fx = fy (square pixels)."""
    zero_tangent: bool = False
    """Fix the tangential terms p1, p2 at zero."""
    rational: bool = False
    """Use OpenCV's 8-term rational model."""


def calibrate_views(views, image_size, board: BoardSpec, *, model: LensModel | None = None,
                    names=None, n_offered=None, skipped=()):
    """Calibrate from board detections already made.

    Parameters
    ----------
    views : list of (ndarray (N, 3), ndarray (N, 2))
        Board points [m] and their pixels [px] per view.
    image_size : (int, int)
        (width, height) [px].
    board : BoardSpec
    model : LensModel, optional
        Which parameters to fit (default: all of OpenCV's 5-term model).
    names : list of str, optional
        Label of each view (for the report).
    n_offered : int, optional
        Images or frames offered, with or without a board found.
    skipped : sequence of str
        Labels of those without a usable board.

    Returns
    -------
    (CameraProfile, LensReport)

    Raises
    ------
    CalibrationError
        Fewer than :data:`MIN_VIEWS` views, or the fit failed.
    """
    names = list(names) if names is not None else [f"view {i + 1}" for i in range(len(views))]
    if len(views) < MIN_VIEWS:
        raise CalibrationError(
            f"board found in {len(views)} view(s), need at least {MIN_VIEWS}; "
            "film the board from more angles, filling more of the frame")
    flags = 0
    flag_names = []
    model = model or LensModel()
    if model.fix_aspect:
        flags |= cv2.CALIB_FIX_ASPECT_RATIO
        flag_names.append("CALIB_FIX_ASPECT_RATIO")
    if model.zero_tangent:
        flags |= cv2.CALIB_ZERO_TANGENT_DIST
        flag_names.append("CALIB_ZERO_TANGENT_DIST")
    if model.rational:
        flags |= cv2.CALIB_RATIONAL_MODEL
        flag_names.append("CALIB_RATIONAL_MODEL")
    obj = [v[0].astype(np.float32) for v in views]
    img = [v[1].astype(np.float32).reshape(-1, 1, 2) for v in views]
    k0 = np.eye(3)
    if model.fix_aspect:  # the aspect ratio fixed is fx/fy of the initial guess
        flags |= cv2.CALIB_USE_INTRINSIC_GUESS
        f0 = 0.9 * max(image_size)
        k0 = np.array([[f0, 0, image_size[0] / 2], [0, f0, image_size[1] / 2], [0, 0, 1]])
    crit = (cv2.TERM_CRITERIA_COUNT + cv2.TERM_CRITERIA_EPS, 100, 1e-10)
    try:
        rms, k, dist, rvecs, tvecs = cv2.calibrateCamera(
            obj, img, tuple(int(s) for s in image_size), k0, None, flags=flags, criteria=crit)
    except cv2.error as exc:
        raise CalibrationError(f"lens fit failed in OpenCV ({exc.err}); "
                               "check the board size and the views") from None
    per_view = []
    for o, i, r, t in zip(obj, img, rvecs, tvecs, strict=True):
        proj, _ = cv2.projectPoints(o, r, t, k, dist)
        per_view.append(float(np.sqrt(np.mean(np.sum((proj - i) ** 2, axis=2)))))
    dist = np.asarray(dist, float).ravel()
    warnings = []
    if len(views) < 8:
        warnings.append(f"only {len(views)} views; 10 or more from varied angles give "
                        "a steadier fit (common practice)")
    if rms > 1.0:
        warnings.append(f"reprojection error {rms:.2f} px is high; look for blurred views "
                        "or a wrong board size")
    if not np.all(np.isfinite(k)) or k[0, 0] <= 0 or k[1, 1] <= 0:
        raise CalibrationError("lens fit gave a non-positive focal length; "
                               "use views that tilt the board more")
    cam = CameraProfile(
        width_px=int(image_size[0]), height_px=int(image_size[1]),
        fx_px=float(k[0, 0]), fy_px=float(k[1, 1]), cx_px=float(k[0, 2]),
        cy_px=float(k[1, 2]), distortion=tuple(float(v) for v in dist))
    report = LensReport(
        image_size_px=(int(image_size[0]), int(image_size[1])),
        n_views=int(n_offered if n_offered is not None else len(views)),
        n_used=len(views), rms_px=float(rms), per_view_rms_px=tuple(per_view),
        used=tuple(names), skipped=tuple(skipped), flags=tuple(flag_names),
        warnings=warnings)
    return cam, report


def _collect(frames, board: BoardSpec):
    """Detect the board in (name, grey image) pairs."""
    det = None
    if board.dictionary is not None:
        det = cv2.aruco.CharucoDetector(_charuco_board(board))
    views, names, skipped, size, n = [], [], [], None, 0
    for name, grey in frames:
        n += 1
        this = (grey.shape[1], grey.shape[0])
        if size is None:
            size = this
        elif this != size:
            raise InputError(f"{name}: size {this[0]}x{this[1]} differs from the first "
                             f"view's {size[0]}x{size[1]}; use views from one camera mode")
        found = find_board(grey, board, charuco_detector=det)
        if found is None:
            skipped.append((name, f"board {board.cols}x{board.rows} not found"))
            continue
        views.append(found)
        names.append(name)
    return views, names, skipped, size, n


def calibrate_images(paths, board=(9, 6), square_m=0.025, *, dictionary=None,
                     marker_m=None, model: LensModel | None = None):
    """Calibrate a lens from still images of a board.

    Parameters
    ----------
    paths : iterable of path-like
        Image files; a folder is expanded to its images (sorted by name).
    board : (int, int)
        Checkerboard inner corners (cols, rows), or ChArUco squares when
        ``dictionary`` is given.
    square_m : float
        Side of one board square [m]. Only the extrinsics depend on it.
    dictionary : str, optional
        cv2.aruco dictionary name of a ChArUco board.
    marker_m : float, optional
        ChArUco marker side [m].
    model : LensModel, optional
        Which lens parameters to fit.

    Returns
    -------
    (CameraProfile, LensReport)

    Raises
    ------
    InputError
        An image cannot be read or the sizes differ.
    CalibrationError
        The board was found in too few images.
    """
    spec = BoardSpec(int(board[0]), int(board[1]), float(square_m), dictionary, marker_m)
    spec.validate()
    files = []
    for p in paths:
        p = Path(p)
        if p.is_dir():
            files += sorted(q for q in p.iterdir() if q.suffix.lower() in IMAGE_SUFFIXES)
        else:
            files.append(p)
    if not files:
        raise InputError("no images given; pass image files or a folder holding them")
    frames = ((f.name, read_image(f, grey=True)) for f in files)
    views, names, skipped, size, n = _collect(frames, spec)
    return calibrate_views(views, size, spec, model=model, names=names, n_offered=n,
                           skipped=skipped)


def calibrate_video(path, board=(9, 6), square_m=0.025, *, every_s=0.5, max_views=40,
                    dictionary=None, marker_m=None, model: LensModel | None = None):
    """Calibrate a lens from a clip of a board, using one frame every ``every_s`` seconds.

    Parameters
    ----------
    path : path-like
        Video file.
    every_s : float
        Spacing of the frames tried [s].
    max_views : int
        At most this many views with a found board are used (spread over the clip).
    board, square_m, dictionary, marker_m
        As for :func:`calibrate_images`.
    model : LensModel, optional
        Which lens parameters to fit.

    Returns
    -------
    (CameraProfile, LensReport)
    """
    spec = BoardSpec(int(board[0]), int(board[1]), float(square_m), dictionary, marker_m)
    spec.validate()
    p = Path(path)
    if not p.is_file():
        raise InputError(f"{p}: video not found; check the path")
    cap = cv2.VideoCapture(str(p))
    if not cap.isOpened():
        raise InputError(f"{p}: cannot be opened as a video; give an MP4, MOV or MKV file")

    def frames():
        next_t = 0.0
        i = 0
        got_any = False
        while True:
            ok, frame = cap.read()
            if not ok:
                break
            got_any = True
            t_s = cap.get(cv2.CAP_PROP_POS_MSEC) / 1000.0
            if t_s + 1e-9 >= next_t:
                next_t = t_s + every_s
                yield f"{p.name}@{t_s:.2f}s", cv2.cvtColor(frame, cv2.COLOR_BGR2GRAY)
            i += 1
        if not got_any:
            raise InputError(f"{p}: no frame could be decoded; check the file")

    try:
        views, names, skipped, size, n = _collect(frames(), spec)
    finally:
        cap.release()
    if len(views) > max_views:
        keep = np.linspace(0, len(views) - 1, max_views).round().astype(int)
        views = [views[i] for i in keep]
        names = [names[i] for i in keep]
    return calibrate_views(views, size, spec, model=model, names=names, n_offered=n,
                           skipped=skipped)
