"""Loading one DICOM CT series (classic single-frame or Enhanced CT multi-frame).

Plain files (single-frame CT Image, Explicit VR Little Endian, 16 bits allocated and
stored, every element of defined length or a followable sequence) are parsed by the
project's own element scan (:func:`~._quick.quick_dataset`, which reuses discovery's scan
of an unchanged file) into a :class:`~._quick.QuickHeader`: the values the loader needs
come straight from the raw bytes, no pydicom Dataset is built per file, and the pixels
are read straight from disk. Everything else is read by pydicom. The first quickly read
file of each series is read again by pydicom and must agree in every element, every
value the loader takes from the raw bytes and every stored value, else the whole series
is read by pydicom. The slices are cut into ``READ_THREADS`` consecutive runs, one per
thread, each read, rescaled into the float32 volume and checked for padding in one pass
per slice. The Volume is the same either way (same HU, geometry, notes and errors); only
the time differs.

Record values: none of this changes a value (the loader makes no method choice that
would).
"""
from __future__ import annotations

import functools
import math
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from pydicom.dataelem import RawDataElement
from pydicom.dataset import Dataset
from pydicom.uid import UID, ExplicitVRLittleEndian, ImplicitVRLittleEndian

from ..errors import (
    DecoderMissingError,
    InconsistentGeometryError,
    MissingSlicesError,
    NoPixelDataError,
    ReconauditError,
    TooLargeError,
    UnreadableFileError,
)
from ..identifiers import identifier_words, withhold_words
from ..volume import Volume
from ._geometry import (
    StackGeometry,
    orientation_groups,
    remaining_positions_complete,
    stack_geometry,
)
from ._headers import (
    MULTIFRAME_CT_SOP_CLASSES,
    as_float,
    as_floats,
    check_has_pixels,
    check_is_ct,
    check_monochrome,
    quick_get,
    read_dataset,
)
from ._quick import QuickHeader, quick_dataset, quick_pixels_of, read_quick_pixels
from ._types import SeriesSource

#: Packages that bring a decoder, by transfer syntax (pip names).
DECODER_PACKAGES = {
    "1.2.840.10008.1.2.4.50": "pylibjpeg and pylibjpeg-libjpeg",
    "1.2.840.10008.1.2.4.51": "pylibjpeg and pylibjpeg-libjpeg",
    "1.2.840.10008.1.2.4.57": "pylibjpeg and pylibjpeg-libjpeg",
    "1.2.840.10008.1.2.4.70": "pylibjpeg and pylibjpeg-libjpeg",
    "1.2.840.10008.1.2.4.80": "pylibjpeg and pylibjpeg-libjpeg (or pyjpegls)",
    "1.2.840.10008.1.2.4.81": "pylibjpeg and pylibjpeg-libjpeg (or pyjpegls)",
    "1.2.840.10008.1.2.4.90": "pylibjpeg and pylibjpeg-openjpeg",
    "1.2.840.10008.1.2.4.91": "pylibjpeg and pylibjpeg-openjpeg",
    "1.2.840.10008.1.2.4.201": "pylibjpeg and pylibjpeg-openjpeg",
    "1.2.840.10008.1.2.4.202": "pylibjpeg and pylibjpeg-openjpeg",
    "1.2.840.10008.1.2.4.203": "pylibjpeg and pylibjpeg-openjpeg",
    "1.2.840.10008.1.2.5": "pylibjpeg and pylibjpeg-rle (pydicom's own RLE decoder needs numpy only)",
}
NATIVE_SYNTAXES = frozenset({ImplicitVRLittleEndian, ExplicitVRLittleEndian, "1.2.840.10008.1.2.2", "1.2.840.10008.1.2.1.99"})

__all__ = ["load_dicom_series", "check_decoder", "DECODER_PACKAGES"]


@dataclass
class _Frame:
    """One 2-D image: a classic file, or one frame of a multi-frame file."""

    ds_index: int
    frame: int
    name: str
    position: np.ndarray | None
    iop: np.ndarray | None
    pixel_spacing: np.ndarray | None
    slope: float
    intercept: float
    rescale_found: bool
    thickness: float | None


# --------------------------------------------------------------------------- frames
def _rescale(item: Any) -> tuple[float, float, bool]:
    slope, intercept = as_float(item.get("RescaleSlope")), as_float(item.get("RescaleIntercept"))
    if slope is None or intercept is None:
        return 1.0, 0.0, False
    return slope, intercept, True


