"""One self-contained HTML report of a graded run.

The page holds everything it shows: plots are embedded as ``data:`` URIs, the style sheet
is inline, there are no scripts, fonts or links to anything outside the file, and a
Content-Security-Policy forbids the page from loading anything that is not a data URI.
Every string that came from an input (source names, event details, file names,
settings, warnings) goes through :func:`html.escape`.

Each figure cell carries its SI value and where it came from in ``summary.json``, e.g.
``<td data-key="sources/drive/ate_rmse_m" data-si="0.0123">12.3 mm</td>``, so the page
can be checked against the summary by a machine as well as read by a person.
"""

from __future__ import annotations

import base64
import json
import math
from html import escape
from pathlib import Path

from .. import __version__
from ..units import format_angle, format_length, format_percent, length_factor

__all__ = ["METRIC_COLUMNS", "build_html", "write_html", "png_data_uri",
           "registration_section"]

METRIC_COLUMNS = (
    # (summary key, heading, kind)  kind: length | angle | percent | degrees | seconds | bool
    ("ate_rmse_m", "ATE (best fit) RMSE", "length"),
    ("rpe_0p5m_rmse_m", "RPE per 0.5 m", "length"),
    ("rpe_1s_rmse_m", "RPE per 1 s", "length"),
    ("final_err_m", "final error", "length"),
    ("final_heading_err_rad", "final heading error", "angle"),
    ("drift_pct", "drift (% of path)", "percent"),
    ("heading_drift_deg_per_turn", "heading drift per turn", "degrees"),
    ("max_err_m", "max error", "length"),
    ("max_err_t_s", "max error at", "seconds"),
    ("path_length_m", "path length", "length"),
    ("pass", "within tolerance", "bool"),
)
"""Columns of the metrics table, in order: summary key, heading, kind of value."""

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:0;color:#1b1b1b;
background:#fafafa}
main{max-width:1100px;margin:0 auto;padding:1.2rem 1.5rem 3rem}
h1{font-size:1.5rem;margin:.2rem 0 .8rem}h2{font-size:1.15rem;margin-top:2rem;
border-bottom:1px solid #ddd;padding-bottom:.2rem}
table{border-collapse:collapse;margin:.4rem 0;font-size:.9rem;background:#fff}
th,td{border:1px solid #d7d7d7;padding:.25rem .55rem;text-align:left;vertical-align:top}
th{background:#f0f0f0}td.num{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
.verdict{font-size:1.1rem;padding:.5rem .8rem;border-radius:4px;display:inline-block}
.pass{background:#e3f4e1}.fail{background:#fbe3e1}.unknown{background:#eee}
figure{margin:1rem 0}figure img{max-width:100%;height:auto;border:1px solid #ddd;
background:#fff}figcaption{font-size:.85rem;color:#555}
.warn{color:#8a4b00}footer{margin-top:2.5rem;font-size:.8rem;color:#666}
code{font-size:.85rem}
"""

_CSP = ("default-src 'none'; img-src data:; style-src 'unsafe-inline'; "
        "base-uri 'none'; form-action 'none'")


def png_data_uri(png) -> str:
    """A PNG (path or bytes) as a ``data:image/png;base64,...`` URI."""
    data = Path(png).read_bytes() if not isinstance(png, bytes | bytearray) else bytes(png)
    if not data.startswith(b"\x89PNG\r\n\x1a\n"):
        raise ValueError("png_data_uri: not a PNG file")
    return "data:image/png;base64," + base64.b64encode(data).decode("ascii")


def _e(value) -> str:
    return escape(str(value), quote=True)


def _is_number(v) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool)


def _si_attr(v) -> str:
    if v is None:
        return "null"
    if isinstance(v, bool):
        return "true" if v else "false"
    if _is_number(v):
        return repr(float(v)) if math.isfinite(float(v)) else "nan"
    return _e(v)


def _format(v, kind: str, unit: str) -> str:
    if kind == "bool":
        return "\u2013" if v is None else ("pass" if v else "FAIL")
    if not _is_number(v):
        return "\u2013" if v is None else _e(v)
    if kind == "length":
        return format_length(v, unit)
    if kind == "angle":
        return format_angle(v)
    if kind == "percent":
        return format_percent(v)
    if kind == "degrees":
        return "\u2013" if not math.isfinite(v) else f"{v:.2f} deg"
    if kind == "seconds":
        return "\u2013" if not math.isfinite(v) else f"{v:.2f} s"
    return f"{v:g}"


def _cell(key: str, v, kind: str, unit: str) -> str:
    return (f'<td class="num" data-key="{_e(key)}" data-kind="{kind}" '
            f'data-si="{_si_attr(v)}">{_e(_format(v, kind, unit))}</td>')


def _cell_pm(key: str, m: dict, figure: str, kind: str, unit: str) -> str:
    """A figure's cell with its 1-sigma after a plus-minus sign when the summary has it
    (``<figure>_sigma_<unit>``, :func:`vidodo.metrics.sigma_key`)."""
    from ..metrics import sigma_key

    v = m.get(figure)
    sig = m.get(sigma_key(figure)) if figure.count("_") else None
    if not (_is_number(v) and _is_number(sig) and math.isfinite(sig)):
        return _cell(key, v, kind, unit)
    text = f"{_format(v, kind, unit)} \u00b1 {_format(sig, kind, unit)}"
    return (f'<td class="num" data-key="{_e(key)}" data-kind="{kind}" '
            f'data-si="{_si_attr(v)}" data-sigma-si="{_si_attr(sig)}">{_e(text)}</td>')


def _kv_table(data, key_prefix: str, unit: str) -> str:
    """A two-column table of a flat or nested dict; lengths by key suffix ``_m``."""
    rows = []

    def walk(d, path):
        for k, v in d.items():
            p = f"{path}/{k}" if path else str(k)
            if isinstance(v, dict):
                walk(v, p)
                continue
            kind = "raw"
            if _is_number(v) and str(k).endswith("_m"):
                kind = "length"
            elif _is_number(v) and str(k).endswith("_rad"):
                kind = "angle"
            if kind == "raw" and _is_number(v):
                rows.append(f'<tr><th>{_e(p)}</th><td class="num" '
                            f'data-key="{_e(key_prefix + "/" + p)}" data-kind="raw" '
                            f'data-si="{_si_attr(v)}">{_e(f"{v:.6g}")}</td></tr>')
            elif kind == "raw":
                text = json.dumps(v, ensure_ascii=False) if isinstance(v, list | tuple) else v
                rows.append(f'<tr><th>{_e(p)}</th><td data-key="{_e(key_prefix + "/" + p)}">'
                            f'{_e(text)}</td></tr>')
            else:
                rows.append(f"<tr><th>{_e(p)}</th>{_cell(key_prefix + '/' + p, v, kind, unit)}"
                            "</tr>")

    if isinstance(data, dict):
        walk(data, "")
    if not rows:
        return "<p>none recorded</p>"
    return "<table>" + "".join(rows) + "</table>"


def _metrics_table(sources: dict, unit: str) -> str:
    if not sources:
        return "<p>No odometry source was graded.</p>"
    head = "".join(f"<th>{_e(h)}</th>" for _, h, _ in METRIC_COLUMNS)
    rows = []
    for name, m in sources.items():
        cells = "".join(_cell_pm(f"sources/{name}/{key}", m or {}, key, kind, unit)
                        for key, _, kind in METRIC_COLUMNS)
        rows.append(f'<tr data-source="{_e(name)}"><th>{_e(name)}</th>{cells}</tr>')
    return f"<table id=\"metrics\"><tr><th>source</th>{head}</tr>{''.join(rows)}</table>"


def _events_table(events: list, unit: str) -> str:
    if not events:
        return "<p>No events were detected.</p>"
    head = ("<tr><th>#</th><th>kind</th><th>start</th><th>end</th><th>x</th><th>y</th>"
            "<th>magnitude</th><th>sources</th><th>detail</th></tr>")
    rows = []
    for i, ev in enumerate(events):
        mag = ev.get("magnitude")
        mag_unit = ev.get("magnitude_unit") or ""
        if _is_number(mag) and mag_unit == "m":
            mag_cell = _cell(f"events/{i}/magnitude", mag, "length", unit)
        else:
            txt = (f"{mag:.3g} {mag_unit}".strip() if _is_number(mag) and math.isfinite(mag)
                   else "\u2013")
            mag_cell = (f'<td class="num" data-key="events/{i}/magnitude" data-kind="raw" '
                        f'data-si="{_si_attr(mag)}">{_e(txt)}</td>')
        rows.append(
            f"<tr><td>{i + 1}</td><td>{_e(ev.get('kind', ''))}</td>"
            + _cell(f"events/{i}/t_start_s", ev.get("t_start_s"), "seconds", unit)
            + _cell(f"events/{i}/t_end_s", ev.get("t_end_s"), "seconds", unit)
            + _cell(f"events/{i}/x_m", ev.get("x_m"), "length", unit)
            + _cell(f"events/{i}/y_m", ev.get("y_m"), "length", unit)
            + mag_cell
            + f"<td>{_e(_text(ev.get('sources')).replace(';', '; '))}</td>"
            + f"<td>{_e(_text(ev.get('detail')))}</td>"
            "</tr>")
    return f"<table id=\"events\">{head}{''.join(rows)}</table>"


def _text(v) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return ""
    if isinstance(v, list | tuple):
        return "; ".join(str(x) for x in v)
    return str(v)


def _overview(summary: dict, unit: str) -> str:
    """A few lines a person reads first: clock, truth coverage, sources, events."""
    items = []
    clock = summary.get("clock") or {}
    off, sig = clock.get("offset_s"), clock.get("sigma_s")
    if _is_number(off):
        txt = f"video time = log time {'-' if off < 0 else '+'} {abs(off):.3f} s"
        if _is_number(sig):
            txt += f" (\u00b1 {sig * 1000:.1f} ms)"
        items.append(f"Clock: {_e(txt)}, found by {_e(clock.get('method', '?'))}")
    truth = summary.get("truth") or {}
    frac = truth.get("detected_fraction")
    if _is_number(frac):
        items.append(f"Truth track: marker seen in {frac * 100:.1f} % of "
                     f"{_e(truth.get('frames', '?'))} frames")
    sources = summary.get("sources") or {}
    if sources:
        worst = max(((m.get("final_err_m"), n) for n, m in sources.items()
                     if _is_number((m or {}).get("final_err_m"))), default=None)
        line = f"{len(sources)} odometry source(s) graded"
        if worst is not None:
            line += (f"; largest final error {_e(format_length(worst[0], unit))} "
                     f"({_e(worst[1])})")
        items.append(line)
    events = summary.get("events") or []
    kinds: dict = {}
    for ev in events:
        kinds[str(ev.get("kind", "?"))] = kinds.get(str(ev.get("kind", "?")), 0) + 1
    items.append("Events: " + (", ".join(f"{_e(k)} \u00d7 {n}" for k, n in kinds.items())
                               if kinds else "none"))
    return '<ul id="overview">' + "".join(f"<li>{i}</li>" for i in items) + "</ul>"


def _verdict_block(summary: dict) -> str:
    verdict = summary.get("verdict")
    sources = summary.get("sources") or {}
    passes = [m.get("pass") for m in sources.values() if isinstance(m, dict)]
    if passes and all(p is True for p in passes):
        cls = "pass"
    elif any(p is False for p in passes):
        cls = "fail"
    else:
        cls = "unknown"
    text = verdict if verdict is not None else "no verdict recorded"
    return f'<p class="verdict {cls}" id="verdict">Verdict: {_e(text)}</p>'


def registration_section(reg, unit: str = "mm") -> str:
    """The report's registration section (``id="registration"``) as HTML.

    Parameters
    ----------
    reg : vidodo.registration_report.RegistrationSummary or None
        None gives a short note that the registrations are not known.
    unit : {'mm', 'in', 'm'}
        Display unit of floor residuals.
    """
    parts = ['<section id="registration"><h2>Floor registration</h2>']
    if reg is None:
        parts.append("<p>The registrations the truth track was measured with are not in "
                     "this grade folder (no track.floor.csv), so none is shown.</p></section>")
        return "".join(parts)
    cam = "hand-held (every frame registered again)" if reg.moving else "still"
    parts.append(
        "<table>"
        '<tr><th>method</th><td colspan="2" data-key="registration/method">'
        f"{_e(reg.method)}</td></tr>"
        f'<tr><th>lens</th><td colspan="2" data-key="registration/lens">{_e(reg.lens)}</td></tr>'
        f'<tr><th>camera</th><td colspan="2">{_e(cam)}</td></tr>'
        f'<tr><th>shown</th><td colspan="2">{_e(reg.source)}</td></tr>'
        f'<tr><th>registrations made</th><td colspan="2" class="num">{reg.n_ok} of '
        f"{reg.n_registrations} succeeded</td></tr>"
        "<tr><th>residual in px (median / worst)</th>"
        f'{_cell("registration/rms_px_median", reg.rms_px_median, "raw", unit)}'
        f'{_cell("registration/rms_px_max", reg.rms_px_max, "raw", unit)}</tr>'
        "<tr><th>on the floor (median / worst)</th>"
        f'{_cell("registration/rms_floor_m_median", reg.rms_floor_m_median, "length", unit)}'
        f'{_cell("registration/rms_floor_m_max", reg.rms_floor_m_max, "length", unit)}</tr>'
        "</table>")
    if reg.note:
        parts.append(f'<p class="warn">{_e(reg.note)}</p>')
    for f in reg.frames:
        src = "data:image/jpeg;base64," + base64.b64encode(f.jpeg).decode("ascii")
        cap = (f"{f.role} frame, t = {f.t_s:.2f} s: {f.method}, residual {f.rms_px:.3g} px "
               f"({format_length(f.rms_floor_m, unit)} on the floor), {f.n_points} "
               "observations; magenta: the tile grid and field outline this registration "
               "implies")
        parts.append(f'<figure class="registration-frame" data-role="{_e(f.role)}" '
                     f'data-t-s="{f.t_s!r}" data-scale="{f.scale!r}">'
                     f'<img src="{src}" alt="{_e(f.role)} frame with the registered grid">'
                     f"<figcaption>{_e(cap)}</figcaption></figure>")
    parts.append("</section>")
    return "".join(parts)


def build_html(summary: dict, images: dict | None = None, *, unit: str = "mm",
               title: str | None = None, extra_files=(), registration="absent") -> str:
    """The report page as one string.

    Parameters
    ----------
    summary : dict
        The content of ``summary.json`` (DEVELOPERS.md, "Grade outputs").
    images : dict, optional
        Caption -> PNG (path or bytes), embedded in this order.
    unit : {'mm', 'in', 'm'}
        Display unit for lengths.
    title : str, optional
        Page heading (default from the inputs in the summary).
    extra_files : iterable of str
        Names of files written beside the report (e.g. the replay), listed as text.
    registration : RegistrationSummary or None, optional
        The registration section (:func:`registration_section`); left out when not
        given.

    Returns
    -------
    str
        A complete HTML document that loads nothing from outside itself.
    """
    length_factor(unit)
    inputs = summary.get("inputs") or {}
    if title is None:
        run = inputs.get("run") or inputs.get("video") or ""
        title = f"vidodo report: {Path(str(run)).name}" if run else "vidodo report"
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f'<meta http-equiv="Content-Security-Policy" content="{_CSP}">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        '<link rel="icon" href="data:,">',
        f"<title>{_e(title)}</title><style>{_CSS}</style></head><body><main>",
        f"<h1>{_e(title)}</h1>",
        _verdict_block(summary),
    ]
    parts.append("<h2>Summary</h2>" + _overview(summary, unit))
    warnings = summary.get("warnings") or []
    if warnings:
        parts.append("<h3>Warnings</h3><ul class=\"warn\">"
                     + "".join(f"<li>{_e(w)}</li>" for w in warnings) + "</ul>")
    parts.append(f"<h2>Metrics per odometry source</h2><p>Lengths in {_e(unit)}; "
                 "drift is anchored at the start of motion, ATE after a rigid fit.</p>")
    parts.append(_metrics_table(summary.get("sources") or {}, unit))
    parts.append("<h2>Events</h2>")
    parts.append(_events_table(list(summary.get("events") or []), unit))
    if images:
        parts.append("<h2>Plots</h2>")
        for caption, png in images.items():
            parts.append(f'<figure><img src="{png_data_uri(png)}" alt="{_e(caption)}">'
                         f"<figcaption>{_e(caption)}</figcaption></figure>")
    if registration != "absent":
        parts.append(registration_section(registration, unit))
    parts.append("<h2>Details</h2>")
    parts.append("<h3>Inputs</h3>" + _kv_table(inputs, "inputs", unit))
    parts.append("<h3>Clock (log onto video)</h3>" + _kv_table(summary.get("clock") or {},
                                                               "clock", unit))
    parts.append("<h3>Truth track quality</h3>" + _kv_table(summary.get("truth") or {},
                                                             "truth", unit))
    files = [str(f) for f in extra_files]
    if files:
        parts.append("<h2>Other files</h2><ul>"
                     + "".join(f"<li><code>{_e(f)}</code></li>" for f in files) + "</ul>")
    parts.append("<h2>Settings used</h2>" + _kv_table(summary.get("settings") or {},
                                                       "settings", unit))
    parts.append("<h3>Tolerances</h3>" + _kv_table(summary.get("tolerances") or {},
                                                   "tolerances", unit))
    graded_with = summary.get("vidodo_version")
    foot = f"vidodo {_e(__version__)}"
    if graded_with is not None and str(graded_with) != __version__:
        foot += f" (graded with vidodo {_e(graded_with)})"
    parts.append(f'<footer id="version">Report written by {foot}.</footer>')
    parts.append("</main></body></html>")
    return "\n".join(parts) + "\n"


def write_html(path, summary: dict, images: dict | None = None, *, unit: str = "mm",
               title: str | None = None, extra_files=(), registration="absent") -> Path:
    """Write :func:`build_html` to ``path`` (UTF-8) and return the path."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(build_html(summary, images, unit=unit, title=title,
                               extra_files=extra_files, registration=registration),
                    encoding="utf-8")
    return path
