"""The corner picker: one self-contained HTML page for registering the floor by hand.

:func:`picker_frames` takes a frame of the video (the first, or the one at ``at_s``; for
a hand-held clip a few more spread over the clip) and computes, in Python, the tile-corner
candidates of each (:func:`vidodo.corner_candidates.corner_candidates`) and the floor
fiducials of the field profile seen in it
(:func:`vidodo.registration.floor_markers.detect_floor_markers`).
:func:`build_page` embeds the frames as JPEG ``data:`` URIs and the candidates as JSON in
one HTML file with its script and style sheet inline (package data ``picker_page.js`` and
``picker_page.css``); a Content-Security-Policy forbids it to load anything else, so it
works from ``file://`` with no server and no network.

In the page a click snaps to the nearest candidate, the lattice of tiles is filled in
once four points carry floor coordinates, the implied grid is drawn over the image, and
"Save" downloads ``u_px,v_px,x_m,y_m`` rows, the format :func:`vidodo.registration.camera_fit.
read_points_csv` reads.
"""

from __future__ import annotations

import base64
import json
import math
from dataclasses import dataclass
from html import escape
from importlib import resources
from pathlib import Path

import cv2
import numpy as np

from .corner_candidates import CornerSettings, corner_candidates
from .errors import InputError
from .profiles import FieldProfile

__all__ = ["PickerFrame", "PickerSettings", "frame_for_picker", "picker_frames", "build_page",
           "write_picker"]

_CSP = ("default-src 'none'; img-src data:; style-src 'unsafe-inline'; "
        "script-src 'unsafe-inline'; base-uri 'none'; form-action 'none'")


@dataclass(frozen=True)
class PickerSettings:
    """How the picker page is made."""

    jpeg_quality: int = 90
    """JPEG quality of the embedded frames (0-100)."""
    extra_frames: int = 3
    """Frames added after the first for a hand-held clip."""
    moved_px: float = 1.5
    """A view shifted by more than this between the frames counts as hand-held [px]."""
    corners: CornerSettings = CornerSettings()


@dataclass(frozen=True)
class PickerFrame:
    """One frame offered in the picker, with what was found in it."""

    t_s: float
    """Frame time on the video clock [s]."""
    jpeg: bytes
    """The frame, JPEG-encoded."""
    width_px: int
    height_px: int
    candidates: np.ndarray
    """Tile-corner candidates, shape (N, 2) [px]."""
    fiducials: tuple
    """(family, id, corners_px (4, 2), corners_floor_m (4, 2)) per floor fiducial seen."""


def frame_for_picker(frame_bgr, t_s: float, field: FieldProfile,
                     settings: PickerSettings | None = None, grey=None) -> PickerFrame:
    """Candidates and fiducials of one frame, and the frame as JPEG.

    ``grey``: the frame's grey levels if known otherwise (the video's own luma plane,
    full resolution, where the colour planes have half of it); default from the
    colour frame.
    """
    from .registration.floor_markers import detect_floor_markers

    settings = settings or PickerSettings()
    if grey is None:
        grey = frame_bgr if frame_bgr.ndim == 2 else cv2.cvtColor(frame_bgr,
                                                                  cv2.COLOR_BGR2GRAY)
    cand = corner_candidates(grey, settings.corners)
    fids = []
    if field.floor_markers:
        px, fl, seen = detect_floor_markers(grey, field)
        for k, mid in enumerate(seen):
            fam = next(m.family for m in field.floor_markers if m.id == mid)
            fids.append((fam, int(mid), px[4 * k:4 * k + 4], fl[4 * k:4 * k + 4]))
    ok, buf = cv2.imencode(".jpg", frame_bgr, [cv2.IMWRITE_JPEG_QUALITY,
                                               int(settings.jpeg_quality)])
    if not ok:
        raise InputError("picker: the frame could not be encoded as JPEG")
    return PickerFrame(float(t_s), buf.tobytes(), int(grey.shape[1]), int(grey.shape[0]),
                       cand, tuple(fids))


def _view_shift_px(a, b) -> float:
    """How far the view moved between two grey frames (phase correlation) [px]."""
    fa, fb = (np.float32(x) for x in (a, b))
    (dx, dy), _ = cv2.phaseCorrelate(fa, fb)
    return math.hypot(dx, dy)


def _read_frames(video_path, times_s, grey=False):
    """The first frame at or after each wanted time: list of (t_s, frame_bgr), or with
    ``grey`` (t_s, frame_grey) from the stream's luma plane where the reader can.

    ``times_s`` may also be a function ``f(VideoInfo) -> times`` (one opening of the
    video for both).
    """
    from .video import VideoReader, VideoTruncatedError

    got = []
    with VideoReader(video_path, threaded=False, check_identical=False,
                     grey=grey) as reader:
        want = sorted(times_s(reader.info) if callable(times_s) else times_s)
        try:
            for _, t_s, frame in reader:
                while want and t_s >= want[0] - 1e-6:
                    want.pop(0)
                    got.append((t_s, frame))
                if not want:
                    break
        except VideoTruncatedError:
            pass
    return got