def _decimal_strings(ds: Dataset, name: str) -> Any:
    """A DS/IS value as a list of text numbers straight from the raw bytes, else pydicom's value.

    Decimal and integer strings are ASCII text in every transfer syntax (DICOM PS3.5,
    6.2), so an unconverted element is split here instead of being converted by pydicom.
    """
    if isinstance(ds, QuickHeader):
        raw = ds.raw(name)
        if raw is None:
            return None
        vr, value = raw
    else:
        elem = ds.get_item(name)
        if elem is None:
            return None
        if not (isinstance(elem, RawDataElement) and isinstance(elem.value, bytes)):
            return ds.get(name)
        vr, value = (elem.VR or "DS").encode("ascii"), elem.value
    if vr in (b"DS", b"IS"):
        try:
            parts = [v.strip(" \x00") for v in value.decode("ascii").split("\\")]
        except UnicodeDecodeError:
            return ds.get(name)
        return None if parts == [""] else parts
    return ds.get(name)


def _classic_frame(ds: Dataset, i: int, path: Path) -> _Frame:
    slope = as_float(_decimal_strings(ds, "RescaleSlope"))
    intercept = as_float(_decimal_strings(ds, "RescaleIntercept"))
    found = slope is not None and intercept is not None
    if not found:
        slope, intercept = 1.0, 0.0
    return _Frame(
        i, 0, path.name,
        as_floats(_decimal_strings(ds, "ImagePositionPatient"), 3),
        as_floats(_decimal_strings(ds, "ImageOrientationPatient"), 6),
        as_floats(_decimal_strings(ds, "PixelSpacing"), 2),
        slope, intercept, found,
        as_float(_decimal_strings(ds, "SpacingBetweenSlices")) or as_float(_decimal_strings(ds, "SliceThickness")),
    )


def _group_item(groups: Any, name: str) -> Any:
    """First item of functional-group sequence ``name`` in ``groups``, or None."""
    if groups is None or name not in groups or not groups[name].value:
        return None
    return groups[name].value[0]


def _find_group(per_frame: Any, shared: Any, name: str) -> Any:
    item = _group_item(per_frame, name)
    return item if item is not None else _group_item(shared, name)


def _multiframe_frames(ds: Dataset, i: int, path: Path) -> list[_Frame]:
    n = int(ds.get("NumberOfFrames", 1) or 1)
    shared_seq = ds.get("SharedFunctionalGroupsSequence")
    shared = shared_seq[0] if shared_seq else None
    per_frame_seq = ds.get("PerFrameFunctionalGroupsSequence") or []
    if len(per_frame_seq) not in (0, n):
        raise InconsistentGeometryError(
            f"PerFrameFunctionalGroupsSequence has {len(per_frame_seq)} items, NumberOfFrames is {n}", source=str(path)
        )
    frames = []
    for f in range(n):
        pf = per_frame_seq[f] if per_frame_seq else None
        pos = _find_group(pf, shared, "PlanePositionSequence")
        ori = _find_group(pf, shared, "PlaneOrientationSequence")
        meas = _find_group(pf, shared, "PixelMeasuresSequence")
        trans = _find_group(pf, shared, "PixelValueTransformationSequence")
        slope, intercept, found = _rescale(trans if trans is not None else ds)
        frames.append(_Frame(
            i, f, f"{path.name} frame {f + 1}",
            as_floats(pos.get("ImagePositionPatient"), 3) if pos is not None else None,
            as_floats(ori.get("ImageOrientationPatient"), 6) if ori is not None else None,
            as_floats(meas.get("PixelSpacing"), 2) if meas is not None else None,
            slope, intercept, found,
            (as_float(meas.get("SpacingBetweenSlices")) or as_float(meas.get("SliceThickness"))) if meas is not None else None,
        ))
    return frames


def _number_of_frames(ds: Dataset | QuickHeader) -> int:
    """NumberOfFrames, 1 when absent (read from the raw bytes when it is absent there)."""
    return int(quick_get(ds, "NumberOfFrames", 1) or 1)


def _frames_of(ds: Dataset, i: int, path: Path) -> list[_Frame]:
    if str(quick_get(ds, "SOPClassUID", "")) in MULTIFRAME_CT_SOP_CLASSES or _number_of_frames(ds) > 1:
        return _multiframe_frames(ds, i, path)
    return [_classic_frame(ds, i, path)]


