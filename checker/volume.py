"""The in-memory CT volume every analysis works on."""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

#: Metadata keys that carry no patient identity and may appear in every output.
SAFE_METADATA_KEYS = (
    "modality",
    "convolution_kernel",
    "kvp",
    "slice_thickness_mm",
    "series_description",
    "manufacturer_model_name",
    "study_date",
    "series_number",
)

#: Keys that identify a patient; kept only when the caller asks for them.
IDENTIFIER_KEYS = ("patient_name", "patient_id", "patient_birth_date", "accession_number")


@dataclass
class Volume:
    """A CT volume in HU with its patient geometry.

    Parameters
    ----------
    hu : ndarray, float32, shape (z, y, x)
        CT numbers in HU (rescale slope/intercept applied).
    spacing_mm : tuple of float
        Voxel spacing (z, y, x) in mm; z from the slice positions, never SliceThickness.
    affine : ndarray, shape (4, 4)
        Maps homogeneous voxel indices (z, y, x, 1) to DICOM patient coordinates
        (LPS x, y, z in mm, 1). Columns 0..2 are the steps of one voxel along z, y, x.
    series_uid : str
        SeriesInstanceUID, or a stable generated identifier for non-DICOM files.
    metadata : dict
        The safe subset (``SAFE_METADATA_KEYS``); never patient identifiers.
    identifiers : dict
        Patient identifiers, filled only when the loader is asked for them.
    padding_mask : ndarray of bool (y, x) or None
        Pixels the scanner marked as padding (PixelPaddingValue) on every slice.
    notes : list of str
        What the loader did that a physicist should know (a tilt, a skipped file).
    source : str
        The folder or file the series was found in.
    """

    hu: np.ndarray
    spacing_mm: tuple[float, float, float]
    affine: np.ndarray
    series_uid: str = ""
    metadata: dict[str, Any] = field(default_factory=dict)
    identifiers: dict[str, Any] = field(default_factory=dict)
    padding_mask: np.ndarray | None = None
    notes: list[str] = field(default_factory=list)
    source: str = ""

    def __post_init__(self) -> None:
        if self.hu.ndim != 3:
            raise ValueError(f"Volume.hu must be 3-D (z, y, x), got shape {self.hu.shape}")
        if self.hu.dtype != np.float32:
            self.hu = self.hu.astype(np.float32)
        self.spacing_mm = tuple(float(s) for s in self.spacing_mm)  # type: ignore[assignment]
        self.affine = np.asarray(self.affine, dtype=float)

    # ----------------------------------------------------------------- geometry
    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(self.hu.shape)  # type: ignore[return-value]

    @property
    def origin_mm(self) -> np.ndarray:
        """LPS position (x, y, z) of voxel [0, 0, 0]."""
        return self.affine[:3, 3].copy()

    def index_to_patient(self, zyx: Any) -> np.ndarray:
        """Voxel index (z, y, x), fractional allowed, -> LPS (x, y, z) mm. Accepts (..., 3)."""
        zyx = np.asarray(zyx, dtype=float)
        return zyx @ self.affine[:3, :3].T + self.affine[:3, 3]

    def patient_to_index(self, lps: Any) -> np.ndarray:
        """LPS (x, y, z) mm -> fractional voxel index (z, y, x). Accepts (..., 3)."""
        lps = np.asarray(lps, dtype=float)
        inv = np.linalg.inv(self.affine[:3, :3])
        return (lps - self.affine[:3, 3]) @ inv.T

    @property
    def voxel_volume_mm3(self) -> float:
        return float(abs(np.linalg.det(self.affine[:3, :3])))

    def geometry_record(self) -> dict[str, Any]:
        return {
            "shape_zyx": [int(n) for n in self.shape],
            "spacing_mm_zyx": [round(float(s), 6) for s in self.spacing_mm],
            "origin_mm": [round(float(v), 4) for v in self.origin_mm],
        }

    @classmethod
    def from_array(
        cls,
        hu: np.ndarray,
        spacing_mm: tuple[float, float, float] = (1.0, 1.0, 1.0),
        origin_mm: tuple[float, float, float] = (0.0, 0.0, 0.0),
        **kwargs: Any,
    ) -> "Volume":
        """An axial volume with identity orientation: +x index = L, +y index = P, +z = S."""
        affine = axial_affine(spacing_mm, origin_mm)
        return cls(hu=np.asarray(hu, dtype=np.float32), spacing_mm=spacing_mm, affine=affine, **kwargs)


def axial_affine(
    spacing_mm: tuple[float, float, float], origin_mm: tuple[float, float, float]
) -> np.ndarray:
    """Affine of an axial stack with ImageOrientationPatient = [1,0,0,0,1,0]."""
    dz, dy, dx = spacing_mm
    a = np.eye(4)
    a[:3, 0] = (0.0, 0.0, dz)  # one step in z index -> +z (superior)
    a[:3, 1] = (0.0, dy, 0.0)  # one step in y index (row) -> +y (posterior)
    a[:3, 2] = (dx, 0.0, 0.0)  # one step in x index (column) -> +x (left)
    a[:3, 3] = origin_mm
    return a


def affine_from_sitk(origin, spacing, direction) -> np.ndarray:
    """(z,y,x,1) -> LPS affine from SimpleITK's origin, spacing (x,y,z) and direction.

    SimpleITK's direction is the row-major 3x3 matrix whose columns are the LPS unit
    vectors of the image's index axes i (x), j (y), k (z).
    """
    d = np.asarray(direction, dtype=float).reshape(3, 3)
    sx, sy, sz = (float(s) for s in spacing)
    a = np.eye(4)
    a[:3, 0] = d[:, 2] * sz
    a[:3, 1] = d[:, 1] * sy
    a[:3, 2] = d[:, 0] * sx
    a[:3, 3] = np.asarray(origin, dtype=float)
    return a


def to_sitk(volume: Volume, array: np.ndarray | None = None):
    """A SimpleITK image of ``volume`` (or of ``array`` on the volume's grid)."""
    import SimpleITK as sitk

    arr = volume.hu if array is None else array
    img = sitk.GetImageFromArray(np.ascontiguousarray(arr))
    steps = volume.affine[:3, :3]
    spacing = np.linalg.norm(steps, axis=0)  # z, y, x
    unit = steps / spacing
    direction = np.stack([unit[:, 2], unit[:, 1], unit[:, 0]], axis=1)  # columns i, j, k
    img.SetSpacing((float(spacing[2]), float(spacing[1]), float(spacing[0])))
    img.SetOrigin(tuple(float(v) for v in volume.affine[:3, 3]))
    img.SetDirection(tuple(float(v) for v in direction.ravel()))
    return img
