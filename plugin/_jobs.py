"""The work the panel hands to a thread worker: generators that yield progress.

No Qt here, so the jobs can be tested and timed on their own. Each job yields
``(stage, fraction)`` and returns its outcome; the GUI thread only shows the outcome.
"""
from __future__ import annotations

import hashlib
import threading
from collections import OrderedDict
from dataclasses import dataclass, field
from typing import Any, Generator, Iterable

import numpy as np

from reconaudit.checker.pipeline import Cancelled, SeriesAnalysis, analyse_volume
from reconaudit.checker.regions import Regions
from reconaudit.checker.volume import Volume

from ._geometry import LayerGeometry
from ._layers import ResultView, result_view

Progress = tuple[str, float]


@dataclass
class RunOutcome:
    """What one run measured, and the context needed to re-measure a ROI or an edge."""

    source: str
    volume: Volume  # the volume analysed (the full one, or a one-slice volume)
    z_offset: int  # slice of the full volume that is slice 0 of ``volume``
    geometry: LayerGeometry  # geometry of the full volume's image layer
    analysis: SeriesAnalysis
    settings: dict[str, dict[str, Any]] = field(default_factory=dict)
    views: dict[str, ResultView] = field(default_factory=dict)


def slice_volume(volume: Volume, z_index: int) -> Volume:
    """A one-slice Volume of slice ``z_index`` whose geometry is that slice's own.

    The affine's translation moves to the slice's position, so patient coordinates stay
    right; overlays computed on it carry z = 0 and are shifted back by ``z_index``.
    """
    nz = volume.shape[0]
    if not 0 <= z_index < nz:
        raise IndexError(f"slice {z_index} is outside the volume (0..{nz - 1})")
    affine = volume.affine.copy()
    affine[:3, 3] = volume.affine[:3, 3] + z_index * volume.affine[:3, 0]
    return Volume(
        hu=volume.hu[z_index : z_index + 1],
        spacing_mm=volume.spacing_mm,
        affine=affine,
        series_uid=volume.series_uid,
        metadata=dict(volume.metadata),
        padding_mask=volume.padding_mask,
        notes=list(volume.notes) + [f"one slice (index {z_index}) of the loaded volume"],
        source=volume.source,
    )


def volume_fingerprint(volume: Volume) -> tuple:
    """What the regions of ``volume`` depend on: its voxels (a BLAKE2 digest), grid and padding.

    Digesting is cheap next to finding the regions (about 1 ms for a 512 x 512 slice) and
    catches edits of the layer's data (painting), which an object id would not.

    References
    ----------
    RFC 7693 (BLAKE2 cryptographic hash).
    """
    digest = hashlib.blake2b(digest_size=16)
    digest.update(memoryview(np.ascontiguousarray(volume.hu)).cast("B"))
    if volume.padding_mask is not None:
        digest.update(np.packbits(volume.padding_mask).tobytes())
    return (volume.shape, tuple(volume.spacing_mm), np.round(volume.affine, 6).tobytes(), digest.hexdigest())


class RegionsCache:
    """The regions of the last few analysed volumes, so a re-run does not find them again.

    Keys are :func:`volume_fingerprint` values; a changed voxel, grid or padding mask
    misses. Holds at most ``size`` entries and ``max_bytes`` of masks (least recently
    used dropped first; the newest entry is always kept).
    """

    def __init__(self, size: int = 4, max_bytes: int = 400 * 2**20) -> None:
        self.size = int(size)
        self.max_bytes = int(max_bytes)
        self._items: OrderedDict[tuple, Regions] = OrderedDict()
        self.hits = 0
        self.misses = 0

    def get(self, key: tuple) -> Regions | None:
        found = self._items.get(key)
        if found is None:
            self.misses += 1
            return None
        self._items.move_to_end(key)
        self.hits += 1
        return found

    def put(self, key: tuple, regions: Regions) -> None:
        self._items[key] = regions
        self._items.move_to_end(key)
        while len(self._items) > 1 and (len(self._items) > self.size or self.nbytes > self.max_bytes):
            self._items.popitem(last=False)

    @property
    def nbytes(self) -> int:
        """Bytes held by the cached masks."""
        return sum(int(getattr(r, k).nbytes) for r in self._items.values() for k in ("fov", "body", "table", "air"))

    def clear(self) -> None:
        self._items.clear()


