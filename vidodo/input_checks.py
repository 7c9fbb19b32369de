"""Checks of command-line values and input pairs that can be made before any work.

Each raises :class:`~vidodo.errors.InputError` (exit 2) with one line naming the file or
option and what to do, so a mistake is found in a second instead of after a whole
tracking pass.
"""

from __future__ import annotations

import math
from pathlib import Path

from .errors import InputError

__all__ = ["positive_option", "finite_option", "camera_matches_video", "with_file_names"]


def positive_option(name: str, value) -> None:
    """Refuse a value of option ``name`` that is not a finite number above zero."""
    if value is not None and not (math.isfinite(value) and value > 0):
        raise InputError(f"{name} {value}: must be a positive number")


def finite_option(name: str, value) -> None:
    """Refuse a value of option ``name`` that is NaN or infinite."""
    if value is not None and not math.isfinite(value):
        raise InputError(f"{name} {value}: must be a finite number")


def camera_matches_video(camera, video_path) -> None:
    """Refuse a camera profile made for another image size than the video's.

    Parameters
    ----------
    camera : CameraProfile or None
    video_path : path
        The footage; only its header is read.

    Raises
    ------
    InputError
        When the profile's ``width_px`` x ``height_px`` is not the video's frame size
        (either way round for footage with 90/270 degree rotation metadata).
    """
    if camera is None or video_path is None or not Path(video_path).is_file():
        return
    from .video import probe_video

    info = probe_video(video_path)
    size = (int(info.width_px), int(info.height_px))
    prof = (int(camera.width_px), int(camera.height_px))
    ok = {size, size[::-1]} if info.orientation_deg in (90, 270) else {size}
    if prof not in ok:
        raise InputError(
            f"{camera.path or 'camera profile'}: made for {prof[0]} x {prof[1]} px images "
            f"but {video_path} is {size[0]} x {size[1]} px; calibrate the lens in the "
            "video mode the run was filmed in (vidodo lens), or leave out --camera")


def with_file_names(exc: Exception, paths) -> Exception:
    """``exc`` with the input files put in front of its message if it names none of them.

    Errors from the measuring stages ("only 1 usable sample") do not know which files
    they came from; the command does.
    """
    names = [str(p) for p in paths if p is not None]
    msg = str(exc)
    if names and not any(n in msg or Path(n).name in msg for n in names):
        exc.args = (f"{', '.join(names)}: {msg}",) + tuple(exc.args[1:])
    return exc
