"""Writing video whose frames carry exact, possibly uneven, presentation times.

Phones record with a variable frame rate: each frame's presentation time (PTS) is when
it was captured, not ``index / fps``. :func:`write_video` streams raw BGR frames to
Debian's ``ffmpeg`` (libx264, libx265 or its own MPEG-4 part 2 encoder; without ffmpeg,
MPEG-4 part 2 through the OpenCV wheel's writer) at a constant nominal rate, then
rewrites the timing tables of the finished MP4 so that frame ``i`` is presented at
``frame_times_s[i]``:

* the Decoding Time to Sample box (``stts``) gets one delta per frame
  (ISO/IEC 14496-12, sec. 8.6.1.2); encoding without B-frames keeps decoding order equal
  to presentation order, so no composition offsets (``ctts``) are needed;
* an empty edit in the edit list (``elst``, sec. 8.6.6) delays the first frame to
  ``frame_times_s[0]`` when that is not zero;
* the movie, track and media durations follow, all on a 90 kHz clock.

Readers see these times through ffprobe's ``pts_time`` and OpenCV's
``CAP_PROP_POS_MSEC`` after ``read()``; OpenCV counts from the first frame, so it
reports ``frame_times_s - frame_times_s[0]`` (``vidodo.video`` adds the stream's start
time back and hands out ``frame_times_s``).
"""

from __future__ import annotations

import os
import shutil
import struct
import subprocess
from collections.abc import Iterable
from pathlib import Path

import numpy as np

from .errors import InputError, VidodoError
from .outputs import atomic_file

__all__ = ["write_video", "CODECS", "retime_mp4"]

TIMESCALE_HZ = 90000
"""Clock of the written timing tables [1/s] (the common MPEG 90 kHz clock)."""

CODECS = {
    "h264": ["-c:v", "libx264", "-bf", "0", "-pix_fmt", "yuv420p"],
    "hevc": ["-c:v", "libx265", "-x265-params", "bframes=0:log-level=error",
             "-tag:v", "hvc1", "-pix_fmt", "yuv420p"],
    "mpeg4": ["-c:v", "mpeg4", "-bf", "0", "-pix_fmt", "yuv420p"],
}
"""ffmpeg arguments per codec name ('h265' is accepted as 'hevc')."""


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


def _ffmpeg_path(codec: str) -> str | None:
    """ffmpeg's path; None when it is missing and OpenCV's own MPEG-4 writer can serve."""
    exe = shutil.which("ffmpeg")
    if exe is None and codec != "mpeg4":
        raise VidodoError(
            f"ffmpeg not found, needed for {codec} video; install it (Debian/Ubuntu: "
            "apt-get install ffmpeg) or ask for codec 'mpeg4'"
        )
    return exe


def _opencv_frames(tmp: Path, first, it, shape, fps_nominal, path) -> int:
    """Write MPEG-4 part 2 with the OpenCV wheel's own encoder (no ffmpeg needed)."""
    import cv2

    h, w = shape
    writer = cv2.VideoWriter(str(tmp), cv2.VideoWriter_fourcc(*"mp4v"), fps_nominal, (w, h))
    if not writer.isOpened():
        raise VidodoError(f"{path}: OpenCV cannot write MPEG-4 here; install ffmpeg")
    n = 0
    try:
        frame = first
        while frame is not None:
            _check_frame(frame, n, shape, path)
            writer.write(frame)
            n += 1
            frame = next(it, None)
    finally:
        writer.release()
    return n


