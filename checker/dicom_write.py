"""Write a :class:`~reconaudit.checker.volume.Volume` as a valid CT DICOM series.

Used for the demo scenario, tests and benchmarks: one CT Image Storage file per slice
(classic single-frame objects), or one Enhanced CT multi-frame file. The geometry comes
from ``volume.affine`` (voxel (z, y, x, 1) -> LPS mm); UIDs are derived from a seed so
the same call always writes the same files.

Every patient-module value written here is invented demo data.
"""
from __future__ import annotations

import hashlib
from pathlib import Path
from typing import Any

import numpy as np
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.sequence import Sequence
from pydicom.uid import ExplicitVRLittleEndian, UID

from .errors import InvalidVolumeError
from .volume import Volume

CT_IMAGE_STORAGE = UID("1.2.840.10008.5.1.4.1.1.2")
ENHANCED_CT_IMAGE_STORAGE = UID("1.2.840.10008.5.1.4.1.1.2.1")

#: Fixed, invented study date/time so written files are byte-for-byte reproducible.
DEMO_STUDY_DATE = "20240315"
DEMO_STUDY_TIME = "101500"

__all__ = [
    "write_ct_series",
    "write_enhanced_ct",
    "plane_geometry",
    "seeded_uid",
    "CT_IMAGE_STORAGE",
    "ENHANCED_CT_IMAGE_STORAGE",
]


# --------------------------------------------------------------------------- UIDs
def seeded_uid(parts: list[str]) -> UID:
    """A deterministic ``2.25.`` UID: the first 128 bits of SHA-256 of ``parts``.

    References
    ----------
    DICOM PS3.5, B.2 (UUID-derived UIDs under the root ``2.25``); ITU-T X.667.
    """
    digest = hashlib.sha256("\x1f".join(parts).encode("utf-8")).hexdigest()
    return UID(f"2.25.{int(digest[:32], 16)}")


# --------------------------------------------------------------------------- geometry
def plane_geometry(affine: np.ndarray) -> tuple[list[float], list[float], np.ndarray]:
    """DICOM plane attributes from a (z, y, x, 1) -> LPS affine.

    Parameters
    ----------
    affine : ndarray, shape (4, 4)
        Column 0 = slice step, column 1 = row step (moving down one row), column 2 =
        column step (moving right one column), column 3 = position of voxel [0, 0, 0].

    Returns
    -------
    image_orientation : list of 6 float
        ImageOrientationPatient: row direction cosine (the column step direction), then
        column direction cosine (the row step direction).
    pixel_spacing : list of 2 float
        PixelSpacing: [spacing between rows, spacing between columns] in mm.
    slice_step : ndarray, shape (3,)
        LPS step from one slice to the next.

    References
    ----------
    DICOM PS3.3, C.7.6.2.1.1 (Image Position and Image Orientation, Patient).
    """
    a = np.asarray(affine, dtype=float)
    row_step, col_step = a[:3, 1], a[:3, 2]
    dy, dx = float(np.linalg.norm(row_step)), float(np.linalg.norm(col_step))
    if dy <= 0 or dx <= 0:
        raise InvalidVolumeError(f"affine has a zero in-plane step (row {dy} mm, column {dx} mm)")
    row_cosine = col_step / dx
    col_cosine = row_step / dy
    if abs(float(row_cosine @ col_cosine)) > 1e-6:
        raise InvalidVolumeError("affine in-plane axes are not orthogonal; DICOM planes need orthogonal rows and columns")
    iop = [float(v) for v in np.concatenate([row_cosine, col_cosine])]
    return iop, [dy, dx], a[:3, 0].copy()


def _ds(value: float) -> str:
    """A decimal string (VR DS, max 16 characters) holding ``value`` as exactly as fits."""
    for digits in range(10, 0, -1):
        text = f"{value:.{digits}g}"
        if len(text) <= 16:
            return text
    raise ValueError(f"cannot format {value} as DICOM DS")


# --------------------------------------------------------------------------- storage
def _stored_values(
    hu: np.ndarray, slope: float, intercept: float, padding: np.ndarray | None, padding_value: int | None
) -> tuple[np.ndarray, int]:
    """Stored integer pixel values (int16 or uint16) and PixelRepresentation."""
    if not np.all(np.isfinite(hu)):
        raise InvalidVolumeError("volume holds NaN or Inf; DICOM integer pixels cannot store them")
    if slope == 0:
        raise InvalidVolumeError("rescale_slope must not be 0")
    stored = np.rint((hu.astype(np.float64) - intercept) / slope)
    if padding is not None and padding_value is not None:
        stored[:, padding] = padding_value
    lo, hi = float(stored.min()), float(stored.max())
    if lo >= -32768 and hi <= 32767:
        return stored.astype(np.int16), 1
    if lo >= 0 and hi <= 65535:
        return stored.astype(np.uint16), 0
    raise InvalidVolumeError(
        f"stored values span {lo:.0f}..{hi:.0f}, outside both int16 and uint16; "
        f"choose another rescale_intercept/rescale_slope (now {intercept}/{slope})"
    )


