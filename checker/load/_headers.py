"""Reading DICOM headers and checking what kind of object a file holds."""
from __future__ import annotations

import os
import struct
from pathlib import Path
from typing import Any

import numpy as np
import pydicom
from pydicom.dataelem import RawDataElement
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.tag import BaseTag
from pydicom.errors import InvalidDicomError
from pydicom.uid import UID

from ..errors import NoPixelDataError, NotCTError, NotMonochromeError, UnreadableFileError

CT_IMAGE = "1.2.840.10008.5.1.4.1.1.2"
ENHANCED_CT_IMAGE = "1.2.840.10008.5.1.4.1.1.2.1"
LEGACY_ENHANCED_CT_IMAGE = "1.2.840.10008.5.1.4.1.1.2.2"
CT_SOP_CLASSES = frozenset({CT_IMAGE, ENHANCED_CT_IMAGE, LEGACY_ENHANCED_CT_IMAGE})
MULTIFRAME_CT_SOP_CLASSES = frozenset({ENHANCED_CT_IMAGE, LEGACY_ENHANCED_CT_IMAGE})

#: Top-level tags discovery reads; everything else in a header is skipped.
DISCOVERY_TAGS = [
    "SOPClassUID",
    "SeriesInstanceUID",
    "StudyInstanceUID",
    "Modality",
    "SeriesDescription",
    "SeriesNumber",
    "ImageOrientationPatient",
    "ImagePositionPatient",
    "Rows",
    "Columns",
    "NumberOfFrames",
    "AcquisitionNumber",
    "TemporalPositionIdentifier",
    "ConvolutionKernel",
    "ImageType",
    "AcquisitionTime",
    "DirectoryRecordSequence",
]

#: Deferred reading: values larger than this stay on disk until they are used.
DEFER_SIZE = "64 KB"

#: Tags the quick header scan keeps: (group, element) -> keyword (DICOM PS3.6).
SCAN_TAGS = {
    (0x0004, 0x1220): "DirectoryRecordSequence",
    (0x0008, 0x0008): "ImageType",
    (0x0008, 0x0016): "SOPClassUID",
    (0x0008, 0x0032): "AcquisitionTime",
    (0x0008, 0x0060): "Modality",
    (0x0008, 0x103E): "SeriesDescription",
    (0x0018, 0x1210): "ConvolutionKernel",
    (0x0020, 0x000E): "SeriesInstanceUID",
    (0x0020, 0x0012): "AcquisitionNumber",
    (0x0020, 0x0032): "ImagePositionPatient",
    (0x0020, 0x0037): "ImageOrientationPatient",
    (0x0020, 0x0100): "TemporalPositionIdentifier",
}
#: Explicit VR encodings with a 2-byte reserved field and a 4-byte length (PS3.5 7.1.2).
LONG_VRS = frozenset({b"OB", b"OD", b"OF", b"OL", b"OV", b"OW", b"SQ", b"SV", b"UC", b"UN", b"UR", b"UT", b"UV"})
EXPLICIT_VR_LITTLE_ENDIAN = "1.2.840.10008.1.2.1"
SCAN_BYTES = 32768

__all__ = [
    "scan_header",
    "header_facts",
    "read_header",
    "read_dataset",
    "sop_class_name",
    "check_is_ct",
    "check_monochrome",
    "has_pixel_data",
    "as_float",
    "as_floats",
    "quick_get",
    "quick_dataset",
    "QuickPixels",
]


def _dcmread(path: Path, **kwargs: Any) -> Dataset:
    try:
        return pydicom.dcmread(path, **kwargs)
    except InvalidDicomError:
        ds = pydicom.dcmread(path, force=True, **kwargs)
        if "SOPClassUID" not in ds and "SeriesInstanceUID" not in ds:
            raise UnreadableFileError("not a DICOM file (no preamble and no DICOM identifiers)", source=str(path))
        return ds


def read_header(path: Path) -> Dataset:
    """The discovery subset of a header (pixels never read).

    Raises
    ------
    UnreadableFileError
        The file cannot be opened or parsed as DICOM.

    References
    ----------
    pydicom documentation, ``dcmread(stop_before_pixels=True, specific_tags=...)``.
    """
    try:
        return _dcmread(path, stop_before_pixels=True, specific_tags=DISCOVERY_TAGS, defer_size=DEFER_SIZE)
    except UnreadableFileError:
        raise
    except Exception as exc:  # pydicom raises many types on damaged files
        raise UnreadableFileError(f"cannot read DICOM header ({type(exc).__name__}: {exc})", source=str(path)) from exc


