"""The project's own reading of plain DICOM files: element scan, raw headers, pixels.

A plain file here is a Part 10 file (preamble, "DICM", meta group) in Explicit VR Little
Endian whose elements all have defined lengths or are sequences that can be followed to
their delimiters. :func:`element_scan` lists its elements (tag, VR, value offset and
length) in one pass over the header bytes; :class:`QuickHeader` keeps those raw elements
and answers the few values the loader needs straight from the bytes, building a pydicom
``Dataset`` of the same raw elements only when something else is asked for (so every
other value is pydicom's own conversion). :func:`quick_dataset` accepts single-frame CT
Images with 16 bits allocated and stored; their pixels are read by
:func:`read_quick_pixels` straight from disk into an array.

Discovery scans the same header bytes; :func:`remember_scan` keeps that scan (header
bytes only, up to the pixel data) for the load that follows in the same process, keyed by
the file's size, modification time and inode, so a file is not parsed twice. A file that
changed in between is scanned again.

References
----------
DICOM PS3.10, 7.1 (preamble, prefix, File Meta Information); PS3.5, 7.1.2 (explicit VR
data element structure), 7.5 (nesting of data sets, undefined lengths), 8.1.1 (native
pixel data), A.2 (Explicit VR Little Endian).
"""
from __future__ import annotations

import os
import struct
import threading
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
from pydicom.datadict import tag_for_keyword
from pydicom.dataelem import RawDataElement
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.tag import BaseTag

from ..errors import UnreadableFileError

#: Explicit VR encodings with a 2-byte reserved field and a 4-byte length (PS3.5 7.1.2).
LONG_VRS = frozenset({b"OB", b"OD", b"OF", b"OL", b"OV", b"OW", b"SQ", b"SV", b"UC", b"UN", b"UR", b"UT", b"UV"})
EXPLICIT_VR_LITTLE_ENDIAN = "1.2.840.10008.1.2.1"
CT_IMAGE = "1.2.840.10008.5.1.4.1.1.2"
#: Bytes read from the start of a file for its header.
SCAN_BYTES = 32768
#: Bytes read first; the rest of ``SCAN_BYTES`` only when the header is longer.
FIRST_READ = 4096
PIXEL_DATA_TAG = 0x7FE00010
ITEM, ITEM_END, SEQUENCE_END = (0xFFFE, 0xE000), (0xFFFE, 0xE00D), (0xFFFE, 0xE0DD)
#: At most this many bytes of remembered discovery scans are kept at once.
CACHE_LIMIT_BYTES = 32 * 2**20

#: VR codes seen to be two upper-case letters (a set lookup instead of two checks).
_VALID_VRS: set[bytes] = set()
_HEAD = struct.Struct("<HH2sH").unpack_from
_U32 = struct.Struct("<I").unpack_from
_TAG_PAIR = struct.Struct("<HH").unpack_from
_TAG_LEN = struct.Struct("<HHI").unpack_from

__all__ = [
    "ElementScan",
    "element_scan",
    "QuickHeader",
    "QuickPixels",
    "quick_dataset",
    "quick_pixels_of",
    "read_quick_pixels",
    "read_and_scan",
    "remember_scan",
    "SCAN_BYTES",
]


# --------------------------------------------------------------------------- element scan
class ElementScan(NamedTuple):
    """What :func:`element_scan` found.

    Attributes
    ----------
    elements : list of (int, bytes, int, int)
        (tag, VR, value offset, value length) of every element, in file order; a
        sequence of undefined length is kept as the bytes of its items.
    pos : int
        Where scanning stopped.
    stopped : bool
        True when it stopped at PixelData or at the stop group, False at the end of the
        buffer.
    undefined : bool
        True when a sequence of undefined length was followed.
    """

    elements: list
    pos: int
    stopped: bool
    undefined: bool


