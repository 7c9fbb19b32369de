"""PNG plots of a graded run: the field map, error over time, and speed.

The plots read the grade outputs (DEVELOPERS.md, "Grade outputs"): the drift table
(one row per truth sample, anchored drift per source) and the events table. The data
that feeds each plot is computed by small functions here (:func:`source_prefixes`,
:func:`speed_from_positions`, :func:`event_windows`, :func:`tile_grid_lines`) so that it
can be tested apart from the drawing. Drawing uses matplotlib's object interface on the
Agg canvas (no pyplot, no global state, safe in worker processes).
"""

from __future__ import annotations

import functools
import math
from pathlib import Path

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

from ..outputs import column_prefix
from ..units import length_factor

__all__ = [
    "trend_figure",
    "source_prefixes",
    "speed_from_positions",
    "event_windows",
    "tile_grid_lines",
    "field_map_figure",
    "error_figure",
    "speed_figure",
    "save_figure",
    "write_plots",
    "EVENT_STYLE",
    "TRUTH_COLOR",
    "source_colors",
]

TRUTH_COLOR = "#111111"
_SOURCE_PALETTE = ("#1f77b4", "#d62728", "#2ca02c", "#9467bd", "#ff7f0e", "#17becf",
                   "#8c564b", "#e377c2", "#7f7f7f", "#bcbd22")
EVENT_STYLE = {
    "wheel_slip": ("#e6a100", "o"),
    "shove": ("#c2185b", "s"),
    "pod_lift": ("#00897b", "^"),
    "impact": ("#b71c1c", "X"),
    "heading_jump": ("#5e35b1", "D"),
}
"""Event kind -> (colour, marker) used on every plot."""
_OTHER_EVENT = ("#555555", "P")
PLOT_NAMES = ("field_map", "error_vs_time", "speed")


# ------------------------------------------------------------------ data for plots
LITERAL_TEXT = {"text.parse_math": False, "text.usetex": False}
"""Matplotlib settings under which every string is drawn as written: names, titles and
labels come from users (a ``$`` in a source name must not start math text)."""


def literal_text(fn):
    """Run ``fn`` (which makes or saves a figure) with :data:`LITERAL_TEXT`."""
    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        with matplotlib.rc_context(LITERAL_TEXT):
            return fn(*args, **kwargs)
    return wrapper


def source_prefixes(drift: pd.DataFrame, names=None) -> dict[str, str]:
    """Odometry sources present in a drift table, display name -> column prefix.

    Parameters
    ----------
    drift : DataFrame
        Drift table; a source is present when its ``<prefix>_x_m``, ``<prefix>_y_m``
        and ``<prefix>_err_m`` columns are.
    names : iterable of str, optional
        Source names in the order wanted (e.g. the keys of ``summary['sources']``).
        Names whose columns are missing are left out; sources with columns but no name
        are added under their prefix.

    Returns
    -------
    dict
        Ordered mapping display name -> column prefix.
    """
    cols = set(drift.columns)
    found = [c[: -len("_err_m")] for c in drift.columns
             if c.endswith("_err_m") and not c.endswith("heading_err_m")]
    found = [p for p in found if f"{p}_x_m" in cols and f"{p}_y_m" in cols]
    out: dict[str, str] = {}
    for name in names or ():
        p = column_prefix(name)
        if p in found and p not in out.values():
            out[str(name)] = p
    for p in found:
        if p not in out.values():
            out[p] = p
    return out