# --------------------------------------------------------------------------- checks
def _declared_bytes(ds: Dataset) -> int:
    rows, cols = int(quick_get(ds, "Rows", 0) or 0), int(quick_get(ds, "Columns", 0) or 0)
    return rows * cols * _number_of_frames(ds) * 4


def _check_size(total: int, where: str, max_bytes: int, what: str) -> None:
    if total > max_bytes:
        raise TooLargeError(
            f"too large: {what} declare(s) {total / 2**30:.2f} GiB as float32 (Rows x Columns x frames x 4), "
            f"limit {max_bytes / 2**30:.2f} GiB (max_bytes); nothing was allocated",
            source=where,
        )


def _check_rows_columns(datasets: list[tuple[Path, Dataset]], label: str) -> tuple[int, int]:
    sizes: dict[tuple[int, int], str] = {}
    for path, ds in datasets:
        sizes.setdefault((int(quick_get(ds, "Rows", 0) or 0), int(quick_get(ds, "Columns", 0) or 0)), path.name)
    if len(sizes) > 1:
        found = ", ".join(f"{r}x{c} in {name}" for (r, c), name in sizes.items())
        raise InconsistentGeometryError(f"inconsistent Rows/Columns: {found}; expected one image size", source=label)
    (rows, cols), name = next(iter(sizes.items()))
    if rows < 1 or cols < 1:
        raise InconsistentGeometryError(f"Rows/Columns {rows}x{cols} in {name}; expected positive sizes", source=label)
    return rows, cols


def _check_orientation(frames: list[_Frame], label: str) -> np.ndarray:
    missing = [f.name for f in frames if f.iop is None or f.position is None]
    if missing:
        if len(frames) == 1:
            return np.array([1.0, 0, 0, 0, 1, 0])
        raise InconsistentGeometryError(
            f"ImagePositionPatient/ImageOrientationPatient missing in {len(missing)} of {len(frames)} slices "
            f"(e.g. {missing[0]}): cannot order the slices", source=label,
        )
    groups = orientation_groups(np.array([f.iop for f in frames]))
    if len(groups) > 1:
        found = "; ".join(f"{np.round(frames[g[0]].iop, 4).tolist()} in {len(g)} slice(s) (e.g. {frames[g[0]].name})" for g in groups)
        raise InconsistentGeometryError(f"mixed orientation: ImageOrientationPatient differs: {found}; expected one", source=label)
    return frames[0].iop


def _check_pixel_spacing(frames: list[_Frame], label: str) -> np.ndarray:
    missing = [f.name for f in frames if f.pixel_spacing is None]
    if missing:
        raise InconsistentGeometryError(f"PixelSpacing missing or malformed in {missing[0]} ({len(missing)} slice(s)); expected 2 positive numbers", source=label)
    ps = np.array([f.pixel_spacing for f in frames])
    if np.any(ps <= 0):
        raise InconsistentGeometryError(f"PixelSpacing must be positive, found {ps[np.any(ps <= 0, axis=1)][0].tolist()}", source=label)
    if np.max(np.abs(ps - ps[0])) > 1e-4:
        raise InconsistentGeometryError(
            f"PixelSpacing differs between slices: {ps.min(axis=0).tolist()} to {ps.max(axis=0).tolist()} mm; expected one", source=label
        )
    return ps[0]


def check_decoder(transfer_syntax: str, where: str) -> None:
    """Raise DecoderMissingError when no installed decoder handles ``transfer_syntax``.

    References
    ----------
    pydicom documentation, "Pixel data decoding" (``pydicom.pixels.get_decoder``).
    """
    ts = UID(transfer_syntax)
    if ts in NATIVE_SYNTAXES or (ts.is_transfer_syntax and not ts.is_compressed):
        return
    from pydicom.pixels import get_decoder

    try:
        decoder = get_decoder(ts)
    except (NotImplementedError, ValueError) as exc:
        raise DecoderMissingError(
            f"compressed pixel data in transfer syntax {ts.name} ({ts}): the installed pydicom has no decoder "
            "for it; a newer pydicom or a decoder plugin is needed", source=where,
        ) from exc
    if not decoder.is_available:
        package = DECODER_PACKAGES.get(str(ts), "a pydicom decoder plugin (pylibjpeg with its plugins, or gdcm)")
        raise DecoderMissingError(
            f"compressed pixel data in transfer syntax {ts.name} ({ts}) and no decoder installed: "
            f"install {package} (pip install {package.split(' (')[0].replace(' and ', ' ')})", source=where,
        )


