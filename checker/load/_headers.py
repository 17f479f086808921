"""Reading DICOM headers and checking what kind of object a file holds."""
from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np
import pydicom
from pydicom.dataelem import RawDataElement
from pydicom.dataset import Dataset
from pydicom.errors import InvalidDicomError
from pydicom.uid import UID

from ..errors import (
    NoPixelDataError,
    NotCTError,
    NotMonochromeError,
    UnreadableFileError,
)
from ._quick import (
    EXPLICIT_VR_LITTLE_ENDIAN,
    SCAN_BYTES,
    QuickHeader,
    QuickPixels,
    element_scan,
    quick_dataset,
    quick_pixels_of,
    read_and_scan,
    read_quick_pixels,
    remember_scan,
)

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
    "PatientName",
    "PatientID",
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
    (0x0010, 0x0010): "PatientName",
    (0x0010, 0x0020): "PatientID",
    (0x0018, 0x1210): "ConvolutionKernel",
    (0x0020, 0x000E): "SeriesInstanceUID",
    (0x0020, 0x0012): "AcquisitionNumber",
    (0x0020, 0x0032): "ImagePositionPatient",
    (0x0020, 0x0037): "ImageOrientationPatient",
    (0x0020, 0x0100): "TemporalPositionIdentifier",
}
#: Read only so that free text can be cleared of them (see checker/identifiers.py).
IDENTIFIER_TAGS = frozenset({"PatientName", "PatientID"})
_SCAN_TAG_INTS = {(g << 16) | e: name for (g, e), name in SCAN_TAGS.items()}

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
    "quick_pixels_of",
    "read_quick_pixels",
    "QuickHeader",
    "QuickPixels",
    "SCAN_BYTES",
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


def scan_header(path: Path) -> dict[str, Any] | None:
    """The discovery facts of a plain file, parsed directly; None when pydicom must decide.

    Handles the common case only: a Part 10 file (preamble, "DICM", meta group) in
    Explicit VR Little Endian with defined lengths, plain ASCII text and the header
    within the first ``SCAN_BYTES`` (or the whole file). Everything else returns None
    so that :func:`read_header` reads it. The element scan is kept for the load of the
    same file that follows (:func:`~._quick.remember_scan`).

    Returns
    -------
    dict or None
        Keyword -> text (multi-valued text as a list), as :func:`header_facts` gives.

    References
    ----------
    DICOM PS3.10, 7.1 (preamble, prefix, File Meta Information); PS3.5, 7.1.2 (data
    element structure with explicit VR).
    """
    read = read_and_scan(path)
    if read is None:
        return None
    buf, st, meta, body = read
    whole = len(buf) >= st.st_size
    if meta is None or meta.undefined or (not meta.stopped and meta.pos != len(buf)):
        return None
    ts = None
    for tag, _, start, n in meta.elements:
        if tag == 0x00020010:
            ts = _text_value(buf[start:start + n])
    if ts != EXPLICIT_VR_LITTLE_ENDIAN:
        return None
    if body is None and not meta.stopped:
        body = element_scan(buf, meta.pos, 0xFFFF)  # the file ended with the meta group
    if body is not None:
        remember_scan(path, st, buf, meta, body)
    if body is None or body.undefined or (not body.stopped and body.pos != len(buf)):
        return None
    if not whole and body.pos >= len(buf):
        return None
    found: dict[int, bytes] = {}
    for tag, _, start, n in body.elements:
        if tag in _SCAN_TAG_INTS or tag >> 16 == 0x0002:
            found[tag] = buf[start:start + n]
    facts: dict[str, Any] = {}
    for tag, raw in found.items():
        if tag >> 16 == 0x0002:
            return None  # meta elements again inside the data set: unusual, let pydicom read it
        name = _SCAN_TAG_INTS[tag]
        value = True if name == "DirectoryRecordSequence" else _text_value(raw)
        if value is None and name in IDENTIFIER_TAGS:
            value = raw.decode("latin-1").strip(" \x00")  # only used to withhold it
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
    if isinstance(ds, QuickHeader):
        return _quick_header_get(ds, name, default)
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


def _quick_header_get(ds: QuickHeader, name: str, default: Any) -> Any:
    """:func:`quick_get` for a :class:`~._quick.QuickHeader`: the same plain values from
    the raw bytes, pydicom's conversion for the rest."""
    raw = ds.raw(name)
    if raw is None:
        return default
    vr, value = raw
    if vr in (b"US", b"SS") and len(value) == 2:
        return int.from_bytes(value, "little", signed=vr == b"SS")
    if vr in (b"CS", b"UI") and b"\\" not in value:
        try:
            return value.decode("ascii").strip(" \x00")
        except UnicodeDecodeError:
            pass
    return ds.get(name, default)


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
        values = [float(v) for v in value]
    except (TypeError, ValueError):
        return None
    if len(values) != n or not all(map(math.isfinite, values)):
        return None
    return np.array(values, dtype=float)
