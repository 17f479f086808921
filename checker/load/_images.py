"""NIfTI, MHA/MHD, NRRD (through SimpleITK) and .npy + JSON sidecar."""
from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np

from ..dicom_write import seeded_uid
from ..errors import InconsistentGeometryError, InvalidVolumeError, NotMonochromeError, TooLargeError, UnreadableFileError
from ..volume import Volume

__all__ = ["image_series_uid", "load_image_file", "load_numpy_file", "sitk_affine"]

ASSUMED_HU_NOTE = "non-DICOM image: values assumed to be HU (no rescale information in the file)"


def image_series_uid(path: Path) -> str:
    """A stable UID for a non-DICOM file, derived from its resolved path."""
    return str(seeded_uid(["reconaudit image file", str(Path(path).resolve())]))


def _size_guard(shape: tuple[int, ...], where: str, max_bytes: int) -> None:
    need = int(np.prod([int(n) for n in shape], dtype=np.float64)) * 4
    if need > max_bytes:
        raise TooLargeError(
            f"too large: declared size {' x '.join(str(int(n)) for n in shape)} needs {need / 2**30:.2f} GiB "
            f"as float32, limit {max_bytes / 2**30:.2f} GiB (max_bytes); nothing was read",
            source=where,
        )


def sitk_affine(origin: Any, spacing: Any, direction: Any) -> np.ndarray:
    """(z, y, x, 1) -> LPS affine from a 3-D SimpleITK image's origin, spacing, direction.

    SimpleITK maps index (i, j, k) = (x, y, z) to ``origin + D @ (spacing * ijk)`` in
    LPS, so the column for array axis z is ``D[:, 2] * spacing[2]``, and so on.

    References
    ----------
    SimpleITK documentation, "Fundamental Concepts: Images" (physical space, LPS).
    """
    d = np.asarray(direction, dtype=float).reshape(3, 3)
    s = np.asarray(spacing, dtype=float)
    a = np.eye(4)
    a[:3, 0] = d[:, 2] * s[2]
    a[:3, 1] = d[:, 1] * s[1]
    a[:3, 2] = d[:, 0] * s[0]
    a[:3, 3] = np.asarray(origin, dtype=float)
    return a


def _read_info(path: Path) -> Any:
    import SimpleITK as sitk

    reader = sitk.ImageFileReader()
    reader.SetFileName(str(path))
    try:
        reader.ReadImageInformation()
    except RuntimeError as exc:
        raise UnreadableFileError(f"cannot read image header ({str(exc).strip().splitlines()[-1]})", source=str(path)) from exc
    return reader


def load_image_file(path: Path, *, max_bytes: int) -> Volume:
    """Load a NIfTI, MHA/MHD or NRRD file as a HU volume in LPS.

    Raises
    ------
    UnreadableFileError, TooLargeError, NotMonochromeError, InvalidVolumeError

    References
    ----------
    SimpleITK documentation (ImageFileReader; LPS physical space).
    """
    import SimpleITK as sitk

    reader = _read_info(path)
    size, dim = reader.GetSize(), reader.GetDimension()
    if reader.GetNumberOfComponents() != 1:
        raise NotMonochromeError(f"not monochrome: {reader.GetNumberOfComponents()} components per voxel, expected 1", source=str(path))
    if dim not in (2, 3):
        raise InvalidVolumeError(f"image has {dim} dimensions, expected 2 or 3", source=str(path))
    _size_guard(tuple(size), str(path), max_bytes)
    try:
        image = reader.Execute()
    except RuntimeError as exc:
        raise UnreadableFileError(f"cannot read image data ({str(exc).strip().splitlines()[-1]})", source=str(path)) from exc
    if dim == 2:
        image = sitk.JoinSeries(image)
    arr = sitk.GetArrayFromImage(image).astype(np.float32, copy=False)
    nonfinite = _nifti_nonfinite_mask(path, arr.shape)
    if nonfinite is not None:
        arr[nonfinite] = np.nan  # SimpleITK reads NaN/Inf in NIfTI as 0, which would pass for water
    affine = sitk_affine(image.GetOrigin(), image.GetSpacing(), image.GetDirection())
    spacing = image.GetSpacing()
    return _finish(arr, affine, (spacing[2], spacing[1], spacing[0]), path)


_NIFTI_FLOAT_TYPES = {16: "f4", 64: "f8"}


