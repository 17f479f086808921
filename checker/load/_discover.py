"""Finding series in folders and files from headers only."""
from __future__ import annotations

import os
import stat
from collections import defaultdict
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from ..errors import ReconauditError, UnreadableFileError
from ..identifiers import identifier_words, withhold_words
from ._geometry import DUPLICATE_TOL_MM, LINE_TOL_MM, orientation_groups
from ._headers import as_floats, header_facts, read_header, scan_header
from ._images import image_series_uid
from ._types import Discovery, FileProblem, SeriesSource

IMAGE_SUFFIXES = (".nii.gz", ".nii", ".mha", ".mhd", ".nrrd", ".nhdr")
NUMPY_SUFFIX = ".npy"
#: Files that are never series of their own (sidecars, data parts of .mhd/.nhdr, documents).
IGNORED_SUFFIXES = (
    ".json", ".raw", ".zraw", ".txt", ".md", ".csv", ".html", ".htm", ".xml", ".log", ".png",
    ".jpg", ".jpeg", ".pdf", ".toml", ".yaml", ".yml", ".py", ".db", ".sqlite", ".gz",
)
IGNORED_NAMES = frozenset({"DICOMDIR"})
#: Header attributes tried, in order, to separate stacks that share one SeriesInstanceUID.
STACK_ATTRIBUTES = ("AcquisitionNumber", "TemporalPositionIdentifier", "ConvolutionKernel", "ImageType", "AcquisitionTime")

__all__ = ["discover", "file_kind"]


def file_kind(path: Path) -> str | None:
    """"image", "numpy", "dicom" (a candidate) or None (ignored) from the file name."""
    name = path.name.lower()
    if name.startswith(".") or path.name in IGNORED_NAMES:
        return None
    if name.endswith(IMAGE_SUFFIXES):
        return "image"
    if name.endswith(NUMPY_SUFFIX):
        return "numpy"
    if name.endswith(IGNORED_SUFFIXES):
        return None
    return "dicom"


def _walk(inputs: Sequence[str | Path], problems: list[FileProblem]) -> list[Path]:
    files: list[Path] = []
    for item in inputs:
        path = Path(item)
        if path.is_dir():
            for root, dirs, names in os.walk(path):
                dirs.sort()
                files.extend(Path(root) / n for n in sorted(names))
        elif path.is_file():
            files.append(path)
        else:
            problems.append(FileProblem(str(path), UnreadableFileError("no such file or folder", source=str(path))))
    return files


def _not_regular_file(path: Path) -> UnreadableFileError | None:
    """Why ``path`` cannot be opened safely as a file, or None when it can.

    A named pipe, socket or device named like an image would block or misbehave when
    opened, and a symlink loop cannot be resolved: both are refused before any open.
    """
    try:
        mode = os.stat(path).st_mode
    except OSError as exc:
        return UnreadableFileError(f"cannot stat the file ({exc.strerror or exc}); expected a readable file", source=str(path))
    if not stat.S_ISREG(mode):
        what = "a named pipe (FIFO)" if stat.S_ISFIFO(mode) else "a socket" if stat.S_ISSOCK(mode) else "a device or other special file"
        return UnreadableFileError(f"not a regular file: {what}; expected a file (not opened)", source=str(path))
    return None


# --------------------------------------------------------------------------- stacks
class _Header:
    """The discovery facts of one DICOM file (``ds``: keyword -> text, see scan_header)."""

    __slots__ = ("path", "ds", "iop", "ipp", "scanned")

    def __init__(self, path: Path, ds: dict[str, Any], scanned: bool = False):
        self.path = path
        self.ds = ds
        self.scanned = scanned
        self.iop = as_floats(ds.get("ImageOrientationPatient"), 6)
        self.ipp = as_floats(ds.get("ImagePositionPatient"), 3)


def _is_clean_stack(headers: list[_Header]) -> bool:
    """One orientation, positions on one line, no position twice."""
    if len(headers) < 2:
        return True
    iop = headers[0].iop
    normal = np.cross(iop[:3], iop[3:])
    p = np.array([h.ipp for h in headers])
    order = np.argsort(p @ normal)
    p = p[order]
    d = p @ normal
    if np.min(np.diff(d)) < DUPLICATE_TOL_MM:
        return False
    step = (p[-1] - p[0]) / (len(p) - 1)
    fitted = p[0] + np.arange(len(p))[:, None] * step
    return bool(np.max(np.linalg.norm(p - fitted, axis=1)) <= LINE_TOL_MM)


def _partition_by_attribute(headers: list[_Header]) -> list[list[_Header]] | None:
    for attr in STACK_ATTRIBUTES:
        groups: dict[str, list[_Header]] = defaultdict(list)
        for h in headers:
            groups[str(h.ds.get(attr, ""))].append(h)
        if len(groups) > 1 and all(_is_clean_stack(g) for g in groups.values()):
            return [groups[k] for k in sorted(groups)]
    return None


def _partition_by_plane_offset(headers: list[_Header]) -> list[list[_Header]] | None:
    """Stacks side by side: group by the in-plane part of the position."""
    iop = headers[0].iop
    basis = np.array([iop[:3], iop[3:]])
    offsets = np.array([basis @ h.ipp for h in headers])
    groups: list[list[_Header]] = []
    refs: list[np.ndarray] = []
    for h, off in zip(headers, offsets):
        for g, ref in enumerate(refs):
            if np.max(np.abs(off - ref)) <= LINE_TOL_MM * 10:
                groups[g].append(h)
                break
        else:
            refs.append(off)
            groups.append([h])
    if len(groups) > 1 and all(len(g) > 1 and _is_clean_stack(g) for g in groups):
        return groups
    return None