def _text_value(raw: bytes) -> str | list[str] | None:
    """An ASCII text value split at backslashes; None when not plain ASCII."""
    try:
        text = raw.decode("ascii")
    except UnicodeDecodeError:
        return None
    parts = [v.strip(" \x00") for v in text.split("\\")]
    return parts[0] if len(parts) == 1 else parts


def _scan_elements(buf: bytes, pos: int, stop_group: int) -> tuple[dict[tuple[int, int], bytes], int] | None:
    """Explicit VR little endian elements from ``pos`` until PixelData, ``stop_group`` or the end.

    Returns the values of the tags wanted and where scanning ended, or None when the
    buffer ends inside an element or an element has undefined length.
    """
    found: dict[tuple[int, int], bytes] = {}
    end = len(buf)
    while pos + 8 <= end:
        group, elem = struct.unpack_from("<HH", buf, pos)
        if group >= stop_group or (group, elem) == (0x7FE0, 0x0010):
            return found, pos
        vr = buf[pos + 4:pos + 6]
        if not (vr.isalpha() and vr.isupper()):
            return None  # not explicit VR after all
        if vr in LONG_VRS:
            if pos + 12 > end:
                return None
            (length,), start = struct.unpack_from("<I", buf, pos + 8), pos + 12
        else:
            (length,), start = struct.unpack_from("<H", buf, pos + 6), pos + 8
        if length == 0xFFFFFFFF or start + length > end:
            return None
        if (group, elem) in SCAN_TAGS or group == 0x0002:
            found[(group, elem)] = buf[start:start + length]
        pos = start + length
    return (found, pos) if pos == end else None


def scan_header(path: Path) -> dict[str, Any] | None:
    """The discovery facts of a plain file, parsed directly; None when pydicom must decide.

    Handles the common case only: a Part 10 file (preamble, "DICM", meta group) in
    Explicit VR Little Endian with defined lengths, plain ASCII text and the header
    within the first ``SCAN_BYTES`` (or the whole file). Everything else returns None
    so that :func:`read_header` reads it.

    Returns
    -------
    dict or None
        Keyword -> text (multi-valued text as a list), as :func:`header_facts` gives.

    References
    ----------
    DICOM PS3.10, 7.1 (preamble, prefix, File Meta Information); PS3.5, 7.1.2 (data
    element structure with explicit VR).
    """
    try:
        with open(path, "rb") as fh:
            buf = fh.read(SCAN_BYTES)
            whole = len(buf) < SCAN_BYTES or fh.read(1) == b""
    except OSError:
        return None
    if len(buf) < 132 or buf[128:132] != b"DICM":
        return None
    meta = _scan_elements(buf, 132, 0x0003)
    if meta is None:
        return None
    ts = _text_value(meta[0].get((0x0002, 0x0010), b""))
    if ts != EXPLICIT_VR_LITTLE_ENDIAN:
        return None
    body = _scan_elements(buf, meta[1], 0xFFFF)
    if body is None or (not whole and body[1] >= len(buf)):
        return None
    facts: dict[str, Any] = {}
    for tag, raw in body[0].items():
        if tag[0] == 0x0002:
            return None  # meta elements again inside the data set: unusual, let pydicom read it
        name = SCAN_TAGS[tag]
        value = True if name == "DirectoryRecordSequence" else _text_value(raw)
        if value is None:
            return None
        if value != "":
            facts[name] = value
    return facts


def header_facts(ds: Dataset) -> dict[str, Any]:
    """The discovery facts of a pydicom header in the form :func:`scan_header` gives."""
    facts: dict[str, Any] = {}
    for name in SCAN_TAGS.values():
        if name not in ds:
            continue
        if name == "DirectoryRecordSequence":
            facts[name] = True
            continue
        value = ds[name].value
        if isinstance(value, (list, tuple, pydicom.multival.MultiValue)):
            value = [str(v) for v in value]
            value = value[0] if len(value) == 1 else value
        elif value is not None:
            value = str(value).strip(" \x00")
        if value not in (None, "", []):
            facts[name] = value
    return facts


