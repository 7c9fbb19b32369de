"""Writing video whose frames carry exact, possibly uneven, presentation times.

Phones record with a variable frame rate: each frame's presentation time (PTS) is when
it was captured, not ``index / fps``. :func:`write_video` encodes BGR frames through
PyAV (FFmpeg's libraries, with x264 and x265, in the ``av`` wheel) at a constant nominal
rate for rate control, without B-frames so that packets leave the encoder in
presentation order, and stamps packet ``i`` with ``frame_times_s[i]`` on a 90 kHz
clock before it is muxed. The MP4 muxer then writes the timing tables itself (one
``stts`` delta per frame, ISO/IEC 14496-12 sec. 8.6.1.2, and an edit list delaying the
first frame to ``frame_times_s[0]``, sec. 8.6.6). Packet ``i`` leaves the encoder only
after frame ``i`` went in, so the times may also come one by one with the frames (pairs
``(frame, t_s)``, as while decoding footage): each is known before its packet is muxed.

Readers see these times through ffprobe's ``pts_time`` and OpenCV's
``CAP_PROP_POS_MSEC`` after ``read()``; OpenCV counts from the first frame, so it
reports ``frame_times_s - frame_times_s[0]`` (``vidodo.video`` adds the stream's start
time back and hands out ``frame_times_s``). Times are rounded to the 90 kHz clock (at
most 5.6 us off).
"""

from __future__ import annotations

import math
import os
from collections.abc import Iterable
from fractions import Fraction
from pathlib import Path

import numpy as np

from .errors import InputError, VidodoError
from .outputs import atomic_file

__all__ = ["write_video", "CODECS", "TIMESCALE_HZ"]

TIMESCALE_HZ = 90000
"""Clock of the written timestamps [1/s] (the common MPEG 90 kHz clock)."""

CODECS = {
    "h264": ("libx264", {"bf": "0"}),
    "hevc": ("libx265", {"x265-params": "bframes=0:log-level=error"}),
    "mpeg4": ("mpeg4", {"bf": "0"}),
}
"""FFmpeg encoder and its options per codec name ('h265' is accepted as 'hevc')."""


def _check_times(frame_times_s) -> np.ndarray:
    t = np.asarray(frame_times_s, dtype=float).ravel()
    if t.size == 0:
        raise InputError("write_video: frame_times_s is empty; give one time per frame")
    if not np.all(np.isfinite(t)) or t[0] < 0:
        raise InputError("write_video: frame_times_s must be finite and not negative")
    bad = np.flatnonzero(np.diff(t) <= 0)
    if bad.size:
        i = int(bad[0]) + 1
        raise InputError(
            f"write_video: frame {i} time {t[i]:.6f} s does not come after frame {i - 1} "
            f"({t[i - 1]:.6f} s); frame times must strictly increase"
        )
    return t


def _unpaired(pairs, ticks: list, path):
    """The frames of ``(frame, t_s)`` pairs; each time is checked as :func:`_check_times`
    checks a whole array and appended to ``ticks`` (90 kHz, rounded as there) before its
    frame is handed on."""
    prev = None
    for i, item in enumerate(pairs):
        if not isinstance(item, tuple) or len(item) != 2:
            raise InputError(f"{path}: item {i} is not a (frame, t_s) pair; give the frame "
                             "times with the frames or as frame_times_s")
        frame, t_s = item
        t_s = float(t_s)
        if not math.isfinite(t_s) or (prev is None and t_s < 0):
            raise InputError("write_video: frame_times_s must be finite and not negative")
        if prev is not None and not t_s > prev:
            raise InputError(
                f"write_video: frame {i} time {t_s:.6f} s does not come after frame {i - 1} "
                f"({prev:.6f} s); frame times must strictly increase"
            )
        ticks.append(int(np.round(np.float64(t_s) * TIMESCALE_HZ)))
        prev = t_s
        yield frame