def _transfer_syntax(ds: Dataset) -> str:
    if isinstance(ds, QuickHeader):
        return ExplicitVRLittleEndian  # quick_dataset accepts nothing else
    meta = getattr(ds, "file_meta", None)
    ts = meta.get("TransferSyntaxUID") if meta is not None else None
    return str(ts) if ts else ImplicitVRLittleEndian


# --------------------------------------------------------------------------- pixels
def _stored_frames(ds: Dataset, path: Path, scratch: np.ndarray | None = None) -> np.ndarray:
    """Stored values (frames, rows, cols) of one file; UnreadableFileError if damaged.

    The pixels of a quickly read file are read into ``scratch`` when it fits (the
    returned array is then a view of it)."""
    rows, cols = int(quick_get(ds, "Rows")), int(quick_get(ds, "Columns"))
    where = quick_pixels_of(ds)
    if where is not None:  # a plain native file from quick_dataset: pixels read straight from disk
        stored = read_quick_pixels(path, where) if scratch is None else read_quick_pixels(path, where, scratch)
        return stored.reshape(1, rows, cols)
    frames = _number_of_frames(ds)
    try:
        if _transfer_syntax(ds) in (ImplicitVRLittleEndian, ExplicitVRLittleEndian) and int(quick_get(ds, "BitsAllocated")) == 16 \
                and int(quick_get(ds, "BitsStored", 16)) == 16 and "PixelData" in ds:
            raw = ds.PixelData
            need = rows * cols * frames
            if len(raw) < 2 * need:
                raise UnreadableFileError(f"truncated pixel data: {len(raw)} bytes, expected {2 * need}", source=str(path))
            dtype = "<i2" if int(quick_get(ds, "PixelRepresentation", 0)) else "<u2"
            return np.frombuffer(raw, dtype=dtype, count=need).reshape(frames, rows, cols)
        return np.asarray(ds.pixel_array).reshape(frames, rows, cols)
    except ReconauditError:
        raise
    except Exception as exc:
        raise UnreadableFileError(f"cannot decode pixel data ({type(exc).__name__}: {exc})", source=str(path)) from exc


def _padding_range(ds: Dataset) -> tuple[float, float] | None:
    if "PixelPaddingValue" not in ds:
        return None
    padding = quick_get(ds, "PixelPaddingValue")
    value = int(padding if not isinstance(padding, bytes) else 0)
    bits = int(quick_get(ds, "BitsAllocated", 16) or 16)
    if int(quick_get(ds, "PixelRepresentation", 0)) and value >= 2 ** (bits - 1):
        value -= 2**bits  # read as unsigned though the storage is signed
    limit = quick_get(ds, "PixelPaddingRangeLimit")
    if limit is None:
        return float(value), float(value)
    lim = int(limit)
    if int(quick_get(ds, "PixelRepresentation", 0)) and lim >= 2 ** (bits - 1):
        lim -= 2**bits
    return float(min(value, lim)), float(max(value, lim))


def _same_mask(a: np.ndarray | None, b: np.ndarray | None) -> bool:
    if a is None or b is None:
        return a is None and b is None
    return bool(np.array_equal(a, b))


def _padding_mask(stored: np.ndarray, pad: tuple[float, float]) -> np.ndarray | None:
    """Pixels of ``stored`` whose stored value lies in ``pad`` (DICOM PS3.3 C.7.5.1.1.2).

    Integer pixels are compared in their own type (no float64 temporary); a padding range
    outside the type's range marks nothing (None).
    """
    lo, hi = pad
    if not np.issubdtype(stored.dtype, np.integer):
        return (stored == lo) if lo == hi else (stored >= lo) & (stored <= hi)
    low, high = _integer_range(stored.dtype)
    first, last = max(math.ceil(lo), low), min(math.floor(hi), high)
    if first > last:
        return None
    kind = stored.dtype.type
    if first == last:
        return stored == kind(first)
    return (stored >= kind(first)) & (stored <= kind(last))


@functools.cache
def _integer_range(dtype: np.dtype) -> tuple[int, int]:
    info = np.iinfo(dtype)
    return int(info.min), int(info.max)


