"""Staged outputs leave nothing half-written behind."""

import pytest

from vidodo.outputs import MANIFEST, OutputError, atomic_file, owned_files, staged_dir


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


# ---------------------------------------------------------------- issue 14: safety rules
def _names(folder):
    return sorted(p.relative_to(folder).as_posix() for p in folder.rglob("*") if p.is_file())


def test_manifest_lists_the_set_and_a_new_set_replaces_it(tmp_path):
    target = tmp_path / "out"
    with staged_dir(target) as stage:
        (stage / "a.csv").write_text("1\n")
        (stage / "old.png").write_bytes(b"png")
    assert owned_files(target) == {"a.csv", "old.png"}
    with staged_dir(target) as stage:
        (stage / "a.csv").write_text("2\n")
    assert _names(target) == [MANIFEST, "a.csv"]  # no stale picture beside new figures
    assert (target / "a.csv").read_text() == "2\n"


def test_carry_over_keeps_files_not_written_again(tmp_path):
    target = tmp_path / "out"
    with staged_dir(target) as stage:
        (stage / "summary.json").write_text("{}")
        (stage / "report.html").write_text("old")
    with staged_dir(target, carry_over=True) as stage:
        (stage / "report.html").write_text("new")
    assert _names(target) == [MANIFEST, "report.html", "summary.json"]
    assert (target / "report.html").read_text() == "new"
    assert owned_files(target) == {"report.html", "summary.json"}


def test_foreign_files_refused_then_kept_with_force(tmp_path):
    target = tmp_path / "out"
    target.mkdir()
    (target / "notes.txt").write_text("mine")
    with pytest.raises(OutputError, match=r"holds files vidodo did not write \(e\.g\. "
                       r"notes\.txt\)"), staged_dir(target):
        pass
    for _ in range(2):
        with staged_dir(target, force=True) as stage:
            (stage / "a.csv").write_text("x")
    assert _names(target) == [MANIFEST, "a.csv", "notes.txt"]
    assert (target / "notes.txt").read_text() == "mine"


def test_inputs_are_never_replaced(tmp_path):
    target = tmp_path / "out"
    target.mkdir()
    log = target / "events.csv"
    log.write_text("t\n0\n")
    with pytest.raises(OutputError, match="holds an input"), staged_dir(target, inputs=[log]):
        pass
    with pytest.raises(OutputError, match="is an input of this run"), \
            staged_dir(target, inputs=[log], force=True) as stage:
        (stage / "events.csv").write_text("kind\n")
    assert log.read_text() == "t\n0\n"


def test_one_writer_at_a_time_and_nested_writers_pass_through(tmp_path):
    target = tmp_path / "out"
    with staged_dir(target) as stage:
        with pytest.raises(OutputError, match="another vidodo command is writing"), \
                staged_dir(target):
            pass
        with staged_dir(stage / "tune") as inner:  # a writer inside the open set
            assert inner == stage / "tune"
            (inner / "fit.csv").write_text("p\n")
    assert _names(target) == [MANIFEST, "tune/fit.csv"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]  # no lock file left


def test_atomic_file_signature(tmp_path):
    p = tmp_path / "track.csv"
    p.write_text("my own notes\n")
    with pytest.raises(OutputError, match="was not written by vidodo"), \
            atomic_file(p, signature=b"t_s,"):
        pass
    with atomic_file(p, signature=b"t_s,", force=True) as tmp:
        tmp.write_text("t_s,x_m\n")
    with atomic_file(p, signature=b"t_s,") as tmp:  # ours now: replaced without --force
        tmp.write_text("t_s,x_m\n1,2\n")
    assert p.read_text() == "t_s,x_m\n1,2\n"
