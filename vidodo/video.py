"""Reading video frames with their container presentation timestamps.

Phones record with a variable frame rate, so a frame's time is never ``index / fps``:
every frame carries the presentation time its container gives it. OpenCV's
``CAP_PROP_POS_MSEC`` (read right after ``read()``) follows the stream's PTS but counts
from the stream's start time; the reader adds that start time back (read with
``ffprobe``, :func:`stream_start_s`), so a frame's time equals the ``pts_time`` ffprobe
shows. The reader checks that these times increase, reports frames that look
dropped (an interval well over the typical one) or duplicated (a timestamp that does
not increase), notes images identical to the previous one (a still scene in HEVC or
H.264 repeats bit for bit; such a frame with its own timestamp is still a frame), reads
the orientation metadata, and raises
:class:`VideoTruncatedError` naming the frame where a truncated or corrupt file stopped,
after handing out every frame it could decode.

Decoding can run in a background thread (OpenCV releases the GIL while it decodes), so
that decoding the next frame overlaps the caller's work on the current one. Only a few
frames are ever held in memory.
"""

from __future__ import annotations

import json
import math
import queue
import shutil
import subprocess
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

import cv2
import numpy as np

from .errors import InputError

__all__ = [
    "VideoInfo",
    "FrameTiming",
    "VideoReader",
    "VideoTruncatedError",
    "probe_video",
    "stream_start_s",
    "analyse_timing",
    "readout_fraction",
]


class VideoTruncatedError(InputError):
    """The video stopped before its container said it would (truncated or corrupt).

    Every frame before the stop was handed out; ``frames_read`` and ``t_last_s`` say
    where it stopped.
    """

    def __init__(self, message, *, frames_read=0, t_last_s=float("nan"), partial=None):
        super().__init__(message)
        self.frames_read = frames_read
        """Frames decoded before the stop."""
        self.t_last_s = t_last_s
        """Presentation time of the last good frame [s]."""
        self.partial = partial
        """Whatever a caller computed from the frames that were read (e.g. a track)."""


@dataclass(frozen=True)
class VideoInfo:
    """What the container says about a video before any frame is decoded."""

    path: Path
    width_px: int
    """Frame width as delivered (after applying the orientation metadata) [px]."""
    height_px: int
    """Frame height as delivered [px]."""
    frame_count: int
    """Frame count the container claims (0 when unknown)."""
    nominal_fps: float
    """Frame rate the container claims; wrong for variable-rate video [1/s]."""
    orientation_deg: int
    """Rotation metadata as OpenCV reports it (0, 90, 180, 270) [deg]."""
    rotated: bool
    """True if OpenCV applied the rotation, so frames arrive upright."""
    codec: str
    """Four-character codec code, e.g. 'h264'."""
    start_s: float = 0.0
    """Presentation time of the stream's start (ffprobe's ``start_time``), added to
    OpenCV's times so frame times are container times [s]."""
    start_known: bool = True
    """False when the start time could not be read (no ``ffprobe``): frame times then
    count from the stream's start."""


@dataclass(frozen=True)
class FrameTiming:
    """Timing analysis of the frames read so far."""

    t_s: np.ndarray
    """Presentation time of every frame, ndarray of shape (N,) [s]."""
    interval_s: float
    """Median interval between frames [s]."""
    dropped: tuple = ()
    """``(frame_index, t_s, frames_missing)`` for every interval that looks like lost
    frames (longer than 1.6 median intervals) before ``frame_index``."""
    duplicated: tuple = ()
    """Indices of frames whose timestamp does not increase."""
    bad_timestamps: tuple = ()
    """Indices of frames whose timestamp went backwards (replaced by an estimate)."""
    warnings: list = field(default_factory=list)
    identical: tuple = ()
    """Indices of frames whose image equals the previous frame's but whose timestamp is
    later: a still scene, kept as frames."""


def probe_video(path) -> VideoInfo:
    """Open ``path`` and read what its container says.

    Raises
    ------
    InputError
        If the file is missing or cannot be decoded.
    """
    cap = _open(path)
    try:
        return _info(cap, Path(path))
    finally:
        cap.release()


