"""The Python API: ``import vidodo`` is light, its names resolve, the README example runs."""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import pytest

import vidodo

README = Path(__file__).resolve().parents[1] / "README.md"


def test_import_loads_no_stage():
    """``import vidodo`` alone pulls in none of the heavy libraries; they come with the
    first entry point used."""
    code = ("import sys, json, vidodo; print(json.dumps(sorted(m for m in sys.modules "
            "if m.split('.')[0] in ('numpy', 'pandas', 'cv2', 'scipy', 'matplotlib') "
            "or m.startswith('vidodo.'))))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout
    assert json.loads(out) == []


def test_every_public_name_resolves_with_a_docstring():
    """Each name in ``vidodo.__all__`` is reachable and documented (numpydoc sections for
    the functions)."""
    for name in vidodo.__all__:
        obj = getattr(vidodo, name)
        if name == "__version__":
            continue
        assert obj.__doc__, name
        if callable(obj) and not isinstance(obj, type):
            assert "Returns" in obj.__doc__ or "Parameters" in obj.__doc__, name
    with pytest.raises(AttributeError):
        vidodo.no_such_entry_point  # noqa: B018


def readme_python_example() -> str:
    """The first ``python`` block of the README's "From Python" section."""
    text = README.read_text(encoding="utf-8")
    section = text.split("## From Python", 1)[1]
    return re.search(r"```python\n(.*?)```", section, re.S).group(1)


@pytest.mark.slow
def test_readme_example_runs(rendered_run, tmp_path, monkeypatch, capsys):
    """The README's example, word for word, on a rendered run folder: it grades, prints
    one line per source and writes the grade files and the report."""
    run = rendered_run("tank-tripod", 0, video__width_px=1280, video__height_px=720)
    (tmp_path / "run").symlink_to(run, target_is_directory=True)
    monkeypatch.chdir(tmp_path)
    exec(compile(readme_python_example(), "README.md", "exec"), {})
    printed = capsys.readouterr().out.splitlines()
    assert printed[0].split()[0] in ("pass", "fail")
    assert any(line.startswith("drive") and "final error" in line for line in printed)
    for f in ("drift.csv", "events.csv", "summary.json", "report.html", "field_map.png"):
        assert (tmp_path / "graded" / f).is_file(), f