def _end_of_sequence(buf: bytes, pos: int, depth: int = 0) -> tuple[int, int] | None:
    """Where the items of an undefined-length sequence starting at ``pos`` end, and
    where its delimiter ends; None when it cannot be followed (PS3.5, 7.5)."""
    end = len(buf)
    while pos + 8 <= end and depth < 8:
        group, elem, length = _TAG_LEN(buf, pos)
        if (group, elem) == SEQUENCE_END:
            return pos, pos + 8
        if (group, elem) != ITEM:
            return None
        pos += 8
        if length != 0xFFFFFFFF:
            pos += length
            continue
        while True:  # an item of undefined length: elements until the item delimiter
            if pos + 8 > end:
                return None
            if _TAG_PAIR(buf, pos) == ITEM_END:
                pos += 8
                break
            group, elem, vr, n = _HEAD(buf, pos)
            if not (vr.isalpha() and vr.isupper()):
                return None
            start = pos + 8
            if vr in LONG_VRS:
                if pos + 12 > end:
                    return None
                (n,), start = _U32(buf, pos + 8), pos + 12
            if n != 0xFFFFFFFF:
                pos = start + n
            elif vr == b"SQ":
                inner = _end_of_sequence(buf, start, depth + 1)
                if inner is None:
                    return None
                pos = inner[1]
            else:
                return None
    return None


def element_scan(buf: bytes, pos: int, stop_group: int) -> ElementScan | None:
    """Every explicit VR little endian element from ``pos`` until PixelData, ``stop_group``
    or the end of ``buf``.

    Returns
    -------
    ElementScan or None
        None when an element is not explicit VR, has an undefined length that is not a
        followable sequence, or runs past the end of ``buf``.

    References
    ----------
    DICOM PS3.5, 7.1.2 (data element structure with explicit VR), 7.5 (sequences).
    """
    out: list = []
    append = out.append
    end = len(buf)
    undefined = False
    while pos + 8 <= end:
        group, elem, vr, length = _HEAD(buf, pos)
        if group >= stop_group or (group == 0x7FE0 and elem == 0x0010):
            return ElementScan(out, pos, True, undefined)
        if vr not in _VALID_VRS:
            if not (vr.isalpha() and vr.isupper()):
                return None  # not explicit VR after all
            _VALID_VRS.add(vr)
        start = pos + 8
        if vr in LONG_VRS:
            if pos + 12 > end:
                return None
            (length,), start = _U32(buf, pos + 8), pos + 12
        if length == 0xFFFFFFFF:
            if vr != b"SQ":
                return None
            found = _end_of_sequence(buf, start)
            if found is None:
                return None
            length, after, undefined = found[0] - start, found[1], True
        elif start + length > end:
            return None
        else:
            after = start + length
        append(((group << 16) | elem, vr, start, length))
        pos = after
    return ElementScan(out, pos, False, undefined)


# --------------------------------------------------------------------------- raw headers
_KEYWORD_TAGS: dict[str, int | None] = {}


def _tag_of(name: str) -> int | None:
    """The tag of a DICOM keyword (PS3.6), or None for an unknown keyword."""
    tag = _KEYWORD_TAGS.get(name, -1)
    if tag == -1:
        tag = tag_for_keyword(name)
        _KEYWORD_TAGS[name] = tag
    return tag


def _raw_elements(buf: bytes, found: list) -> dict:
    """pydicom raw elements (converted on use, as pydicom would) of scanned elements."""
    return {
        BaseTag(t): RawDataElement(BaseTag(t), vr.decode("ascii"), n, buf[start:start + n], start, False, True)
        for t, vr, start, n in found
    }


class QuickPixels(tuple):
    """(offset, byte length, dtype) of the native 16-bit pixel data of a quickly read file."""

    __slots__ = ()


