"""The code base stays ruff clean (rules in pyproject.toml; common practice)."""

import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def test_ruff_clean():
    ruff = shutil.which("ruff", path=str(Path(sys.executable).parent)) or shutil.which("ruff")
    if ruff is None:
        pytest.skip("ruff is not installed (it comes with the 'test' extra)")
    proc = subprocess.run([ruff, "check", "--no-cache", str(ROOT)], capture_output=True,
                          text=True, cwd=ROOT)
    assert proc.returncode == 0, proc.stdout[-3000:]