class _PaddingTracker:
    """Keeps the padding mask while slices are filled; tells whether it is the same everywhere."""

    def __init__(self) -> None:
        self.mask: np.ndarray | None = None  # None: no padded pixel
        self.same = True
        self.count = 0
        self.hu_values: set[float] = set()
        self._mask_bytes: bytes | None = None  # the first mask's bytes, for a quick comparison

    def _same_as_first(self, mask: np.ndarray | None) -> bool:
        """Whether ``mask`` marks exactly the (non-empty) first mask's pixels."""
        return (mask is not None and self._mask_bytes is not None and mask.shape == self.mask.shape
                and mask.dtype == self.mask.dtype and mask.tobytes() == self._mask_bytes)

    def add(self, stored: np.ndarray, pad: tuple[float, float] | None, slope: float, intercept: float) -> None:
        mask = None if pad is None else _padding_mask(stored, pad)
        same_as_first = self.count > 0 and self._same_as_first(mask)
        if mask is not None and (same_as_first or mask.any()):
            self.hu_values.add(round(pad[0] * slope + intercept, 3))
        else:
            mask = None
        if self.count == 0:
            self.mask = mask
            self._mask_bytes = None if mask is None else mask.tobytes()
        elif self.same and not same_as_first and not _same_mask(mask, self.mask):
            self.same = False
        self.count += 1

    def result(self) -> tuple[np.ndarray | None, str | None]:
        if not self.hu_values:
            return None, None
        hu = ", ".join(f"{v:g}" for v in sorted(self.hu_values))
        if not self.same:
            return None, f"PixelPaddingValue marks different pixels on different slices: no common padding mask; padded voxels hold {hu} HU"
        return self.mask.copy(), f"padding: {int(self.mask.sum())} pixels per slice marked by PixelPaddingValue hold {hu} HU"


# --------------------------------------------------------------------------- series
def _read_all(src: SeriesSource) -> tuple[list[tuple[Path, Dataset]], list[tuple[Path, ReconauditError]]]:
    """Every file's dataset: plain native CT files from the quick header parse (pixels
    left on disk), everything else read whole by pydicom; see :func:`_checked_quick`."""
    good, bad = [], []
    for path in (p if isinstance(p, Path) else Path(p) for p in src.files):
        try:
            ds = quick_dataset(path)
            good.append((path, ds if ds is not None else read_dataset(path)))
        except ReconauditError as err:
            bad.append((path, err))
    return _checked_quick(good), bad


def _same_elements(quick: Dataset, full: Dataset) -> bool:
    """Whether two readings of one file hold the same elements with the same values
    (pixel data compared as stored values)."""
    if set(quick.keys()) != set(full.keys()):
        return False
    for tag in full.keys():
        if tag == 0x7FE00010:
            continue
        if quick[tag].VR != full[tag].VR or quick[tag].value != full[tag].value:
            return False
    return True


#: Values the loader takes from the raw bytes of a quickly read file (:func:`quick_get`).
QUICK_VALUES = ("Rows", "Columns", "BitsAllocated", "BitsStored", "PixelRepresentation", "SamplesPerPixel",
                "PhotometricInterpretation", "Modality", "SOPClassUID", "NumberOfFrames", "PixelPaddingValue",
                "PixelPaddingRangeLimit")


def _same_frame(a: _Frame, b: _Frame) -> bool:
    def same(x, y):
        return (x is None and y is None) or (x is not None and y is not None and np.array_equal(x, y))

    return (same(a.position, b.position) and same(a.iop, b.iop) and same(a.pixel_spacing, b.pixel_spacing)
            and (a.slope, a.intercept, a.rescale_found, a.thickness) == (b.slope, b.intercept, b.rescale_found, b.thickness))


def _same_loader_values(quick: QuickHeader, full: Dataset, path: Path) -> bool:
    """Whether the values the loader reads from the raw bytes of ``quick`` (codes, sizes,
    padding, geometry, rescale) equal pydicom's values of the same file (False when
    either reading cannot be converted)."""
    try:
        return _loader_values_agree(quick, full, path)
    except (TypeError, ValueError, KeyError, AttributeError, IndexError):
        return False


def _loader_values_agree(quick: QuickHeader, full: Dataset, path: Path) -> bool:
    if any(quick_get(quick, n) != quick_get(full, n) or (n in quick) != (n in full) for n in QUICK_VALUES):
        return False
    if _padding_range(quick) != _padding_range(full) or (("PixelData" in quick) != ("PixelData" in full)):
        return False
    return _same_frame(_classic_frame(quick, 0, path), _classic_frame(full, 0, path))