def picker_frames(video_path, field: FieldProfile, *, at_s: float | None = None,
                  settings: PickerSettings | None = None) -> list[PickerFrame]:
    """The frames the picker offers: the one at ``at_s`` (default the first) and, when the
    camera moves (a hand-held clip), ``settings.extra_frames`` more spread over the rest.

    Raises
    ------
    InputError
        When the video has no frame at ``at_s``.
    """
    settings = settings or PickerSettings()
    path = Path(video_path)
    if not path.is_file():
        raise InputError(f"{path}: file not found; check the video path")
    start = 0.0 if at_s is None else float(at_s)

    def times(info):
        fps = info.nominal_fps if info.nominal_fps and info.nominal_fps > 0 else 30.0
        end = info.frame_count / fps if info.frame_count else start
        extra = settings.extra_frames
        return [start] + [start + (end - start) * (k + 1) / (extra + 1) for k in range(extra)]

    frames = _read_frames(path, times)
    if not frames:
        raise InputError(f"{path}: no frame at {start:.3f} s (the video is shorter); "
                         "give a smaller --at")
    first = frames[0]
    small = [cv2.resize(cv2.cvtColor(f, cv2.COLOR_BGR2GRAY), None, fx=0.5, fy=0.5,
                        interpolation=cv2.INTER_AREA) for _, f in frames]
    moving = any(2.0 * _view_shift_px(small[0], s) > settings.moved_px for s in small[1:])
    chosen = frames if moving else [first]
    # candidates from the luma plane the camera encoded (full resolution; grey made
    # from the colour frame mixes in the half-resolution colour planes wherever the
    # decoder's colour matrix is not the encoder's)
    greys = _read_frames(path, [t for t, _ in chosen], grey=True)
    greys = [g if g.ndim == 2 else None for _, g in greys]
    if len(greys) != len(chosen):
        greys = [None] * len(chosen)
    return [frame_for_picker(f, t, field, settings, grey=g)
            for (t, f), g in zip(chosen, greys, strict=True)]


def _asset(name: str) -> str:
    return resources.files("vidodo").joinpath(name).read_text(encoding="utf-8")


def _page_data(frames, field: FieldProfile, title: str) -> dict:
    out = []
    for fr in frames:
        out.append({
            "t_s": round(fr.t_s, 6), "w": fr.width_px, "h": fr.height_px,
            "src": "data:image/jpeg;base64," + base64.b64encode(fr.jpeg).decode("ascii"),
            "cand": np.round(np.asarray(fr.candidates, float), 3).tolist(),
            "fiducials": [{"family": fam, "id": mid,
                           "px": np.round(np.asarray(px, float), 3).tolist(),
                           "floor_m": np.round(np.asarray(fl, float), 6).tolist()}
                          for fam, mid, px, fl in fr.fiducials],
        })
    return {"title": title, "frames": out,
            "field": {"tiles_x": field.tiles_x, "tiles_y": field.tiles_y,
                      "tile_m": field.tile_size_m}}


def build_page(frames, field: FieldProfile, *, title: str = "vidodo corner picker") -> str:
    """The picker page as one HTML string (nothing outside it is loaded)."""
    if not frames:
        raise InputError("picker: no frame to show")
    data = json.dumps(_page_data(frames, field, title), separators=(",", ":"))
    data = data.replace("</", "<\\/")
    return "\n".join([
        PAGE_SIGNATURE.decode("ascii"),
        '<html lang="en"><head><meta charset="utf-8">',
        f'<meta http-equiv="Content-Security-Policy" content="{_CSP}">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        '<link rel="icon" href="data:,">',
        f"<title>{escape(title)}</title><style>{_asset('picker_page.css')}</style></head>",
        "<body>",
        _asset("picker_page.html"),
        f'<script type="application/json" id="picker-data">{data}</script>',
        f"<script>{_asset('picker_page.js')}</script>",
        "</body></html>",
    ]) + "\n"


PAGE_SIGNATURE = b"<!DOCTYPE html>\n<!-- corner picker page written by `vidodo pick` -->"
"""First bytes of every picker page (an existing file without them is not replaced)."""


def write_picker(video_path, field: FieldProfile, out_path, *, at_s: float | None = None,
                 settings: PickerSettings | None = None, inputs=(),
                 force: bool = False) -> Path:
    """Write the picker page for a video; returns ``out_path``.

    An existing ``out_path`` that is an input, or a file this function did not write
    (:data:`PAGE_SIGNATURE`), is refused (``OutputError``) unless ``force``; an input
    never is replaced.
    """
    from .outputs import atomic_file, check_file_target

    inputs = (video_path, *inputs)
    check_file_target(out_path, inputs=inputs, force=force, signature=PAGE_SIGNATURE)
    frames = picker_frames(video_path, field, at_s=at_s, settings=settings)
    page = build_page(frames, field, title=f"vidodo corner picker: {Path(video_path).name}")
    out_path = Path(out_path)
    with atomic_file(out_path, inputs=inputs, force=force,
                     signature=PAGE_SIGNATURE) as tmp:
        Path(tmp).write_text(page, encoding="utf-8")
    return out_path