def write_video(path, frames: Iterable[np.ndarray], frame_times_s, *, codec="h264", crf=18,
                fps_nominal=30.0, preset="veryfast") -> None:
    """Encode BGR frames to an MP4 whose frame ``i`` is presented at ``frame_times_s[i]``.

    Frames are streamed to ffmpeg one at a time, so a clip of any length needs only one
    frame in memory. The file appears at ``path`` only when everything succeeded.

    Parameters
    ----------
    path : str or Path
        Output file (.mp4).
    frames : iterable of ndarray of shape (H, W, 3), uint8
        BGR frames, all the same size; H and W must be even.
    frame_times_s : array_like of shape (N,), or callable
        Presentation time of each frame, strictly increasing, first >= 0 [s]; or a
        function returning them, called after the last frame (for a stream whose times
        come with its frames).
    codec : {'h264', 'hevc', 'mpeg4'}
        Video codec (libx264, libx265, or ffmpeg's MPEG-4 part 2 encoder).
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
        ffmpeg is missing or failed (its last message is included).
    """
    lazy = callable(frame_times_s)
    t = None if lazy else _check_times(frame_times_s)
    codec = {"h265": "hevc", "x264": "h264", "x265": "hevc"}.get(codec, codec)
    if codec not in CODECS:
        raise InputError(f"write_video: codec {codec!r} unknown; use one of {sorted(CODECS)}")
    if not (fps_nominal > 0):
        raise InputError(f"write_video: fps_nominal must be positive, got {fps_nominal}")
    exe = _ffmpeg_path(codec)
    path = Path(path)
    it = iter(frames)
    try:
        first = next(it)
    except StopIteration:
        raise InputError(f"{path}: no frames to write") from None
    h, w = _check_frame(first, 0, None, path)
    if h % 2 or w % 2:
        raise InputError(f"{path}: frame size {w}x{h} must be even for 4:2:0 video")
    quality = (["-q:v", str(max(2, round(crf / 6)))] if codec == "mpeg4"
               else ["-crf", str(crf), "-preset", preset])
    with atomic_file(path) as tmp:
        if exe is None:
            n = _opencv_frames(tmp, first, it, (h, w), fps_nominal, path)
            t = _check_times(frame_times_s()) if lazy else t
            if n != t.size:
                raise InputError(
                    f"{path}: got {n} frames but {t.size} frame times; give one time per frame"
                )
            retime_mp4(tmp, t)
            _usual_mode(tmp)
            return
        cmd = [exe, "-hide_banner", "-nostdin", "-loglevel", "error", "-y",
               "-f", "rawvideo", "-pix_fmt", "bgr24", "-s", f"{w}x{h}",
               "-framerate", f"{fps_nominal:.6f}", "-i", "pipe:0",
               *CODECS[codec], *quality, "-an",
               "-video_track_timescale", str(TIMESCALE_HZ), "-f", "mp4", str(tmp)]
        n = _pipe_frames(cmd, first, it, (h, w), path)
        t = _check_times(frame_times_s()) if lazy else t
        if n != t.size:
            raise InputError(
                f"{path}: got {n} frames but {t.size} frame times; give one time per frame"
            )
        retime_mp4(tmp, t)
        _usual_mode(tmp)


def _usual_mode(path: Path) -> None:
    """Give the file the permissions a normal new file gets (temporary files are 0600)."""
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(path, 0o666 & ~umask)


def _check_frame(frame, i, shape, path):
    if not isinstance(frame, np.ndarray) or frame.dtype != np.uint8 or frame.ndim != 3 \
            or frame.shape[2] != 3:
        raise InputError(f"{path}: frame {i} is not an (H, W, 3) uint8 BGR image")
    if shape is not None and frame.shape[:2] != shape:
        raise InputError(
            f"{path}: frame {i} is {frame.shape[1]}x{frame.shape[0]}, the first frame is "
            f"{shape[1]}x{shape[0]}; all frames must have one size"
        )
    return frame.shape[:2]


def _pipe_frames(cmd, first, it, shape, path) -> int:
    proc = subprocess.Popen(cmd, stdin=subprocess.PIPE, stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE)
    n = 0
    try:
        frame = first
        while frame is not None:
            _check_frame(frame, n, shape, path)
            proc.stdin.write(np.ascontiguousarray(frame).data)
            n += 1
            frame = next(it, None)
        proc.stdin.close()
    except BrokenPipeError:
        pass
    except BaseException:
        proc.kill()
        proc.wait()
        raise
    err = proc.stderr.read().decode(errors="replace").strip()
    rc = proc.wait()
    if rc != 0:
        last = err.splitlines()[-1] if err else f"exit code {rc}"
        raise VidodoError(f"{path}: ffmpeg failed at frame {n}: {last}")
    return n