def _checked_quick(datasets: list[tuple[Path, Dataset]]) -> list[tuple[Path, Dataset]]:
    """Cross-check the quick parse against pydicom once per series.

    The first quickly read file is read again by pydicom: its elements and its stored
    pixel values must be the same. When they differ, every quickly read file is read by
    pydicom instead.
    """
    quick = [i for i, (_, ds) in enumerate(datasets) if quick_pixels_of(ds) is not None]
    if not quick:
        return datasets
    path, ds = datasets[quick[0]]
    try:
        full = read_dataset(path)
        stored = _stored_frames(ds, path)
        agree = (_same_loader_values(ds, full, path) and _same_elements(ds, full)
                 and np.array_equal(stored, _stored_frames(full, path)))
    except ReconauditError:
        agree = False
    if agree:
        return datasets
    out = list(datasets)
    for i in quick:
        try:
            out[i] = (out[i][0], read_dataset(out[i][0]))
        except ReconauditError:
            pass  # kept as read; its pixels raise when read
    return out


def _validate_objects(datasets: list[tuple[Path, Dataset]], bad: list, label: str, notes: list[str]) -> list[tuple[Path, Dataset]]:
    for path, ds in datasets:
        where = f"{label}, file {path.name}"
        check_is_ct(ds, where)
        note = check_monochrome(ds, where)
        if note and note not in notes:
            notes.append(note)
    with_pixels = [(p, ds) for p, ds in datasets if _has_pixels(ds)]
    if not with_pixels:
        check_has_pixels(datasets[0][1], f"{label}, file {datasets[0][0].name}")
    for p, ds in datasets:
        if not _has_pixels(ds):
            bad.append((p, NoPixelDataError("no pixel data: the object has no PixelData element", source=str(p))))
    return with_pixels


def _has_pixels(ds: Dataset) -> bool:
    return any(k in ds for k in ("PixelData", "FloatPixelData", "DoubleFloatPixelData"))


def _geometry(frames: list[_Frame], bad: list, label: str) -> StackGeometry:
    iop = _check_orientation(frames, label)
    ps = _check_pixel_spacing(frames, label)
    positions = np.array([f.position if f.position is not None else np.zeros(3) for f in frames])
    try:
        return stack_geometry(positions, iop, ps, names=[f.name for f in frames], label=label, single_slice_spacing=frames[0].thickness)
    except MissingSlicesError as err:
        if bad:
            raise UnreadableFileError(
                f"{len(bad)} file(s) could not be used ({bad[0][0].name}: {bad[0][1]}) and the rest is not complete "
                f"without them: {err}", source=label,
            ) from err
        raise


def load_dicom_series(src: SeriesSource, *, include_identifiers: bool = False, max_bytes: int = 4 * 2**30) -> Volume:
    """Load a DICOM CT series as a HU volume sorted along the slice normal.

    Parameters
    ----------
    src : SeriesSource
        From :func:`~reconaudit.checker.load.discover` (or built by hand).
    include_identifiers : bool
        Fill ``Volume.identifiers`` with patient name, ID, birth date and accession number.
    max_bytes : int
        Refuse a series whose declared Rows x Columns x frames x 4 bytes exceed this,
        before anything is allocated.

    Returns
    -------
    Volume

    Raises
    ------
    NotCTError, NotMonochromeError, NoPixelDataError, InconsistentGeometryError,
    MissingSlicesError, UnreadableFileError, DecoderMissingError, TooLargeError

    References
    ----------
    DICOM PS3.3, A.3 (CT Image IOD), A.38 (Enhanced CT Image IOD), C.7.6.2 (Image Plane),
    C.7.6.3 (Image Pixel; PixelPaddingValue), C.11.1 (Modality LUT: RescaleSlope and
    RescaleIntercept give HU).
    """
    label = src.label
    datasets, bad = _read_all(src)
    if not datasets:
        raise UnreadableFileError(f"none of the {len(bad)} file(s) could be read; first: {bad[0][1]}" if bad else "no files", source=label)
    for path, ds in datasets:
        if _declared_bytes(ds) > max_bytes:
            _check_size(_declared_bytes(ds), f"{label}, file {path.name}", max_bytes, f"Rows {ds.get('Rows')} x Columns {ds.get('Columns')} x {ds.get('NumberOfFrames', 1)} frame(s)")
    notes = list(src.notes)
    datasets = _validate_objects(datasets, bad, label, notes)
    rows, cols = _check_rows_columns(datasets, label)
    frames = [f for i, (p, ds) in enumerate(datasets) for f in _frames_of(ds, i, p)]
    _check_size(rows * cols * len(frames) * 4, label, max_bytes, f"{len(frames)} slices of {rows} x {cols}")
    geometry = _geometry(frames, bad, label)
    for ts in sorted({_transfer_syntax(ds) for _, ds in datasets}):
        check_decoder(ts, label)
    hu, failed, padding = _fill(datasets, frames, geometry, rows, cols)
    if failed:
        hu, geometry = _drop_failed(hu, frames, geometry, failed, label)
        bad.extend(failed.values())
    notes.extend(_notes(frames, datasets, geometry, bad, padding))
    first = datasets[frames[geometry.order[0]].ds_index][1]
    return Volume(
        hu=hu, spacing_mm=geometry.spacing_mm, affine=geometry.affine, series_uid=src.series_uid,
        metadata=_metadata(first, frames[geometry.order[0]], withhold=not include_identifiers),
        identifiers=_identifiers(first) if include_identifiers else {},
        padding_mask=padding[0], notes=notes, source=src.source,
    )