# --------------------------------------------------------------------------- datasets
def _file_meta(sop_class: UID, sop_instance: UID) -> FileMetaDataset:
    meta = FileMetaDataset()
    meta.MediaStorageSOPClassUID = sop_class
    meta.MediaStorageSOPInstanceUID = sop_instance
    meta.TransferSyntaxUID = ExplicitVRLittleEndian
    meta.ImplementationClassUID = seeded_uid(["reconaudit implementation"])
    meta.ImplementationVersionName = "RECONAUDIT_01"
    return meta


def _fit(text: str, limit: int) -> str:
    """``text`` cut to the maximum length of its VR (LO 64, SH 16; DICOM PS3.5 6.2)."""
    return str(text)[:limit]


def _common_modules(ds: Dataset, p: dict[str, Any]) -> None:
    """Patient, study, series, frame of reference and equipment modules."""
    ds.SpecificCharacterSet = "ISO_IR 100"
    ds.PatientName = p["patient_name"]
    ds.PatientID = p["patient_id"]
    ds.PatientBirthDate = ""
    ds.PatientSex = ""
    ds.StudyInstanceUID = p["study_uid"]
    ds.StudyDate = DEMO_STUDY_DATE
    ds.StudyTime = DEMO_STUDY_TIME
    ds.ReferringPhysicianName = ""
    ds.StudyID = "1"
    ds.AccessionNumber = ""
    ds.Modality = "CT"
    ds.SeriesInstanceUID = p["series_uid"]
    ds.SeriesNumber = int(p["series_number"])
    ds.SeriesDescription = _fit(p["series_description"], 64)
    ds.PatientPosition = "HFS"
    ds.FrameOfReferenceUID = p["frame_uid"]
    ds.PositionReferenceIndicator = ""
    ds.Manufacturer = "reconaudit synthetic"
    ds.ManufacturerModelName = _fit(p["manufacturer_model_name"], 64)
    if p["institution_name"] is not None:
        ds.InstitutionName = _fit(p["institution_name"], 64)
    ds.ContentDate = DEMO_STUDY_DATE
    ds.ContentTime = DEMO_STUDY_TIME
    ds.AcquisitionNumber = 1
    ds.KVP = _ds(float(p["kvp"]))
    ds.ConvolutionKernel = _fit(p["convolution_kernel"], 16)


def _image_pixel_module(ds: Dataset, rows: int, cols: int, pixel_representation: int) -> None:
    ds.SamplesPerPixel = 1
    ds.PhotometricInterpretation = "MONOCHROME2"
    ds.Rows = rows
    ds.Columns = cols
    ds.BitsAllocated = 16
    ds.BitsStored = 16
    ds.HighBit = 15
    ds.PixelRepresentation = pixel_representation


def _padding_attribute(ds: Dataset, padding_value: int | None, pixel_representation: int) -> None:
    if padding_value is None:
        return
    ds.add_new(0x00280120, "SS" if pixel_representation else "US", int(padding_value))


def _params(volume: Volume, kwargs: dict[str, Any]) -> dict[str, Any]:
    seed = str(kwargs["uid_seed"])
    p = dict(kwargs)
    p["series_uid"] = seeded_uid([seed, "series"])
    p["study_uid"] = kwargs["study_uid"] or seeded_uid([seed, "study"])
    p["frame_uid"] = seeded_uid([seed, "frame-of-reference"])
    p["seed"] = seed
    return p


def _file_names(n: int, seed: str, shuffle: bool) -> list[str]:
    """File names in slice order; shuffled names sort in an order unrelated to position."""
    if not shuffle:
        return [f"slice_{i:05d}.dcm" for i in range(n)]
    digest = int(hashlib.sha256(seed.encode()).hexdigest()[:8], 16)
    order = np.random.default_rng(digest).permutation(n)
    return [f"obj_{int(k):05d}_{hashlib.sha1(f'{seed}{i}'.encode()).hexdigest()[:6]}.dcm" for i, k in enumerate(order)]


def _check_volume(volume: Volume, padding_value: int | None) -> None:
    if min(volume.shape) < 1:
        raise InvalidVolumeError(f"volume has an empty axis (shape {volume.shape})")
    if padding_value is not None and volume.padding_mask is not None:
        if volume.padding_mask.shape != volume.shape[1:]:
            raise InvalidVolumeError(
                f"padding_mask shape {volume.padding_mask.shape} does not match the slice shape {volume.shape[1:]}"
            )


