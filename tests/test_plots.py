"""Plots: the data that feeds them, checked against closed forms and the input tables.

The grade folder used here is built by hand (``make_grade_dir``) in the formats of
DEVELOPERS.md "Grade outputs", from twists integrated in closed form with
:func:`vidodo.se2.integrate_twist`, so these tests need no rendering.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from matplotlib.patches import Rectangle
from numpy.testing import assert_allclose

from vidodo import __version__
from vidodo.outputs import column_prefix
from vidodo.profiles import FieldProfile
from vidodo.report import plots
from vidodo.report.build import load_grade_dir, write_report
from vidodo.se2 import integrate_twist, to_body_frame

FIELD = FieldProfile(tiles_x=6, tiles_y=4, tile_size_m=0.6)


def synthetic_grade(*, n=241, duration_s=8.0, source_names=("drive", "tracking+imu"),
                    weird_names=False):
    """A drift table, events and summary in the grade output formats.

    Truth: 3 s straight at 0.5 m/s, a quarter-turn arc of radius 0.5 m, then straight.
    Each source integrates the same twist with a scale error (1.04 and 0.99 on speed,
    1.03 and 1.0 on turn rate), anchored at the truth start pose.
    """
    t = np.linspace(0.0, duration_s, n)
    v = np.where(t < 7.5, 0.5, 0.0)
    w = np.where((t >= 3.0) & (t < 3.0 + math.pi / 2), 1.0, 0.0)  # quarter turn at 1 rad/s
    start = (0.6, 0.5, 0.0)
    truth = integrate_twist(t, np.column_stack([v, np.zeros_like(v), w]), start)
    drift = pd.DataFrame({"t_s": t, "truth_x_m": truth[:, 0], "truth_y_m": truth[:, 1],
                          "truth_heading_rad": truth[:, 2],
                          "truth_sigma_xy_m": np.full(n, 0.002),
                          "truth_sigma_heading_rad": np.full(n, 0.004)})
    seg = np.hypot(np.diff(truth[:, 0]), np.diff(truth[:, 1]))
    drift["path_length_m"] = np.concatenate([[0.0], np.cumsum(seg)])
    scales = {0: (1.04, 1.03), 1: (0.99, 1.0), 2: (1.0, 0.97)}
    sources = {}
    for i, name in enumerate(source_names):
        sv, sw = scales[i % 3]
        pose = integrate_twist(t, np.column_stack([v * sv, np.zeros_like(v), w * sw]), start)
        p = column_prefix(name)
        dx, dy = pose[:, 0] - truth[:, 0], pose[:, 1] - truth[:, 1]
        along, cross = to_body_frame(dx, dy, truth[:, 2])
        err = np.hypot(dx, dy)
        drift[f"{p}_x_m"] = pose[:, 0]
        drift[f"{p}_y_m"] = pose[:, 1]
        drift[f"{p}_heading_rad"] = pose[:, 2]
        drift[f"{p}_err_m"] = err
        drift[f"{p}_along_m"] = along
        drift[f"{p}_cross_m"] = cross
        drift[f"{p}_heading_err_rad"] = pose[:, 2] - truth[:, 2]
        k = int(np.argmax(err))
        sources[name] = {
            "ate_rmse_m": float(np.sqrt(np.mean(err**2)) * 0.5),
            "rpe_0p5m_rmse_m": 0.0123 + i * 0.001, "rpe_1s_rmse_m": 0.0149 + i * 0.002,
            "final_err_m": float(err[-1]),
            "final_heading_err_rad": float(pose[-1, 2] - truth[-1, 2]),
            "drift_pct": float(100 * err[-1] / drift["path_length_m"].iloc[-1]),
            "heading_drift_deg_per_turn": float(360 * (sw - 1)),
            "max_err_m": float(err[k]), "max_err_t_s": float(t[k]),
            "max_err_x_m": float(truth[k, 0]), "max_err_y_m": float(truth[k, 1]),
            "path_length_m": float(drift["path_length_m"].iloc[-1]),
            "pass": bool(err[-1] < 0.05),
        }
    detail = "drive wheels spun" if not weird_names else \
        '<img src="http://127.0.0.1:9/x.png" onerror="console.error(1)">'
    events = pd.DataFrame([
        {"kind": "wheel_slip", "t_start_s": 1.0, "t_end_s": 1.6, "x_m": 1.1, "y_m": 0.5,
         "magnitude": 0.21, "magnitude_unit": "ratio", "sources": "drive",
         "detail": detail},
        {"kind": "impact", "t_start_s": 5.2, "t_end_s": 5.2, "x_m": 1.6, "y_m": 1.4,
         "magnitude": 0.034, "magnitude_unit": "m", "sources": ";".join(source_names),
         "detail": "speed dropped while the wheels kept turning"},
    ])
    active = np.full(n, "", dtype=object)
    active[(t >= 1.0) & (t <= 1.6)] = "wheel_slip"
    active[np.isclose(t, 5.2, atol=0.02)] = "impact"
    drift["events"] = active
    summary = {
        "vidodo_version": __version__,
        "inputs": {"run": "runs/day3-run07" if not weird_names else
                   "runs/<script>alert(1)</script>",
                   "video": "video.mp4", "log": "log.csv", "robot": "robot.toml",
                   "field": "field.toml"},
        "settings": {"units": "mm", "marker_family": "DICT_4X4_50", "smooth_s": 0.1},
        "clock": {"offset_s": 0.4213, "sigma_s": 0.0021, "confidence": 0.97,
                  "method": "speed cross-correlation"},
        "truth": {"detected_fraction": 0.98, "median_sigma_xy_m": 0.0021},
        "sources": sources,
        "events": events.to_dict(orient="records"),
        "tolerances": {"final_err_m": 0.05, "heading_drift_deg_per_turn": 5.0},
        "verdict": "1 of 2 sources within tolerance",
        "warnings": ["truth lost for 3 frames near t = 4.1 s"],
        "field": {"tiles_x": FIELD.tiles_x, "tiles_y": FIELD.tiles_y,
                  "tile_size_m": FIELD.tile_size_m},
    }
    return drift, events, summary


def make_grade_dir(folder, **kw):
    """Write a synthetic grade folder (drift.csv, events.csv, summary.json)."""
    folder.mkdir(parents=True, exist_ok=True)
    drift, events, summary = synthetic_grade(**kw)
    drift.to_csv(folder / "drift.csv", index=False)
    events.to_csv(folder / "events.csv", index=False)
    (folder / "summary.json").write_text(json.dumps(summary, indent=2), encoding="utf-8")
    return folder


# --------------------------------------------------------------------- data feeding
def test_column_prefix_rule():
    """DEVELOPERS.md: lower-cased, then every character outside [a-z0-9] becomes '_';
    the plots find the columns the drift table wrote for a capitalised name."""
    assert column_prefix("tracking+imu") == "tracking_imu"
    assert column_prefix("Drive 2") == "drive_2"
    drift = pd.DataFrame({"t_s": [0.0], "drive_2_x_m": [0.0], "drive_2_y_m": [0.0],
                          "drive_2_err_m": [0.0]})
    assert plots.source_prefixes(drift, ["Drive 2"]) == {"Drive 2": "drive_2"}


def test_source_prefixes_follow_summary_order_and_skip_absent():
    drift, _, _ = synthetic_grade()
    got = plots.source_prefixes(drift, ["tracking+imu", "missing", "drive"])
    assert list(got.items()) == [("tracking+imu", "tracking_imu"), ("drive", "drive")]
    # the truth columns and heading errors are not mistaken for sources
    assert "truth" not in plots.source_prefixes(drift).values()


def test_speed_on_a_circle_is_radius_times_rate():
    """Uniform circular motion: speed = r * omega (closed form, common practice)."""
    t = np.linspace(0, 2, 201)
    r, w = 0.8, 1.5
    v = plots.speed_from_positions(t, r * np.cos(w * t), r * np.sin(w * t))
    # central differences on a circle: speed * sinc(w dt) (exact for sampled sinusoids)
    dt = t[1] - t[0]
    assert_allclose(v[1:-1], r * np.sin(w * dt) / dt, rtol=1e-9)
    assert_allclose(v, r * w, rtol=2e-3)


def test_speed_nan_stays_local():
    t = np.arange(10) * 0.1
    x = t * 0.5
    x[5] = np.nan
    v = plots.speed_from_positions(t, x, np.zeros_like(x))
    assert np.isnan(v[4:7]).all()
    assert_allclose(v[[0, 1, 2, 3, 7, 8, 9]], 0.5)


def test_event_windows_from_events_table():
    _, events, _ = synthetic_grade()
    w = plots.event_windows(events)
    assert w[0] == ("wheel_slip", 1.0, 1.6)
    # a zero-length impact is widened to 20 ms around its time so it stays visible
    assert w[1][0] == "impact"
    assert_allclose(w[1][1:], (5.19, 5.21))
    assert plots.event_windows(None) == []


def test_tile_grid_lines_are_the_tile_seams():
    xs, ys = plots.tile_grid_lines(6, 4, 0.6)
    assert_allclose(xs, [0, 0.6, 1.2, 1.8, 2.4, 3.0, 3.6], atol=1e-12)
    assert_allclose(ys, [0, 0.6, 1.2, 1.8, 2.4], atol=1e-12)


# --------------------------------------------------------------------- the figures
def _lines(ax):
    return {ln.get_label(): ln.get_xydata() for ln in ax.get_lines()}


@pytest.mark.parametrize("unit,factor", [("mm", 1000.0), ("in", 1 / 0.0254), ("m", 1.0)])
def test_field_map_draws_the_tracks_to_scale(unit, factor):
    """Lines carry the table's positions times the unit factor (1 in = 25.4 mm exactly)."""
    drift, events, _ = synthetic_grade()
    fig = plots.field_map_figure(drift, events, field=FIELD, unit=unit)
    ax = fig.axes[0]
    lines = _lines(ax)
    assert_allclose(lines["truth (video)"][:, 0], drift["truth_x_m"] * factor)
    assert_allclose(lines["drive"][:, 1], drift["drive_y_m"] * factor)
    assert_allclose(lines["tracking_imu"][:, 0], drift["tracking_imu_x_m"] * factor)
    # equal scale on both axes; the field rectangle is the full tile grid
    assert ax.get_aspect() == 1.0
    rect = [p for p in ax.patches if isinstance(p, Rectangle)][0]
    assert_allclose([rect.get_width(), rect.get_height()], [3.6 * factor, 2.4 * factor])
    # one grid line per tile seam: 7 vertical + 5 horizontal
    seams = [ln for ln in ax.get_lines() if ln.get_label().startswith("_")
             and ln.get_color() == "#9e9e9e"]
    assert len(seams) == 7 + 5
    # events marked where they happened
    marks = {tuple(np.round(ln.get_xydata()[0] / factor, 6)) for ln in ax.get_lines()
             if len(ln.get_xydata()) == 1}
    assert (1.1, 0.5) in marks and (1.6, 1.4) in marks
    x0, x1 = ax.get_xlim()
    assert x0 <= 0 and x1 >= 3.6 * factor