def _rescale_into(stored: np.ndarray, slope: float, intercept: float, out: np.ndarray) -> None:
    """out = stored * slope + intercept in float32 (DICOM PS3.3 C.11.1.1.2).

    Integers of up to 16 bits are exact in float32: they are copied into ``out`` and
    rescaled there (the same float32 arithmetic as a mixed-type ufunc, in fewer steps).
    """
    if stored.dtype.kind in "iu" and stored.dtype.itemsize <= 2:
        out[...] = stored
        if slope != 1.0:
            out *= np.float32(slope)
        out += np.float32(intercept)
        return
    if slope == 1.0:
        np.add(stored, np.float32(intercept), out=out, casting="unsafe")
    else:
        np.multiply(stored, np.float32(slope), out=out, casting="unsafe")
        out += np.float32(intercept)


#: Threads reading and rescaling files (file reads and numpy release the interpreter lock).
READ_THREADS = 2


def _new_volume_array(shape: tuple[int, int, int]) -> np.ndarray:
    """An uninitialised float32 array for the volume."""
    return np.empty(shape, dtype=np.float32)


def _chunks(items: list, n: int) -> list[list]:
    """``items`` cut into at most ``n`` consecutive runs of near-equal length."""
    n = max(1, min(n, len(items)))
    bounds = [round(k * len(items) / n) for k in range(n + 1)]
    return [items[bounds[k]:bounds[k + 1]] for k in range(n)]


def _merged(trackers: list[_PaddingTracker]) -> _PaddingTracker:
    """One tracker for consecutive runs of slices tracked separately (in slice order)."""
    total = _PaddingTracker()
    for t in trackers:
        if t.count == 0:
            continue
        if total.count == 0:
            total.mask, total.same, total._mask_bytes = t.mask, t.same, t._mask_bytes
        else:
            total.same = total.same and t.same and _same_mask(t.mask, total.mask)
        total.count += t.count
        total.hu_values |= t.hu_values
    return total


def _fill(datasets, frames, geometry, rows, cols):
    """Read, rescale and check the padding of every slice, straight into the float32 volume.

    The files are taken in slice order and cut into ``READ_THREADS`` consecutive runs,
    one per thread; each thread reads a file's stored values (into one reused buffer for
    quickly read files), rescales them into their place in the volume and compares them
    with the padding value in the stored integer type. File reads and numpy release the
    interpreter lock, so the threads overlap.
    """
    out_index = np.empty(len(frames), dtype=int)
    out_index[geometry.order] = np.arange(len(frames))
    by_ds: dict[int, list[int]] = {}
    for j, f in enumerate(frames):
        by_ds.setdefault(f.ds_index, []).append(j)
    hu = _new_volume_array((len(frames), rows, cols))

    def fill_run(run: list[int]) -> tuple[_PaddingTracker, dict[int, tuple[Path, ReconauditError]]]:
        pad, failed, scratch = _PaddingTracker(), {}, None
        for ds_index in run:
            path, ds = datasets[ds_index]
            try:
                stored = _stored_frames(ds, path, scratch)
            except ReconauditError as err:
                for j in by_ds[ds_index]:
                    failed[int(out_index[j])] = (path, err)
                continue
            if quick_pixels_of(ds) is not None:
                scratch = stored
            pad_range = _padding_range(ds)
            for j in by_ds[ds_index]:
                f = frames[j]
                _rescale_into(stored[f.frame], f.slope, f.intercept, hu[int(out_index[j])])
                pad.add(stored[f.frame], pad_range, f.slope, f.intercept)
        return pad, failed

    order = sorted(by_ds, key=lambda i: min(out_index[j] for j in by_ds[i]))
    runs = _chunks(order, READ_THREADS)
    if len(runs) == 1:
        results = [fill_run(runs[0])]
    else:
        with ThreadPoolExecutor(max_workers=len(runs)) as pool:
            results = list(pool.map(fill_run, runs))
    failed: dict[int, tuple[Path, ReconauditError]] = {}
    for _, f in results:
        failed.update(f)
    return hu, failed, _merged([pad for pad, _ in results]).result()