class QuickHeader:
    """The raw elements of a plain file, read by :func:`element_scan`.

    Answers ``name in header`` and (through
    :func:`~reconaudit.checker.load._headers.quick_get`) plain US/SS numbers, single
    CS/UI codes and DS/IS text straight from the bytes; everything else (``get``, item
    access, attributes, ``keys``) goes to a pydicom ``Dataset`` of the same raw elements,
    built once on first use.

    Attributes
    ----------
    pixels : QuickPixels
        Where the pixel data are in the file.
    """

    __slots__ = ("_buf", "_elements", "_tail", "_tail_elements", "_meta", "pixels", "_dataset")

    def __init__(self, buf: bytes, meta: list, body: list, tail: bytes, trailing: list, pixel_vr: bytes,
                 pixels: QuickPixels):
        self._buf = buf
        self._meta = meta
        self._elements = {t: (vr, start, n) for t, vr, start, n in body}
        self._elements[PIXEL_DATA_TAG] = (pixel_vr, pixels[0], 0)
        self._tail = tail
        self._tail_elements = {t: (vr, start, n) for t, vr, start, n in trailing}
        self.pixels = pixels
        self._dataset: Dataset | None = None

    def raw(self, name: str) -> tuple[bytes, bytes] | None:
        """(VR, value bytes) of top-level element ``name`` (a keyword), or None when absent."""
        tag = _tag_of(name)
        item = self._elements.get(tag)
        if item is not None:
            vr, start, n = item
            return vr, self._buf[start:start + n]
        item = self._tail_elements.get(tag)
        if item is None:
            return None
        vr, start, n = item
        return vr, self._tail[start:start + n]

    def __contains__(self, name: object) -> bool:
        if isinstance(name, str):
            tag = _tag_of(name)
        elif isinstance(name, int):
            tag = name
        else:
            return name in self.dataset()
        return tag is not None and (tag in self._elements or tag in self._tail_elements)

    def dataset(self) -> Dataset:
        """The pydicom Dataset of these raw elements (pixel data left on disk), built once."""
        if self._dataset is None:
            elements = _raw_elements(self._buf, [(t, vr, s, n) for t, (vr, s, n) in self._elements.items() if t != PIXEL_DATA_TAG])
            elements.update(_raw_elements(self._tail, [(t, vr, s, n) for t, (vr, s, n) in self._tail_elements.items()]))
            vr, start, _ = self._elements[PIXEL_DATA_TAG]
            elements[BaseTag(PIXEL_DATA_TAG)] = RawDataElement(
                BaseTag(PIXEL_DATA_TAG), vr.decode("ascii"), self.pixels[1], b"", start, False, True)
            ds = Dataset(elements)
            ds.file_meta = FileMetaDataset(_raw_elements(self._buf, self._meta))
            ds.set_original_encoding(False, True, ds._character_set)
            self._dataset = ds
        return self._dataset

    @property
    def file_meta(self) -> FileMetaDataset:
        return self.dataset().file_meta

    def get(self, name: Any, default: Any = None) -> Any:
        return self.dataset().get(name, default)

    def get_item(self, name: Any) -> Any:
        return self.dataset().get_item(name)

    def keys(self):
        return self.dataset().keys()

    def __getitem__(self, key: Any) -> Any:
        return self.dataset()[key]

    def __getattr__(self, name: str) -> Any:
        if name.startswith("_") or name == "pixels":
            raise AttributeError(name)
        return getattr(self.dataset(), name)


# --------------------------------------------------------------------------- scans kept from discovery
class _Remembered(NamedTuple):
    key: tuple
    buf: bytes
    meta: ElementScan
    body: ElementScan


_REMEMBERED: dict[str, _Remembered] = {}
_REMEMBERED_BYTES = [0]
_LOCK = threading.Lock()


def _file_key(st: os.stat_result) -> tuple:
    return (st.st_size, st.st_mtime_ns, st.st_ino, st.st_dev)


def remember_scan(path: Path, st: os.stat_result, buf: bytes, meta: ElementScan, body: ElementScan) -> None:
    """Keep discovery's scan of ``path`` (header bytes up to the pixel data) for its load.

    Only scans that stopped at the pixel data are kept; when the kept bytes would exceed
    ``CACHE_LIMIT_BYTES``, the oldest scans are dropped first (a series discovered but
    never loaded does not keep later ones out).
    """
    if not body.stopped or body.pos + 12 > len(buf) or body.pos + 12 > CACHE_LIMIT_BYTES:
        return
    head = buf[:body.pos + 12]
    with _LOCK:
        old = _REMEMBERED.pop(str(path), None)
        if old is not None:
            _REMEMBERED_BYTES[0] -= len(old.buf)
        while _REMEMBERED and _REMEMBERED_BYTES[0] + len(head) > CACHE_LIMIT_BYTES:
            _REMEMBERED_BYTES[0] -= len(_REMEMBERED.pop(next(iter(_REMEMBERED))).buf)
        _REMEMBERED[str(path)] = _Remembered(_file_key(st), head, meta, body)
        _REMEMBERED_BYTES[0] += len(head)


def _take_remembered(path: Path) -> tuple[_Remembered, int] | None:
    """The kept scan of ``path`` and the file size, when the file is unchanged (the entry
    is removed either way)."""
    with _LOCK:
        kept = _REMEMBERED.pop(str(path), None)
        if kept is not None:
            _REMEMBERED_BYTES[0] -= len(kept.buf)
    if kept is None:
        return None
    try:
        st = os.stat(path)
    except OSError:
        return None
    return (kept, st.st_size) if _file_key(st) == kept.key else None


