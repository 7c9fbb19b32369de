"""Printable sheets at true scale: the robot's markers, a lens checkerboard, floor fiducials.

Everything is laid out in millimetres on the page (origin bottom-left) and drawn as
vector rectangles with matplotlib's object interface, so the PDF holds exact sizes; the
PNG is the same page rendered at 300 dpi. Each page carries a 100 mm ruler and the line
:data:`MEASURE_LINE`. Items are packed onto pages in rows; an item larger than a page's
printable area is split over several pages ("tiles", cut along the thin frame and butt
together).

Page sizes: A4 is 210 x 297 mm (ISO 216); US Letter is 8.5 x 11 in = 215.9 x 279.4 mm
(ANSI/ASME Y14.1).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import cv2
import numpy as np
from matplotlib.figure import Figure
from matplotlib.patches import Rectangle

from .errors import InputError

__all__ = ["PAGE_SIZES_MM", "MEASURE_LINE", "RULER_MM", "Item", "Page", "marker_item",
           "checkerboard_item", "layout_pages", "page_figure", "write_sheets",
           "marker_cells", "BOARD_DEFAULT", "SQUARE_MM_DEFAULT", "PNG_DPI"]

PAGE_SIZES_MM = {"a4": (210.0, 297.0), "letter": (215.9, 279.4)}
MEASURE_LINE = ("measure this: if it is not 100 mm, printing scaled the page; "
                "print at 100 % / actual size")
RULER_MM = 100.0
MARGIN_MM = 12.0
FOOTER_MM = 26.0
HEADER_MM = 10.0
GAP_MM = 6.0
LABEL_MM = 9.0
PNG_DPI = 300
BOARD_DEFAULT = (9, 6)
"""Inner corners of the lens checkerboard: ``vidodo lens --board`` default."""
SQUARE_MM_DEFAULT = 18.0
"""Square side of the printed checkerboard [mm]; give the same to ``vidodo lens``."""


@dataclass(frozen=True)
class Item:
    """One thing to print: black rectangles, a cut line and a label, in its own mm frame
    (origin at the bottom-left of its cut line)."""

    name: str
    width_mm: float
    height_mm: float
    black: tuple[tuple[float, float, float, float], ...]
    """(x, y, w, h) of each black rectangle [mm]."""
    label: str
    cut_line: bool = True


@dataclass(frozen=True)
class Page:
    """One printed page: placed items (item, x_mm, y_mm, window) and a title."""

    size_mm: tuple[float, float]
    title: str
    placed: tuple = field(default_factory=tuple)
    """(item, x_mm, y_mm, (wx0, wy0, wx1, wy1)): the part of the item shown, in the
    item's frame, drawn with its window corner at (x_mm, y_mm)."""


def marker_cells(family: str, marker_id: int) -> np.ndarray:
    """The marker's cells, border included: True where black, (n, n), row 0 at the top."""
    code = getattr(cv2.aruco, family, None) if family.startswith("DICT_") else None
    if code is None:
        raise InputError(f"marker family {family!r} is not an OpenCV predefined dictionary; "
                         "use a name like 'DICT_4X4_50'")
    d = cv2.aruco.getPredefinedDictionary(code)
    if not 0 <= marker_id < d.bytesList.shape[0]:
        raise InputError(f"marker id {marker_id} is not in {family} (0..."
                         f"{d.bytesList.shape[0] - 1}); use an id the dictionary has")
    n = d.markerSize + 2
    return cv2.aruco.generateImageMarker(d, marker_id, n, borderBits=1) < 128


def _cells_to_rects(cells, x0, y0, cell_mm):
    """Black cells as rectangles; runs along a row merge into one rectangle."""
    rects = []
    n_rows = cells.shape[0]
    for r in range(n_rows):
        c = 0
        while c < cells.shape[1]:
            if not cells[r, c]:
                c += 1
                continue
            c1 = c
            while c1 < cells.shape[1] and cells[r, c1]:
                c1 += 1
            rects.append((x0 + c * cell_mm, y0 + (n_rows - 1 - r) * cell_mm,
                          (c1 - c) * cell_mm, cell_mm))
            c = c1
    return tuple(rects)