# --------------------------------------------------------------------------- public
def write_ct_series(
    volume: Volume,
    folder: str | Path,
    *,
    series_description: str,
    convolution_kernel: str = "STANDARD",
    series_number: int = 1,
    uid_seed: str = "reconaudit-demo",
    study_uid: str | None = None,
    padding_value: int | None = None,
    rescale_intercept: float = -1024.0,
    rescale_slope: float = 1.0,
    patient_name: str = "DEMO^PHANTOM",
    patient_id: str = "DEMO-0001",
    manufacturer_model_name: str = "DEMO-SCANNER",
    kvp: float = 120.0,
    institution_name: str | None = None,
    shuffle_names: bool = False,
) -> list[Path]:
    """Write ``volume`` as one CT Image Storage file per slice.

    Parameters
    ----------
    volume : Volume
        HU volume; its affine gives ImagePositionPatient, ImageOrientationPatient and
        PixelSpacing. Slice ``k`` is written at ``affine @ (k, 0, 0, 1)``.
    folder : str or Path
        Created if needed.
    series_description, convolution_kernel, series_number, manufacturer_model_name, kvp,
    institution_name, patient_name, patient_id
        Written as the matching DICOM attributes (invented demo values by default).
    uid_seed : str
        Study, series, frame-of-reference and SOP instance UIDs are derived from it
        (``2.25.`` UIDs from a hash), so the same seed always gives the same UIDs.
    study_uid : str, optional
        StudyInstanceUID to use instead of the derived one (several series, one study).
    padding_value : int, optional
        Stored value for voxels in ``volume.padding_mask``; PixelPaddingValue is written
        when given.
    rescale_intercept, rescale_slope : float
        HU = stored * slope + intercept. Stored values are int16 when they fit, else uint16.
    shuffle_names : bool
        Give the files names whose alphabetical order is unrelated to slice order.

    Notes
    -----
    Texts longer than their VR allows are cut to fit (SeriesDescription,
    ManufacturerModelName, InstitutionName: LO, 64 characters; ConvolutionKernel: SH,
    16 characters), so every written file stays valid.

    Returns
    -------
    list of Path
        The written files, in slice order (index 0 first).

    Raises
    ------
    InvalidVolumeError
        NaN/Inf voxels, values that fit neither int16 nor uint16, a degenerate affine.

    References
    ----------
    DICOM PS3.3, A.3 (CT Image IOD), C.7.6.2 (Image Plane), C.7.6.3 (Image Pixel),
    C.8.2.1 (CT Image); PS3.5, 9.1 (UID encoding; ``2.25`` UUID-derived roots).
    """
    _check_volume(volume, padding_value)
    params = _params(volume, dict(locals(), uid_seed=uid_seed))
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    iop, pixel_spacing, step = plane_geometry(volume.affine)
    pad = volume.padding_mask if padding_value is not None else None
    stored, pixrep = _stored_values(volume.hu, rescale_slope, rescale_intercept, pad, padding_value)
    names = _file_names(volume.shape[0], params["seed"], shuffle_names)
    normal = np.cross(iop[:3], iop[3:])
    paths = []
    for k in range(volume.shape[0]):
        position = volume.affine[:3, 3] + k * step
        ds = _classic_slice(params, k, stored[k], pixrep, iop, pixel_spacing, position, normal, volume)
        path = folder / names[k]
        ds.save_as(path, enforce_file_format=True)
        paths.append(path)
    return paths


def _classic_slice(
    p: dict[str, Any],
    k: int,
    pixels: np.ndarray,
    pixrep: int,
    iop: list[float],
    pixel_spacing: list[float],
    position: np.ndarray,
    normal: np.ndarray,
    volume: Volume,
) -> Dataset:
    sop_uid = seeded_uid([p["seed"], "instance", str(k)])
    ds = Dataset()
    ds.file_meta = _file_meta(CT_IMAGE_STORAGE, sop_uid)
    ds.SOPClassUID = CT_IMAGE_STORAGE
    ds.SOPInstanceUID = sop_uid
    ds.ImageType = ["ORIGINAL", "PRIMARY", "AXIAL"]
    _common_modules(ds, p)
    ds.InstanceNumber = k + 1
    ds.ImagePositionPatient = [_ds(v) for v in position]
    ds.ImageOrientationPatient = [_ds(v) for v in iop]
    ds.SliceLocation = _ds(float(position @ normal))
    ds.SliceThickness = _ds(float(volume.spacing_mm[0]))
    ds.PixelSpacing = [_ds(v) for v in pixel_spacing]
    _image_pixel_module(ds, pixels.shape[0], pixels.shape[1], pixrep)
    ds.RescaleIntercept = _ds(float(p["rescale_intercept"]))
    ds.RescaleSlope = _ds(float(p["rescale_slope"]))
    ds.RescaleType = "HU"
    ds.WindowCenter = "40"
    ds.WindowWidth = "400"
    _padding_attribute(ds, p["padding_value"], pixrep)
    ds.PixelData = np.ascontiguousarray(pixels).astype("<" + pixels.dtype.str[1:]).tobytes()
    return ds


