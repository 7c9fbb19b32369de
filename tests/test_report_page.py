"""The HTML report, opened in a real headless browser (Debian's chromium + chromedriver).

Checks: the page loads with no console errors and no network requests other
than the file itself, every image has decoded (naturalWidth > 0), the figures in the
page equal those in summary.json, and strings from the inputs are escaped.
"""

from __future__ import annotations

import json
import math
import shutil
import tempfile
from pathlib import Path

import pytest
from test_plots import make_grade_dir, synthetic_grade  # sibling test module

from vidodo.outputs import MANIFEST
from vidodo.report.build import write_report
from vidodo.report.page import METRIC_COLUMNS, build_html

CHROMIUM = Path("/usr/bin/chromium")
CHROMEDRIVER = Path("/usr/bin/chromedriver")


@pytest.fixture(scope="module")
def browser():
    """A headless Chromium with console and network logging, fresh profile."""
    webdriver = pytest.importorskip("selenium.webdriver")
    if not (CHROMIUM.exists() and CHROMEDRIVER.exists()):
        pytest.skip("Debian chromium / chromium-driver not installed (see .ci/run)")
    from selenium.webdriver.chrome.options import Options
    from selenium.webdriver.chrome.service import Service

    profile = tempfile.mkdtemp(prefix="vidodo-chromium-")
    opts = Options()
    opts.binary_location = str(CHROMIUM)
    for flag in ("--headless", "--no-sandbox", "--disable-gpu",
                 "--disable-background-networking", "--disable-component-update",
                 "--disable-sync", "--no-first-run", f"--user-data-dir={profile}",
                 "--disable-dev-shm-usage"):
        opts.add_argument(flag)
    opts.set_capability("goog:loggingPrefs", {"browser": "ALL", "performance": "ALL"})
    driver = webdriver.Chrome(service=Service(str(CHROMEDRIVER)), options=opts)
    try:
        yield driver
    finally:
        driver.quit()
        shutil.rmtree(profile, ignore_errors=True)


def _open(driver, path: Path):
    driver.get_log("browser")  # drop anything left from an earlier page
    driver.get_log("performance")
    driver.get(path.resolve().as_uri())
    driver.execute_script("return document.readyState")
    # images are data URIs: wait until each has finished decoding
    driver.execute_async_script(
        "const done = arguments[arguments.length - 1];"
        "Promise.all([...document.images].map(i => i.decode().catch(() => null)))"
        ".then(() => done(true));")
    console = driver.get_log("browser")
    requests = []
    for entry in driver.get_log("performance"):
        msg = json.loads(entry["message"])["message"]
        if msg["method"] != "Network.requestWillBeSent":
            continue
        # the browser's own start page (chrome://new-tab-page...) may still be loading
        # its parts when the test starts; those requests are not made by our page
        if msg["params"].get("documentURL", "").startswith("chrome://"):
            continue
        requests.append(msg["params"]["request"]["url"])
    return console, requests


def _cells(driver):
    return driver.execute_script(
        "return [...document.querySelectorAll('[data-key][data-si]')].map(e => "
        "[e.dataset.key, e.dataset.si, e.dataset.kind, e.textContent]);")


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    folder = make_grade_dir(tmp_path_factory.mktemp("grade") / "run")
    write_report(folder, folder, replay=False, units="mm")
    return folder


def test_page_loads_clean_and_offline(browser, report):
    console, requests = _open(browser, report / "report.html")
    assert [e for e in console if e["level"] in ("SEVERE", "ERROR")] == []
    # only the file itself (data: URIs are not fetched over the network)
    assert [u for u in requests if not u.startswith("data:")] == \
        [(report / "report.html").resolve().as_uri()]
    widths = browser.execute_script(
        "return [...document.images].map(i => [i.complete, i.naturalWidth, i.alt]);")
    assert len(widths) == 3
    for complete, width, alt in widths:
        assert complete and width > 0, alt


def test_figures_in_page_equal_summary(browser, report):
    """Each cell's SI value equals summary.json exactly; its text is that value in mm.

    1 m = 1000 mm (SI definition); displayed with one decimal, so the text may differ
    from value * 1000 by at most 0.05 mm plus float noise.
    """
    _open(browser, report / "report.html")
    summary = json.loads((report / "summary.json").read_text())
    cells = {key: (si, kind, text) for key, si, kind, text in _cells(browser)}
    checked = 0
    for name, metrics in summary["sources"].items():
        for key, _, kind in METRIC_COLUMNS:
            si, ckind, text = cells[f"sources/{name}/{key}"]
            value = metrics[key]
            if kind == "bool":
                assert si == ("true" if value else "false")
                assert text == ("pass" if value else "FAIL")
                continue
            assert float(si) == value, key
            shown = float(text.split()[0])
            if kind == "length":
                assert text.endswith(" mm")
                assert abs(shown - value * 1000) <= 0.05 + 1e-9, (key, text, value)
            elif kind == "angle":
                assert abs(shown - math.degrees(value)) <= 0.05 + 1e-9
            else:
                assert abs(shown - value) <= 0.005 + 1e-9
            checked += 1
    assert checked == len(summary["sources"]) * (len(METRIC_COLUMNS) - 1)
    for i, ev in enumerate(summary["events"]):
        assert float(cells[f"events/{i}/t_start_s"][0]) == ev["t_start_s"]
        assert float(cells[f"events/{i}/x_m"][0]) == ev["x_m"]
    off = cells["clock/offset_s"]
    assert float(off[0]) == summary["clock"]["offset_s"]
    version = browser.find_element("id", "version").text
    assert summary["vidodo_version"] in version