def stream_start_s(path):
    """Start time of the first video stream [s], as ffprobe reports it.

    OpenCV subtracts this from every presentation time; the container's own times (what
    ffprobe, players and other tools show, and what a clock offset measured against the
    file refers to) include it.

    Returns
    -------
    float or None
        The start time, 0.0 when the container gives none, None when ``ffprobe`` is not
        installed or cannot read the file.
    """
    exe = shutil.which("ffprobe")
    if exe is None:
        return None
    p = Path(path)
    try:
        st = p.stat()
        key = (str(p.resolve()), st.st_size, st.st_mtime_ns)
    except OSError:
        key = None
    if key is not None and key in _START_S:  # each file is probed once per process
        return _START_S[key]
    start = _ffprobe_start_s(exe, p)
    if key is not None and start is not None:
        _START_S.clear()  # one entry is enough: a run reads one video
        _START_S[key] = start
    return start


_START_S: dict = {}  # (resolved path, size, mtime) -> start time [s]


def _ffprobe_start_s(exe, path):
    try:
        out = subprocess.run(
            [exe, "-v", "error", "-select_streams", "v:0", "-show_entries",
             "stream=start_time", "-of", "json", str(path)],
            check=True, capture_output=True, text=True, timeout=30,
        ).stdout
        streams = json.loads(out).get("streams") or [{}]
    except (OSError, subprocess.SubprocessError, ValueError):
        return None
    value = streams[0].get("start_time")
    try:
        start = float(value) if value not in (None, "N/A") else 0.0
    except (TypeError, ValueError):
        return 0.0
    return start if math.isfinite(start) else 0.0


def _open(path, raw=False, threads=None):
    p = Path(path)
    if not p.is_file():
        raise InputError(f"{p}: video file not found; check the path")
    params = [cv2.CAP_PROP_CONVERT_RGB, 0] if raw else []
    if threads:
        params += [cv2.CAP_PROP_N_THREADS, int(threads)]
    cap = cv2.VideoCapture(str(p), cv2.CAP_FFMPEG, params)
    if not cap.isOpened():
        raise InputError(
            f"{p}: cannot open as video (unknown format, or truncated before its index "
            "was written); re-export or re-copy the file"
        )
    return cap


_RAW_READERS = [0, None]  # raw readers open, log level before the first one


def _quiet_raw_decoding(opening: bool):
    """OpenCV warns on every raw frame it does not convert; silence that while a raw
    reader is open and restore the caller's log level after the last one closes."""
    log = cv2.utils.logging
    if opening:
        if _RAW_READERS[0] == 0:
            _RAW_READERS[1] = log.getLogLevel()
            log.setLogLevel(min(_RAW_READERS[1], log.LOG_LEVEL_ERROR))
        _RAW_READERS[0] += 1
    else:
        _RAW_READERS[0] = max(_RAW_READERS[0] - 1, 0)
        if _RAW_READERS[0] == 0 and _RAW_READERS[1] is not None:
            log.setLogLevel(_RAW_READERS[1])


def luma_lut(path, *, max_rms_levels=2.0):
    """Grey levels from the decoder's own luma plane, if this stream allows it.

    Decoding straight to the luma (Y) plane skips the conversion to colour, about a
    third of the decoding work for H.264. OpenCV hands out such raw frames only for
    some pixel formats, so the first frame is decoded both ways and the luma plane is
    used only if it is a (height, width) 8-bit image that one straight line maps onto
    OpenCV's BGR-to-grey image (limited-range luma spans 16-235, so the line is not the
    identity) within ``max_rms_levels``; otherwise colour decoding is kept.

    Parameters
    ----------
    path : str or Path
    max_rms_levels : float
        Largest RMS difference accepted between the mapped luma and the grey image.

    Returns
    -------
    ndarray of uint8, shape (256,), or None
        Look-up table from luma to grey level, or None when luma frames are unusable.
    """
    colour = _open(path)
    try:
        lut, raw, _first = _probe_luma(path, colour, max_rms_levels=max_rms_levels)
    finally:
        colour.release()
    if raw is not None:
        raw.release()
    return lut


def _probe_luma(path, colour, *, max_rms_levels=2.0, threads=None):
    """:func:`luma_lut` reading the first frame from ``colour`` (left one frame on).

    Returns ``(lut, raw_capture, (t_ms, first_raw_frame))``: the raw capture stays open,
    one frame on, only when the table is usable; otherwise ``(None, None, None)``.
    """
    _quiet_raw_decoding(True)
    raw = None
    try:
        raw = _open(path, raw=True, threads=threads)
        ok_c, bgr = colour.read()
        ok_r, luma = raw.read()
        t_ms = raw.get(cv2.CAP_PROP_POS_MSEC)
    except InputError:
        ok_c = ok_r = False
    finally:
        _quiet_raw_decoding(False)
    lut = None
    if ok_c and ok_r and bgr is not None and luma is not None and bgr.ndim == 3 \
            and luma.dtype == np.uint8 and luma.shape == bgr.shape[:2]:
        lut = _luma_line(luma, bgr, max_rms_levels)
    if lut is None:
        if raw is not None:
            raw.release()
        return None, None, None
    return lut, raw, (t_ms, luma)


