"""File-system helpers: atomic writes and safe file names."""
from __future__ import annotations

import hashlib
import os
import re
import tempfile
import unicodedata
from pathlib import Path

_UNSAFE = re.compile(r"[^A-Za-z0-9._-]+")


def safe_name(text: str, *, max_length: int = 60, fallback: str = "series") -> str:
    """A file-name-safe form of ``text``: ASCII letters, digits, '.', '_' and '-' only.

    No path separators, no leading dots (so never ``..``), bounded length.
    """
    ascii_text = unicodedata.normalize("NFKD", str(text)).encode("ascii", "ignore").decode()
    name = _UNSAFE.sub("-", ascii_text).strip("-.")
    name = re.sub(r"-{2,}", "-", name)[:max_length].strip("-.")
    return name or fallback


def short_hash(*parts: str, length: int = 8) -> str:
    h = hashlib.sha256("\x1f".join(parts).encode("utf-8", "surrogateescape"))
    return h.hexdigest()[:length]


def inside(root: Path, path: Path) -> bool:
    """Whether ``path`` resolves to a place inside ``root``."""
    try:
        path.resolve().relative_to(root.resolve())
    except ValueError:
        return False
    return True


def atomic_write_bytes(path: str | Path, data: bytes) -> Path:
    """Write ``data`` to ``path`` via a temporary file in the same folder and a rename.

    A reader (or a killed run) never sees a half-written file: either the old content
    or the new. On failure (e.g. a full disk) the temporary file is removed and the
    error propagates; the previous file, if any, is intact.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    return path


def atomic_write_text(path: str | Path, text: str) -> Path:
    return atomic_write_bytes(path, text.encode("utf-8"))


def file_fingerprint(paths: list[Path], *, chunk: int = 8192) -> str:
    """A content hash of a series that reads only the head and tail of each file.

    Size plus the first and last ``chunk`` bytes of every file (headers, UIDs and the
    ends of the pixel data) identify a DICOM series without reading it whole.
    """
    return fingerprint_and_bytes(paths, chunk=chunk)[0]


def fingerprint_and_bytes(paths: list[Path], *, chunk: int = 8192) -> tuple[str, int]:
    """:func:`file_fingerprint` and the files' total size in bytes (unreadable files count
    0), from one look at each file."""
    h = hashlib.sha256()
    total = 0
    for p in sorted(Path(x) for x in paths):
        try:
            size = p.stat().st_size
            total += size
            h.update(p.name.encode("utf-8", "surrogateescape"))
            h.update(str(size).encode())
            with open(p, "rb") as fh:
                h.update(fh.read(chunk))
                if size > chunk:
                    fh.seek(max(chunk, size - chunk))
                    h.update(fh.read(chunk))
        except OSError as exc:
            h.update(f"unreadable:{p}:{exc.errno}".encode())
    return h.hexdigest()[:32], total