def speed_from_positions(t_s, x_m, y_m):
    """Ground speed from positions by central differences on the sample times.

    Parameters
    ----------
    t_s, x_m, y_m : array_like of shape (N,)
        Times [s] (increasing) and floor positions [m]. NaN positions give NaN speed
        at and beside them.

    Returns
    -------
    ndarray of shape (N,)
        Speed [m/s]; one-sided differences at the ends; NaN where undefined.
    """
    t = np.asarray(t_s, dtype=float)
    x = np.asarray(x_m, dtype=float)
    y = np.asarray(y_m, dtype=float)
    if t.size < 2:
        return np.full(t.shape, np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        vx = np.gradient(x, t)
        vy = np.gradient(y, t)
    return np.hypot(vx, vy)


def event_windows(events: pd.DataFrame | None) -> list[tuple[str, float, float]]:
    """Event windows to shade, as ``(kind, t_start_s, t_end_s)`` sorted by start.

    An event without an end (NaN) or shorter than 20 ms is widened to 20 ms around its
    middle so that it stays visible on a plot.
    """
    if events is None or len(events) == 0:
        return []
    out = []
    for _, ev in events.iterrows():
        t0 = float(ev.get("t_start_s", np.nan))
        t1 = float(ev.get("t_end_s", np.nan))
        if not math.isfinite(t0):
            continue
        if not math.isfinite(t1) or t1 < t0:
            t1 = t0
        if t1 - t0 < 0.02:
            mid = 0.5 * (t0 + t1)
            t0, t1 = mid - 0.01, mid + 0.01
        out.append((str(ev.get("kind", "event")), t0, t1))
    return sorted(out, key=lambda w: w[1])


def tile_grid_lines(tiles_x: int, tiles_y: int, tile_size_m: float):
    """Tile seam positions of the field, ``(xs_m, ys_m)``, each including the borders.

    Returns
    -------
    tuple of ndarray
        ``tiles_x + 1`` x positions and ``tiles_y + 1`` y positions [m].
    """
    return (np.arange(tiles_x + 1) * float(tile_size_m),
            np.arange(tiles_y + 1) * float(tile_size_m))


def source_colors(names) -> dict[str, str]:
    """A fixed colour per source, in the given order."""
    return {n: _SOURCE_PALETTE[i % len(_SOURCE_PALETTE)] for i, n in enumerate(names)}


def _event_style(kind: str):
    return EVENT_STYLE.get(kind, _OTHER_EVENT)


def _shade_events(ax, windows, t_scale=1.0):
    for kind, t0, t1 in windows:
        ax.axvspan(t0 * t_scale, t1 * t_scale, color=_event_style(kind)[0], alpha=0.18, lw=0)


def _event_legend(windows):
    kinds = sorted({k for k, _, _ in windows})
    return [Patch(facecolor=_event_style(k)[0], alpha=0.35, label=k) for k in kinds]


# ------------------------------------------------------------------------ figures
@literal_text
def field_map_figure(drift: pd.DataFrame, events: pd.DataFrame | None = None, *,
                     field=None, sources=None, unit: str = "mm", title: str = "") -> Figure:
    """Top-down map of the field to scale with every track and the events.

    Parameters
    ----------
    drift : DataFrame
        Drift table (truth and per-source positions [m]).
    events : DataFrame, optional
        Events table; each event is marked at its ``x_m, y_m``.
    field : FieldProfile-like, optional
        Anything with ``tiles_x, tiles_y, tile_size_m``; draws the tile grid. Without
        it the map is drawn to scale around the tracks, with no grid.
    sources : dict, optional
        Display name -> column prefix (default: :func:`source_prefixes`).
    unit : {'mm', 'in', 'm'}
        Display unit of the axes.
    """
    k = length_factor(unit)
    sources = source_prefixes(drift) if sources is None else sources
    colors = source_colors(sources)
    xs_all = [drift["truth_x_m"].to_numpy(float)]
    ys_all = [drift["truth_y_m"].to_numpy(float)]
    for p in sources.values():
        xs_all.append(drift[f"{p}_x_m"].to_numpy(float))
        ys_all.append(drift[f"{p}_y_m"].to_numpy(float))
    if field is not None:
        gx, gy = tile_grid_lines(field.tiles_x, field.tiles_y, field.tile_size_m)
        xs_all.append(gx)
        ys_all.append(gy)
    if events is not None and len(events) and {"x_m", "y_m"} <= set(events.columns):
        xs_all.append(pd.to_numeric(events["x_m"], errors="coerce").to_numpy(float))
        ys_all.append(pd.to_numeric(events["y_m"], errors="coerce").to_numpy(float))
    lim = _map_limits(xs_all, ys_all, tight=field is not None)
    aspect = (lim[3] - lim[2]) / (lim[1] - lim[0]) if lim else 1.0
    ax_w = 6.0
    ax_h = float(np.clip(ax_w * aspect, 2.5, 8.0))
    fig = Figure(figsize=(ax_w + 2.4, ax_h + 1.3), dpi=110)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    if field is not None:
        ax.add_patch(_field_patch(gx, gy, k))
        for x in gx:
            ax.plot([x * k, x * k], [gy[0] * k, gy[-1] * k], color="#9e9e9e", lw=0.8, zorder=1)
        for y in gy:
            ax.plot([gx[0] * k, gx[-1] * k], [y * k, y * k], color="#9e9e9e", lw=0.8, zorder=1)
    for name, p in sources.items():
        x = drift[f"{p}_x_m"].to_numpy(float)
        y = drift[f"{p}_y_m"].to_numpy(float)
        ax.plot(x * k, y * k, color=colors[name], lw=1.4, label=str(name), zorder=3)
    tx = drift["truth_x_m"].to_numpy(float)
    ty = drift["truth_y_m"].to_numpy(float)
    # truth under the sources (thick), so a source that follows it stays visible on top
    ax.plot(tx * k, ty * k, color=TRUTH_COLOR, lw=3.2, label="truth (video)", zorder=2.5)
    ok = np.isfinite(tx) & np.isfinite(ty)
    if ok.any():
        i0, i1 = np.flatnonzero(ok)[[0, -1]]
        ax.plot(tx[i0] * k, ty[i0] * k, "o", ms=9, mfc="white", mec=TRUTH_COLOR, mew=2,
                zorder=5, label="start")
        ax.plot(tx[i1] * k, ty[i1] * k, "s", ms=8, color=TRUTH_COLOR, zorder=5, label="end")
    handles, labels = ax.get_legend_handles_labels()
    if events is not None and len(events):
        seen = set()
        placed: list[tuple[float, float]] = []
        for i, ev in enumerate(events.itertuples(index=False), start=1):
            ex, ey = float(getattr(ev, "x_m", np.nan)), float(getattr(ev, "y_m", np.nan))
            if not (math.isfinite(ex) and math.isfinite(ey)):
                continue
            kind = str(getattr(ev, "kind", "event"))
            c, mk = _event_style(kind)
            ax.plot(ex * k, ey * k, mk, ms=11, color=c, mec="black", mew=0.8, zorder=6)
            # events at (nearly) the same spot get their numbers stacked, not overprinted
            near = sum(1 for px, py in placed if math.hypot(px - ex, py - ey) < 0.08)
            placed.append((ex, ey))
            ax.annotate(str(i), (ex * k, ey * k), xytext=(7, 7 + 10 * near),
                        textcoords="offset points", fontsize=8, color=c, zorder=7,
                        fontweight="bold")
            if kind not in seen:
                seen.add(kind)
                handles.append(Line2D([], [], ls="", marker=mk, color=c, mec="black",
                                      ms=9, label=kind))
                labels.append(kind)
    ax.set_aspect("equal", adjustable="box")
    if lim:
        ax.set_xlim(lim[0] * k, lim[1] * k)
        ax.set_ylim(lim[2] * k, lim[3] * k)
    ax.set_xlabel(f"x [{unit}]")
    ax.set_ylabel(f"y [{unit}]")
    if field is None:
        ax.text(0.99, 0.01, "no field profile: tile grid not drawn", transform=ax.transAxes,
                ha="right", va="bottom", fontsize=8, color="#616161")
    ax.set_title(title or "Field map (top view, to scale)")
    leg = ax.legend(handles, labels, loc="upper left", bbox_to_anchor=(1.01, 1.0),
                    fontsize=8, frameon=False)
    _fit_outside_legend(fig, leg)
    return fig


def _fit_outside_legend(fig: Figure, legend) -> None:
    """Lay the figure out so a legend placed right of the axes stays inside it.

    ``tight_layout`` leaves a legend anchored outside the axes out of its sums, so long
    source names were cut at the right edge; the legend's drawn width is measured and
    the figure widened by it, the axes kept to the rest.
    """
    fig.tight_layout()
    renderer = fig.canvas.get_renderer()
    box = legend.get_window_extent(renderer)
    over_in = (box.x1 - fig.bbox.x1) / fig.dpi
    if over_in > 0:
        w, h = fig.get_size_inches()
        fig.set_size_inches(w + over_in + 0.15, h)
        fig.tight_layout(rect=(0.0, 0.0, w / (w + over_in + 0.15), 1.0))


def _field_patch(gx, gy, k):
    from matplotlib.patches import Rectangle

    return Rectangle((gx[0] * k, gy[0] * k), (gx[-1] - gx[0]) * k, (gy[-1] - gy[0]) * k,
                     facecolor="#f3f1ea", edgecolor="#616161", lw=1.6, zorder=0)


def _map_limits(xs, ys, *, tight):
    """``(x0, x1, y0, y1)`` [m] around every point with a small margin, or None."""
    x = np.concatenate([np.asarray(a, float).ravel() for a in xs])
    y = np.concatenate([np.asarray(a, float).ravel() for a in ys])
    x, y = x[np.isfinite(x)], y[np.isfinite(y)]
    if x.size == 0:
        return None
    span = max(x.max() - x.min(), y.max() - y.min(), 0.1)
    pad = 0.03 * span if tight else 0.08 * span
    return (x.min() - pad, x.max() + pad, y.min() - pad, y.max() + pad)


@literal_text
def error_figure(drift: pd.DataFrame, events: pd.DataFrame | None = None, *, sources=None,
                 unit: str = "mm", title: str = "") -> Figure:
    """Anchored position error over time, one panel per source, events shaded.

    Each panel shows the error distance and its along-track and cross-track parts
    (when present) in the display unit.
    """
    k = length_factor(unit)
    sources = source_prefixes(drift) if sources is None else sources
    colors = source_colors(sources)
    windows = event_windows(events)
    n = max(len(sources), 1)
    fig = Figure(figsize=(9.0, 1.2 + 2.0 * n), dpi=110)
    FigureCanvasAgg(fig)
    axes = fig.subplots(n, 1, sharex=True, squeeze=False)[:, 0]
    t = drift["t_s"].to_numpy(float)
    for ax, (name, p) in zip(axes, sources.items(), strict=False):
        _shade_events(ax, windows)
        ax.plot(t, drift[f"{p}_err_m"].to_numpy(float) * k, color=colors[name], lw=1.6,
                label="error")
        for part, style in (("along", "--"), ("cross", ":")):
            col = f"{p}_{part}_m"
            if col in drift:
                ax.plot(t, drift[col].to_numpy(float) * k, color=colors[name], lw=1.0,
                        ls=style, alpha=0.8, label=f"{part}-track")
        ax.axhline(0.0, color="#9e9e9e", lw=0.6)
        ax.set_ylabel(f"{name}\n[{unit}]")
        ax.grid(True, lw=0.3, alpha=0.6)
    if not sources:
        axes[0].text(0.5, 0.5, "no odometry source in the drift table", ha="center",
                     va="center", transform=axes[0].transAxes)
    axes[-1].set_xlabel("time on the video clock [s]")
    handles, _ = axes[0].get_legend_handles_labels()
    axes[0].legend(handles=handles + _event_legend(windows), fontsize=8, loc="upper left",
                   ncol=3, frameon=False)
    fig.suptitle(title or "Anchored drift per odometry source")
    fig.tight_layout()
    return fig


@literal_text
def speed_figure(drift: pd.DataFrame, events: pd.DataFrame | None = None, *, sources=None,
                 unit: str = "mm", title: str = "") -> Figure:
    """Ground speed of the truth track against each odometry source, events shaded."""
    k = length_factor(unit)
    sources = source_prefixes(drift) if sources is None else sources
    colors = source_colors(sources)
    windows = event_windows(events)
    fig = Figure(figsize=(9.0, 3.8), dpi=110)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    _shade_events(ax, windows)
    t = drift["t_s"].to_numpy(float)
    for name, p in sources.items():
        v = speed_from_positions(t, drift[f"{p}_x_m"], drift[f"{p}_y_m"])
        ax.plot(t, v * k, color=colors[name], lw=1.2, label=str(name))
    v_truth = speed_from_positions(t, drift["truth_x_m"], drift["truth_y_m"])
    ax.plot(t, v_truth * k, color=TRUTH_COLOR, lw=2.0, label="truth (video)")
    ax.set_xlabel("time on the video clock [s]")
    ax.set_ylabel(f"speed [{unit}/s]")
    ax.set_ylim(bottom=0.0)
    ax.grid(True, lw=0.3, alpha=0.6)
    handles, _ = ax.get_legend_handles_labels()
    leg = ax.legend(handles=handles + _event_legend(windows), fontsize=8, loc="upper left",
                    bbox_to_anchor=(1.01, 1.0), frameon=False)
    ax.set_title(title or "Speed: truth against wheels")
    _fit_outside_legend(fig, leg)
    return fig


@literal_text
def save_figure(fig: Figure, path) -> Path:
    """Write a figure as PNG and return the path."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, format="png")
    return path


def write_plots(drift: pd.DataFrame, events: pd.DataFrame | None, out_dir, *, field=None,
                sources=None, unit: str = "mm", title: str = "") -> dict[str, Path]:
    """Write the three PNG plots into ``out_dir``.

    Returns
    -------
    dict
        ``{'field_map': path, 'error_vs_time': path, 'speed': path}``.
    """
    out_dir = Path(out_dir)
    sources = source_prefixes(drift) if sources is None else sources
    prefix = f"{title}: " if title else ""
    figs = {
        "field_map": field_map_figure(drift, events, field=field, sources=sources, unit=unit,
                                      title=prefix + "field map (top view, to scale)"),
        "error_vs_time": error_figure(drift, events, sources=sources, unit=unit,
                                      title=prefix + "anchored drift per odometry source"),
        "speed": speed_figure(drift, events, sources=sources, unit=unit,
                              title=prefix + "speed: truth against wheels"),
    }
    return {name: save_figure(fig, out_dir / f"{name}.png") for name, fig in figs.items()}


@literal_text
def trend_figure(table: pd.DataFrame, *, unit: str = "mm"):
    """Drift across runs: final error and ATE per source, failed runs marked.

    Parameters
    ----------
    table : DataFrame
        :func:`vidodo.batch.batch_table` (``<src>_final_err_m``, ``<src>_ate_rmse_m``
        [m], ``status``, ``run``).
    unit : {"mm", "in", "m"}
        Length unit of the axes.

    Returns
    -------
    matplotlib.figure.Figure
    """
    k = length_factor(unit)
    srcs = [c[: -len("_final_err_m")] for c in table.columns if c.endswith("_final_err_m")]
    names = table.attrs.get("source_names", {})
    colors = source_colors(srcs)
    n = len(table)
    fig = Figure(figsize=(max(7.0, 1.0 + 0.55 * n), 6.4), dpi=110)
    FigureCanvasAgg(fig)
    axes = fig.subplots(2, 1, sharex=True)
    x = np.arange(n)
    failed = (table["status"] != "graded").to_numpy() if n else np.zeros(0, bool)
    for ax, fig_key, label in ((axes[0], "final_err_m", "final error"),
                               (axes[1], "ate_rmse_m", "ATE (best fit)")):
        for s in srcs:
            col = f"{s}_{fig_key}"
            if col in table:
                y = pd.to_numeric(table[col], errors="coerce").to_numpy(float) * k
                ax.plot(x, y, "o-", color=colors[s], lw=1.4, ms=5, label=names.get(s, s))
        for xi in x[failed]:
            ax.axvspan(xi - 0.4, xi + 0.4, color="#d32f2f", alpha=0.12, lw=0)
        ax.set_ylabel(f"{label} [{unit}]")
        ax.set_ylim(bottom=0)
        ax.grid(True, lw=0.3, alpha=0.6)
    if failed.any():
        axes[0].plot([], [], "s", color="#d32f2f", alpha=0.3, ms=10, label="not graded")
    axes[0].legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    axes[1].set_xticks(x)
    axes[1].set_xticklabels(list(table["run"]) if n else [], rotation=35, ha="right",
                            fontsize=8)
    axes[1].set_xlabel("run (folder-name order)")
    fig.suptitle(f"Drift across {n} runs ({int((~failed).sum())} graded)")
    fig.tight_layout()
    return fig