def _nifti_nonfinite_mask(path: Path, shape: tuple[int, ...]) -> np.ndarray | None:
    """Voxels stored as NaN/Inf in a float NIfTI-1 file, or None (none, or not applicable).

    SimpleITK returns such voxels as 0; this reads the stored floats directly.

    References
    ----------
    NIfTI-1 data format (nifti1.h: sizeof_hdr 348, datatype 16/64, vox_offset).
    """
    name = path.name.lower()
    if not name.endswith((".nii", ".nii.gz")):
        return None
    import gzip

    opener = gzip.open if name.endswith(".gz") else open
    try:
        with opener(path, "rb") as fh:
            header = fh.read(348)
            if len(header) < 348:
                return None
            order = "<" if int.from_bytes(header[:4], "little") == 348 else ">"
            dtype = _NIFTI_FLOAT_TYPES.get(int(np.frombuffer(header[70:72], order + "i2")[0]))
            if dtype is None:
                return None
            offset = int(np.frombuffer(header[108:112], order + "f4")[0])
            fh.read(max(0, offset - 348))
            data = np.frombuffer(fh.read(int(np.prod(shape)) * np.dtype(dtype).itemsize), order + dtype)
    except (OSError, EOFError, ValueError):
        return None
    if data.size != int(np.prod(shape)):
        return None
    mask = ~np.isfinite(data)
    return mask.reshape(shape) if mask.any() else None


def _finish(arr: np.ndarray, affine: np.ndarray, spacing: Any, path: Path) -> Volume:
    if arr.size == 0:
        raise InvalidVolumeError(f"image is empty (shape {arr.shape})", source=str(path))
    finite = np.isfinite(arr)
    if not np.any(finite):
        raise InvalidVolumeError("image holds no finite value (every voxel NaN or Inf)", source=str(path))
    notes = [ASSUMED_HU_NOTE]
    if not finite.all():
        low = float(arr[finite].min())
        n_bad = int(arr.size - np.count_nonzero(finite))
        arr = arr if arr.flags.writeable else arr.copy()
        arr[~finite] = low
        notes.append(f"{n_bad} voxel(s) NaN or Inf in the file: set to {low:g} HU, the lowest finite value in "
                     "the volume; measurements touching them are suspect")
    return Volume(
        hu=arr,
        spacing_mm=tuple(float(s) for s in spacing),
        affine=affine,
        series_uid=image_series_uid(path),
        metadata={"modality": "CT", "series_description": path.name},
        notes=notes,
        source=str(path),
    )


def _sidecar(path: Path) -> dict[str, Any]:
    side = path.with_suffix(".json")
    if not side.is_file():
        raise InconsistentGeometryError(
            f"no spacing for a .npy volume: expected a sidecar {side.name} holding "
            '{"spacing_mm_zyx": [dz, dy, dx], "origin_mm": [x, y, z]}',
            source=str(path),
        )
    try:
        meta = json.loads(side.read_text())
    except (OSError, ValueError) as exc:
        raise UnreadableFileError(f"sidecar {side.name} is not valid JSON ({exc})", source=str(path)) from exc
    return meta if isinstance(meta, dict) else {}


def _sidecar_vector(meta: dict[str, Any], key: str, default: Any, path: Path) -> tuple[float, float, float]:
    value = meta.get(key, default)
    try:
        vec = tuple(float(v) for v in value)
    except (TypeError, ValueError):
        vec = ()
    if len(vec) != 3 or not all(np.isfinite(vec)):
        raise InconsistentGeometryError(f"sidecar key '{key}' must be 3 numbers, found {value!r}", source=str(path))
    return vec  # type: ignore[return-value]


def load_numpy_file(path: Path, *, max_bytes: int) -> Volume:
    """Load a ``.npy`` array [z, y, x] of HU with a ``name.json`` sidecar for spacing.

    The sidecar holds ``{"spacing_mm_zyx": [dz, dy, dx], "origin_mm": [x, y, z]}``
    (origin optional, default 0); the orientation is axial (+x index = L, +y = P, +z = S).

    Raises
    ------
    UnreadableFileError, TooLargeError, InconsistentGeometryError, InvalidVolumeError
    """
    meta = _sidecar(path)
    spacing = _sidecar_vector(meta, "spacing_mm_zyx", None, path)
    if min(spacing) <= 0:
        raise InconsistentGeometryError(f"sidecar spacing must be positive, found {list(spacing)}", source=str(path))
    origin = _sidecar_vector(meta, "origin_mm", (0.0, 0.0, 0.0), path)
    try:
        mm = np.load(path, mmap_mode="r", allow_pickle=False)
    except (OSError, ValueError) as exc:
        raise UnreadableFileError(f"cannot read .npy ({exc})", source=str(path)) from exc
    if mm.ndim == 2:
        mm = mm[None]
    if mm.ndim != 3 or not np.issubdtype(mm.dtype, np.number) or np.iscomplexobj(mm):
        raise InvalidVolumeError(f"expected a real 3-D array [z, y, x], found shape {mm.shape} dtype {mm.dtype}", source=str(path))
    _size_guard(mm.shape, str(path), max_bytes)
    vol = Volume.from_array(np.asarray(mm, dtype=np.float32), spacing_mm=spacing, origin_mm=origin)
    return _finish(vol.hu, vol.affine, spacing, path)
