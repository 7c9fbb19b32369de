"""Tests of vidodo.video: container timestamps, orientation, dropped frames, truncation.

Reference values come from outside vidodo: ``ffprobe`` (FFmpeg) reports each frame's
presentation time and the rotation tag; clips are made with Debian's ``ffmpeg``.
"""

from __future__ import annotations

import math
import shutil
import subprocess

import numpy as np
import pytest

from vidodo.errors import InputError
from vidodo.video import (
    VideoReader,
    VideoTruncatedError,
    analyse_timing,
    probe_video,
    readout_fraction,
)

pytestmark = pytest.mark.skipif(shutil.which("ffmpeg") is None, reason="needs ffmpeg")


def _ffmpeg(*args):
    subprocess.run(["ffmpeg", "-loglevel", "error", "-y", *args], check=True)


def _ffprobe_pts(path):
    out = subprocess.run(
        ["ffprobe", "-v", "error", "-select_streams", "v", "-show_entries",
         "frame=pts_time", "-of", "csv=p=0", str(path)],
        check=True, capture_output=True, text=True,
    ).stdout
    return np.array([float(x.strip().strip(",")) for x in out.split() if x.strip(",")])


@pytest.fixture(scope="module")
def vfr_clip(tmp_path_factory):
    """A variable-rate H.264 clip: 30 fps, then a 50 ms stall, then a slower section."""
    path = tmp_path_factory.mktemp("video") / "vfr.mp4"
    _ffmpeg(
        "-f", "lavfi", "-i", "testsrc=size=160x120:rate=30,noise=alls=30:allf=t",
        "-frames:v", "60",
        "-vf", "settb=1/90000,setpts='(N/30 + gte(N\\,20)*0.05 + gte(N\\,40)*N*0.0123)/TB'",
        "-fps_mode", "passthrough", "-enc_time_base", "1/90000",
        "-video_track_timescale", "90000", "-c:v", "libx264", "-pix_fmt", "yuv420p",
        str(path),
    )
    return path


@pytest.mark.parametrize("threaded", [False, True])
def test_vfr_timestamps_match_ffprobe(vfr_clip, threaded):
    """Frame times equal the container PTS that ffprobe reports (< 1 ms), not i/fps."""
    truth = _ffprobe_pts(vfr_clip)
    with VideoReader(vfr_clip, threaded=threaded) as reader:
        got = [(i, t) for i, t, _frame in reader]
        timing = reader.timing()
    idx = np.array([i for i, _ in got])
    t = np.array([t for _, t in got])
    assert idx.tolist() == list(range(len(truth)))
    assert np.max(np.abs(t - truth)) < 1e-3
    assert np.all(np.diff(timing.t_s) > 0)
    assert timing.duplicated == ()  # every frame has fresh noise
    # The 50 ms stall after frame 19 is longer than 1.6 intervals: reported as a drop.
    assert any(d[0] == 20 for d in timing.dropped)


