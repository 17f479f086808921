"""Slice geometry: sort by position along the normal, validate spacing, build the affine."""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Sequence

import numpy as np

from ..errors import InconsistentGeometryError, MissingSlicesError

#: Two positions closer than this along the normal are the same position (mm).
DUPLICATE_TOL_MM = 0.01
#: A step larger than this multiple of the median step is a gap (missing slices).
GAP_FACTOR = 1.5
#: Steps may differ from the median by this much before spacing counts as non-uniform.
SPACING_TOL_MM = 0.01
SPACING_TOL_REL = 0.01
#: Positions may leave the fitted line by this much (mm) before the stack is not one stack.
LINE_TOL_MM = 0.05
#: A slice step further than this from the normal is reported as a tilt (degrees).
TILT_NOTE_DEG = 0.01
#: Direction cosines that differ by less than this are the same orientation.
ORIENTATION_TOL = 1e-4

__all__ = [
    "StackGeometry",
    "slice_normal",
    "orientation_groups",
    "stack_geometry",
    "remaining_positions_complete",
]


@dataclass
class StackGeometry:
    """Result of :func:`stack_geometry`: the slice order, spacing, affine and notes."""

    order: np.ndarray
    spacing_mm: tuple[float, float, float]
    affine: np.ndarray
    notes: list[str] = field(default_factory=list)


