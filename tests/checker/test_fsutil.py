from __future__ import annotations

import os

import pytest

from reconaudit.checker.fsutil import atomic_write_text, file_fingerprint, inside, safe_name


@pytest.mark.parametrize("text", ["../../etc/passwd", "a/b\\c", "..", "<script>", "é\u0000x", "x" * 500, ""])
def test_safe_name_has_no_separators_or_dot_dot(text, tmp_path):
    name = safe_name(text)
    assert name and len(name) <= 60
    assert "/" not in name and "\\" not in name and not name.startswith(".")
    assert inside(tmp_path, tmp_path / name)


def test_atomic_write_leaves_old_file_on_failure(tmp_path, monkeypatch):
    target = tmp_path / "results.json"
    atomic_write_text(target, "old")

    def boom(*a, **k):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "fsync", boom)
    with pytest.raises(OSError):
        atomic_write_text(target, "new")
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["results.json"]  # no temp file left


def test_fingerprint_changes_with_content(tmp_path):
    a = tmp_path / "a.dcm"
    a.write_bytes(b"x" * 20000)
    h1 = file_fingerprint([a])
    a.write_bytes(b"x" * 19999 + b"y")
    assert file_fingerprint([a]) != h1


def test_fingerprint_and_bytes_gives_the_fingerprint_and_the_total_size(tmp_path):
    from reconaudit.checker.fsutil import fingerprint_and_bytes

    a, b = tmp_path / "a.dcm", tmp_path / "b.dcm"
    a.write_bytes(b"x" * 20000)
    b.write_bytes(b"y" * 300)
    digest, size = fingerprint_and_bytes([b, a, tmp_path / "missing.dcm"])
    assert digest == file_fingerprint([a, b, tmp_path / "missing.dcm"]) and size == 20300
