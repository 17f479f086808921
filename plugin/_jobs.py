"""The work the panel hands to a thread worker: generators that yield progress.

No Qt here, so the jobs can be tested and timed on their own. Each job yields
``(stage, fraction)`` and returns its outcome; the GUI thread only shows the outcome.
"""
from __future__ import annotations

import threading
from dataclasses import dataclass, field
from typing import Any, Generator, Iterable

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


def run_checks(
    volume: Volume,
    names: Iterable[str],
    settings: dict[str, dict[str, Any]],
    geometry: LayerGeometry,
    source: str,
    *,
    z_index: int | None = None,
    regions: Regions | None = None,
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
    stop : threading.Event, optional
        Set it to cancel; checked between stages and inside the pipeline.

    Raises
    ------
    reconaudit.checker.pipeline.Cancelled
        When ``stop`` is set.
    """
    names = list(names)
    stop = stop or threading.Event()
    target = volume if z_index is None else slice_volume(volume, z_index)
    z_offset = 0 if z_index is None else int(z_index)
    steps = len(names) + 2
    yield ("regions", 0.0)
    first = analyse_volume(target, analyses=[], regions=regions, cancel=stop.is_set)
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