def quick_get(ds: Dataset, name: str, default: Any = None) -> Any:
    """``ds.get(name, default)``, taking plain US/SS numbers and single CS/UI codes from the raw bytes.

    pydicom converts an element on first access, which costs more than the few bytes
    these values need; anything other than an unconverted explicit-VR US, SS, CS or UI
    element of the usual size is left to pydicom.

    References
    ----------
    DICOM PS3.5, 6.2 (value representations US, SS, CS, UI) and 7.3 (byte ordering).
    """
    elem = ds.get_item(name)
    if elem is None:
        return default
    if isinstance(elem, RawDataElement) and isinstance(elem.value, bytes):
        raw = elem.value
        if elem.VR in ("US", "SS") and len(raw) == 2:
            return int.from_bytes(raw, "little" if elem.is_little_endian else "big", signed=elem.VR == "SS")
        if elem.VR in ("CS", "UI") and b"\\" not in raw:
            try:
                return raw.decode("ascii").strip(" \x00")
            except UnicodeDecodeError:
                pass
    return ds.get(name, default)


#: Attribute of a dataset from :func:`quick_dataset` that says where its pixels are.
QUICK_PIXELS = "_reconaudit_quick_pixels"
PIXEL_DATA = (0x7FE0, 0x0010)


class QuickPixels(tuple):
    """(offset, byte length, dtype) of the native 16-bit pixel data of a quickly read file."""

    __slots__ = ()


ITEM, ITEM_END, SEQUENCE_END = (0xFFFE, 0xE000), (0xFFFE, 0xE00D), (0xFFFE, 0xE0DD)


def _element_header(buf: bytes, pos: int) -> tuple[int, int, bytes, int, int] | None:
    """(group, element, VR, length, value offset) of the explicit VR element at ``pos``."""
    end = len(buf)
    if pos + 8 > end:
        return None
    group, elem = struct.unpack_from("<HH", buf, pos)
    vr = buf[pos + 4:pos + 6]
    if not (vr.isalpha() and vr.isupper()):
        return None
    if vr in LONG_VRS:
        if pos + 12 > end:
            return None
        (length,) = struct.unpack_from("<I", buf, pos + 8)
        return group, elem, vr, length, pos + 12
    (length,) = struct.unpack_from("<H", buf, pos + 6)
    return group, elem, vr, length, pos + 8


def _end_of_sequence(buf: bytes, pos: int, depth: int = 0) -> tuple[int, int] | None:
    """Where the items of an undefined-length sequence starting at ``pos`` end, and
    where its delimiter ends; None when it cannot be followed (PS3.5, 7.5)."""
    end = len(buf)
    while pos + 8 <= end and depth < 8:
        group, elem, length = *struct.unpack_from("<HH", buf, pos), struct.unpack_from("<I", buf, pos + 4)[0]
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
            if struct.unpack_from("<HH", buf, pos) == ITEM_END:
                pos += 8
                break
            head = _element_header(buf, pos)
            if head is None:
                return None
            _, _, vr, n, start = head
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


def _all_elements(buf: bytes, pos: int, stop_group: int) -> tuple[list[tuple[int, int, str, int, int]], int] | None:
    """Every explicit VR little endian element from ``pos`` until PixelData, ``stop_group``
    or the end of ``buf``: (group, element, VR, value offset, value length) each, and
    where scanning stopped. A sequence of undefined length is followed to its delimiter
    and kept as its items' bytes. None when an element cannot be followed.
    """
    out = []
    end = len(buf)
    while pos + 8 <= end:
        group, elem = struct.unpack_from("<HH", buf, pos)
        if group >= stop_group or (group, elem) == PIXEL_DATA:
            return out, pos
        head = _element_header(buf, pos)
        if head is None:
            return None
        _, _, vr, length, start = head
        if length == 0xFFFFFFFF:
            if vr != b"SQ":
                return None
            found = _end_of_sequence(buf, start)
            if found is None:
                return None
            length, after = found[0] - start, found[1]
        elif start + length > end:
            return None
        else:
            after = start + length
        out.append((group, elem, vr.decode("ascii"), start, length))
        pos = after
    return None  # the header did not end inside the buffer


def _raw_elements(buf: bytes, found: list[tuple[int, int, str, int, int]]) -> dict:
    return {
        BaseTag((g << 16) | e): RawDataElement(BaseTag((g << 16) | e), vr, n, buf[start:start + n], start, False, True)
        for g, e, vr, start, n in found
    }


