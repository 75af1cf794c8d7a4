"""Atomic output files: several files all or nothing, and the check before writing."""

from __future__ import annotations

import os

import pytest

from qa import fileio
from qa.errors import InputError
from qa.fileio import check_writable, write_files_atomic


def test_all_files_are_written_together(tmp_path):
    a, b = tmp_path / "new" / "deeper" / "a.pdf", tmp_path / "b.json"
    assert write_files_atomic([(a, b"%PDF-", "--out"), (b, b"{}\n", "--json")]) == [a, b]
    assert a.read_bytes() == b"%PDF-" and b.read_bytes() == b"{}\n"
    assert not list(tmp_path.rglob(".*.part"))


def test_a_file_that_cannot_be_written_leaves_nothing(tmp_path):
    blocker = tmp_path / "a-file"
    blocker.write_text("x")
    a = tmp_path / "new" / "a.pdf"
    with pytest.raises(InputError, match=r"a-file/b.json, field '--json': cannot write the "
                                         r"file: "):
        write_files_atomic([(a, b"%PDF-", "--out"), (blocker / "b.json", b"{}", "--json")])
    # the first file's temporary copy and the folder made for it are gone again
    assert not (tmp_path / "new").exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a-file"]


def test_a_failed_rename_removes_the_files_already_in_place(tmp_path, monkeypatch):
    a, b = tmp_path / "a.pdf", tmp_path / "b.json"
    real = os.replace
    calls = []

    def second_fails(src, dst):
        calls.append(dst)
        if len(calls) == 2:
            raise OSError(28, "No space left on device")
        real(src, dst)

    monkeypatch.setattr(fileio.os, "replace", second_fails)
    with pytest.raises(InputError, match=r"b.json, field '--json': cannot write the file: "
                                         r"No space left on device"):
        write_files_atomic([(a, b"%PDF-", "--out"), (b, b"{}", "--json")])
    assert list(tmp_path.iterdir()) == []


def test_check_writable_creates_nothing(tmp_path):
    target = tmp_path / "x" / "y" / "z.csv"
    assert check_writable(target, field="--csv") == target
    assert list(tmp_path.iterdir()) == []
    (tmp_path / "f").write_text("")
    with pytest.raises(InputError, match=r"f/z.csv, field '--csv': cannot write here: .*f "
                                         r"is a file, not a folder"):
        check_writable(tmp_path / "f" / "z.csv", field="--csv")
    with pytest.raises(InputError, match=r"field '--json': is a folder"):
        check_writable(tmp_path, field="--json")
