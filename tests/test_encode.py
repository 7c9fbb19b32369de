"""Encoder: per-frame presentation times as read back by independent tools.

References: ffprobe (FFmpeg's own reader of the MP4 timing tables, ISO/IEC 14496-12)
and OpenCV's ``CAP_PROP_POS_MSEC`` after ``read()`` (which follows the stream's PTS
since OpenCV 4.2, counted from the first frame).
"""

import json
import shutil
import subprocess

import cv2
import numpy as np
import pytest

from vidodo.encode import write_video
from vidodo.errors import InputError

pytestmark = pytest.mark.skipif(shutil.which("ffprobe") is None, reason="needs ffmpeg")

# uneven timing as a phone records it: jitter, a dropped frame, a slow section
TIMES = np.array([0.0, 0.0334, 0.0667, 0.1002, 0.1665, 0.2001, 0.2337, 0.2836, 0.3337,
                  0.3669, 0.4003, 0.4337])


def _frames(n, w=160, h=96):
    for i in range(n):
        img = np.zeros((h, w, 3), np.uint8)
        img[:, : 10 + 10 * i] = (40, 160, 220)
        yield img


def _ffprobe_times(path):
    out = subprocess.run(
        ["ffprobe", "-v", "error", "-select_streams", "v:0", "-show_entries",
         "frame=pts_time", "-of", "json", str(path)],
        capture_output=True, text=True, check=True).stdout
    return np.array([float(f["pts_time"]) for f in json.loads(out)["frames"]])


def _opencv_times(path):
    cap = cv2.VideoCapture(str(path))
    times, images = [], []
    while True:
        ok, img = cap.read()
        if not ok:
            break
        times.append(cap.get(cv2.CAP_PROP_POS_MSEC) / 1000.0)
        images.append(img)
    cap.release()
    return np.array(times), images


@pytest.mark.slow
@pytest.mark.parametrize("codec", ["h264", "hevc", "mpeg4"])
@pytest.mark.parametrize("start_s", [0.0, 1.25])
def test_variable_frame_times_read_back(tmp_path, codec, start_s):
    """ffprobe sees exactly the requested PTS (within 6 us); OpenCV decodes every frame and
    reports the same times counted from the first frame."""
    t = TIMES + start_s
    path = tmp_path / f"clip_{codec}.mp4"
    write_video(path, _frames(t.size), t, codec=codec, crf=20)
    assert np.abs(_ffprobe_times(path) - t).max() < 6e-6
    t_cv, images = _opencv_times(path)
    assert len(images) == t.size
    assert np.abs(t_cv - (t - t[0])).max() < 1e-3
    # the picture survives compression (the bar grows 10 px per frame)
    bar = [(img[:, :, 2] > 128).mean(axis=0).sum() for img in images]
    assert np.allclose(bar, 10 + 10 * np.arange(t.size), atol=2)


def test_bad_input_leaves_no_file(tmp_path):
    path = tmp_path / "x.mp4"
    with pytest.raises(InputError, match="frame 2 time"):
        write_video(path, _frames(3), [0.0, 0.1, 0.1])
    with pytest.raises(InputError, match="got 3 frames but 4"):
        write_video(path, _frames(3), [0.0, 0.1, 0.2, 0.3])
    with pytest.raises(InputError, match="must be even"):
        write_video(path, _frames(2, w=161), [0.0, 0.1])
    assert list(tmp_path.iterdir()) == []


def test_encoder_failure_is_one_line(tmp_path, monkeypatch):
    """An encoder the FFmpeg build lacks: one line naming the file and the encoder, and
    no file left behind."""
    from vidodo import encode
    from vidodo.errors import VidodoError

    monkeypatch.setitem(encode.CODECS, "h264", ("no_such_encoder_xyz", {}))
    with pytest.raises(VidodoError, match="no_such_encoder_xyz") as info:
        write_video(tmp_path / "x.mp4", _frames(3), [0.0, 0.1, 0.2])
    assert "\n" not in str(info.value)
    assert list(tmp_path.iterdir()) == []


@pytest.mark.slow
def test_times_hold_to_the_90khz_clock(tmp_path):
    """Three hundred uneven frame times come back from ffprobe within 6 us (half a tick
    of the 90 kHz clock, 5.6 us, plus ffprobe's printing to the microsecond), also when
    the first frame starts late (an edit list)."""
    rng = np.random.default_rng(0)
    t = 0.37 + np.cumsum(rng.uniform(1 / 40, 1 / 20, 300))
    path = tmp_path / "long.mp4"
    write_video(path, (np.full((64, 96, 3), i % 255, np.uint8) for i in range(t.size)), t)
    assert np.abs(_ffprobe_times(path) - t).max() < 6e-6


def test_times_with_the_frames(tmp_path):
    """Times handed over with each frame, as while decoding footage, are written exactly
    as the same times given up front (no frame is held back: each packet's time is known
    before it is muxed)."""
    rng = np.random.default_rng(1)
    t = 0.21 + np.cumsum(rng.uniform(1 / 40, 1 / 20, 40))
    path = tmp_path / "paired.mp4"
    write_video(path, ((np.full((64, 96, 3), i * 5, np.uint8), t_s)
                       for i, t_s in enumerate(t)))
    assert np.abs(_ffprobe_times(path) - t).max() < 6e-6
    with pytest.raises(InputError, match="frame 2 time"):
        write_video(path, zip(_frames(3), [0.0, 0.1, 0.1], strict=True))
    with pytest.raises(InputError, match="not a \\(frame, t_s\\) pair"):
        write_video(tmp_path / "y.mp4", _frames(3))
    assert list(tmp_path.iterdir()) == [path]


def test_i420_frames_decode_to_the_same_picture(tmp_path):
    """An I420 frame (OpenCV's BGR-to-I420 conversion) encoded losslessly decodes
    (OpenCV) to the source picture about as well as the same BGR frame through the
    encoder's own conversion: the same BT.601 limited-range matrix (the luma agrees to
    a level), the colour planes averaged a little differently (on strongly coloured
    texture both lose 3-4 levels to 4:2:0); a wrong shape is refused."""
    rng = np.random.default_rng(5)
    base = cv2.GaussianBlur(rng.integers(0, 256, (96, 160, 3), np.uint8), (0, 0), 3)
    base = cv2.normalize(base, None, 20, 235, cv2.NORM_MINMAX)
    t = np.arange(3) / 30.0
    write_video(tmp_path / "bgr.mp4", [base] * 3, t, crf=0)
    write_video(tmp_path / "i420.mp4", [cv2.cvtColor(base, cv2.COLOR_BGR2YUV_I420)] * 3, t,
                crf=0)
    _, a = _opencv_times(tmp_path / "bgr.mp4")
    _, b = _opencv_times(tmp_path / "i420.mp4")
    assert len(a) == len(b) == 3
    err_own = np.abs(a[0].astype(int) - base).mean()
    err_i420 = np.abs(b[0].astype(int) - base).mean()
    assert err_i420 < err_own + 1.0 and err_i420 < 5.0
    grey = [cv2.cvtColor(x, cv2.COLOR_BGR2GRAY).astype(int) for x in (a[0], b[0])]
    assert np.abs(grey[0] - grey[1]).mean() < 1.0
    with pytest.raises(InputError, match="frame 1 is"):
        write_video(tmp_path / "x.mp4", [cv2.cvtColor(base, cv2.COLOR_BGR2YUV_I420),
                                         base[:48]], t[:2])