# ----------------------------------------------------------------- MP4 retiming
_CONTAINERS = {b"moov", b"trak", b"edts", b"mdia", b"minf", b"stbl"}


def _parse_boxes(data: bytes, start: int, end: int) -> list:
    """Split ``data[start:end]`` into [type, payload-or-children] (ISO/IEC 14496-12 4.2)."""
    out = []
    pos = start
    while pos + 8 <= end:
        size, kind = struct.unpack(">I4s", data[pos:pos + 8])
        head = 8
        if size == 1:
            size = struct.unpack(">Q", data[pos + 8:pos + 16])[0]
            head = 16
        elif size == 0:
            size = end - pos
        if size < head or pos + size > end:
            raise VidodoError("MP4 written by ffmpeg has a malformed box; cannot set frame times")
        body = data[pos + head:pos + size]
        if kind in _CONTAINERS:
            out.append([kind, _parse_boxes(data, pos + head, pos + size)])
        else:
            out.append([kind, bytes(body)])
        pos += size
    return out


def _serialise(boxes: list) -> bytes:
    parts = []
    for kind, body in boxes:
        payload = _serialise(body) if isinstance(body, list) else body
        parts.append(struct.pack(">I4s", 8 + len(payload), kind) + payload)
    return b"".join(parts)


def _child(boxes, kind):
    for b in boxes:
        if b[0] == kind:
            return b
    return None


def _set_duration(body: bytes, off_v0: int, off_v1: int, duration: int) -> bytes:
    """Replace the duration field of mvhd/tkhd/mdhd (version 0: 32 bit, 1: 64 bit)."""
    b = bytearray(body)
    if b[0] == 1:
        b[off_v1:off_v1 + 8] = struct.pack(">Q", duration)
    else:
        if duration >= 2**32:
            raise VidodoError("video too long for a version-0 MP4 header")
        b[off_v0:off_v0 + 4] = struct.pack(">I", duration)
    return bytes(b)


def _set_timescale(body: bytes, off_v0: int, off_v1: int, timescale: int) -> bytes:
    b = bytearray(body)
    off = off_v1 if b[0] == 1 else off_v0
    b[off:off + 4] = struct.pack(">I", timescale)
    return bytes(b)