def test_error_figure_one_panel_per_source_with_shaded_events():
    drift, events, _ = synthetic_grade()
    fig = plots.error_figure(drift, events, unit="mm")
    assert len(fig.axes) == 2
    for ax, p in zip(fig.axes, ("drive", "tracking_imu"), strict=True):
        lines = _lines(ax)
        assert_allclose(lines["error"][:, 1], drift[f"{p}_err_m"] * 1000)
        assert_allclose(lines["along-track"][:, 1], drift[f"{p}_along_m"] * 1000)
        spans = [pt for pt in ax.patches]
        assert len(spans) == 2  # one shaded window per event


def test_speed_figure_truth_matches_commanded_speed():
    """The synthetic truth drives at 0.5 m/s: the plotted truth speed is 500 mm/s."""
    drift, events, _ = synthetic_grade()
    fig = plots.speed_figure(drift, events, unit="mm")
    truth = _lines(fig.axes[0])["truth (video)"]
    moving = (truth[:, 0] > 0.2) & (truth[:, 0] < 7.3)
    assert_allclose(truth[moving, 1], 500.0, rtol=2e-3)
    drive = _lines(fig.axes[0])["drive"]
    assert_allclose(drive[moving, 1], 520.0, rtol=2e-3)  # 1.04 speed scale


