"""Printable sheets (vidodo/sheets.py): true scale on the rasterised PDF, both detectors.

The PDF page is rasterised at 300 dpi by Debian's poppler-utils (``pdftoppm``, an
independent PDF renderer); 1 in = 25.4 mm exactly (international inch, 1959), so one
millimetre is 300 / 25.4 px. The marker's black square must measure its nominal size
within 0.2 % and the ruler 100 mm; cv2.aruco and the AprilTag 3 library
(tests/apriltag3.py) must both decode the marker.
"""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import cv2
import numpy as np
import pytest
from apriltag3 import apriltag3_corners

from vidodo.outputs import MANIFEST
from vidodo.sheets import (
    BOARD_DEFAULT,
    MEASURE_LINE,
    PAGE_SIZES_MM,
    checkerboard_item,
    layout_pages,
    marker_cells,
    marker_item,
    write_sheets,
)

DPI = 300
PX_PER_MM = DPI / 25.4
ROBOT = """
[robot]
name = "printer"
[log]
time_column = "t"
[[marker]]
id = 23
family = "DICT_APRILTAG_36h11"
size_m = 0.12
z_m = 0.3
[[marker]]
id = 7
family = "DICT_4X4_50"
size_m = 0.08
x_m = 0.1
[[wheel]]
name = "left"
column = "l"
x_m = 0.0
y_m = 0.2
radius_m = 0.05
ticks_per_rev = 100
"""


def _rasterise(pdf: Path, page: int, tmp: Path) -> np.ndarray:
    if shutil.which("pdftoppm") is None:
        pytest.skip("Debian poppler-utils (pdftoppm) not installed (see .ci/run)")
    prefix = tmp / f"r{page}"
    subprocess.run(["pdftoppm", "-r", str(DPI), "-gray", "-png", "-f", str(page), "-l",
                    str(page), "-singlefile", str(pdf), str(prefix)], check=True)
    img = cv2.imread(str(prefix) + ".png", cv2.IMREAD_GRAYSCALE)
    assert img is not None
    return img


def _side_mm(corners):
    c = np.asarray(corners, float).reshape(4, 2)
    return float(np.mean(np.linalg.norm(np.roll(c, -1, axis=0) - c, axis=1))) / PX_PER_MM


@pytest.fixture(scope="module")
def sheets(tmp_path_factory):
    from vidodo.cli_main import main

    d = tmp_path_factory.mktemp("sheets")
    (d / "robot.toml").write_text(ROBOT)
    assert main(["sheets", "--robot", str(d / "robot.toml"), "--out", str(d / "out"),
                 "--quiet"]) == 0
    return d / "out"


def _find(pages, family, marker_id):
    """Corners of one marker on whichever rasterised page holds it."""
    det = cv2.aruco.ArucoDetector(cv2.aruco.getPredefinedDictionary(getattr(cv2.aruco,
                                                                            family)),
                                  cv2.aruco.DetectorParameters())
    for n, img in enumerate(pages):
        corners, ids, _ = det.detectMarkers(img)
        if ids is not None and marker_id in ids.ravel():
            return n, corners[list(ids.ravel()).index(marker_id)]
    pytest.fail(f"{family} id {marker_id} not found on any page")


@pytest.mark.parametrize("paper", ["a4", "letter"])
def test_markers_true_size_and_decoded_by_both_detectors(sheets, tmp_path, paper):
    n = len(list(sheets.glob(f"sheets-{paper}-*.png")))
    pages = [_rasterise(sheets / f"sheets-{paper}.pdf", k, tmp_path) for k in range(1, n + 1)]
    w_mm, h_mm = PAGE_SIZES_MM[paper]
    assert pages[0].shape[1] == pytest.approx(w_mm * PX_PER_MM, abs=1.5)
    assert pages[0].shape[0] == pytest.approx(h_mm * PX_PER_MM, abs=1.5)
    k, corners = _find(pages, "DICT_APRILTAG_36h11", 23)
    assert _side_mm(corners) == pytest.approx(120.0, rel=0.002)
    tags = apriltag3_corners(pages[k], "tag36h11")
    assert 23 in tags
    assert _side_mm(tags[23]) == pytest.approx(120.0, rel=0.002)
    # an ArUco dictionary: the AprilTag library does not know it, OpenCV decodes it
    _, corners = _find(pages, "DICT_4X4_50", 7)
    assert _side_mm(corners) == pytest.approx(80.0, rel=0.002)


@pytest.mark.parametrize("paper", ["a4", "letter"])
def test_every_page_has_a_100_mm_ruler(sheets, tmp_path, paper):
    pdf = sheets / f"sheets-{paper}.pdf"
    n = len(list(sheets.glob(f"sheets-{paper}-*.png")))
    assert n >= 2
    for page in range(1, n + 1):
        img = _rasterise(pdf, page, tmp_path)
        # the ruler's solid bar: 3 mm tall, its lower edge 16 mm above the page's bottom
        row = img[int(round(img.shape[0] - (16.0 + 1.5) * PX_PER_MM))] < 128
        runs = np.diff(np.concatenate([[0], row.astype(int), [0]]))
        starts, ends = np.flatnonzero(runs == 1), np.flatnonzero(runs == -1)
        longest = int(np.max(ends - starts))
        assert longest / PX_PER_MM == pytest.approx(100.0, rel=0.002), page


