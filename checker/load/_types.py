"""Records produced by discovery: series found, files that could not be used."""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from ..errors import ReconauditError

__all__ = ["SeriesSource", "FileProblem", "Discovery"]


@dataclass
class SeriesSource:
    """One loadable series found by :func:`~reconaudit.checker.load.discover`.

    Attributes
    ----------
    key : str
        Stable identifier: the SeriesInstanceUID, with ``#n`` appended when one UID holds
        several stacks (n counts from 1 in a fixed order); the file path for image files.
    source : str
        The folder (DICOM) or file (images) where the series was found.
    series_uid : str
        SeriesInstanceUID, or a UID derived from the path for non-DICOM files.
    kind : str
        ``"dicom"``, ``"image"`` (NIfTI, MHA/MHD, NRRD) or ``"numpy"`` (.npy + .json).
    files : list of Path
        The files holding the series (sorted by name; slice order comes from positions).
    description : str
        SeriesDescription, or the file name for non-DICOM files.
    modality : str
        Modality as stated in the header ("CT", "MR", ...), "" when absent.
    notes : list of str
        What discovery did that matters (a split of a shared SeriesInstanceUID).
    """

    key: str
    source: str
    series_uid: str
    kind: str
    files: list[Path]
    description: str = ""
    modality: str = ""
    notes: list[str] = field(default_factory=list)

    @property
    def label(self) -> str:
        """How messages name this series."""
        desc = f" '{self.description}'" if self.description else ""
        return f"series {self.key}{desc} in {self.source}"


@dataclass
class FileProblem:
    """A file discovery could not use, with the typed error that says why."""

    path: str
    error: ReconauditError


@dataclass
class Discovery:
    """Everything :func:`~reconaudit.checker.load.discover` found."""

    series: list[SeriesSource] = field(default_factory=list)
    problems: list[FileProblem] = field(default_factory=list)

    def by_key(self, key: str) -> SeriesSource:
        for s in self.series:
            if s.key == key:
                return s
        raise KeyError(key)