def test_units_inch(browser, tmp_path):
    """--units in: 1 in = 25.4 mm exactly (international inch, 1959)."""
    folder = make_grade_dir(tmp_path / "run")
    write_report(folder, folder, replay=False, units="in")
    _open(browser, folder / "report.html")
    summary = json.loads((folder / "summary.json").read_text())
    cells = {key: (si, text) for key, si, _, text in _cells(browser)}
    si, text = cells["sources/drive/final_err_m"]
    assert text.endswith(" in")
    assert abs(float(text.split()[0]) - summary["sources"]["drive"]["final_err_m"] / 0.0254) \
        <= 0.005 + 1e-9


def test_hostile_strings_are_escaped(browser, tmp_path):
    """Markup in a run name or event detail shows as text and loads nothing."""
    folder = make_grade_dir(tmp_path / "run", weird_names=True,
                            source_names=("drive", "<b>pods</b>"))
    write_report(folder, folder, replay=False, units="mm")
    page = (folder / "report.html").read_text()
    assert "<script>alert(1)</script>" not in page
    assert '<img src="http://127.0.0.1' not in page
    console, requests = _open(browser, folder / "report.html")
    assert [e for e in console if e["level"] in ("SEVERE", "ERROR")] == []
    assert all(u.startswith(("file:", "data:")) for u in requests)
    body = browser.find_element("tag name", "body").text
    assert "<script>alert(1)</script>" in body
    assert "<b>pods</b>" in body
    assert browser.execute_script("return document.images.length") == 3


def test_build_html_is_deterministic_and_has_no_external_reference():
    _, _, summary = synthetic_grade()
    page = build_html(summary, {}, unit="m")
    assert page == build_html(summary, {}, unit="m")
    for needle in ("http://", "https://", "<script", "@import", "url("):
        assert needle not in page


# ------------------------------------------------------------ display units (units.py)
def test_length_formatting_units():
    """1 in = 25.4 mm exactly (international yard and pound agreement, 1959)."""
    from vidodo.units import format_length, length_factor, to_display

    assert format_length(0.0254, "in") == "1.00 in"
    assert format_length(0.0254, "mm") == "25.4 mm"
    assert format_length(0.0254, "m") == "0.025 m"
    assert format_length(None) == "\u2013" and format_length(float("nan")) == "\u2013"
    assert to_display(2.0, "mm") == 2000.0
    assert length_factor("in") * 0.0254 == pytest.approx(1.0, abs=1e-15)
    with pytest.raises(ValueError, match="use one of"):
        length_factor("ft")


def test_terminal_summary_lines():
    from vidodo.units import summary_lines

    _, _, summary = synthetic_grade()
    lines = summary_lines(summary, "in")
    assert lines[0].startswith("log clock offset +0.421 s \u00b1 2.1 ms")
    drive = next(ln for ln in lines if ln.startswith("drive"))
    final_in = summary["sources"]["drive"]["final_err_m"] / 0.0254
    assert f"{final_in:.2f} in" in drive
    assert "events: impact x1, wheel_slip x1" in lines
    assert lines[-1] == "verdict: 1 of 2 sources within tolerance"
    assert not any(ln.startswith("warning:") for ln in lines)
    assert "warning: truth lost for 3 frames near t = 4.1 s" in summary_lines(
        summary, "mm", warnings=True)
    assert "FAIL" in drive
    # columns line up: the data rows are padded to the same width
    rows = lines[2:4]
    assert rows[0].startswith("drive") and rows[1].startswith("tracking+imu")
    assert len(rows[0]) == len(rows[1])


# ------------------------------------------------------------ the report verb
def test_report_verb_rebuilds_pictures(tmp_path, capsys):
    from vidodo.cli_main import main

    folder = make_grade_dir(tmp_path / "run")
    assert main(["report", str(folder), "--out", str(tmp_path / "pics"), "--units", "m",
                 "--quiet"]) == 0
    names = sorted(p.name for p in (tmp_path / "pics").iterdir() if p.name != MANIFEST)
    assert names == ["error_vs_time.png", "field_map.png", "report.html", "speed.png"]
    (folder / "summary.json").write_text("{not json")
    assert main(["report", str(folder)]) == 2
    assert "summary.json: not valid JSON" in capsys.readouterr().err


@pytest.mark.slow
def test_report_of_a_real_grade(browser, rendered_run, tmp_path):
    """End to end: grade a rendered run, write_report from the GradeResult (plots, replay,
    HTML), and check the page in the browser against the summary it was built from."""
    from vidodo.pipeline import grade_run

    run = rendered_run("default", 5, video__width_px=1280, video__height_px=720,
                       **{"video.max_duration_s": 3.0})
    result = grade_run(run / "video.mp4", run / "log.csv", run / "robot.toml",
                       run / "field.toml", run / "camera.toml")
    out = tmp_path / "grade"
    written = write_report(result, out, replay=True, units="mm")
    assert {p.name for p in written} == {"field_map.png", "error_vs_time.png", "speed.png",
                                         "robot.png", "plan.png",
                                         "replay.mp4", "report.html"}
    console, requests = _open(browser, out / "report.html")
    assert [e for e in console if e["level"] in ("SEVERE", "ERROR")] == []
    assert [u for u in requests if not u.startswith("data:")] == \
        [(out / "report.html").resolve().as_uri()]
    assert all(w > 0 for w in browser.execute_script(
        "return [...document.images].map(i => i.naturalWidth);"))
    summary = json.loads((out / "summary.json").read_text())
    cells = {key: si for key, si, _, _ in _cells(browser)}
    for name, metrics in summary["sources"].items():
        for key, _, kind in METRIC_COLUMNS:
            value = metrics.get(key)
            si = cells[f"sources/{name}/{key}"]
            if value is None:
                assert si == "null"
            elif kind == "bool":
                assert si == ("true" if value else "false")
            else:
                assert float(si) == value