def forget_scans() -> None:
    """Drop every kept discovery scan."""
    with _LOCK:
        _REMEMBERED.clear()
        _REMEMBERED_BYTES[0] = 0


# --------------------------------------------------------------------------- quick dataset
def _trailing_elements(path: Path, offset: int, size: int) -> tuple[bytes, list] | None:
    """The bytes and elements after the pixel data (at most ``SCAN_BYTES`` of them), or None."""
    if offset == size:
        return b"", []
    if size - offset > SCAN_BYTES:
        return None
    try:
        with open(path, "rb") as fh:
            fh.seek(offset)
            tail = fh.read()
    except OSError:
        return None
    found = element_scan(tail + b"\xff" * 8, 0, 0xFFFF)  # a stop marker after the last element
    if found is None or not found.stopped or found.pos != len(tail):
        return None
    return tail, found.elements


def _uint(raw: tuple[bytes, bytes] | None) -> int | None:
    if raw is None or raw[0] not in (b"US", b"SS") or len(raw[1]) != 2:
        return None
    return int.from_bytes(raw[1], "little", signed=raw[0] == b"SS")


def _code(raw: tuple[bytes, bytes] | None) -> str | None:
    if raw is None or raw[0] not in (b"CS", b"UI") or b"\\" in raw[1]:
        return None
    try:
        return raw[1].decode("ascii").strip(" \x00")
    except UnicodeDecodeError:
        return None


def _plain_native_ct(ds: QuickHeader, length: int) -> np.dtype | None:
    """The pixel dtype when ``ds`` is a single-frame CT image with 16 bits allocated and
    stored, one sample per pixel and exactly Rows x Columns pixels; else None.

    Values not in their usual plain form are left to pydicom (None)."""
    rows, cols = _uint(ds.raw("Rows")), _uint(ds.raw("Columns"))
    bits_allocated, bits_stored = _uint(ds.raw("BitsAllocated")), _uint(ds.raw("BitsStored"))
    samples, signed = _uint(ds.raw("SamplesPerPixel")), _uint(ds.raw("PixelRepresentation"))
    if None in (rows, cols, bits_allocated, bits_stored, samples, signed):
        return None
    ok = (_code(ds.raw("SOPClassUID")) == CT_IMAGE and _code(ds.raw("Modality")) == "CT"
          and bits_allocated == 16 and bits_stored == 16 and samples == 1 and "NumberOfFrames" not in ds
          and length == 2 * rows * cols)
    if not ok or signed not in (0, 1):
        return None
    return np.dtype("<i2" if signed else "<u2")


class HeadScan(NamedTuple):
    """The first bytes of a file and their element scan (see :func:`read_and_scan`)."""

    buf: bytes
    stat: os.stat_result
    meta: ElementScan | None
    body: ElementScan | None


def _read_prefix(fd: int, n: int) -> bytes:
    parts, got = [], 0
    while got < n:
        part = os.read(fd, n - got)
        if not part:
            break
        parts.append(part)
        got += len(part)
    return b"".join(parts)


def _scan_prefix(buf: bytes) -> tuple[ElementScan | None, ElementScan | None]:
    if len(buf) < 132 or buf[128:132] != b"DICM":
        return None, None
    meta = element_scan(buf, 132, 0x0003)
    if meta is None or not meta.stopped:
        return meta, None
    return meta, element_scan(buf, meta.pos, 0xFFFF)


def _conclusive(buf: bytes, st: os.stat_result, meta: ElementScan | None, body: ElementScan | None) -> bool:
    """Whether a scan of a prefix of the file is the scan of its first ``SCAN_BYTES``:
    the whole file was read, or the scan reached the pixel data inside the prefix."""
    if len(buf) >= st.st_size:
        return True
    return meta is not None and body is not None and body.stopped and body.pos + 12 <= len(buf)


def read_and_scan(path: Path) -> HeadScan | None:
    """The first ``SCAN_BYTES`` of a file (or fewer, when the header and the start of the
    pixel data lie in the first ``FIRST_READ`` bytes), with their element scan.

    The scan of the short read is used only when it reached the pixel data inside it (or
    the file ended); otherwise the full ``SCAN_BYTES`` are read and scanned, so the
    result is always that of the first ``SCAN_BYTES``. None when the file cannot be read.
    ``meta`` is None when there is no "DICM" prefix or the meta group cannot be scanned;
    ``body`` is None when the meta group did not end or the data set cannot be scanned.
    """
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return None
    try:
        st = os.fstat(fd)
        buf = _read_prefix(fd, FIRST_READ)
        meta, body = _scan_prefix(buf)
        if not _conclusive(buf, st, meta, body):
            buf += _read_prefix(fd, SCAN_BYTES - len(buf))
            meta, body = _scan_prefix(buf)
    except OSError:
        return None
    finally:
        os.close(fd)
    return HeadScan(buf, st, meta, body)


