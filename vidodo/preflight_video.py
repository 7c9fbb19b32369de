"""The video part of the pre-flight check: the first seconds only.

Reads the first few seconds of the footage, looks for the robot's marker (and, when it is
not there, for any marker of any common dictionary, to name a wrong id or family),
registers the floor on one frame and predicts the marker's cell size in pixels at the
field's corners from that registration (:func:`vidodo.planner.marker_cell_px`).
"""

from __future__ import annotations

from pathlib import Path

import cv2
import numpy as np

from .checklist import Check
from .errors import InputError

__all__ = ["read_first_frames", "video_checks", "find_markers", "OTHER_DICTIONARIES"]

OTHER_DICTIONARIES = ("DICT_4X4_50", "DICT_5X5_100", "DICT_6X6_250", "DICT_7X7_1000",
                      "DICT_ARUCO_ORIGINAL", "DICT_APRILTAG_36h11", "DICT_APRILTAG_25h9",
                      "DICT_APRILTAG_16h5")
"""Dictionaries tried when the profile's marker is not found (largest of each size)."""


def read_first_frames(path: Path, settings):
    """Frames of the first ``settings.first_s`` seconds, every ``frame_step``-th.

    Returns
    -------
    frames : list of (t_s, ndarray)
        Container time [s] and BGR frame.
    duration_s : float or None
        The clip's length from its frame count and rate.
    check : Check
    """
    if not path.is_file():
        return [], None, Check("video", "fail", f"{path}: file not found", "check the path")
    cap = cv2.VideoCapture(str(path))
    try:
        if not cap.isOpened():
            return [], None, Check("video", "fail", f"{path}: cannot be opened",
                                   "give an MP4/MOV the phone wrote")
        fps = cap.get(cv2.CAP_PROP_FPS) or 0.0
        n = cap.get(cv2.CAP_PROP_FRAME_COUNT) or 0.0
        duration = n / fps if fps > 0 and n > 0 else None
        frames, i = [], 0
        while True:
            if not cap.grab():
                break
            t = cap.get(cv2.CAP_PROP_POS_MSEC) / 1000.0
            if t > settings.first_s:
                break
            if i % settings.frame_step == 0:
                ok, frame = cap.retrieve()
                if ok:
                    frames.append((t, frame))
            i += 1
    finally:
        cap.release()
    if not frames:
        return [], duration, Check("video", "fail", f"{path}: no frame could be decoded",
                                   "re-export the clip as H.264 MP4")
    h, w = frames[0][1].shape[:2]
    dur = f"{duration:.1f} s" if duration else "unknown length"
    return frames, duration, Check("video", "pass", f"{w}x{h}, {fps:.1f} fps, {dur}")


def _detector(family):
    code = getattr(cv2.aruco, family, None)
    if code is None:
        raise InputError(f"marker family {family!r} is not an OpenCV predefined dictionary")
    return cv2.aruco.ArucoDetector(cv2.aruco.getPredefinedDictionary(code),
                                   cv2.aruco.DetectorParameters())


def find_markers(frames, family, *, wanted=None, enough=5) -> dict[int, int]:
    """``{id: frames seen in}`` for markers of one dictionary.

    Stops early once the id ``wanted`` has been seen in ``enough`` frames.
    """
    det = _detector(family)
    seen: dict[int, int] = {}
    for _, frame in frames:
        gray = frame if frame.ndim == 2 else cv2.cvtColor(frame, cv2.COLOR_BGR2GRAY)
        _, ids, _ = det.detectMarkers(gray)
        for i in ([] if ids is None else ids.ravel().tolist()):
            seen[int(i)] = seen.get(int(i), 0) + 1
        if wanted is not None and seen.get(wanted, 0) >= enough:
            break
    return seen


