"""napari reader: CT series (DICOM folder or file, NIfTI, MHA/MHD, NRRD) -> Image layers in HU.

Every series found becomes one Image layer, placed in millimetres (see
:mod:`reconaudit.plugin._geometry`), windowed for soft tissue, with the safe metadata and
the :class:`~reconaudit.checker.volume.Volume` itself in ``layer.metadata`` so the panel
can analyse exactly what was loaded.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np

from reconaudit.checker.errors import ReconauditError, UnreadableFileError
from reconaudit.checker.volume import Volume

from ._geometry import layer_geometry
from ._presets import DEFAULT_PRESET, preset_limits

LayerData = tuple[Any, dict[str, Any], str]

#: Metadata key holding the Volume a layer shows.
VOLUME_KEY = "reconaudit_volume"
#: Metadata key holding the layer geometry record (scale, translate, world axes).
GEOMETRY_KEY = "reconaudit_geometry"

_IMAGE_SUFFIXES = (".nii", ".nii.gz", ".mha", ".mhd", ".nrrd", ".nhdr")
_DICOM_SUFFIXES = (".dcm", ".dicom", ".ima")


def looks_like_dicom(path: Path) -> bool:
    """True if ``path`` has a DICOM suffix or the 'DICM' marker after the 128-byte preamble.

    References
    ----------
    DICOM PS3.10 7.1 (DICOM File Meta Information: preamble and prefix).
    """
    if path.name.lower().endswith(_DICOM_SUFFIXES):
        return True
    try:
        with open(path, "rb") as fh:
            head = fh.read(132)
    except OSError:
        return False
    return len(head) == 132 and head[128:132] == b"DICM"


def is_readable_path(path: str | Path) -> bool:
    """Whether the reader claims ``path``: a folder, a DICOM file or a known volume file."""
    p = Path(path)
    if p.is_dir():
        return True
    name = p.name.lower()
    if name.endswith(_IMAGE_SUFFIXES):
        return True
    return p.is_file() and looks_like_dicom(p)


def layer_name(volume: Volume, index: int, count: int) -> str:
    """A short layer name: the series description (or file name), numbered when several."""
    desc = str(volume.metadata.get("series_description") or "").strip()
    if not desc:
        desc = Path(volume.source).name if volume.source else "CT series"
    number = volume.metadata.get("series_number")
    if number not in (None, ""):
        desc = f"{desc} (series {number})"
    return desc if count == 1 else f"{desc} [{index + 1}/{count}]"


def safe_metadata(volume: Volume) -> dict[str, Any]:
    """Only the safe header subset plus geometry; never patient identifiers."""
    meta = {k: v for k, v in volume.metadata.items()}
    meta.update(volume.geometry_record())
    meta["series_uid"] = volume.series_uid
    meta["notes"] = list(volume.notes)
    return meta


def volume_layer_data(volume: Volume, name: str | None = None) -> LayerData:
    """The napari LayerData tuple showing ``volume`` in HU, in mm, soft-tissue windowed.

    Parameters
    ----------
    volume : Volume
    name : str, optional
        Layer name; defaults to the series description.

    Returns
    -------
    (data, kwargs, "image")
    """
    geometry = layer_geometry(volume)
    metadata = safe_metadata(volume)
    metadata[VOLUME_KEY] = volume
    metadata[GEOMETRY_KEY] = geometry.to_json()
    kwargs = {
        "name": name or layer_name(volume, 0, 1),
        "scale": geometry.scale,
        "translate": geometry.translate,
        "contrast_limits": preset_limits(DEFAULT_PRESET),
        "colormap": "gray",
        "metadata": metadata,
    }
    return (volume.hu, kwargs, "image")


def _load(path: str) -> list[Volume]:
    from reconaudit.checker.load import load_path  # the loader engineer's entry point

    try:
        volumes = load_path(path)
    except ReconauditError:
        raise
    except Exception as exc:  # a loader bug must still name the file
        raise UnreadableFileError(f"could not be read as a CT series ({type(exc).__name__}: {exc})", source=str(path)) from exc
    if not volumes:
        raise UnreadableFileError("no CT series found (expected DICOM CT files, NIfTI, MHA or NRRD)", source=str(path))
    return list(volumes)


def read_ct(path: str | Sequence[str]) -> list[LayerData]:
    """Read every CT series under ``path`` (one path or several) into Image layers.

    Raises
    ------
    ReconauditError
        A typed error naming the file and the problem (napari shows it to the user).
    """
    paths = [path] if isinstance(path, (str, Path)) else list(path)
    volumes: list[Volume] = []
    for p in paths:
        volumes.extend(_load(str(p)))
    return [volume_layer_data(v, layer_name(v, i, len(volumes))) for i, v in enumerate(volumes)]


def napari_get_reader(path: str | Sequence[str]) -> Callable[[Any], list[LayerData]] | None:
    """npe2 reader hook: :func:`read_ct` if every path looks like a CT input, else None."""
    paths = [path] if isinstance(path, (str, Path)) else list(path)
    if not paths or not all(is_readable_path(p) for p in paths):
        return None
    return read_ct


def volume_from_layer(layer: Any, z_index: int | None = None) -> Volume:
    """The Volume behind an Image layer: the reader's own, or one built from the layer.

    A layer that did not come from the reconaudit reader is taken as HU with its scale as
    spacing (z, y, x) and its translate as the position of voxel [0, 0, 0] on an axial
    identity orientation; the volume's notes say so.

    Parameters
    ----------
    layer : napari Image layer
    z_index : int, optional
        For a layer not from the reader: build only this slice (a one-slice Volume placed
        at that slice), so a one-slice run neither reads a lazy (dask) array whole nor
        converts the whole array to float32. Ignored for the reader's layers, whose
        Volume is returned as it is (the caller takes a view of the slice).
    """
    vol = layer.metadata.get(VOLUME_KEY) if hasattr(layer, "metadata") else None
    if isinstance(vol, Volume):
        return vol
    data = layer.data
    if data.ndim == 2:
        data = data[None]
    if data.ndim != 3:
        from reconaudit.checker.errors import InvalidVolumeError

        raise InvalidVolumeError(
            f"expected a 2-D or 3-D grey image (z, y, x), got shape {data.shape}", source=str(layer.name)
        )
    scale = tuple(float(s) for s in layer.scale[-3:]) if len(layer.scale) >= 3 else (1.0, *map(float, layer.scale[-2:]))
    translate = tuple(float(t) for t in layer.translate[-3:]) if len(layer.translate) >= 3 else (0.0, *map(float, layer.translate[-2:]))
    notes = ["built from a napari layer: values taken as HU, axial orientation assumed"]
    if z_index is not None:
        if not 0 <= z_index < data.shape[0]:
            raise IndexError(f"slice {z_index} is outside the layer (0..{data.shape[0] - 1})")
        data = data[z_index : z_index + 1]
        translate = (translate[0] + z_index * scale[0], translate[1], translate[2])
        notes.append(f"one slice (index {z_index}) of the layer")
    hu = np.asarray(data).astype(np.float32, copy=False)
    origin = (translate[2], translate[1], translate[0])  # world (z, y, x) -> LPS (x, y, z)
    vol = Volume.from_array(hu, spacing_mm=scale, origin_mm=origin, source=str(layer.name))
    vol.notes.extend(notes)
    return vol