def _luma_line(luma, bgr, max_rms_levels):
    """The look-up table of the straight line from luma to grey, or None."""
    # Every 97th pixel (a prime: no lock-step with rows or 8x8 blocks) is plenty for a
    # straight line and keeps the probe to a few milliseconds.
    grey = cv2.cvtColor(bgr, cv2.COLOR_BGR2GRAY).ravel()[::97].astype(float)
    y = luma.ravel()[::97].astype(float)
    if np.std(y) < 5.0:  # a blank first frame cannot tell the mapping
        return None
    a, b = np.polyfit(y, grey, 1)
    rms = float(np.sqrt(np.mean((a * y + b - grey) ** 2)))
    if not (0.9 < a < 1.3) or rms > max_rms_levels:
        return None
    return np.clip(np.rint(a * np.arange(256.0) + b), 0, 255).astype(np.uint8)


def _info(cap, p: Path) -> VideoInfo:
    fourcc = int(cap.get(cv2.CAP_PROP_FOURCC))
    codec = "".join(chr((fourcc >> (8 * i)) & 0xFF) for i in range(4)).strip("\x00")
    orient = cap.get(cv2.CAP_PROP_ORIENTATION_META)
    orient = int(round(orient)) % 360 if math.isfinite(orient) and orient >= 0 else 0
    count = cap.get(cv2.CAP_PROP_FRAME_COUNT)
    start = stream_start_s(p)
    return VideoInfo(
        path=p,
        width_px=int(cap.get(cv2.CAP_PROP_FRAME_WIDTH)),
        height_px=int(cap.get(cv2.CAP_PROP_FRAME_HEIGHT)),
        frame_count=int(count) if math.isfinite(count) and count > 0 else 0,
        nominal_fps=float(cap.get(cv2.CAP_PROP_FPS)),
        orientation_deg=orient,
        rotated=bool(cap.get(cv2.CAP_PROP_ORIENTATION_AUTO) > 0),
        codec=codec,
        start_s=0.0 if start is None else start,
        start_known=start is not None,
    )


def readout_fraction(u_px, v_px, info: VideoInfo):
    """Fraction of the sensor readout elapsed when pixel (u, v) was read.

    A rolling shutter reads sensor rows top to bottom; the delivered image may be
    rotated from the sensor by the orientation metadata, so the scan axis follows the
    sensor, not the picture (common practice).

    Parameters
    ----------
    u_px, v_px : array_like
        Pixel coordinates in the delivered frame [px].
    info : VideoInfo
        The video the pixels come from.

    Returns
    -------
    ndarray
        Fraction in [0, 1): 0 for the first sensor row read.
    """
    u = np.asarray(u_px, dtype=float)
    v = np.asarray(v_px, dtype=float)
    w, h = info.width_px, info.height_px
    rot = info.orientation_deg if info.rotated else 0
    # OpenCV reports the metadata as the counter-clockwise angle it rotates the stored
    # frame by: with 270 the stored top row arrives as the left column, with 90 as the
    # right column (checked in tests/test_video.py against ffmpeg's rotate tag).
    if rot == 270:
        return np.clip(u / w, 0.0, 1.0)
    if rot == 180:
        return np.clip((h - 1 - v) / h, 0.0, 1.0)
    if rot == 90:
        return np.clip((w - 1 - u) / w, 0.0, 1.0)
    return np.clip(v / h, 0.0, 1.0)