def test_write_plots_and_write_report(tmp_path):
    folder = make_grade_dir(tmp_path / "grade")
    data = load_grade_dir(folder)
    assert data.field == FieldProfile(6, 4, 0.6)
    assert list(data.sources) == ["drive", "tracking+imu"]
    written = write_report(folder, folder, replay=False, units="in")
    names = sorted(p.name for p in written)
    assert names == ["error_vs_time.png", "field_map.png", "report.html", "speed.png"]
    for p in written:
        if p.suffix == ".png":
            assert p.read_bytes().startswith(b"\x89PNG\r\n\x1a\n")
            assert p.stat().st_size > 10_000


def test_field_map_legend_stays_inside_the_figure():
    """A legend right of the axes with long source names and every event kind is drawn
    wholly inside the figure (it was cut at the right edge; checked on the rendered
    canvas with matplotlib's own window extents)."""
    drift, events, _ = synthetic_grade()
    long = {c: c.replace("drive", "drive_with_a_rather_long_source_name")
            for c in drift.columns}
    fig = plots.field_map_figure(drift.rename(columns=long), events, field=FIELD)
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    leg = fig.axes[0].get_legend().get_window_extent(renderer)
    assert leg.x1 <= fig.bbox.x1 + 0.5
    ax = fig.axes[0].get_window_extent(renderer)
    assert ax.x1 < leg.x0  # the axes keep clear of it
