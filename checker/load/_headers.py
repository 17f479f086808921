"""Reading DICOM headers and checking what kind of object a file holds."""
from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pydicom
from pydicom.dataset import Dataset
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

__all__ = [
    "read_header",
    "read_dataset",
    "sop_class_name",
    "check_is_ct",
    "check_monochrome",
    "has_pixel_data",
    "as_float",
    "as_floats",
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
    modality = str(ds.get("Modality", "") or "")
    sop = str(ds.get("SOPClassUID", "") or "")
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
    spp = int(ds.get("SamplesPerPixel", 1) or 1)
    photometric = str(ds.get("PhotometricInterpretation", "MONOCHROME2") or "MONOCHROME2")
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
