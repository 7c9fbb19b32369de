"""The video entry point: a video becomes the truth track with its 1-sigma.

The frames are decoded (:class:`vidodo.video.VideoReader`, only a few held at once) and
fed to the frame loop (:func:`~vidodo.tracking.frame_loop.track_frames`); the fixes are
then smoothed (:func:`~vidodo.tracking.finish.finish_track`) and the track placed on the
field by the start tile.
"""

from __future__ import annotations

from dataclasses import replace

import cv2

from ..errors import TrackingError
from ..video import VideoReader, VideoTruncatedError
from .finish import finish_track
from .frame_loop import FrameRecords, _track_into
from .result import TrackResult
from .settings import TrackSettings

__all__ = ["track_video", "AHEAD_MB"]

#: Decoded frames the decoder may hold ahead of the frame loop [MB]: while the first
#: frame is registered from scratch (a second or more for the automatic grid), about a
#: second of 1080p60 grey frames is decoded meanwhile instead of waiting.
AHEAD_MB = 128


def track_video(video_path, robot, field, camera=None, settings=None, *, registrar=None,
                progress=None):
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
    settings : TrackSettings, optional
        Refinement, detector, readout time, gap length, corner noise, window search,
        decoding thread, registration policy, jump limits (see :class:`TrackSettings`).
    registrar : object, optional
        Anything with ``register(frame_bgr, t_s)`` -> FrameRegistration; default
        ``registration.registrar.FloorRegistrar(field, camera)``.
    progress : callable, optional
        ``progress(frames_done, frames_total)``.

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
    settings = TrackSettings() if settings is None else settings
    if registrar is None:
        from ..registration.registrar import FloorRegistrar

        registrar = FloorRegistrar(field, camera=camera)
    if settings.readout_s is None:
        readout_s = float(camera.readout_s) if camera is not None else 0.0
        source = "camera profile" if readout_s > 0 else "none"
    else:
        readout_s = float(settings.readout_s)
        source = "given"
    settings = replace(settings, readout_s=readout_s)
    # Detection runs on small windows: OpenCV's own thread pool costs more than it gives
    # there and competes with the decoder's threads, so it is paused while tracking.
    threads = cv2.getNumThreads()
    cv2.setNumThreads(1)
    try:
        result = _track_video(video_path, robot, field, camera, registrar, progress,
                              settings, source)
    finally:
        cv2.setNumThreads(threads)
    return _placed(result, registrar)


def _placed(result: TrackResult, registrar) -> TrackResult:
    """The track placed by the start tile and checked against the field (see
    :func:`vidodo.registration.selfcheck.place_track`); states what positions are
    relative to."""
    from ..registration.selfcheck import place_track

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


def _video_warnings(info, camera, warnings):
    """Warnings about the video's times and size before tracking."""
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


def _track_video(video_path, robot, field, camera, registrar, progress, settings, source):
    warnings: list[str] = []
    acc = FrameRecords()
    truncated = None
    threaded = settings.threaded
    with VideoReader(video_path, threaded=threaded, grey=True, luma_raw=True,
                     decoder_threads=1 if threaded else None, ahead_mb=AHEAD_MB) as reader:
        info = reader.info
        _video_warnings(info, camera, warnings)
        try:
            _track_into(acc, reader, robot, field, registrar, settings, info,
                        lambda: reader.last_frame_repeated, progress)
        except VideoTruncatedError as exc:
            truncated = exc
        timing = reader.timing()
        acc.times.add("decode", reader.decode_s)

    def finish():
        return finish_track(acc, robot, field, settings, readout_source=source,
                            video_info=info, timing=timing, warnings=warnings)

    if truncated is not None:
        partial = None
        if acc.t:
            warnings.append(f"video truncated: {truncated}")
            try:
                partial = finish()
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
        result = finish()
    return replace(result, timings_s=acc.times.as_dict())