def quick_dataset(path: Path) -> QuickHeader | None:
    """The header of a plain CT file parsed directly, with where its pixels are; None
    when pydicom must read the file.

    Handles the common case only: a Part 10 file (preamble, "DICM", meta group) in
    Explicit VR Little Endian, every element of defined length or a followable sequence,
    the header within the first ``SCAN_BYTES``, a single-frame CT Image with 16 bits
    allocated and stored and exactly Rows x Columns pixels (elements after them are read
    too). The pixels stay on disk (:attr:`QuickHeader.pixels`) and are read by
    :func:`read_quick_pixels`. Discovery's scan of the same unchanged file is used when
    it was kept (:func:`remember_scan`).

    References
    ----------
    DICOM PS3.10, 7.1 (File Meta Information); PS3.5, 7.1.2 (explicit VR data element
    structure), 8.1.1 (native pixel data), A.2 (Explicit VR Little Endian).
    """
    kept = _take_remembered(path)
    if kept is not None:
        (_, buf, meta, body), size = kept
    else:
        read = read_and_scan(path)
        if read is None:
            return None
        buf, size, meta, body = read.buf, read.stat.st_size, read.meta, read.body
    return _quick_from_scan(path, buf, size, meta, body)


def _transfer_syntax_of(buf: bytes, meta: ElementScan) -> str | None:
    for tag, vr, start, n in meta.elements:
        if tag == 0x00020010:
            return _code((vr, buf[start:start + n]))
    return None


def _quick_from_scan(path: Path, buf: bytes, size: int, meta: ElementScan | None, body: ElementScan | None) -> QuickHeader | None:
    if meta is None or not meta.stopped or body is None or not body.stopped or body.pos + 12 > len(buf):
        return None
    pos = body.pos
    vr = buf[pos + 4:pos + 6]
    if vr not in (b"OW", b"OB"):
        return None
    (length,) = _U32(buf, pos + 8)
    start = pos + 12
    if length == 0xFFFFFFFF or start + length > size:
        return None
    trailing = _trailing_elements(path, start + length, size)
    if trailing is None or _transfer_syntax_of(buf, meta) != EXPLICIT_VR_LITTLE_ENDIAN:
        return None
    header = QuickHeader(buf, meta.elements, body.elements, trailing[0], trailing[1], vr, QuickPixels((start, length, None)))
    if min(header._elements) < 0x00080000:
        return None  # meta or command elements inside the data set: left to pydicom
    dtype = _plain_native_ct(header, length)
    if dtype is None:
        return None
    header.pixels = QuickPixels((start, length, dtype))
    return header


def quick_pixels_of(ds: Any) -> QuickPixels | None:
    """Where the pixels of a :func:`quick_dataset` header are; None for any other dataset."""
    return ds.pixels if isinstance(ds, QuickHeader) else None


def read_quick_pixels(path: Path, where: QuickPixels, out: np.ndarray | None = None) -> np.ndarray:
    """The stored pixel values of a quickly read file, read straight into an array.

    Parameters
    ----------
    path : Path
    where : QuickPixels
        From :attr:`QuickHeader.pixels`.
    out : ndarray, optional
        A C-contiguous array of ``where``'s dtype and size to read into (reused between
        files); a new one when omitted.

    Raises
    ------
    UnreadableFileError
        The file cannot be read or ends before its pixel data do.
    """
    start, length, dtype = where
    if out is None or out.dtype != dtype or out.nbytes != length or not out.flags.c_contiguous:
        out = np.empty(length // 2, dtype=dtype)
    view = memoryview(out).cast("B")
    got = 0
    try:
        with open(path, "rb", buffering=0) as fh:
            fh.seek(start)
            while got < length:
                n = fh.readinto(view[got:])
                if not n:
                    break
                got += n
    except OSError as exc:
        raise UnreadableFileError(f"cannot read pixel data ({exc.strerror or exc})", source=str(path)) from exc
    if got != length:
        raise UnreadableFileError(f"truncated pixel data: {got} bytes, expected {length}", source=str(path))
    return out
