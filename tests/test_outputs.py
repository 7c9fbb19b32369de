"""Staged outputs leave nothing half-written behind."""

import pytest

from vidodo.outputs import atomic_file, staged_dir


def test_staged_dir_commits_on_success(tmp_path):
    target = tmp_path / "out"
    with staged_dir(target) as stage:
        (stage / "a.csv").write_text("x\n")
        (stage / "sub").mkdir()
        (stage / "sub" / "b.png").write_bytes(b"png")
        assert not target.exists()
    assert (target / "a.csv").read_text() == "x\n"
    assert (target / "sub" / "b.png").is_file()
    assert [p.name for p in tmp_path.iterdir()] == ["out"]


def test_staged_dir_leaves_nothing_on_error(tmp_path):
    target = tmp_path / "out"
    with pytest.raises(RuntimeError), staged_dir(target) as stage:
        (stage / "a.csv").write_text("half")
        raise RuntimeError("boom")
    assert list(tmp_path.iterdir()) == []


def test_atomic_file(tmp_path):
    p = tmp_path / "x.json"
    with pytest.raises(ValueError), atomic_file(p) as tmp:
        tmp.write_text("{")
        raise ValueError
    assert list(tmp_path.iterdir()) == []
    with atomic_file(p) as tmp:
        tmp.write_text("{}")
    assert p.read_text() == "{}"
