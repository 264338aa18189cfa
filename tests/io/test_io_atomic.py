"""Tests for vesselgeom.io.atomic: outputs appear whole or not at all."""

import os
import re
import stat

import pytest

from vesselgeom.errors import InputError
from vesselgeom.io import atomic
from vesselgeom.io.atomic import atomic_output_dir, atomic_write_text


class _Boom(RuntimeError):
    pass


def _snapshot(folder):
    """{relative path: bytes} for every file below `folder`."""
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def _hidden_leftovers(parent):
    return sorted(p.name for p in parent.iterdir() if p.name.startswith("."))


def _mode(path):
    return stat.S_IMODE(path.stat().st_mode)


# --- atomic_output_dir -------------------------------------------------------------------------


def test_new_folder_appears_only_on_exit(tmp_path):
    out = tmp_path / "results"
    with atomic_output_dir(out) as tmp:
        assert tmp.parent == tmp_path  # same parent, so the final rename stays on one file system
        assert re.fullmatch(rf"\.results\.tmp-{os.getpid()}-[0-9a-f]+", tmp.name)
        assert tmp.is_dir() and not any(tmp.iterdir())
        (tmp / "table.csv").write_text("a,b\n1,2\n")
        (tmp / "sub").mkdir()
        (tmp / "sub" / "x.txt").write_text("x")
        assert not out.exists()  # nothing visible until the block succeeds
    assert _snapshot(out) == {"table.csv": b"a,b\n1,2\n", "sub/x.txt": b"x"}
    assert _hidden_leftovers(tmp_path) == []


def test_existing_folder_is_replaced_completely(tmp_path):
    out = tmp_path / "results"
    out.mkdir()
    (out / "old.csv").write_text("old")
    (out / "shared.csv").write_text("old")
    with atomic_output_dir(out) as tmp:
        (tmp / "shared.csv").write_text("new")
        assert _snapshot(out) == {"old.csv": b"old", "shared.csv": b"old"}  # untouched meanwhile
    assert _snapshot(out) == {"shared.csv": b"new"}  # stale files do not survive
    assert _hidden_leftovers(tmp_path) == []


@pytest.mark.parametrize("error", [_Boom("stage failed"), KeyboardInterrupt()])
def test_failure_leaves_existing_folder_exactly_as_it_was(tmp_path, error):
    out = tmp_path / "results"
    out.mkdir()
    (out / "keep.csv").write_text("precious")
    before = _snapshot(out)
    with pytest.raises(type(error)), atomic_output_dir(out) as tmp:
        (tmp / "keep.csv").write_text("half-written")
        raise error
    assert _snapshot(out) == before
    assert not tmp.exists()
    assert _hidden_leftovers(tmp_path) == []


def test_failure_leaves_no_folder_when_there_was_none(tmp_path):
    out = tmp_path / "results"
    with pytest.raises(_Boom), atomic_output_dir(out) as tmp:
        (tmp / "partial.csv").write_text("x")
        raise _Boom("stage failed")
    assert not out.exists()
    assert list(tmp_path.iterdir()) == []


def test_failed_swap_puts_the_old_folder_back(tmp_path, monkeypatch):
    out = tmp_path / "results"
    out.mkdir()
    (out / "keep.csv").write_text("precious")
    real_rename = os.rename
    calls = []

    def flaky_rename(src, dst):
        calls.append((os.fspath(src), os.fspath(dst)))
        if len(calls) == 2:  # first: old -> trash succeeds; second: tmp -> out fails
            raise OSError(28, "No space left on device")
        return real_rename(src, dst)

    monkeypatch.setattr(atomic.os, "rename", flaky_rename)
    with pytest.raises(OSError, match="No space left"), atomic_output_dir(out) as tmp:
        (tmp / "new.csv").write_text("new")
    assert _snapshot(out) == {"keep.csv": b"precious"}
    assert _hidden_leftovers(tmp_path) == []
    assert len(calls) == 3  # the third rename is the restore trash -> out


def test_existing_file_is_refused_before_the_body_runs(tmp_path):
    out = tmp_path / "results"
    out.write_text("i am a file")
    ran = []
    with pytest.raises(InputError, match="exists and is not a folder") as exc_info:
        with atomic_output_dir(out):
            ran.append(True)
    assert ran == []
    assert str(exc_info.value).startswith(f"{out}: ")
    assert "\n" not in str(exc_info.value)
    assert out.read_text() == "i am a file"


def test_missing_parents_are_created(tmp_path):
    out = tmp_path / "a" / "b" / "results"
    with atomic_output_dir(out) as tmp:
        (tmp / "f.txt").write_text("1")
    assert (out / "f.txt").read_text() == "1"


def test_symlinked_output_keeps_the_link(tmp_path):
    real = tmp_path / "real"
    real.mkdir()
    (real / "old.txt").write_text("old")
    link = tmp_path / "link"
    link.symlink_to(real, target_is_directory=True)
    with atomic_output_dir(link) as tmp:
        (tmp / "new.txt").write_text("new")
    assert link.is_symlink()
    assert _snapshot(real) == {"new.txt": b"new"}


def test_output_folder_gets_ordinary_permissions(tmp_path):
    plain = tmp_path / "plain"
    plain.mkdir()  # what os.mkdir gives under the current umask
    out = tmp_path / "results"
    with atomic_output_dir(out):
        pass
    assert _mode(out) == _mode(plain)


# --- atomic_write_text -------------------------------------------------------------------------


def test_write_text_exact_bytes_and_replace(tmp_path):
    path = tmp_path / "run.json"
    text = '{"name": "μ-CT"}\r\nline2\n'
    assert atomic_write_text(path, text) == path
    assert path.read_bytes() == text.encode("utf-8")  # no newline translation
    atomic_write_text(path, "second")
    assert path.read_text() == "second"
    assert _hidden_leftovers(tmp_path) == []


def test_write_text_creates_parents_and_uses_ordinary_permissions(tmp_path):
    plain = tmp_path / "plain.txt"
    plain.write_text("x")  # what open() gives under the current umask
    path = tmp_path / "deep" / "er" / "f.txt"
    atomic_write_text(path, "x")
    assert path.read_text() == "x"
    assert _mode(path) == _mode(plain)


def test_write_text_failure_keeps_old_file_and_removes_temp(tmp_path, monkeypatch):
    path = tmp_path / "table.csv"
    path.write_text("old")

    def failing_replace(src, dst):
        raise OSError(5, "Input/output error")

    monkeypatch.setattr(atomic.os, "replace", failing_replace)
    with pytest.raises(OSError, match="Input/output error"):
        atomic_write_text(path, "new")
    assert path.read_text() == "old"
    assert _hidden_leftovers(tmp_path) == []


def test_write_text_refuses_a_folder(tmp_path):
    folder = tmp_path / "out"
    folder.mkdir()
    with pytest.raises(InputError, match="is a folder") as exc_info:
        atomic_write_text(folder, "x")
    assert str(exc_info.value).startswith(f"{folder}: ")
    assert folder.is_dir()