def slice_normal(iop: Sequence[float], label: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Row cosine, column cosine and slice normal (row x column) from ImageOrientationPatient.

    References
    ----------
    DICOM PS3.3, C.7.6.2.1.1: the normal of the image plane is the cross product of the
    row and column direction cosines.
    """
    v = np.asarray(iop, dtype=float)
    if v.shape != (6,) or not np.all(np.isfinite(v)):
        raise InconsistentGeometryError(f"ImageOrientationPatient must hold 6 numbers, found {list(iop)}", source=label)
    row, col = v[:3], v[3:]
    if abs(np.linalg.norm(row) - 1) > 1e-3 or abs(np.linalg.norm(col) - 1) > 1e-3 or abs(row @ col) > 1e-3:
        raise InconsistentGeometryError(
            f"ImageOrientationPatient {list(np.round(v, 6))} is not two orthogonal unit vectors", source=label
        )
    row, col = row / np.linalg.norm(row), col / np.linalg.norm(col)
    return row, col, np.cross(row, col)


def orientation_groups(iops: np.ndarray) -> list[np.ndarray]:
    """Indices of rows of ``iops`` (n, 6) grouped by equal orientation, in first-seen order."""
    groups: list[list[int]] = []
    refs: list[np.ndarray] = []
    for i, v in enumerate(np.asarray(iops, dtype=float)):
        for g, ref in enumerate(refs):
            if np.max(np.abs(v - ref)) < ORIENTATION_TOL:
                groups[g].append(i)
                break
        else:
            refs.append(v)
            groups.append([i])
    return [np.asarray(g) for g in groups]


def _check_duplicates(d_sorted: np.ndarray, names_sorted: Sequence[str], label: str) -> None:
    steps = np.diff(d_sorted)
    dup = np.flatnonzero(steps < DUPLICATE_TOL_MM)
    if dup.size:
        i = int(dup[0])
        raise InconsistentGeometryError(
            f"duplicate slice positions: {dup.size} pair(s) of slices share a position along the normal, "
            f"e.g. {names_sorted[i]} and {names_sorted[i + 1]} at {d_sorted[i]:.3f} mm; "
            "expected one slice per position",
            source=label,
        )


def _check_steps(steps: np.ndarray, d_sorted: np.ndarray, label: str) -> float:
    median = float(np.median(steps))
    gaps = np.flatnonzero(steps > GAP_FACTOR * median)
    if gaps.size:
        i = int(gaps[0])
        missing = int(round(steps[i] / median)) - 1
        raise MissingSlicesError(
            f"missing slices: gap of {steps[i]:.3f} mm between positions {d_sorted[i]:.3f} and "
            f"{d_sorted[i + 1]:.3f} mm along the normal, median spacing {median:.3f} mm "
            f"(about {max(missing, 1)} slice(s) missing; {gaps.size} gap(s) in all)",
            source=label,
        )
    tol = max(SPACING_TOL_MM, SPACING_TOL_REL * median)
    if np.max(np.abs(steps - median)) > tol:
        raise InconsistentGeometryError(
            f"non-uniform slice spacing: steps from {steps.min():.4f} to {steps.max():.4f} mm "
            f"(median {median:.4f} mm, tolerance {tol:.4f} mm); expected one spacing",
            source=label,
        )
    return median


def _line_step(p_sorted: np.ndarray, label: str) -> np.ndarray:
    n = len(p_sorted)
    step = (p_sorted[-1] - p_sorted[0]) / (n - 1)
    fitted = p_sorted[0] + np.arange(n)[:, None] * step
    off = float(np.max(np.linalg.norm(p_sorted - fitted, axis=1)))
    if off > LINE_TOL_MM:
        raise InconsistentGeometryError(
            f"slice positions do not lie on one line (a position is {off:.3f} mm off it, tolerance "
            f"{LINE_TOL_MM} mm): the files look like more than one stack",
            source=label,
        )
    return step


def _tilt_note(step: np.ndarray, normal: np.ndarray) -> str | None:
    cosang = abs(float(step @ normal)) / float(np.linalg.norm(step))
    angle = float(np.degrees(np.arccos(min(1.0, cosang))))
    if angle <= TILT_NOTE_DEG:
        return None
    return (
        f"gantry tilt: the slice step leaves the slice normal by {angle:.2f} deg; the volume is "
        "kept sheared (the affine maps each voxel to its true position), no resampling was done"
    )


def stack_geometry(
    positions: np.ndarray,
    iop: Sequence[float],
    pixel_spacing: Sequence[float],
    *,
    names: Sequence[str],
    label: str,
    single_slice_spacing: float | None = None,
) -> StackGeometry:
    """Sort slices along the normal, validate their spacing and build the volume affine.

    Parameters
    ----------
    positions : ndarray (n, 3)
        ImagePositionPatient of each slice (LPS mm).
    iop : sequence of 6 float
        ImageOrientationPatient shared by all slices.
    pixel_spacing : sequence of 2 float
        PixelSpacing [between rows, between columns] in mm.
    names : sequence of str
        A name per slice (file name, frame number) for messages.
    label : str
        How messages name the series.
    single_slice_spacing : float, optional
        z spacing for a one-slice series (SpacingBetweenSlices or SliceThickness).

    Returns
    -------
    StackGeometry
        ``order`` sorts the slices by position along the normal (never by file name or
        InstanceNumber); ``spacing_mm[0]`` is the distance between planes along the
        normal; affine column 0 is the mean step between consecutive positions.

    Raises
    ------
    InconsistentGeometryError
        Duplicate positions, non-uniform spacing, positions off one line.
    MissingSlicesError
        A step larger than 1.5 times the median step.

    References
    ----------
    DICOM PS3.3, C.7.6.2.1.1 (Image Position and Orientation); slice spacing from
    positions rather than SliceThickness: common practice, no source.
    """
    row, col, normal = slice_normal(iop, label)
    p = np.asarray(positions, dtype=float).reshape(-1, 3)
    d = p @ normal
    order = np.argsort(d, kind="stable")
    d_sorted, p_sorted = d[order], p[order]
    names_sorted = [names[i] for i in order]
    notes: list[str] = []
    if len(p) == 1:
        dz = single_slice_spacing if single_slice_spacing and single_slice_spacing > 0 else 1.0
        if not single_slice_spacing:
            notes.append("one slice without SliceThickness/SpacingBetweenSlices: z spacing set to 1 mm")
        step = normal * dz
    else:
        _check_duplicates(d_sorted, names_sorted, label)
        dz = _check_steps(np.diff(d_sorted), d_sorted, label)
        dz = float((d_sorted[-1] - d_sorted[0]) / (len(p) - 1))
        step = _line_step(p_sorted, label)
        note = _tilt_note(step, normal)
        if note:
            notes.append(note)
    affine = np.eye(4)
    affine[:3, 0] = step
    affine[:3, 1] = col * float(pixel_spacing[0])
    affine[:3, 2] = row * float(pixel_spacing[1])
    affine[:3, 3] = p_sorted[0]
    spacing = (float(dz), float(pixel_spacing[0]), float(pixel_spacing[1]))
    return StackGeometry(order=order, spacing_mm=spacing, affine=affine, notes=notes)


def remaining_positions_complete(positions: np.ndarray, iop: Sequence[float]) -> bool:
    """True when ``positions`` (n, 3) sorted along the normal show no gap and no duplicate."""
    _, _, normal = slice_normal(iop, "")
    d = np.sort(np.asarray(positions, dtype=float).reshape(-1, 3) @ normal)
    if len(d) < 2:
        return len(d) == 1
    steps = np.diff(d)
    return bool(steps.min() >= DUPLICATE_TOL_MM and steps.max() <= GAP_FACTOR * np.median(steps))