def analyse_timing(t_s, identical=None, *, gap_factor=1.6) -> FrameTiming:
    """Find dropped and duplicated frames from presentation times.

    Parameters
    ----------
    t_s : array_like
        Presentation time of each frame as read [s].
    identical : array_like of bool, optional
        True where a frame's image equals the previous frame's. Such a frame with a
        later timestamp is a frame of a still scene (listed in ``identical``); with a
        repeated timestamp it is a duplicate either way.
    gap_factor : float
        An interval longer than this many median intervals counts as lost frames.

    Returns
    -------
    FrameTiming
        The analysis; ``t_s`` has backward timestamps replaced by estimates.
    """
    t = np.asarray(t_s, dtype=float).copy()
    n = t.size
    warnings: list[str] = []
    if n < 2:
        return FrameTiming(t_s=t, interval_s=float("nan"), warnings=warnings)
    dt = np.diff(t)
    good = dt > 0
    interval = float(np.median(dt[good])) if good.any() else float("nan")
    valid = np.ones(n, dtype=bool)
    bad = []
    dup = []
    latest = t[0]
    for i in range(1, n):
        if t[i] > latest:
            latest = t[i]
            continue
        valid[i] = False
        (dup if t[i] == latest else bad).append(i)
    if not valid.all():
        # Keep time increasing: stamps that repeat or go backwards are interpolated by
        # frame index between their valid neighbours (extrapolated at the end).
        idx = np.arange(n)
        ok = np.flatnonzero(valid)
        step = interval if math.isfinite(interval) else 1e-3
        fixed = np.interp(idx, ok, t[ok])
        after = idx > ok[-1]
        fixed[after] = t[ok[-1]] + (idx[after] - ok[-1]) * step
        t = fixed
    still = ()
    if identical is not None:
        same = np.asarray(identical, dtype=bool)[:n]
        still = tuple(int(i) for i in np.flatnonzero(same & valid) if i > 0)
    dropped = []
    if math.isfinite(interval):
        dt = np.diff(t)
        for i in np.flatnonzero(dt > gap_factor * interval):
            missing = int(round(dt[i] / interval)) - 1
            dropped.append((int(i + 1), float(t[i + 1]), max(missing, 1)))
    if bad:
        warnings.append(
            f"{len(bad)} frame timestamps went backwards (first at frame {bad[0]}); "
            "replaced by the typical interval"
        )
    if dropped:
        lost = sum(d[2] for d in dropped)
        warnings.append(
            f"about {lost} frames look dropped in {len(dropped)} places (first before "
            f"frame {dropped[0][0]} at t = {dropped[0][1]:.3f} s)"
        )
    if dup:
        warnings.append(f"{len(dup)} frames look duplicated (first: frame {dup[0]})")
    return FrameTiming(t_s=t, interval_s=interval, dropped=tuple(dropped),
                       duplicated=tuple(dup), bad_timestamps=tuple(bad), warnings=warnings,
                       identical=still)


_END = object()

SEEK_AFTER_S = 4.0
""":meth:`VideoReader.frames_at` seeks to a wanted frame this far ahead [s]."""
SEEK_LEAD_S = 2.0
"""...to this long before it, then grabs forward to it [s] (OpenCV's seek lands on the
frame it computes from the frame rate, which a variable rate may put a little off)."""