def marker_item(family: str, marker_id: int, size_mm: float, note: str = "") -> Item:
    """A marker with a white quiet zone of one cell (at least 5 mm), a label strip below
    it (outside the quiet zone) and a cut line around both."""
    cells = marker_cells(family, marker_id)
    cell = size_mm / cells.shape[0]
    quiet = max(cell, 5.0)
    w = size_mm + 2 * quiet
    h = w + LABEL_MM
    rects = _cells_to_rects(cells, quiet, LABEL_MM + quiet, cell)
    label = f"{family} id {marker_id}, {size_mm:.1f} mm black square" + (
        f" ({note})" if note else "")
    return Item(f"{family} id {marker_id}", w, h, rects, label)


def checkerboard_item(board=BOARD_DEFAULT, square_mm: float = SQUARE_MM_DEFAULT) -> Item:
    """A checkerboard with ``board = (cols, rows)`` inner corners, a white border of
    10 mm (at least half a square), and the ``vidodo lens`` command that matches it."""
    cols, rows = board[0] + 1, board[1] + 1  # squares
    if cols < 3 or rows < 3 or square_mm <= 0:
        raise InputError(f"board {board}, square {square_mm} mm: need at least 2x2 inner "
                         "corners and a positive square size")
    # long side across the page's height: portrait pages hold it best
    if cols > rows:
        cols, rows = rows, cols
    q = square_mm
    border = max(10.0, q / 2)
    cells = (np.add.outer(np.arange(rows), np.arange(cols)) % 2) == 0
    rects = _cells_to_rects(cells, border, LABEL_MM + border, q)
    label = (f"checkerboard {board[0]}x{board[1]} inner corners, {square_mm:g} mm squares: "
             f"vidodo lens IMAGES --board {board[0]}x{board[1]} --square-mm {square_mm:g}")
    return Item("checkerboard", cols * q + 2 * border, rows * q + 2 * border + LABEL_MM,
                rects, label)


def _art_box(size_mm):
    """(x0, y0, x1, y1) of a page's printable area for items [mm]."""
    w, h = size_mm
    return MARGIN_MM, MARGIN_MM + FOOTER_MM, w - MARGIN_MM, h - MARGIN_MM - HEADER_MM


def _tiles(item, aw, ah):
    """Windows of an item that does not fit one page: a grid of page-sized parts."""
    nx, ny = math.ceil(item.width_mm / aw), math.ceil(item.height_mm / ah)
    tw, th = item.width_mm / nx, item.height_mm / ny
    return [(i * tw, j * th, (i + 1) * tw, (j + 1) * th)
            for j in reversed(range(ny)) for i in range(nx)]


def layout_pages(items, paper: str, title: str) -> list[Page]:
    """Pack items onto pages in rows, tiling the ones too big for a page."""
    size = PAGE_SIZES_MM[paper]
    x0, y0, x1, y1 = _art_box(size)
    aw, ah = x1 - x0, y1 - y0
    pages, current, cx, cy, row_h = [], [], x0, y1, 0.0
    for it in items:
        if it.width_mm > aw or it.height_mm > ah:
            parts = _tiles(it, aw, ah)
            for k, win in enumerate(parts, start=1):
                pages.append(Page(size, f"{title}: {it.name}, part {k} of {len(parts)} "
                                  "(cut along the thin frame, butt the parts together)",
                                  ((it, x0, y1 - (win[3] - win[1]), win),)))
            continue
        if cx + it.width_mm > x1:  # next row
            cx, cy, row_h = x0, cy - row_h - GAP_MM, 0.0
        if cy - it.height_mm < y0:  # next page
            pages.append(Page(size, title, tuple(current)))
            current, cx, cy, row_h = [], x0, y1, 0.0
        current.append((it, cx, cy - it.height_mm, (0.0, 0.0, it.width_mm, it.height_mm)))
        cx += it.width_mm + GAP_MM
        row_h = max(row_h, it.height_mm)
    if current:
        pages.append(Page(size, title, tuple(current)))
    return pages


