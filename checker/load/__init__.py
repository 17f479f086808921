"""Finding and loading CT series: DICOM (classic and Enhanced CT), NIfTI, MHA/MHD, NRRD, .npy.

:func:`discover` reads headers only and groups DICOM files into series (splitting a
SeriesInstanceUID that holds several stacks); :func:`load_series` reads one series into a
:class:`~reconaudit.checker.volume.Volume` in HU with its LPS geometry, refusing bad input
with the typed errors of :mod:`reconaudit.checker.errors`; :func:`load_path` loads
everything under a file or folder (for the viewer's reader).
"""
from __future__ import annotations

import warnings
from pathlib import Path

from ..errors import ReconauditError, UnreadableFileError
from ..volume import Volume
from ._dicom import check_decoder, load_dicom_series
from ._discover import discover
from ._images import load_image_file, load_numpy_file
from ._types import Discovery, FileProblem, SeriesSource

#: Default size limit: 4 GiB of float32.
DEFAULT_MAX_BYTES = 4 * 2**30

__all__ = [
    "discover",
    "load_series",
    "load_path",
    "Discovery",
    "SeriesSource",
    "FileProblem",
    "check_decoder",
    "DEFAULT_MAX_BYTES",
]


def load_series(src: SeriesSource, *, include_identifiers: bool = False, max_bytes: int = DEFAULT_MAX_BYTES) -> Volume:
    """Load one discovered series as a HU volume.

    Parameters
    ----------
    src : SeriesSource
        A series from :func:`discover`.
    include_identifiers : bool
        Keep patient identifiers in ``Volume.identifiers`` (DICOM only); off by default.
    max_bytes : int
        Refuse series whose declared float32 size exceeds this, before allocating.

    Returns
    -------
    Volume

    Raises
    ------
    ReconauditError
        A subclass naming the series or file and the problem.

    References
    ----------
    DICOM PS3.3 (CT Image and Enhanced CT Image IODs); SimpleITK documentation (LPS).
    """
    if src.kind == "dicom":
        return load_dicom_series(src, include_identifiers=include_identifiers, max_bytes=max_bytes)
    if src.kind == "image":
        vol = load_image_file(Path(src.files[0]), max_bytes=max_bytes)
    elif src.kind == "numpy":
        vol = load_numpy_file(Path(src.files[0]), max_bytes=max_bytes)
    else:
        raise UnreadableFileError(f"unknown series kind '{src.kind}'; expected dicom, image or numpy", source=src.source)
    vol.series_uid = src.series_uid
    return vol


def load_path(path: str | Path, *, include_identifiers: bool = False, max_bytes: int = DEFAULT_MAX_BYTES) -> list[Volume]:
    """Load every series under a file or folder.

    Series that fail are skipped with a warning naming the error, as long as at least
    one series loads; when none loads, the first error is raised.

    Returns
    -------
    list of Volume
        In discovery order (source, then key).

    Raises
    ------
    ReconauditError
        Nothing could be loaded (the first error, or UnreadableFileError when nothing
        that looks like a series was found).
    """
    found = discover([path])
    volumes: list[Volume] = []
    errors: list[ReconauditError] = [p.error for p in found.problems]
    for src in found.series:
        try:
            volumes.append(load_series(src, include_identifiers=include_identifiers, max_bytes=max_bytes))
        except ReconauditError as err:
            errors.append(err)
    if not volumes:
        if errors:
            raise errors[0]
        raise UnreadableFileError("no DICOM series or image file found", source=str(path))
    for err in errors:
        warnings.warn(f"reconaudit: skipped ({err.kind}): {err}", stacklevel=2)
    return volumes