def test_truncated_file_reports_where_it_stopped(tmp_path):
    """A file cut in half (index at the front) yields the first frames, then an error."""
    full = tmp_path / "full.mp4"
    _ffmpeg("-f", "lavfi", "-i", "testsrc=size=160x120:rate=30,noise=alls=30:allf=t",
            "-frames:v", "90", "-c:v", "libx264", "-pix_fmt", "yuv420p",
            "-movflags", "+faststart", str(full))
    data = full.read_bytes()
    cut = tmp_path / "cut.mp4"
    cut.write_bytes(data[: len(data) // 2])
    seen = []
    with pytest.raises(VideoTruncatedError, match=r"stopped at frame \d+") as info:
        with VideoReader(cut) as reader:
            for i, _t, _f in reader:
                seen.append(i)
    assert 0 < len(seen) < 90
    assert info.value.frames_read == len(seen)
    assert str(cut) in str(info.value)


def test_cut_without_index_cannot_open(tmp_path):
    """Cut before the index (moov at the end): a clear InputError, not a crash."""
    full = tmp_path / "full.mp4"
    _ffmpeg("-f", "lavfi", "-i", "testsrc=size=160x120:rate=30,noise=alls=30:allf=t",
            "-frames:v", "60", "-c:v", "libx264", "-pix_fmt", "yuv420p", str(full))
    cut = tmp_path / "cut.mp4"
    cut.write_bytes(full.read_bytes()[:20000])
    with pytest.raises(InputError, match="cut.mp4"):
        VideoReader(cut)
    with pytest.raises(InputError, match="not found"):
        VideoReader(tmp_path / "missing.mp4")


@pytest.mark.parametrize("rotate_tag", [0, 90, 180, 270])
def test_orientation_and_readout_axis(tmp_path, rotate_tag):
    """The sensor's first-read row (a white stripe at the stored top) maps to readout 0.

    ffmpeg's ``rotate`` stream tag sets the display matrix; OpenCV applies it, so the
    stored top row arrives at another edge and the scan axis must follow it.
    """
    src = tmp_path / "top.mp4"
    _ffmpeg("-f", "lavfi", "-i", "color=black:size=160x120:rate=30",
            "-vf", "drawbox=x=0:y=0:w=160:h=8:color=white:t=fill", "-frames:v", "3",
            "-c:v", "libx264", "-pix_fmt", "yuv420p", str(src))
    path = tmp_path / f"rot{rotate_tag}.mp4"
    _ffmpeg("-i", str(src), "-c", "copy", "-metadata:s:v:0", f"rotate={rotate_tag}", str(path))
    info = probe_video(path)
    with VideoReader(path, threaded=False) as reader:
        frame = next(iter(reader))[2]
    assert frame.shape[:2] == (info.height_px, info.width_px)
    vs, us = np.nonzero(frame[..., 1] > 128)
    white = readout_fraction(us, vs, info)
    vv, uu = np.mgrid[0:info.height_px, 0:info.width_px]
    dark = readout_fraction(uu[frame[..., 1] < 64], vv[frame[..., 1] < 64], info)
    assert white.max() < 0.1  # the stripe is 8 of 120 sensor rows
    assert dark.min() > 0.05


def test_analyse_timing_finds_drops_and_duplicates():
    """Worked example (hand calculation): 30 fps, frame 5 missing, frame 8 repeated."""
    t = np.arange(12) / 30.0
    t = np.delete(t, 5)  # one frame lost before new index 5
    t = np.insert(t, 8, t[7])  # frame 8 repeats frame 7's time
    t[-1] = 0.0  # a decoder bug returning 0 at the end
    timing = analyse_timing(t)
    assert timing.dropped == ((5, pytest.approx(6 / 30.0), 1),)
    assert timing.duplicated == (8,)
    assert timing.bad_timestamps == (len(t) - 1,)
    assert np.all(np.diff(timing.t_s) > 0)
    assert timing.interval_s == pytest.approx(1 / 30.0)


@pytest.mark.parametrize("codec", ["libx264", "libx265"])
def test_identical_images_with_own_timestamps_are_frames(tmp_path, codec):
    """A still picture encoded as video decodes to bit-identical frames, each with its
    own presentation time (ffprobe lists them all): every one is a frame, none a
    duplicate; they are only noted as identical images."""
    path = tmp_path / "still.mp4"
    extra = ["-x265-params", "log-level=error"] if codec == "libx265" else []
    _ffmpeg("-f", "lavfi", "-i", "color=gray:size=160x120:rate=30", "-frames:v", "40",
            "-c:v", codec, *extra, "-pix_fmt", "yuv420p", str(path))
    truth = _ffprobe_pts(path)
    with VideoReader(path) as reader:
        got = [(t, reader.last_frame_repeated) for _i, t, _f in reader]
        timing = reader.timing()
    assert len(got) == len(truth) == 40
    assert np.max(np.abs(np.array([t for t, _ in got]) - truth)) < 1e-3
    assert not any(flag for _t, flag in got)
    assert timing.duplicated == ()
    assert timing.identical == tuple(range(1, 40))
    assert not any("duplicated" in w for w in timing.warnings)


def test_analyse_timing_identical_image_at_repeated_time_is_a_duplicate():
    """Hand-built: frame 3 repeats frame 2's image and time (a true duplicate); frame 5
    repeats frame 4's image at a later time (a still scene: a frame)."""
    t = np.array([0, 1, 2, 2, 3, 4, 5]) / 30.0
    same = [False, False, False, True, False, True, False]
    timing = analyse_timing(t, same)
    assert timing.duplicated == (3,)
    assert timing.identical == (5,)


def test_stream_start_time_kept_as_ffprobe_shows(vfr_clip, tmp_path):
    """A stream that starts at 1.5 s (ffmpeg's -itsoffset writes an edit list): frame
    times equal ffprobe's pts_time, 1.5 s on, not OpenCV's times from the start."""
    path = tmp_path / "late.mp4"
    _ffmpeg("-itsoffset", "1.5", "-i", str(vfr_clip), "-c", "copy", str(path))
    truth = _ffprobe_pts(path)
    assert truth[0] == pytest.approx(1.5, abs=1e-3)  # ffprobe: the stream starts at 1.5 s
    assert probe_video(path).start_s == pytest.approx(1.5, abs=1e-6)
    for grey in (False, True):
        with VideoReader(path, grey=grey) as reader:
            t = np.array([t for _i, t, _f in reader])
        assert t.size == truth.size
        assert np.max(np.abs(t - truth)) < 1e-3


def test_luma_frames_match_colour_grey(vfr_clip):
    """Frames read as the stream's luma plane equal OpenCV's BGR-to-grey image of the
    same frames (the BT.601 luma weights, common practice) within 2 grey levels RMS on
    this saturated, noisy colour pattern (chroma rounding and clipping differ), and keep
    the container times ffprobe reports."""
    import cv2

    with VideoReader(vfr_clip, grey=True) as reader:
        assert reader.grey
        luma = [(t, f) for _i, t, f in reader]
    with VideoReader(vfr_clip) as reader:
        colour = [(t, f) for _i, t, f in reader]
    assert len(luma) == len(colour) == len(_ffprobe_pts(vfr_clip))
    for (tl, fl), (tc, fc) in zip(luma, colour, strict=True):
        assert fl.ndim == 2 and fl.shape == fc.shape[:2] and tl == tc
        diff = fl.astype(float) - cv2.cvtColor(fc, cv2.COLOR_BGR2GRAY)
        assert np.sqrt(np.mean(diff**2)) < 2.0 and abs(np.mean(diff)) < 0.5


@pytest.mark.parametrize("threaded", [False, True])
def test_raw_luma_mapped_by_its_table_equals_grey_frames(vfr_clip, threaded):
    """``luma_raw``: the planes as decoded, which ``raw_lut`` maps to exactly the grey
    frames the reader otherwise hands out (the first one, read by the probe, too), at
    the same times; without ``grey`` there is no table."""
    import cv2

    with VideoReader(vfr_clip, grey=True, threaded=threaded) as reader:
        assert reader.raw_lut is None
        grey = [(t, f) for _i, t, f in reader]
    with VideoReader(vfr_clip, grey=True, luma_raw=True, threaded=threaded) as reader:
        lut = reader.raw_lut
        assert lut is not None and lut.shape == (256,) and lut.dtype == np.uint8
        raw = [(t, f) for _i, t, f in reader]
    assert len(raw) == len(grey)
    assert not np.array_equal(raw[0][1], grey[0][1])  # limited-range luma is mapped
    for (tr, fr), (tg, fg) in zip(raw, grey, strict=True):
        assert tr == tg and np.array_equal(cv2.LUT(fr, lut), fg)
    with VideoReader(vfr_clip, luma_raw=True) as reader:
        assert reader.raw_lut is None


@pytest.mark.parametrize("codec,pix_fmt,ext,usable", [
    ("libx264", "yuvj420p", "mp4", True),     # full-range luma: near-identity table
    ("libx264", "yuv420p10le", "mp4", False),  # 10-bit: not an 8-bit plane
    ("ffv1", "bgr0", "mkv", False),           # packed colour: no luma plane at all
])
def test_luma_used_only_where_the_stream_allows(tmp_path, codec, pix_fmt, ext, usable):
    """The luma path is taken only when the first frame proves it right; otherwise the
    reader hands out colour frames as before (pixel formats made with ffmpeg)."""
    from vidodo.video import luma_lut

    path = tmp_path / f"clip.{ext}"
    _ffmpeg("-f", "lavfi", "-i", "testsrc=size=160x120:rate=30", "-frames:v", "5",
            "-c:v", codec, "-pix_fmt", pix_fmt, str(path))
    assert (luma_lut(path) is not None) == usable
    with VideoReader(path, grey=True) as reader:
        frames = [f for _i, _t, f in reader]
        assert reader.grey == usable
    assert len(frames) == 5 and all(f.ndim == (2 if usable else 3) for f in frames)


@pytest.mark.parametrize("seek_after_s", [math.inf, 0.3])
@pytest.mark.parametrize("grey", [False, True])
def test_frames_at_equals_reading_every_frame(vfr_clip, tmp_path, grey, seek_after_s):
    """frames_at (frames in between only grabbed, or sought to on this variable-rate
    clip) gives the same frames and the same container times (ffprobe's pts_time, 1.5 s
    on here) as reading every frame."""
    path = tmp_path / "late.mp4"
    _ffmpeg("-itsoffset", "1.5", "-i", str(vfr_clip), "-c", "copy", str(path))
    with VideoReader(path, threaded=False, grey=grey) as reader:
        every = [(t, f) for _i, t, f in reader]
    times = [t for t, _f in every]
    truth = _ffprobe_pts(path)
    wanted = [times[0], times[21] - 0.004, times[45], times[-1], times[-1] + 1.0]
    with VideoReader(path, threaded=False, grey=grey) as reader:
        got = reader.frames_at(wanted, seek_after_s=seek_after_s, seek_lead_s=0.1)
    assert sorted(got) == sorted(wanted[:4])  # nothing after the last frame
    for want, k in zip(wanted[:4], [0, 21, 45, len(every) - 1], strict=True):
        t, frame = got[want]
        assert t == times[k] and abs(t - truth[k]) < 1e-3
        assert np.array_equal(frame, every[k][1])


def test_frames_at_undoes_a_seek_that_lands_late(vfr_clip):
    """A seek that lands after the wanted frame (a stream whose times the seek misjudges:
    here every seek is pushed 1 s further) is undone by reading from the start: the
    same frames as reading every frame."""
    with VideoReader(vfr_clip, threaded=False) as reader:
        every = [(t, f) for _i, t, f in reader]
    wanted = [every[5][0], every[50][0]]

    class Late:
        def __init__(self, cap):
            self.cap = cap

        def set(self, prop, value):
            return self.cap.set(prop, value + 1000.0)

        def __getattr__(self, name):
            return getattr(self.cap, name)

    with VideoReader(vfr_clip, threaded=False) as reader:
        reader._cap = Late(reader._cap)
        got = reader.frames_at(wanted, seek_after_s=0.3, seek_lead_s=0.1)
        assert not isinstance(reader._cap, Late)  # reopened without seeking
    assert [got[w][0] for w in wanted] == wanted
    assert np.array_equal(got[wanted[1]][1], every[50][1])