def write_enhanced_ct(
    volume: Volume,
    path: str | Path,
    *,
    series_description: str,
    convolution_kernel: str = "STANDARD",
    series_number: int = 1,
    uid_seed: str = "reconaudit-demo-enhanced",
    study_uid: str | None = None,
    padding_value: int | None = None,
    rescale_intercept: float = -1024.0,
    rescale_slope: float = 1.0,
    patient_name: str = "DEMO^PHANTOM",
    patient_id: str = "DEMO-0001",
    manufacturer_model_name: str = "DEMO-SCANNER",
    kvp: float = 120.0,
    institution_name: str | None = None,
    per_frame_rescale: bool = False,
) -> Path:
    """Write ``volume`` as one Enhanced CT Image Storage multi-frame file.

    Frame ``k`` holds slice ``k``. PlaneOrientationSequence and PixelMeasuresSequence go
    into the shared functional groups; PlanePositionSequence goes per frame, and the
    PixelValueTransformationSequence goes per frame when ``per_frame_rescale`` else
    shared. The other parameters are those of :func:`write_ct_series`.

    Returns
    -------
    Path
        The written file.

    References
    ----------
    DICOM PS3.3, A.38 (Enhanced CT Image IOD), C.7.6.16 (Multi-frame Functional Groups),
    C.7.6.16.2.3 (Plane Position), C.7.6.16.2.4 (Plane Orientation), C.7.6.16.2.1 (Pixel
    Measures), C.7.6.16.2.9 (Pixel Value Transformation).
    """
    _check_volume(volume, padding_value)
    kwargs = dict(locals(), uid_seed=uid_seed, shuffle_names=False)
    params = _params(volume, kwargs)
    iop, pixel_spacing, step = plane_geometry(volume.affine)
    pad = volume.padding_mask if padding_value is not None else None
    stored, pixrep = _stored_values(volume.hu, rescale_slope, rescale_intercept, pad, padding_value)
    sop_uid = seeded_uid([params["seed"], "enhanced-instance"])
    ds = Dataset()
    ds.file_meta = _file_meta(ENHANCED_CT_IMAGE_STORAGE, sop_uid)
    ds.SOPClassUID = ENHANCED_CT_IMAGE_STORAGE
    ds.SOPInstanceUID = sop_uid
    ds.ImageType = ["ORIGINAL", "PRIMARY", "VOLUME", "NONE"]
    _common_modules(ds, params)
    ds.InstanceNumber = 1
    ds.NumberOfFrames = volume.shape[0]
    _image_pixel_module(ds, volume.shape[1], volume.shape[2], pixrep)
    _padding_attribute(ds, padding_value, pixrep)
    ds.SharedFunctionalGroupsSequence = Sequence([_shared_groups(iop, pixel_spacing, volume, params, per_frame_rescale)])
    ds.PerFrameFunctionalGroupsSequence = Sequence(
        [_frame_groups(volume.affine[:3, 3] + k * step, params, per_frame_rescale) for k in range(volume.shape[0])]
    )
    ds.PixelData = np.ascontiguousarray(stored).astype("<" + stored.dtype.str[1:]).tobytes()
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    ds.save_as(path, enforce_file_format=True)
    return path


def _rescale_item(p: dict[str, Any]) -> Dataset:
    item = Dataset()
    item.RescaleIntercept = _ds(float(p["rescale_intercept"]))
    item.RescaleSlope = _ds(float(p["rescale_slope"]))
    item.RescaleType = "HU"
    return item


def _shared_groups(
    iop: list[float], pixel_spacing: list[float], volume: Volume, p: dict[str, Any], per_frame_rescale: bool
) -> Dataset:
    shared = Dataset()
    orientation = Dataset()
    orientation.ImageOrientationPatient = [_ds(v) for v in iop]
    shared.PlaneOrientationSequence = Sequence([orientation])
    measures = Dataset()
    measures.PixelSpacing = [_ds(v) for v in pixel_spacing]
    measures.SliceThickness = _ds(float(volume.spacing_mm[0]))
    shared.PixelMeasuresSequence = Sequence([measures])
    if not per_frame_rescale:
        shared.PixelValueTransformationSequence = Sequence([_rescale_item(p)])
    return shared


def _frame_groups(position: np.ndarray, p: dict[str, Any], per_frame_rescale: bool) -> Dataset:
    frame = Dataset()
    plane = Dataset()
    plane.ImagePositionPatient = [_ds(v) for v in position]
    frame.PlanePositionSequence = Sequence([plane])
    if per_frame_rescale:
        frame.PixelValueTransformationSequence = Sequence([_rescale_item(p)])
    return frame