def retime_mp4(path, frame_times_s) -> None:
    """Rewrite an MP4's timing tables in place so frame ``i`` shows at ``frame_times_s[i]``.

    The file must hold one video track without composition offsets (no B-frames) and
    its ``moov`` box must come after ``mdat`` (ffmpeg's default), so chunk offsets stay
    valid when the timing tables grow.

    Parameters
    ----------
    path : str or Path
        MP4 file written by ffmpeg.
    frame_times_s : array_like of shape (N,)
        Presentation times, strictly increasing, first >= 0 [s].
    """
    t = _check_times(frame_times_s)
    path = Path(path)
    top, file_size = _top_level_boxes(path)
    kinds = [k for k, _, _ in top]
    if b"moov" not in kinds or b"mdat" not in kinds or kinds.index(b"moov") < kinds.index(
            b"mdat"):
        raise VidodoError(f"{path}: expected an MP4 with 'moov' after 'mdat'")
    _, m_start, m_end = top[kinds.index(b"moov")]
    if m_end != file_size:
        raise VidodoError(f"{path}: 'moov' is not the last box; cannot retime in place")
    with open(path, "rb") as fh:
        fh.seek(m_start)
        data = fh.read(m_end - m_start)
    moov = _parse_boxes(data, 8, len(data))
    traks = [b for b in moov if b[0] == b"trak"]
    if len(traks) != 1:
        raise VidodoError(f"{path}: expected one video track, found {len(traks)}")
    trak = traks[0][1]
    mdia = _child(trak, b"mdia")[1]
    stbl = _child(_child(mdia, b"minf")[1], b"stbl")[1]
    if _child(stbl, b"ctts") is not None:
        raise VidodoError(f"{path}: the stream has B-frames (ctts); encode without them")
    stsz = _child(stbl, b"stsz")[1]
    n_samples = struct.unpack(">I", stsz[8:12])[0]
    if n_samples != t.size:
        raise VidodoError(f"{path}: holds {n_samples} frames but {t.size} times were given")

    ticks = np.round(t * TIMESCALE_HZ).astype(np.int64)
    deltas = np.diff(ticks)
    last = int(np.median(deltas)) if deltas.size else int(round(TIMESCALE_HZ / 30.0))
    deltas = np.append(deltas, last)
    if np.any(deltas <= 0) or np.any(deltas >= 2**32):
        raise InputError(f"{path}: frame times closer than 1/{TIMESCALE_HZ} s or too far apart")
    # stts: run-length (count, delta) pairs
    change = np.flatnonzero(np.diff(deltas)) + 1
    starts = np.concatenate([[0], change])
    counts = np.diff(np.concatenate([starts, [deltas.size]]))
    entries = np.column_stack([counts, deltas[starts]]).astype(">u4")
    _child(stbl, b"stts")[1] = (b"\x00\x00\x00\x00" + struct.pack(">I", len(counts))
                                + entries.tobytes())
    media_dur = int(deltas.sum())
    start = int(ticks[0])
    # media header: our timescale and the new duration (version 0: at 12/16, v1: 20/24)
    mdhd = _child(mdia, b"mdhd")
    mdhd[1] = _set_timescale(mdhd[1], 12, 20, TIMESCALE_HZ)
    mdhd[1] = _set_duration(mdhd[1], 16, 24, media_dur)
    # movie header on the same clock; tkhd duration is in movie units
    mvhd = _child(moov, b"mvhd")
    mvhd[1] = _set_timescale(mvhd[1], 12, 20, TIMESCALE_HZ)
    mvhd[1] = _set_duration(mvhd[1], 16, 24, start + media_dur)
    tkhd = _child(trak, b"tkhd")
    tkhd[1] = _set_duration(tkhd[1], 20, 28, start + media_dur)
    # edit list: optional empty edit, then the whole media at normal rate
    edits = []
    if start > 0:
        edits.append(struct.pack(">Qqhh", start, -1, 1, 0))
    edits.append(struct.pack(">Qqhh", media_dur, 0, 1, 0))
    elst = [b"elst", b"\x01\x00\x00\x00" + struct.pack(">I", len(edits)) + b"".join(edits)]
    edts = _child(trak, b"edts")
    if edts is None:
        trak.insert(1, [b"edts", [elst]])
    else:
        edts[1] = [elst]
    new_moov = _serialise([[b"moov", moov]])
    with open(path, "r+b") as fh:
        fh.seek(m_start)
        fh.write(new_moov)
        fh.truncate()
    if len(new_moov) + m_start != path.stat().st_size:
        raise VidodoError(f"{path}: retiming did not write the whole header")


def _top_level_boxes(path: Path):
    """(type, start, end) of each top-level box, read by seeking (the media stays on disk)."""
    size_total = path.stat().st_size
    out = []
    pos = 0
    with open(path, "rb") as fh:
        while pos + 8 <= size_total:
            fh.seek(pos)
            head = fh.read(16)
            size, kind = struct.unpack(">I4s", head[:8])
            if size == 1:
                size = struct.unpack(">Q", head[8:16])[0]
            elif size == 0:
                size = size_total - pos
            if size < 8 or pos + size > size_total:
                raise VidodoError(f"{path}: malformed top-level MP4 box; cannot set frame times")
            out.append((kind, pos, pos + size))
            pos += size
    return out, size_total