def write_video(path, frames: Iterable, frame_times_s=None, *, codec="h264", crf=18,
                fps_nominal=30.0, preset="veryfast") -> None:
    """Encode BGR frames to an MP4 whose frame ``i`` is presented at ``frame_times_s[i]``.

    Frames are encoded one at a time, so a clip of any length needs only one frame in
    memory. The file appears at ``path`` only when everything succeeded.

    Parameters
    ----------
    path : str or Path
        Output file (.mp4).
    frames : iterable of ndarray of shape (H, W, 3), uint8, or of (frame, t_s) pairs
        BGR frames, all the same size; H and W must be even. A frame may also come as
        I420, shape (3H/2, W) (``cv2.cvtColor(bgr, cv2.COLOR_BGR2YUV_I420)``: BT.601
        limited range as the encoder's own conversion, 2 x 2 averaged colour planes, at
        a tenth of its CPU time); it is encoded as it is. Without
        ``frame_times_s``, each item is a pair ``(frame, t_s)``: the frame with its
        presentation time [s] (for a stream whose times come with its frames, such as
        one being decoded; only the times are kept, never the frames).
    frame_times_s : array_like of shape (N,), optional
        Presentation time of each frame, strictly increasing, first >= 0 [s]; None
        when the times come with the frames.
    codec : {'h264', 'hevc', 'mpeg4'}
        Video codec (x264, x265, or FFmpeg's MPEG-4 part 2 encoder).
    crf : float
        Constant rate factor for h264/hevc (lower is better quality); for mpeg4 it
        is mapped to a fixed quantiser ``max(2, round(crf / 6))``.
    fps_nominal : float
        Rate the encoder is told about (rate control only) [1/s].
    preset : str
        x264/x265 speed preset.

    Raises
    ------
    InputError
        Bad times, a frame of the wrong shape or type, or a frame count that differs
        from the number of times.
    VidodoError
        The encoder failed (its message is included, on one line).
    """
    paired = frame_times_s is None
    t = None if paired else _check_times(frame_times_s)
    codec = {"h265": "hevc", "x264": "h264", "x265": "hevc"}.get(codec, codec)
    if codec not in CODECS:
        raise InputError(f"write_video: codec {codec!r} unknown; use one of {sorted(CODECS)}")
    if not (fps_nominal > 0):
        raise InputError(f"write_video: fps_nominal must be positive, got {fps_nominal}")
    path = Path(path)
    if paired:
        ticks = []  # filled while the frames are read: frame k's tick before it is encoded
        it = _unpaired(frames, ticks, path)
    else:
        ticks = np.round(t * TIMESCALE_HZ).astype(np.int64)
        it = iter(frames)
    try:
        first = next(it)
    except StopIteration:
        raise InputError(f"{path}: no frames to write") from None
    h, w = _check_frame(first, 0, None, path)
    if h % 2 or w % 2:
        raise InputError(f"{path}: frame size {w}x{h} must be even for 4:2:0 video")
    with atomic_file(path) as tmp:
        n = _encode(tmp, first, it, ticks, codec, (h, w),
                    _quality(codec, crf, preset), fps_nominal, path)
        if n != len(ticks):
            raise InputError(
                f"{path}: got {n} frames but {len(ticks)} frame times; give one time per frame"
            )
        _usual_mode(tmp)


def _quality(codec, crf, preset) -> dict:
    """Encoder options for the wanted quality."""
    if codec == "mpeg4":  # a fixed quantiser, as ffmpeg's -q:v sets it (FF_QP2LAMBDA = 118)
        return {"flags": "+qscale", "global_quality": str(118 * max(2, round(crf / 6)))}
    return {"crf": str(crf), "preset": preset}


def _encode(tmp, first, it, ticks, codec, shape, quality, fps_nominal, path) -> int:
    """Encode and mux every frame; packet ``k`` gets ``ticks[k]`` (no B-frames, so
    packets leave the encoder in presentation order). Returns the frame count."""
    import av

    name, options = CODECS[codec]
    clock = Fraction(1, TIMESCALE_HZ)
    n = 0
    try:
        av.Codec(name, "w")
    except av.codec.codec.UnknownCodecError:
        usable = sorted(c for c, (e, _) in CODECS.items() if e in av.codecs_available)
        raise VidodoError(f"{path}: this FFmpeg build has no encoder {name!r} for {codec}; "
                          f"use one of {usable}") from None
    try:
        # the edit list delaying the first frame counts in the movie's timescale
        # (1000 Hz unless told): give it the 90 kHz clock too
        with av.open(str(tmp), "w", format="mp4",
                     options={"movie_timescale": str(TIMESCALE_HZ)}) as out:
            stream = out.add_stream(name, rate=Fraction(fps_nominal).limit_denominator(1001))
            stream.height, stream.width = shape
            stream.pix_fmt = "yuv420p"
            stream.time_base = clock  # the container's clock: no second rounding
            stream.options = {**options, **quality}
            if codec == "hevc":
                stream.codec_tag = "hvc1"
            muxed = 0

            def mux(packets):
                nonlocal muxed
                for pkt in packets:
                    if muxed >= len(ticks):
                        raise InputError(f"{path}: got more frames than frame times; give "
                                         "one time per frame")
                    pkt.pts = pkt.dts = int(ticks[muxed])
                    pkt.time_base = clock
                    muxed += 1
                    out.mux(pkt)

            frame = first
            while frame is not None:
                _check_frame(frame, n, shape, path)
                vf = av.VideoFrame.from_ndarray(np.ascontiguousarray(frame),
                                                format="yuv420p" if frame.ndim == 2 else "bgr24")
                vf.pts = n
                mux(stream.encode(vf))
                n += 1
                frame = next(it, None)
            mux(stream.encode(None))
    except av.FFmpegError as exc:
        raise VidodoError(f"{path}: the {name} encoder failed at frame {n}: "
                          + " ".join(str(exc).split())) from None
    return n


def _usual_mode(path: Path) -> None:
    """Give the file the permissions a normal new file gets (temporary files are 0600)."""
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(path, 0o666 & ~umask)


def _check_frame(frame, i, shape, path):
    """The (height, width) of a BGR frame, or of an I420 one (2-D: the Y rows, then the U
    and the V plane, each a quarter of Y, as ``cv2.COLOR_BGR2YUV_I420`` makes)."""
    i420 = isinstance(frame, np.ndarray) and frame.ndim == 2 and frame.shape[0] % 3 == 0
    if not isinstance(frame, np.ndarray) or frame.dtype != np.uint8 or not (
            i420 or (frame.ndim == 3 and frame.shape[2] == 3)):
        raise InputError(f"{path}: frame {i} is not an (H, W, 3) uint8 BGR image (nor a "
                         "(3H/2, W) I420 one)")
    size = (frame.shape[0] * 2 // 3, frame.shape[1]) if i420 else frame.shape[:2]
    if shape is not None and size != shape:
        raise InputError(
            f"{path}: frame {i} is {size[1]}x{size[0]}, the first frame is "
            f"{shape[1]}x{shape[0]}; all frames must have one size"
        )
    return size