def _draw_item(ax, item, x, y, win):
    wx0, wy0, wx1, wy1 = win
    clip = Rectangle((x, y), wx1 - wx0, wy1 - wy0, transform=ax.transData, fill=False)
    for rx, ry, rw, rh in item.black:
        p = Rectangle((x + rx - wx0, y + ry - wy0), rw, rh, facecolor="black",
                      edgecolor="none", lw=0, antialiased=False)
        ax.add_patch(p)
        p.set_clip_path(clip)
    if item.cut_line:
        cut = Rectangle((x - wx0, y - wy0), item.width_mm, item.height_mm, fill=False,
                        edgecolor="#808080", lw=0.4, ls=(0, (4, 3)))
        ax.add_patch(cut)
        cut.set_clip_path(clip)
    if win != (0.0, 0.0, item.width_mm, item.height_mm):  # a tile: thin frame to cut along
        ax.add_patch(Rectangle((x, y), wx1 - wx0, wy1 - wy0, fill=False,
                               edgecolor="#b0b0b0", lw=0.3))
    if wy0 <= LABEL_MM / 2 <= wy1 and wx0 <= 2.0 <= wx1:
        t = ax.text(x - wx0 + 2.0, y - wy0 + LABEL_MM / 2, item.label, fontsize=6.5,
                    va="center", ha="left")
        t.set_clip_path(clip)


def _draw_ruler(ax, size_mm):
    x0, y0 = MARGIN_MM, MARGIN_MM + 4.0
    ax.add_patch(Rectangle((x0, y0), RULER_MM, 3.0, facecolor="black", edgecolor="none",
                           lw=0, antialiased=False))
    for k in range(int(RULER_MM) + 1):
        tick = 4.0 if k % 10 == 0 else (2.5 if k % 5 == 0 else 1.5)
        ax.add_patch(Rectangle((x0 + k - 0.1, y0 + 3.0), 0.2, tick, facecolor="black",
                               edgecolor="none", lw=0))
        if k % 10 == 0:
            ax.text(x0 + k, y0 + 7.8, f"{k // 10}", fontsize=5, ha="center", va="bottom")
    ax.text(x0 + RULER_MM + 4.0, y0 + 1.5, "100 mm", fontsize=7, va="center")
    ax.text(x0, y0 - 1.5, MEASURE_LINE, fontsize=7, va="top", ha="left")


def page_figure(page: Page, footer: str = "") -> Figure:
    """A page as a figure whose data units are millimetres on the paper."""
    w, h = page.size_mm
    fig = Figure(figsize=(w / 25.4, h / 25.4))
    ax = fig.add_axes((0.0, 0.0, 1.0, 1.0))
    ax.set_xlim(0, w)
    ax.set_ylim(0, h)
    ax.set_axis_off()
    ax.text(MARGIN_MM, h - MARGIN_MM + 2.0, page.title, fontsize=8, va="top", ha="left")
    for item, x, y, win in page.placed:
        _draw_item(ax, item, x, y, win)
    _draw_ruler(ax, page.size_mm)
    if footer:
        ax.text(w - MARGIN_MM, MARGIN_MM + 20.0, footer, fontsize=6, ha="right",
                va="bottom", color="#606060")
    return fig


def write_sheets(items, out_dir, *, papers=("a4", "letter"), title="vidodo sheets",
                 png=True) -> list[Path]:
    """Write ``sheets-<paper>.pdf`` (all pages) and ``sheets-<paper>-<n>.png`` (300 dpi).

    Returns
    -------
    list of Path
        The files written.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.backends.backend_pdf import FigureCanvasPdf, PdfPages

    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    written = []
    for paper in papers:
        pages = layout_pages(items, paper, title)
        pdf_path = out_dir / f"sheets-{paper}.pdf"
        with PdfPages(pdf_path, metadata={"Creator": "vidodo sheets"}) as pdf:
            for n, page in enumerate(pages, start=1):
                fig = page_figure(page, footer=f"{paper.upper()} page {n} of {len(pages)}")
                FigureCanvasPdf(fig)
                pdf.savefig(fig)
                if png:
                    FigureCanvasAgg(fig)
                    p = out_dir / f"sheets-{paper}-{n}.png"
                    fig.savefig(p, format="png", dpi=PNG_DPI)
                    written.append(p)
        written.insert(0, pdf_path)
    return written