def run_checks(
    volume: Volume,
    names: Iterable[str],
    settings: dict[str, dict[str, Any]],
    geometry: LayerGeometry,
    source: str,
    *,
    z_index: int | None = None,
    regions: Regions | None = None,
    regions_cache: RegionsCache | None = None,
    z_offset: int | None = None,
    stop: threading.Event | None = None,
) -> Generator[Progress, None, RunOutcome]:
    """Analyse ``volume`` (or its slice ``z_index``) one analysis at a time, yielding progress.

    Parameters
    ----------
    volume : Volume
        The full volume of the image layer.
    names : iterable of str
        Analyses to run (names from ``reconaudit.checker.analyses.available()``).
    settings : dict
        Per-analysis settings overriding each module's DEFAULTS.
    geometry : LayerGeometry
        The image layer's geometry; overlay layers get the same.
    source : str
        Image layer name, used to name the overlay layers.
    z_index : int, optional
        Analyse only this slice (a one-slice Volume; overlays land on this slice).
    regions : Regions, optional
        Regions of the analysed volume from an earlier run (re-measuring a ROI).
    regions_cache : RegionsCache, optional
        Looked up (by the analysed voxels' fingerprint) before finding the regions, and
        filled after; an unchanged volume or slice does not have its regions found twice.
    z_offset : int, optional
        ``volume`` is already a slab of the image starting at this slice (a one-slice
        volume built from a layer without copying the rest); ``z_index`` must be None.
    stop : threading.Event, optional
        Set it to cancel; checked between stages and inside the pipeline.

    Raises
    ------
    reconaudit.checker.pipeline.Cancelled
        When ``stop`` is set.
    """
    names = list(names)
    stop = stop or threading.Event()
    if z_offset is not None and z_index is not None:
        raise ValueError("give z_index (slice of the full volume) or z_offset (volume is a slab), not both")
    target = volume if z_index is None else slice_volume(volume, z_index)
    z_offset = int(z_offset or 0) if z_index is None else int(z_index)
    steps = len(names) + 2
    yield ("regions", 0.0)
    key = volume_fingerprint(target) if regions is None and regions_cache is not None else None
    if key is not None:
        regions = regions_cache.get(key)
    first = analyse_volume(target, analyses=[], regions=regions, cancel=stop.is_set)
    if key is not None and regions is None:
        regions_cache.put(key, first.regions)
    outcome = RunOutcome(source, target, z_offset, geometry, first, settings={k: dict(v) for k, v in settings.items()})
    for i, name in enumerate(names, start=1):
        yield (name, i / steps)
        if stop.is_set():
            raise Cancelled("analysis cancelled")
        part = analyse_volume(
            target, analyses=[name], settings={name: settings[name]} if name in settings else None,
            regions=first.regions, cancel=stop.is_set,
        )
        outcome.analysis.results.update(part.results)
        outcome.analysis.errors.update(part.errors)
    yield ("layers", (steps - 1) / steps)
    for name, result in outcome.analysis.results.items():
        outcome.views[name] = result_view(name, result, geometry, source, z_offset)
    yield ("done", 1.0)
    return outcome


def remeasure(
    previous: RunOutcome, name: str, settings: dict[str, Any], stop: threading.Event | None = None
) -> Generator[Progress, None, RunOutcome]:
    """Run analysis ``name`` again on the previous run's volume and regions with new settings.

    Returns a copy of ``previous`` with that analysis' result and view replaced.
    """
    stop = stop or threading.Event()
    yield (name, 0.1)
    part = analyse_volume(
        previous.volume, analyses=[name], settings={name: settings}, regions=previous.analysis.regions, cancel=stop.is_set
    )
    results = dict(previous.analysis.results)
    results.update(part.results)
    errors = {k: v for k, v in previous.analysis.errors.items() if k != name}
    errors.update(part.errors)
    merged = SeriesAnalysis(regions=previous.analysis.regions, results=results, errors=errors)
    new_settings = dict(previous.settings)
    new_settings[name] = dict(settings)
    outcome = RunOutcome(previous.source, previous.volume, previous.z_offset, previous.geometry, merged, new_settings, dict(previous.views))
    yield ("layers", 0.9)
    outcome.views[name] = result_view(name, part.results[name], previous.geometry, previous.source, previous.z_offset)
    yield ("done", 1.0)
    return outcome