def _plain_native_ct(ds: Dataset, length: int) -> np.dtype | None:
    """The pixel dtype when ``ds`` is a single-frame CT image with 16 bits allocated and
    stored, one sample per pixel and exactly Rows x Columns pixels; else None."""
    try:
        rows, cols = int(quick_get(ds, "Rows")), int(quick_get(ds, "Columns"))
        ok = (quick_get(ds, "SOPClassUID") == CT_IMAGE and quick_get(ds, "Modality") == "CT"
              and int(quick_get(ds, "BitsAllocated")) == 16 and int(quick_get(ds, "BitsStored")) == 16
              and int(quick_get(ds, "SamplesPerPixel")) == 1 and "NumberOfFrames" not in ds
              and length == 2 * rows * cols)
        signed = int(quick_get(ds, "PixelRepresentation"))
    except (TypeError, ValueError, KeyError):
        return None
    if not ok or signed not in (0, 1):
        return None
    return np.dtype("<i2" if signed else "<u2")


def _trailing_elements(path: Path, offset: int, size: int) -> dict | None:
    """The elements after the pixel data (at most ``SCAN_BYTES`` of them), or None."""
    if offset == size:
        return {}
    if size - offset > SCAN_BYTES:
        return None
    try:
        with open(path, "rb") as fh:
            fh.seek(offset)
            tail = fh.read()
    except OSError:
        return None
    found = _all_elements(tail + b"\xff" * 8, 0, 0xFFFF)  # a stop marker after the last element
    if found is None or found[1] != len(tail):
        return None
    return _raw_elements(tail, found[0])


def quick_dataset(path: Path) -> Dataset | None:
    """The header of a plain CT file parsed directly, with where its pixels are; None
    when pydicom must read the file.

    Handles the common case only: a Part 10 file (preamble, "DICM", meta group) in
    Explicit VR Little Endian, every element of defined length, the header within the
    first ``SCAN_BYTES``, a single-frame CT Image with 16 bits allocated and stored and
    exactly Rows x Columns pixels (elements after them are read too). The elements are pydicom raw elements
    (converted on use, as pydicom would); the pixels stay on disk, at the offset kept in
    the dataset's ``QUICK_PIXELS`` attribute (:class:`QuickPixels`), and are read by
    :func:`read_quick_pixels`.

    References
    ----------
    DICOM PS3.10, 7.1 (File Meta Information); PS3.5, 7.1.2 (explicit VR data element
    structure), 8.1.1 (native pixel data), A.2 (Explicit VR Little Endian).
    """
    try:
        with open(path, "rb") as fh:
            buf = fh.read(SCAN_BYTES)
            size = os.fstat(fh.fileno()).st_size
    except OSError:
        return None
    if len(buf) < 132 or buf[128:132] != b"DICM":
        return None
    meta = _all_elements(buf, 132, 0x0003)
    if meta is None:
        return None
    body = _all_elements(buf, meta[1], 0xFFFF)
    if body is None or any(g < 0x0008 for g, *_ in body[0]) or body[1] + 12 > len(buf):
        return None
    pos = body[1]
    vr = buf[pos + 4:pos + 6]
    if vr not in (b"OW", b"OB"):
        return None
    (length,) = struct.unpack_from("<I", buf, pos + 8)
    start = pos + 12
    if length == 0xFFFFFFFF or start + length > size:
        return None
    trailing = _trailing_elements(path, start + length, size)
    if trailing is None:
        return None
    file_meta = FileMetaDataset(_raw_elements(buf, meta[0]))
    if str(quick_get(file_meta, "TransferSyntaxUID", "")) != EXPLICIT_VR_LITTLE_ENDIAN:
        return None
    elements = _raw_elements(buf, body[0])
    elements.update(trailing)
    elements[BaseTag(0x7FE00010)] = RawDataElement(BaseTag(0x7FE00010), vr.decode("ascii"), length, b"", start, False, True)
    ds = Dataset(elements)
    dtype = _plain_native_ct(ds, length)
    if dtype is None:
        return None
    ds.file_meta = file_meta
    ds.set_original_encoding(False, True, ds._character_set)
    setattr(ds, QUICK_PIXELS, QuickPixels((start, length, dtype)))
    return ds


def quick_pixels_of(ds: Dataset) -> QuickPixels | None:
    """Where the pixels of a :func:`quick_dataset` dataset are; None for any other dataset."""
    return getattr(ds, QUICK_PIXELS, None)