def _drop_failed(hu, frames, geometry, failed, label):
    keep = np.array([k for k in range(hu.shape[0]) if k not in failed])
    positions = np.array([frames[j].position for j in geometry.order])
    iop = frames[0].iop
    names = ", ".join(sorted({p.name for p, _ in failed.values()}))
    if keep.size == 0 or not remaining_positions_complete(positions[keep], iop):
        first = next(iter(failed.values()))
        raise UnreadableFileError(
            f"unreadable pixel data in {names} ({first[1]}); the series is not complete without them", source=label
        )
    kept_order = geometry.order[keep]
    new = stack_geometry(
        positions[keep], iop, [geometry.spacing_mm[1], geometry.spacing_mm[2]],
        names=[frames[j].name for j in kept_order], label=label, single_slice_spacing=geometry.spacing_mm[0],
    )
    new.order = kept_order[new.order]
    return np.ascontiguousarray(hu[keep]), new


def _notes(frames, datasets, geometry, bad, padding) -> list[str]:
    notes = list(geometry.notes)
    for path, err in bad:
        notes.append(f"file {path.name} left out ({err.kind}: {err}); the remaining slices form a complete series")
    if not all(f.rescale_found for f in frames):
        n = sum(not f.rescale_found for f in frames)
        notes.append(f"RescaleSlope/RescaleIntercept missing in {n} slice(s): slope 1, intercept 0 used (stored values taken as HU)")
    tilt = as_float(_decimal_strings(datasets[0][1], "GantryDetectorTilt"), 0.0)
    if tilt and not any(n.startswith("gantry tilt") for n in notes):
        notes.append(f"GantryDetectorTilt is {tilt:g} deg in the header; the slice positions show no shear")
    if padding[1]:
        notes.append(padding[1])
    return notes


def _text(ds: Dataset, name: str) -> str | None:
    value = ds.get(name)
    if value is None or value == "":
        return None
    if isinstance(value, (list, tuple)) or type(value).__name__ == "MultiValue":
        return "\\".join(str(v) for v in value)
    return str(value)


def _metadata(ds: Dataset, frame: _Frame, *, withhold: bool = True) -> dict[str, Any]:
    """Series facts for records and reports; free text cleared of the patient's name and ID
    unless identifiers were asked for (see :mod:`reconaudit.checker.identifiers`)."""
    words = identifier_words(_text(ds, "PatientName"), _text(ds, "PatientID")) if withhold else []
    thickness = as_float(ds.get("SliceThickness"))
    if thickness is None and frame.thickness is not None:
        thickness = frame.thickness
    number = as_float(ds.get("SeriesNumber"))
    return {
        "modality": _text(ds, "Modality"),
        "convolution_kernel": _text(ds, "ConvolutionKernel"),
        "kvp": as_float(ds.get("KVP")),
        "slice_thickness_mm": thickness,
        "series_description": withhold_words(_text(ds, "SeriesDescription"), words),
        "manufacturer_model_name": _text(ds, "ManufacturerModelName"),
        "study_date": _text(ds, "StudyDate"),
        "series_number": int(number) if number is not None else None,
    }


def _identifiers(ds: Dataset) -> dict[str, Any]:
    return {
        "patient_name": _text(ds, "PatientName"),
        "patient_id": _text(ds, "PatientID"),
        "patient_birth_date": _text(ds, "PatientBirthDate"),
        "accession_number": _text(ds, "AccessionNumber"),
    }