class VideoReader:
    """Iterate over ``(index, t_s, frame)`` of a video, holding only a few frames.

    Parameters
    ----------
    path : str or Path
        The video file.
    threaded : bool
        Decode in a background thread so decoding overlaps the caller's work.
    queue_frames : int
        Decoded frames held ahead of the caller when threaded.
    check_identical : bool
        Compare each frame with the previous one (a subsampled exact comparison) to
        find repeated images.
    grey : bool
        Hand out 2-D grey frames made from the stream's own luma plane where
        :func:`luma_lut` finds that right (skips the colour conversion); BGR otherwise.
    decoder_threads : int, optional
        Threads of the decoder itself (OpenCV's default: one per core). A caller that
        keeps the other cores busy gains by 1: the same frames at less total work.
    ahead_mb : float, optional
        When threaded, let the decoder run up to this many megabytes of frames ahead of
        the caller (at least ``queue_frames``): a caller whose work comes in bursts (a
        costly first frame) then finds the frames decoded meanwhile waiting for it.
    luma_raw : bool
        With ``grey``, hand out the luma planes unmapped and the table as
        :attr:`raw_lut` (the caller maps the parts it uses).

    Notes
    -----
    The iterator raises :class:`VideoTruncatedError` after the last good frame when the
    stream ends clearly before the frame count its container claims. After iteration,
    :meth:`timing` analyses the timestamps of every frame read.

    Examples
    --------
    >>> with VideoReader("run/video.mp4") as reader:  # doctest: +SKIP
    ...     for index, t_s, frame in reader:
    ...         pass
    """

    def __init__(self, path, *, threaded=True, queue_frames=4, check_identical=True,
                 grey=False, decoder_threads=None, ahead_mb=None, luma_raw=False):
        self.path = Path(path)
        self._cap = _open(self.path, threads=decoder_threads)
        self.info = _info(self._cap, self.path)
        self._lut = None
        self._held = None  # first raw frame, read by the probe: (t_ms, frame)
        if grey:  # the probe reads the colour capture's first frame: replaced either way
            self._lut, raw, self._held = _probe_luma(self.path, self._cap,
                                                     threads=decoder_threads)
            self._cap.release()
            if self._lut is not None:
                _quiet_raw_decoding(True)
                self._cap = raw
            else:
                self._cap = _open(self.path, threads=decoder_threads)
        self.grey = self._lut is not None
        """True when frames come as 2-D grey images made from the stream's own luma plane
        (see :func:`luma_lut`); otherwise they are BGR."""
        self.raw_lut = self._lut if luma_raw else None
        """With ``luma_raw``, the luma planes are handed out as decoded and this is the
        table that maps them to grey (``cv2.LUT(frame, raw_lut)``), for a caller that
        uses only parts of each frame (the full-frame mapping costs 0.5-1 ms a 1080p
        frame, a quarter of decoding it); None when frames come mapped (or in colour)."""
        self.threaded = bool(threaded)
        self.queue_frames = max(1, int(queue_frames))
        if ahead_mb is not None:
            frame_bytes = self.info.width_px * self.info.height_px * (1 if self.grey else 3)
            self.queue_frames = max(self.queue_frames,
                                    int(ahead_mb * 1e6 // max(frame_bytes, 1)))
        self.check_identical = check_identical
        self._t: list[float] = []
        self._identical: list[bool] = []
        self._repeat = False  # the frame just handed out repeats the previous one
        self._latest = -math.inf  # latest timestamp handed out [s]
        self._stop = threading.Event()
        self._thread = None
        self.decode_s = 0.0
        """Seconds the decoder has spent producing the frames read so far [s] (in the
        background thread when threaded)."""

    # -- context manager -------------------------------------------------------
    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def close(self):
        """Stop the decoding thread and release the file."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=5.0)
            self._thread = None
        if self._cap is not None:
            self._cap.release()
            self._cap = None
            if self._lut is not None:
                _quiet_raw_decoding(False)

    # -- reading ---------------------------------------------------------------
    def _decode(self):
        """Yield ``(t_ms, frame)`` until the stream ends."""
        cap = self._cap
        start_ms = 1000.0 * self.info.start_s
        while not self._stop.is_set():
            if self._held is not None:
                (t_ms, frame), self._held = self._held, None
                yield t_ms + start_ms, (frame if self.raw_lut is not None
                                        else cv2.LUT(frame, self._lut))
                continue
            t0 = time.perf_counter()
            ok, frame = cap.read()
            if not ok or frame is None:
                return
            if self._lut is not None:
                if frame.shape != (self.info.height_px, self.info.width_px):
                    raise InputError(
                        f"{self.path}: frame {len(self._t)} changed its pixel format "
                        "mid-stream; re-encode the video (e.g. to H.264 yuv420p)")
                if self.raw_lut is None:
                    frame = cv2.LUT(frame, self._lut)
            self.decode_s += time.perf_counter() - t0
            yield cap.get(cv2.CAP_PROP_POS_MSEC) + start_ms, frame

    def _threaded(self):
        q: queue.Queue = queue.Queue(maxsize=self.queue_frames)

        def work():
            try:
                for item in self._decode():
                    while not self._stop.is_set():
                        try:
                            q.put(item, timeout=0.1)
                            break
                        except queue.Full:
                            continue
            except BaseException as exc:  # forwarded to the consumer
                q.put(exc)
                return
            q.put(_END)

        self._thread = threading.Thread(target=work, name="vidodo-decode", daemon=True)
        self._thread.start()
        while True:
            item = q.get()
            if item is _END:
                return
            if isinstance(item, BaseException):
                raise item
            yield item

    def __iter__(self):
        if self._cap is None:
            raise InputError(f"{self.path}: reader already closed; open the video again")
        source = self._threaded() if self.threaded else self._decode()
        prev_small = prev = None
        for t_ms, frame in source:
            index = len(self._t)
            t = t_ms / 1000.0
            same = False
            if self.check_identical:
                # A sparse sample rules out most frames cheaply; only when it matches is
                # the whole image compared (static areas of H.264 can repeat exactly).
                small = (frame[::40, ::40, 1] if frame.ndim == 3 else frame[::40, ::40]).tobytes()
                if small == prev_small and prev is not None and prev.shape == frame.shape:
                    same = bool(np.array_equal(frame, prev))
                prev_small, prev = small, frame
            self._repeat = same and bool(self._t) and t <= self._latest
            self._latest = max(self._latest, t)
            self._t.append(t)
            self._identical.append(same)
            yield index, t, frame
        self._check_complete()

    def _check_complete(self):
        n = len(self._t)
        claimed = self.info.frame_count
        if n == 0:
            raise VideoTruncatedError(
                f"{self.path}: no frame could be decoded; the file is empty, truncated or "
                "corrupt - re-copy it from the phone",
                frames_read=0,
            )
        # Containers with an index give an exact count; allow a little slack for
        # those that estimate it from duration and rate.
        if claimed and n < claimed - max(2, int(0.01 * claimed)):
            t_last = self._t[-1]
            raise VideoTruncatedError(
                f"{self.path}: stopped at frame {n} (t = {t_last:.3f} s) of {claimed} the "
                "container lists; the file is truncated or corrupt there - frames before it "
                "were used; re-copy the file to analyse the rest",
                frames_read=n,
                t_last_s=t_last,
            )

    def frames_at(self, times_s, *, tol_s=1e-4, seek_after_s=SEEK_AFTER_S,
                  seek_lead_s=SEEK_LEAD_S) -> dict:
        """The first frame at or after each of ``times_s``, reading forward from here.

        Frames in between are decoded but not converted or copied out (OpenCV's
        ``grab``), a fraction of the work of reading them; a wanted time more than
        ``seek_after_s`` ahead is reached by seeking to ``seek_lead_s`` before it
        (the decoder starts again at the key frame before that; a 60 s 1080p60 clip
        costs about 13 s CPU to grab through, a seek under 1 s) and grabbing from
        there; a seek that lands after the wanted time (a stream whose times the seek
        misjudges) is undone by reading from the start without seeking. Frame times are
        those the iterator gives. Stops at the last wanted frame or the end of the
        stream (without the truncation check, and :meth:`timing` misses the frames
        skipped by a seek).

        Parameters
        ----------
        times_s : iterable of float
            Wanted times [s].
        tol_s : float
            A frame this much before a wanted time counts as at it [s].
        seek_after_s : float
            Seek to a wanted time this far ahead of the last frame read [s] (inf: never).
        seek_lead_s : float
            ...to this long before it, then grab forward [s].

        Returns
        -------
        dict
            ``{wanted_t_s: (t_s, frame)}`` for every wanted time a frame was found for.
        """
        if self._cap is None:
            raise InputError(f"{self.path}: reader already closed; open the video again")
        want = sorted(set(float(t) for t in times_s))
        got = {}
        start_ms = 1000.0 * self.info.start_s
        seeking, sought = math.isfinite(seek_after_s), None
        while want:
            if self._held is not None:
                (t_ms, frame), self._held = self._held, None
                t_s, wanted = (t_ms + start_ms) / 1000.0, True
            else:
                last = self._t[-1] if self._t else self.info.start_s
                if seeking and want[0] - last > max(seek_after_s, seek_lead_s):
                    sought = want[0]
                    self._cap.set(cv2.CAP_PROP_POS_MSEC,
                                  1000.0 * (want[0] - seek_lead_s) - start_ms)
                ok = self._cap.grab()
                t_s = (self._cap.get(cv2.CAP_PROP_POS_MSEC) + start_ms) / 1000.0 if ok \
                    else math.inf
                if sought is not None and t_s > sought - tol_s:  # landed too late
                    self._cap.release()
                    self._cap = _open(self.path, raw=self._lut is not None)
                    self._t.clear()
                    seeking, sought = False, None
                    continue
                if not ok:
                    break
                sought = None
                wanted = t_s >= want[0] - tol_s
                frame = self._cap.retrieve()[1] if wanted else None
                if wanted and frame is None:
                    break
            self._t.append(t_s)
            if not wanted or t_s < want[0] - tol_s:
                continue
            if self._lut is not None:
                frame = cv2.LUT(frame, self._lut)
            while want and t_s >= want[0] - tol_s:
                got[want.pop(0)] = (t_s, frame)
        return got

    @property
    def last_frame_repeated(self) -> bool:
        """True if the frame just handed out repeats the one before it: the same image
        at a timestamp that is not later. An identical image at a later time (a still
        scene) is a frame of its own and does not count."""
        return self._repeat

    @property
    def frames_read(self) -> int:
        """Frames handed out so far."""
        return len(self._t)

    def timing(self) -> FrameTiming:
        """Timing analysis of the frames read so far (see :func:`analyse_timing`)."""
        return analyse_timing(self._t, self._identical if self.check_identical else None)