def read_quick_pixels(path: Path, where: QuickPixels) -> np.ndarray:
    """The stored pixel values of a quickly read file, read straight into an array.

    Raises
    ------
    UnreadableFileError
        The file cannot be read or ends before its pixel data do.
    """
    start, length, dtype = where
    out = np.empty(length // 2, dtype=dtype)
    try:
        with open(path, "rb") as fh:
            fh.seek(start)
            got = fh.readinto(memoryview(out).cast("B"))
    except OSError as exc:
        raise UnreadableFileError(f"cannot read pixel data ({exc.strerror or exc})", source=str(path)) from exc
    if got != length:
        raise UnreadableFileError(f"truncated pixel data: {got} bytes, expected {length}", source=str(path))
    return out


def read_dataset(path: Path) -> Dataset:
    """The whole file, pixel data included, in one read (no deferred second open).

    Raises
    ------
    UnreadableFileError
        The file cannot be opened or parsed as DICOM.
    """
    try:
        return _dcmread(path)
    except UnreadableFileError:
        raise
    except Exception as exc:
        raise UnreadableFileError(f"cannot read DICOM file ({type(exc).__name__}: {exc})", source=str(path)) from exc


def sop_class_name(uid: str) -> str:
    """The registered name of a SOP class UID, or the UID itself."""
    name = UID(uid).name if uid else ""
    return name if name and name != uid else (uid or "no SOPClassUID")


def check_is_ct(ds: Dataset, where: str) -> None:
    """Refuse anything that is not a CT image object.

    Raises
    ------
    NotCTError
        Modality is not CT, or the SOP class is not a CT image storage class. The message
        says it is not CT and what it is.
    """
    modality = str(quick_get(ds, "Modality", "") or "")
    sop = str(quick_get(ds, "SOPClassUID", "") or "")
    if modality != "CT":
        raise NotCTError(
            f"not CT: Modality is '{modality or 'missing'}' ({sop_class_name(sop)}); reconaudit checks CT images only",
            source=where,
        )
    if sop and sop not in CT_SOP_CLASSES:
        raise NotCTError(
            f"not a CT image: SOP class is {sop_class_name(sop)} ({sop}), expected CT Image Storage or "
            "Enhanced CT Image Storage",
            source=where,
        )


def check_monochrome(ds: Dataset, where: str) -> str | None:
    """Refuse colour pixels; return a note for MONOCHROME1.

    Raises
    ------
    NotMonochromeError
        SamplesPerPixel != 1 or PhotometricInterpretation not MONOCHROME1/2.
    """
    spp = int(quick_get(ds, "SamplesPerPixel", 1) or 1)
    photometric = str(quick_get(ds, "PhotometricInterpretation", "MONOCHROME2") or "MONOCHROME2")
    if spp != 1 or photometric not in ("MONOCHROME1", "MONOCHROME2"):
        raise NotMonochromeError(
            f"not monochrome: PhotometricInterpretation '{photometric}', SamplesPerPixel {spp}; "
            "expected MONOCHROME2 (or MONOCHROME1) with 1 sample per pixel",
            source=where,
        )
    if photometric == "MONOCHROME1":
        return "MONOCHROME1 (display inverted) pixels: HU taken from the rescaled stored values as usual"
    return None


def has_pixel_data(ds: Dataset) -> bool:
    return any(k in ds for k in ("PixelData", "FloatPixelData", "DoubleFloatPixelData"))


def check_has_pixels(ds: Dataset, where: str) -> None:
    """Raises NoPixelDataError when ``ds`` holds no pixel data element."""
    if not has_pixel_data(ds):
        raise NoPixelDataError("no pixel data: the object has no PixelData element", source=where)


def as_float(value: Any, default: float | None = None) -> float | None:
    """A DICOM number (DS/IS/US, possibly multi-valued: first value) as float."""
    if value is None or value == "":
        return default
    try:
        if isinstance(value, (list, tuple, pydicom.multival.MultiValue)):
            value = value[0]
        return float(value)
    except (TypeError, ValueError, IndexError):
        return default


def as_floats(value: Any, n: int) -> np.ndarray | None:
    """A multi-valued DICOM number of length ``n`` as an array, else None."""
    if value is None:
        return None
    try:
        arr = np.asarray([float(v) for v in value], dtype=float)
    except (TypeError, ValueError):
        return None
    return arr if arr.shape == (n,) and np.all(np.isfinite(arr)) else None
