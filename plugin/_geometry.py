"""Where a Volume sits in napari's world: scale, translate and the world frame.

napari maps a layer's data index ``i`` (here [z, y, x]) to world coordinates by
``world = scale * i + translate``, axis by axis; it has no notion of patient axes. We
choose the world frame to be the patient space (DICOM LPS, mm) expressed along the
array's own axes: world axis ``k`` is the unit vector ``u_k`` of array axis ``k``
(column ``k`` of the affine, normalised) and a voxel's world coordinate on that axis is
the projection of its patient position onto ``u_k``. Then

- ``scale[k]`` is the voxel step along axis ``k`` (the spacing, always positive, so the
  image is displayed as stored: row 0 at the top, column 0 on the left);
- ``translate[k] = origin_mm . u_k``: the projection of voxel [0, 0, 0]'s position.

For the common axial stack (ImageOrientationPatient [1,0,0,0,1,0], slices sorted
inferior to superior) ``u_z, u_y, u_x`` are +S, +P, +L and the world coordinates are
exactly the LPS z, y and x in mm. When an axis is flipped (for example the column
direction points to the patient's right) the world coordinate on that axis is the
negated patient coordinate, which keeps the displayed orientation the scanner's; the
frame is recorded in the layer's metadata as signed axis names ("+S", "-L", ...). For
orthogonal directions the mapping is exact; a sheared stack (gantry tilt) is placed by
its array axes, which the frame note says.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from reconaudit.checker.volume import Volume

_PATIENT_AXIS_NAMES = (("L", "R"), ("P", "A"), ("S", "I"))  # LPS x, y, z: (+, -)


@dataclass(frozen=True)
class LayerGeometry:
    """The scale and translate every layer of one image shares (world units: mm)."""

    scale: tuple[float, float, float]
    translate: tuple[float, float, float]
    axes: tuple[str, str, str]
    orthogonal: bool

    def voxel_to_world(self, zyx_vox: np.ndarray) -> np.ndarray:
        """Voxel index (..., 3) -> world (..., 3) mm."""
        return np.asarray(zyx_vox, dtype=float) * np.array(self.scale) + np.array(self.translate)

    def world_to_voxel(self, world: np.ndarray) -> np.ndarray:
        """World (..., 3) mm -> fractional voxel index (..., 3)."""
        return (np.asarray(world, dtype=float) - np.array(self.translate)) / np.array(self.scale)

    def shifted(self, z_offset: int) -> "LayerGeometry":
        """The geometry of a sub-volume that starts at slice ``z_offset``."""
        t = list(self.translate)
        t[0] += z_offset * self.scale[0]
        return LayerGeometry(self.scale, (t[0], t[1], t[2]), self.axes, self.orthogonal)

    def to_json(self) -> dict:
        return {
            "scale_mm_zyx": list(self.scale),
            "translate_mm_zyx": list(self.translate),
            "world_axes_zyx": list(self.axes),
            "orthogonal": self.orthogonal,
        }


def signed_axis_name(unit: np.ndarray) -> str:
    """The patient direction ("+S", "-L", ...) an LPS unit vector mostly points along."""
    k = int(np.argmax(np.abs(unit)))
    positive = unit[k] >= 0
    letter = _PATIENT_AXIS_NAMES[k][0]
    return ("+" if positive else "-") + letter


def layer_geometry(volume: Volume) -> LayerGeometry:
    """Scale and translate (mm) placing ``volume`` in the world frame described above.

    Parameters
    ----------
    volume : Volume

    Returns
    -------
    LayerGeometry

    References
    ----------
    DICOM PS3.3 C.7.6.2.1.1 (Image Position and Orientation, patient LPS frame).
    """
    columns = np.asarray(volume.affine, dtype=float)[:3, :3]
    norms = np.linalg.norm(columns, axis=0)
    spacing = np.array(volume.spacing_mm, dtype=float)
    norms = np.where(norms > 0, norms, 1.0)
    units = columns / norms
    if not np.all(np.isfinite(units)) or np.any(np.linalg.norm(columns, axis=0) == 0):
        units = np.array([[0.0, 0.0, 1.0], [0.0, 1.0, 0.0], [1.0, 0.0, 0.0]]).T
    origin = np.asarray(volume.affine, dtype=float)[:3, 3]
    translate = units.T @ origin
    gram = units.T @ units
    orthogonal = bool(np.allclose(gram, np.eye(3), atol=1e-4))
    scale = np.where(spacing > 0, spacing, norms)
    axes = tuple(signed_axis_name(units[:, k]) for k in range(3))
    return LayerGeometry(
        scale=tuple(float(s) for s in scale),  # type: ignore[arg-type]
        translate=tuple(float(t) for t in translate),  # type: ignore[arg-type]
        axes=axes,  # type: ignore[arg-type]
        orthogonal=orthogonal,
    )
