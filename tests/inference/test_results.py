"""The output-folder guard and the atomic writer: nothing of the user's is ever lost.

Every refusal must come before any work and leave every file where it was, with the
same content; folders get the permissions the umask gives (POSIX: a new directory
is created with mode 0o777 & ~umask, a new file with 0o666 & ~umask).
"""

from __future__ import annotations

import json
import os
import stat

import pytest

from cladewise.errors import InputError
from cladewise.inference.results import (
    MARKER,
    atomic_write,
    check_output_folder,
    is_cladewise_output,
)


def _snapshot(folder):
    """Every file under ``folder`` with its bytes."""
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def _user_folder(tmp_path):
    d = tmp_path / "fieldwork"
    (d / "photos").mkdir(parents=True)
    (d / "notes.txt").write_text("site 4: two nests\n")
    (d / "raw.csv").write_text("species,mass\nA,1.5\n")
    (d / "photos" / "nest.jpg").write_bytes(b"\xff\xd8\xff\xe0 not really a photo")
    return d


def test_user_folder_is_refused_even_with_overwrite(tmp_path):
    d = _user_folder(tmp_path)
    before = _snapshot(d)
    for overwrite in (False, True):
        with pytest.raises(InputError) as err:
            check_output_folder(d, overwrite=overwrite, what="fit")
        msg = str(err.value)
        assert "did not write" in msg and "notes.txt" in msg and "photos" in msg and "--overwrite" in msg
    assert _snapshot(d) == before


def test_current_folder_and_its_parents_are_refused(tmp_path, monkeypatch):
    work = tmp_path / "project" / "analysis"
    work.mkdir(parents=True)
    (work / "spec.toml").write_text("[data]\n")
    monkeypatch.chdir(work)
    before = _snapshot(tmp_path)
    for out in (".", "..", str(tmp_path), "./"):
        with pytest.raises(InputError, match="current folder or a folder above it"):
            check_output_folder(out, overwrite=True)
    assert _snapshot(tmp_path) == before


def test_folder_holding_the_inputs_is_refused(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    data = tmp_path / "data"
    data.mkdir()
    spec = data / "spec.toml"
    spec.write_text("[data]\n")
    atomic_write(data / "inner", lambda f: (f / "x.txt").write_text("x"))  # a cladewise folder inside
    with pytest.raises(InputError, match="holds the input file"):
        check_output_folder(data, overwrite=True, inputs=[spec])
    # the input file itself named as the output
    with pytest.raises(InputError, match="holds the input file"):
        check_output_folder(spec, overwrite=True, inputs=[spec])
    assert spec.read_text() == "[data]\n"


def test_existing_file_is_refused(tmp_path):
    f = tmp_path / "results"
    f.write_text("keep me")
    with pytest.raises(InputError, match="existing file, not a folder"):
        check_output_folder(f, overwrite=True)
    assert f.read_text() == "keep me"


def test_place_that_cannot_be_written_is_refused(tmp_path):
    # Root ignores permission bits (os.access and mkdir succeed on a 0o500 folder),
    # so a path below a regular file is the unwritable place every user has.
    blocker = tmp_path / "a_file"
    blocker.write_text("x")
    with pytest.raises(InputError, match="is a file, so no folder can be made inside it"):
        check_output_folder(blocker / "sub" / "fit")
    if os.geteuid() != 0:
        ro = tmp_path / "readonly"
        ro.mkdir()
        ro.chmod(0o500)
        try:
            assert not os.access(ro, os.W_OK)
            with pytest.raises(InputError, match="cannot write in"):
                check_output_folder(ro / "fit")
        finally:
            ro.chmod(0o700)
        assert list(ro.iterdir()) == []


def test_marker_folder_is_replaced_with_overwrite_only(tmp_path):
    out = tmp_path / "fit"
    atomic_write(out, lambda f: (f / "summary.json").write_text('{"old": 1}'), what="fit")
    assert is_cladewise_output(out)
    marker = json.loads((out / MARKER).read_text())
    assert marker["written_by"] == "cladewise fit" and marker["cladewise_version"]
    with pytest.raises(InputError, match="not empty: it holds an earlier cladewise fit.*pass --overwrite"):
        check_output_folder(out, overwrite=False, what="fit")
    assert check_output_folder(out, overwrite=True) == out.resolve()
    atomic_write(out, lambda f: (f / "summary.json").write_text('{"new": 2}'), what="fit")
    assert json.loads((out / "summary.json").read_text()) == {"new": 2}
    assert sorted(p.name for p in tmp_path.iterdir()) == ["fit"]  # no leftovers beside it


def test_failed_write_keeps_the_old_content(tmp_path):
    out = tmp_path / "fit"
    atomic_write(out, lambda f: (f / "a.txt").write_text("old"), what="fit")

    def broken(folder):
        (folder / "a.txt").write_text("half")
        raise RuntimeError("disk full")

    with pytest.raises(RuntimeError):
        atomic_write(out, broken, what="fit")
    assert (out / "a.txt").read_text() == "old"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["fit"]
    # a file: the same
    f = tmp_path / "report.html"
    atomic_write(f, "<p>one</p>")
    atomic_write(f, "<p>two</p>")
    assert f.read_text() == "<p>two</p>"


@pytest.mark.parametrize("umask", [0o022, 0o077, 0o002])
def test_permissions_follow_the_umask(tmp_path, umask):
    old = os.umask(umask)
    try:
        out = atomic_write(tmp_path / "fit", lambda f: (f / "summary.csv").write_text("a,b\n"), what="fit")
        page = atomic_write(tmp_path / "page.html", "<p>x</p>")
    finally:
        os.umask(old)
    assert stat.S_IMODE(out.stat().st_mode) == 0o777 & ~umask
    assert stat.S_IMODE(page.stat().st_mode) == 0o666 & ~umask


def test_empty_folder_and_new_nested_folder_are_accepted(tmp_path):
    empty = tmp_path / "empty"
    empty.mkdir()
    assert check_output_folder(empty) == empty.resolve()
    assert check_output_folder(tmp_path / "new" / "deeper") == (tmp_path / "new" / "deeper").resolve()
    assert not (tmp_path / "new").exists()  # checking creates nothing