def _split_stacks(headers: list[_Header]) -> tuple[list[list[_Header]], str]:
    """Split one SeriesInstanceUID into stacks where the split is unambiguous."""
    located = [h for h in headers if h.iop is not None and h.ipp is not None]
    if len(located) != len(headers) or len(headers) < 2:
        return [headers], ""
    by_orientation = [[located[i] for i in g] for g in orientation_groups(np.array([h.iop for h in located]))]
    stacks: list[list[_Header]] = []
    reasons = ["different ImageOrientationPatient"] if len(by_orientation) > 1 else []
    for group in by_orientation:
        if _is_clean_stack(group):
            stacks.append(group)
            continue
        parts = _partition_by_attribute(group)
        reason = "repeated positions told apart by a header attribute"
        if parts is None:
            parts, reason = _partition_by_plane_offset(group), "positions on separate lines"
        if parts is None:
            stacks.append(group)  # ambiguous: load_series reports what is wrong
            continue
        stacks.extend(parts)
        reasons.append(reason)
    return stacks, "; ".join(reasons)


def _stack_sort_key(stack: list[_Header]) -> tuple:
    iop = tuple(np.round(stack[0].iop, 4)) if stack[0].iop is not None else ()
    d = min(float(h.ipp @ np.cross(h.iop[:3], h.iop[3:])) for h in stack) if stack[0].iop is not None else 0.0
    return (iop, round(d, 3), str(stack[0].path))


def _common_source(paths: list[Path]) -> str:
    parents = {str(p.parent) for p in paths}
    if len(parents) == 1:
        return parents.pop()
    return os.path.commonpath(list(parents))


def _dicom_series(uid: str, headers: list[_Header]) -> list[SeriesSource]:
    stacks, reason = _split_stacks(sorted(headers, key=lambda h: str(h.path)))
    first = headers[0].ds
    words = identifier_words(first.get("PatientName"), first.get("PatientID"))
    description = withhold_words(str(first.get("SeriesDescription", "") or ""), words)
    modality = str(first.get("Modality", "") or "")
    if len(stacks) == 1:
        files = sorted(h.path for h in stacks[0])
        return [SeriesSource(uid, _common_source(files), uid, "dicom", files, description, modality)]
    out = []
    for i, stack in enumerate(sorted(stacks, key=_stack_sort_key), start=1):
        files = sorted(h.path for h in stack)
        note = f"SeriesInstanceUID {uid} holds {len(stacks)} stacks ({reason}); this is stack {i}"
        out.append(SeriesSource(f"{uid}#{i}", _common_source(files), uid, "dicom", files, description, modality, [note]))
    return out


def _image_source(path: Path, kind: str) -> SeriesSource:
    uid = image_series_uid(path)
    note = "non-DICOM image: values assumed to be HU"
    return SeriesSource(str(path), str(path), uid, kind, [path], path.name, "CT", [note])


def discover(inputs: Sequence[str | Path]) -> Discovery:
    """Find every series under the given files and folders, reading headers only.

    DICOM files are grouped by SeriesInstanceUID; a UID shared by several stacks
    (different ImageOrientationPatient, positions on separate lines, or repeated
    positions told apart by AcquisitionNumber and similar attributes) is split into one
    :class:`SeriesSource` per stack. NIfTI, MHA/MHD, NRRD and ``.npy`` files are one
    series each. Pixel data are never read.

    Parameters
    ----------
    inputs : sequence of str or Path
        Files and folders; folders are walked recursively in name order.

    Returns
    -------
    Discovery
        ``series`` sorted by source then key; ``problems`` lists the files that could
        not be used, each with a typed error.

    References
    ----------
    DICOM PS3.3, C.7.3.1 (General Series: SeriesInstanceUID), C.7.6.2 (Image Plane).
    """
    problems: list[FileProblem] = []
    by_uid: dict[str, list[_Header]] = defaultdict(list)
    series: list[SeriesSource] = []
    for path in _walk(inputs, problems):
        kind = file_kind(path)
        if kind is not None and (err := _not_regular_file(path)) is not None:
            problems.append(FileProblem(str(path), err))
            continue
        if kind in ("image", "numpy"):
            series.append(_image_source(path, kind))
        elif kind == "dicom":
            _collect_header(path, by_uid, problems)
    for uid, headers in by_uid.items():
        series.extend(_dicom_series(uid, _checked_scan(headers)))
    series.sort(key=lambda s: (s.source, s.key))
    return Discovery(series=series, problems=problems)


def _collect_header(path: Path, by_uid: dict[str, list[_Header]], problems: list[FileProblem]) -> None:
    ds = scan_header(path)
    scanned = ds is not None
    if ds is None:
        try:
            ds = header_facts(read_header(path))
        except ReconauditError as err:
            problems.append(FileProblem(str(path), err))
            return
    if "DirectoryRecordSequence" in ds:
        return  # a DICOMDIR index under another name
    uid = str(ds.get("SeriesInstanceUID", "") or "")
    if not uid:
        problems.append(FileProblem(str(path), UnreadableFileError("DICOM file without SeriesInstanceUID", source=str(path))))
        return
    by_uid[uid].append(_Header(path, ds, scanned))


def _checked_scan(headers: list[_Header]) -> list[_Header]:
    """Cross-check the quick header scan against pydicom once per series.

    The first quickly scanned file of the series is read again with pydicom; when the
    facts differ, every quickly scanned file of the series is read with pydicom instead.
    """
    scanned = [h for h in headers if h.scanned]
    if not scanned:
        return headers
    try:
        if header_facts(read_header(scanned[0].path)) == scanned[0].ds:
            return headers
    except ReconauditError:
        pass
    out = []
    for h in headers:
        try:
            out.append(_Header(h.path, header_facts(read_header(h.path))) if h.scanned else h)
        except ReconauditError:
            out.append(h)
    return out