def test_measure_line_is_in_the_pdf(sheets):
    if shutil.which("pdftotext") is None:
        pytest.skip("Debian poppler-utils not installed")
    text = subprocess.run(["pdftotext", "-layout", str(sheets / "sheets-a4.pdf"), "-"],
                          capture_output=True, text=True, check=True).stdout
    assert " ".join(text.split()).count(MEASURE_LINE) == len(
        list(sheets.glob("sheets-a4-*.png")))
    assert "DICT_APRILTAG_36h11 id 23, 120.0 mm" in text
    assert "--board 9x6 --square-mm 18" in text


def test_png_pages_are_300_dpi(sheets):
    img = cv2.imread(str(sheets / "sheets-a4-1.png"))
    assert img.shape[1] == pytest.approx(210.0 * PX_PER_MM, abs=1.5)


def test_checkerboard_is_found_by_opencv(sheets, tmp_path):
    """OpenCV's findChessboardCorners finds the board with the lens verb's default inner
    corners, and the squares measure 18 mm."""
    n = len(list(sheets.glob("sheets-a4-*.png")))
    for page in range(1, n + 1):
        img = _rasterise(sheets / "sheets-a4.pdf", page, tmp_path)
        small = cv2.resize(img, None, fx=0.25, fy=0.25, interpolation=cv2.INTER_AREA)
        ok, corners = cv2.findChessboardCorners(small, BOARD_DEFAULT)
        if ok:
            c = corners.reshape(-1, 2) * 4.0
            step = np.median(np.linalg.norm(np.diff(c.reshape(BOARD_DEFAULT[1],
                                                              BOARD_DEFAULT[0], 2),
                                                    axis=1), axis=2))
            assert step / PX_PER_MM == pytest.approx(18.0, rel=0.01)
            return
    pytest.fail("no page holds a checkerboard OpenCV can find")


def test_board_default_matches_the_lens_verb():
    from vidodo.cli_main import build_parser

    args = build_parser().parse_args(["lens", "x.png", "--square-mm", "18"])
    assert args.board == f"{BOARD_DEFAULT[0]}x{BOARD_DEFAULT[1]}"


def test_quiet_zone_is_at_least_one_cell():
    item = marker_item("DICT_4X4_50", 3, 60.0)
    xs = [r[0] for r in item.black] + [r[0] + r[2] for r in item.black]
    cell = 60.0 / 6
    assert min(xs) >= cell - 1e-9 and item.width_mm - max(xs) >= cell - 1e-9


def test_marker_cells_match_opencv():
    """The cells are OpenCV's own marker image (generateImageMarker), border included."""
    cells = marker_cells("DICT_4X4_50", 0)
    assert cells.shape == (6, 6)
    assert cells[0].all() and cells[-1].all() and cells[:, 0].all() and cells[:, -1].all()


def test_large_marker_is_tiled_over_pages():
    pages = layout_pages([marker_item("DICT_4X4_50", 1, 250.0)], "a4", "t")
    assert len(pages) == 4
    assert all("part" in p.title for p in pages)


def test_board_too_small_is_refused():
    from vidodo.errors import InputError

    with pytest.raises(InputError, match="inner"):
        checkerboard_item((1, 1), 20.0)


def test_unknown_marker_id_is_refused(tmp_path, capsys):
    from vidodo.cli_main import main

    assert main(["sheets", "--floor-ids", "60", "--out", str(tmp_path / "o")]) == 2
    assert "marker id 60 is not in DICT_4X4_50" in capsys.readouterr().err
    assert not (tmp_path / "o").exists()


def test_write_sheets_pdf_only(tmp_path):
    written = write_sheets([marker_item("DICT_4X4_50", 1, 50.0)], tmp_path, papers=("a4",),
                           png=False)
    assert [p.name for p in written] == ["sheets-a4.pdf"]
    assert written[0].read_bytes().startswith(b"%PDF-")


def test_floor_markers_from_the_field_profile(tmp_path):
    from vidodo.cli_main import main

    if shutil.which("pdftotext") is None:
        pytest.skip("Debian poppler-utils not installed")
    field = tmp_path / "field.toml"
    field.write_text("[floor]\ntiles_x = 6\ntiles_y = 6\ntile_size_m = 0.6096\n"
                     "[[floor_marker]]\nid = 11\nfamily = 'DICT_5X5_100'\nsize_m = 0.1\n"
                     "x_m = 0.3\ny_m = 0.3\n")
    out = tmp_path / "out"
    assert main(["sheets", "--field", str(field), "--floor-ids", "2", "--no-board",
                 "--paper", "letter", "--no-png", "--out", str(out), "--quiet"]) == 0
    assert sorted(p.name for p in out.iterdir() if p.name != MANIFEST) == ["sheets-letter.pdf"]
    text = subprocess.run(["pdftotext", str(out / "sheets-letter.pdf"), "-"],
                          capture_output=True, text=True, check=True).stdout
    flat = " ".join(text.split())
    assert "DICT_5X5_100 id 11, 100.0 mm" in flat and "x 0.300 m" in flat
    assert "DICT_4X4_50 id 2, 150.0 mm" in flat