def _check_marker(frames, robot, fld) -> Check:
    floor_ids = {(m.family, m.id) for m in fld.floor_markers}
    found_all = []
    for m in robot.markers:
        seen = {i: n for i, n in find_markers(frames, m.family, wanted=m.id).items()
                if (m.family, i) not in floor_ids}
        if m.id in seen:
            found_all.append(f"{m.family} id {m.id} found (in {seen[m.id]} frames looked at)")
            continue
        if seen:
            other = max(seen, key=seen.get)
            return Check("marker", "fail", f"{m.family} id {m.id} not in the first "
                         f"{frames[-1][0]:.1f} s; the video shows id {other} of that "
                         "family", f"set id = {other} in the profile's [[marker]] (or "
                         "mount the marker the profile names)")
        for fam in OTHER_DICTIONARIES:
            if fam == m.family:
                continue
            other = find_markers(frames[:: max(1, len(frames) // 8)], fam)
            if other:
                i = max(other, key=other.get)
                return Check("marker", "fail", f"no {m.family} marker in the first seconds; "
                             f"the video shows {fam} id {i}",
                             f"set family = '{fam}' and id = {i} in the [[marker]]")
        return Check("marker", "fail", f"no marker found in the first {frames[-1][0]:.1f} s",
                     "start filming with the robot in view, marker flat, facing up, "
                     "not glossy; check the marker size")
    return Check("marker", "pass", "; ".join(found_all))


def _register(frames, fld, camera):
    from .errors import RegistrationRefused
    from .registration.registrar import FloorRegistrar

    registrar = FloorRegistrar(fld, camera)
    reg = None
    for t, frame in frames[:: max(1, len(frames) // 3)][:3]:
        try:
            reg = registrar.register(frame, t)
        except RegistrationRefused as exc:  # its self-check says it may be wrong
            return None, Check("floor registration", "fail", str(exc),
                               "keep the whole field in view and sharp, film at 1080p; or "
                               "give tile corners (vidodo pick) or floor fiducials")
        if reg.ok:
            return reg, Check("floor registration", "pass",
                              f"{reg.method}: {reg.rms_px:.2f} px RMS on {reg.n_points} "
                              "points")
    why = reg.reason if reg is not None else "no frame"
    return None, Check("floor registration", "fail", f"the floor did not register: {why}",
                       "check tiles_x, tiles_y, tile_size_m and origin_hint in field.toml; "
                       "keep the whole field in view; a lens profile helps")


def _check_measurable(reg, frames, robot, fld, log, settings) -> Check:
    from .planner import marker_cell_px

    h, w = frames[0][1].shape[:2]
    fx, fy = fld.size_m
    corners = np.array([[0, 0], [fx, 0], [fx, fy], [0, fy]], float)
    img = reg.floor_to_image(corners)
    out = ~((img[:, 0] >= 0) & (img[:, 0] < w) & (img[:, 1] >= 0) & (img[:, 1] < h))
    problems, todo = [], []
    worst = np.inf
    for m in robot.markers:
        cells = marker_cell_px(reg.rvec, reg.tvec, reg.camera_matrix, reg.dist_coeffs,
                               corners, m)
        worst = min(worst, float(np.nanmin(cells)))
        if np.nanmin(cells) < settings.min_cell_px:
            need = m.size_m * settings.min_cell_px / np.nanmin(cells)
            problems.append(f"marker id {m.id} cells {np.nanmin(cells):.1f} px at the far "
                            f"corner (want {settings.min_cell_px:.0f})")
            todo.append(f"print the marker at {need * 1000:.0f} mm or film from nearer")
    if out.any():
        problems.append(f"{int(out.sum())} field corner(s) out of view")
        todo.append("turn or raise the camera so the whole field is in view")
    if log is not None:
        t = log.frame["t_s"].to_numpy(float)
        if t[-1] - t[0] < 3.0:
            problems.append(f"the log covers only {t[-1] - t[0]:.1f} s")
            todo.append("log the whole run; the clocks need motion to line up")
    if problems:
        status = "fail" if worst < 0.75 * settings.min_cell_px else "warn"
        return Check("measurable", status, "; ".join(problems), "; ".join(todo))
    return Check("measurable", "pass", f"smallest marker cell {worst:.1f} px, whole field "
                 "in view")


def video_checks(frames, robot, fld, camera, log, settings) -> list[Check]:
    """Marker, floor registration and measurability checks on the first frames."""
    checks = [_check_marker(frames, robot, fld)]
    reg, c = _register(frames, fld, camera)
    checks.append(c)
    if reg is not None and robot.markers:
        checks.append(_check_measurable(reg, frames, robot, fld, log, settings))
    return checks
