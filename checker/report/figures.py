"""PNG figures of one series for the HTML report (matplotlib, Agg only, never pyplot/Qt).

:func:`render_series_figures` is called by a batch worker while the volume is still in
memory. Each figure is drawn only when its analysis ran, is applicable and carries the
keys the figure needs; a figure whose data are missing or malformed is skipped (and
logged), it never stops the report.

Windows (common practice, no source): soft tissue W 400 / L 40 HU for the axial
thumbnail; W 400 / L -900 HU for the air thumbnail, so faint structures in the air
(-1000 HU by definition of the Hounsfield scale) show.

Cost. The six figures of a series are drawn on figures built once per thread and kind
(:func:`_series_axes`): size, margins, axis labels, grid and tick settings are made once,
and each series only adds its data artists, which are all removed again when its PNG is
written (``tests/checker/test_report.py`` compares a reused figure's pixels with a
fresh one's). Each thread has its own figures (``threading.local``), so threads never
share one; a process keeps at most one figure of each kind per thread. PNGs are written
as RGB (the figures are opaque) at zlib level 1: measured on the demo series, encoding
took about 0.6 x the time of RGBA at the default level 6 and the files came out about
6 % smaller (212 against 227 KiB per series), the alpha channel being gone. Together
with the reused figures, the six figures of a demo series took 0.53 x the time of
figures built anew for each series and written at level 6 (217 against 412 ms, medians
of 8 alternating rounds over 8 series on a shared 2-core machine), pixel for pixel the
same images.
"""
from __future__ import annotations

import contextlib
import datetime as _dt
import logging
import math
import re
import threading
from pathlib import Path
from typing import Any, Callable, Iterator, Mapping, Sequence

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch, Rectangle
from PIL import Image

from ..regions import Regions
from ..results import AnalysisResult
from ..volume import Volume
from ..results import finite_number

log = logging.getLogger(__name__)

DPI = 100
PNG_COMPRESS_LEVEL = 1  # zlib level: the figures are local thumbnails (see module docstring)
SOFT_TISSUE_WINDOW = (400.0, 40.0)  # (width, level) HU
AIR_WINDOW = (400.0, -900.0)

# Overlay colours, chosen to stay apart on a grey image and for common colour-vision
# deficiencies (each overlay also differs by line style or marker shape).
COLOURS = {
    "streak": "#ff9f1c",
    "roi": "#2ec4d6",
    "edge": "#ffe14d",
    "air_flagged": "#ff3d6e",
    "air_other": "#8fd3ff",
    "current": "#1f4e79",
    "baseline": "#8a8f98",
    "limit": "#c0392b",
    "tolerance": "#c0392b",
}

_DATA_ERRORS = (KeyError, TypeError, ValueError, IndexError, AttributeError)


# ---------------------------------------------------------------------------- helpers
def safe_name(text: str) -> str:
    """A file-name-safe version of ``text`` (letters, digits, ``-``, ``_``, ``.``)."""
    cleaned = re.sub(r"[^A-Za-z0-9._-]+", "_", str(text)).strip("._")
    return cleaned[:80] or "series"


def _record(results: Mapping[str, Any] | None, name: str) -> dict[str, Any] | None:
    """The applicable record of analysis ``name``; accepts AnalysisResult or plain dicts."""
    if not results:
        return None
    item = results.get(name)
    rec = getattr(item, "record", item)
    if not isinstance(rec, Mapping) or rec.get("applicable", True) is False:
        return None
    return dict(rec)


def _overlays(results: Mapping[str, Any], name: str) -> Any:
    item = results.get(name)
    return getattr(item, "overlays", None) if isinstance(item, AnalysisResult) else None


def _floats(seq: Any) -> np.ndarray | None:
    """``seq`` as a 1-D float array, or None when it is not a non-empty list of numbers."""
    if seq is None or isinstance(seq, (str, bytes, Mapping)):
        return None
    try:
        arr = np.asarray([np.nan if v is None else v for v in seq], dtype=float)
    except (TypeError, ValueError):
        return None
    return arr if arr.ndim == 1 and arr.size > 0 and np.isfinite(arr).any() else None




def _new_figure(width_in: float, height_in: float) -> Figure:
    fig = Figure(figsize=(width_in, height_in), dpi=DPI)
    FigureCanvasAgg(fig)
    return fig


def _fixed_margins(fig: Figure, left_in: float = 0.75, bottom_in: float = 0.55, right_in: float = 0.15,
                   top_in: float = 0.35) -> None:
    """Margins fixed in inches (room for tick labels, axis labels and the title).

    Used instead of ``tight_layout``, which measures every text artist and cost about a
    quarter of a series' figure time; the figures' labels are short and of known size.
    """
    w, h = fig.get_size_inches()
    fig.subplots_adjust(left=left_in / w, bottom=bottom_in / h, right=1.0 - right_in / w, top=1.0 - top_in / h)


def _save(fig: Figure, path: Path) -> None:
    """Draw ``fig`` with Agg and write it as an RGB PNG at :data:`PNG_COMPRESS_LEVEL`."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.canvas.draw()
    rgb = np.asarray(fig.canvas.buffer_rgba())[..., :3]
    Image.fromarray(np.ascontiguousarray(rgb)).save(path, format="png", compress_level=PNG_COMPRESS_LEVEL)


# ------------------------------------------------------------ figures kept per thread
_THREAD_FIGURES = threading.local()


def _thumbnail_axes() -> Any:
    """An axial-thumbnail figure: the image axes without ticks, room above for the title."""
    ax = _new_figure(4.2, 4.4).add_axes([0.02, 0.02, 0.96, 0.88])
    ax.set_xticks([])
    ax.set_yticks([])
    return ax


def _curve_axes(height_in: float, xlabel: str, ylabel: str) -> Any:
    """A curve figure 5.4 in wide: labelled axes with a light grid and fixed margins."""
    fig = _new_figure(5.4, height_in)
    ax = fig.add_subplot(111)
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    ax.grid(alpha=0.3)
    _fixed_margins(fig)
    return ax


def _curve_title(ax: Any, text: str) -> None:
    """Set a curve figure's title at the top edge of its axes (y = 1 in axes units).

    That is where matplotlib's own placement puts it, the tick and axis labels being
    below and left. Its placement would also measure every y tick label on each draw
    (about a tenth of a curve figure's time, by cProfile) for the one case in which it
    raises the title: a y offset text (such as "1e-6", at the left end of the top edge)
    meeting the centred title. That case is not looked for: with the limits these
    figures set (from 0) an offset text appears only as a power of ten for values
    below 1e-5 or above 1e6, and it would then sit left of a title of this length.
    """
    ax.set_title(text, fontsize=10, y=1.0)


POLAR_TITLES = ("Streak orientation", "Streak orientation (dominant directions)")
_POLAR_TITLE_Y = threading.local()  # title -> height in axes units, per thread


def _polar_axes() -> Any:
    """The streak rose's polar axes, radial tick labels hidden (the scale is relative).

    Its two axis labels are empty, and the angle labels are the same for every series:
    so the axis labels get fixed coordinates and each title of :data:`POLAR_TITLES` the
    height matplotlib's own placement gives it above the angle labels (found by one
    draw of the empty rose per title). Otherwise every draw would measure all tick
    labels again for both (together about two fifths of this figure's time, cProfile).
    """
    fig = _new_figure(3.6, 3.6)
    ax = fig.add_subplot(111, projection="polar")
    ax.set_yticklabels([])
    ax.xaxis.set_label_coords(0.5, 0.0)
    ax.yaxis.set_label_coords(0.0, 0.5)
    _fixed_margins(fig, left_in=0.35, bottom_in=0.3, right_in=0.35, top_in=0.5)
    for title in POLAR_TITLES:
        ax.set_title(title, fontsize=10)
        fig.canvas.draw()
        _POLAR_TITLE_Y.__dict__[title] = ax.title.get_position()[1]
    return ax


_FIGURE_BUILDERS: dict[str, Callable[[], Any]] = {
    "axial": _thumbnail_axes,
    "axial_air": _thumbnail_axes,
    "nps": lambda: _curve_axes(3.3, "spatial frequency (mm⁻¹)", "NPS (HU² mm²)"),
    "ttf": lambda: _curve_axes(3.3, "spatial frequency (mm⁻¹)", "TTF"),
    "streak_polar": _polar_axes,
    "streak_profile": lambda: _curve_axes(2.8, "slice (z index)", "streak index"),
}


def _remove_series_artists(ax: Any, autoscale_xy: tuple[bool, bool]) -> None:
    """Take every data artist, the legend and the data limits of one series off ``ax``.

    What stays is what the builder made; autoscaling (``autoscale_xy``, as the builder
    left it: a polar axes keeps its full circle of theta) and the colour cycle are back
    at the built state, so the next series draws as on a fresh figure.
    """
    for artist in [*ax.lines, *ax.patches, *ax.collections, *ax.images, *ax.texts]:
        artist.remove()
    if ax.legend_ is not None:
        ax.legend_.remove()
    ax.relim()
    ax.set_autoscalex_on(autoscale_xy[0])
    ax.set_autoscaley_on(autoscale_xy[1])
    ax.set_prop_cycle(None)


@contextlib.contextmanager
def _series_axes(kind: str) -> Iterator[Any]:
    """This thread's axes of figure ``kind`` (built on first use) for drawing one series.

    The series' artists are removed on leaving, also when drawing failed, so no artist
    of one series (nor a reference to its volume) stays for the next; the titles are
    set anew by each series. The figures live as long as their thread.
    """
    built = _THREAD_FIGURES.__dict__
    if kind not in built:
        ax = _FIGURE_BUILDERS[kind]()
        built[kind] = ax, (ax.get_autoscalex_on(), ax.get_autoscaley_on())
    ax, autoscale_xy = built[kind]
    try:
        yield ax
    finally:
        _remove_series_artists(ax, autoscale_xy)


def _window(width: float, level: float) -> tuple[float, float]:
    return level - width / 2.0, level + width / 2.0


# ------------------------------------------------------------------------ slice choice
def most_flagged_streak_slice(streaks: Mapping[str, Any] | None, nz: int) -> int | None:
    """The flagged slice with the largest per-slice streak index, or None."""
    if not streaks:
        return None
    flagged = [int(z) for z in streaks.get("flagged_slices") or [] if finite_number(z) is not None and 0 <= int(z) < nz]
    if not flagged:
        return None
    per_slice = _floats(streaks.get("slice_index"))
    if per_slice is not None and per_slice.size == nz:
        return max(flagged, key=lambda z: np.nan_to_num(per_slice[z], nan=-np.inf))
    return flagged[0]


def largest_air_structure_slice(air: Mapping[str, Any] | None, nz: int, *, flagged_only: bool = False) -> int | None:
    """The slice of the centroid of the largest air structure (flagged ones first)."""
    if not air:
        return None
    structures = [s for s in air.get("structures") or [] if isinstance(s, Mapping)]
    if flagged_only:
        structures = [s for s in structures if s.get("flagged")]
    with_z = [s for s in structures if _floats(s.get("centroid_zyx_vox")) is not None]
    if not with_z:
        return None
    best = max(with_z, key=lambda s: (bool(s.get("flagged")), finite_number(s.get("volume_mm3")) or 0.0))
    z = int(round(float(_floats(best["centroid_zyx_vox"])[0])))
    return min(max(z, 0), nz - 1)


def choose_slice(volume: Volume, results: Mapping[str, Any]) -> tuple[int, str]:
    """The most relevant axial slice and why it was chosen.

    Order: the most-flagged streak slice, the slice of the largest flagged air
    structure, the slice of the measured insert edges, else the middle slice.
    """
    nz = volume.shape[0]
    z = most_flagged_streak_slice(_record(results, "streaks"), nz)
    if z is not None:
        return z, "most-flagged streak slice"
    z = largest_air_structure_slice(_record(results, "air"), nz, flagged_only=True)
    if z is not None:
        return z, "largest flagged air structure"
    z = edge_slice(_record(results, "ttf"), nz)
    if z is not None:
        return z, "slice of the measured edges"
    return nz // 2, "middle slice"


def edge_slice(ttf: Mapping[str, Any] | None, nz: int) -> int | None:
    """The middle of the slices the circular-edge (insert) measurements used, or None."""
    mids = []
    for edge in (ttf or {}).get("edges") or []:
        if not isinstance(edge, Mapping) or edge.get("kind", "circular") != "circular":
            continue
        sl = _floats(edge.get("slices"))
        if sl is not None and sl.size >= 1:
            mids.append(float(np.nanmean(sl[:2])))
    if not mids:
        return None
    return min(max(int(round(float(np.median(mids)))), 0), nz - 1)


# ------------------------------------------------------------------------- thumbnails
def _show_slice(ax: Any, volume: Volume, z: int, window: tuple[float, float]) -> None:
    lo, hi = _window(*window)
    dy, dx = volume.spacing_mm[1], volume.spacing_mm[2]
    ax.imshow(volume.hu[z], cmap="gray", vmin=lo, vmax=hi, interpolation="nearest", aspect=dy / dx)


def _near(z: float, z_lo: float, z_hi: float) -> bool:
    return min(z_lo, z_hi) - 0.5 <= z <= max(z_lo, z_hi) + 0.5


def _draw_streak_segments(ax: Any, overlays: Any, z: int) -> list[Any]:
    segs = [s for s in getattr(overlays, "segments", []) or [] if _near(z, s.start_zyx_vox[0], s.end_zyx_vox[0])]
    for s in segs:
        ax.plot([s.start_zyx_vox[2], s.end_zyx_vox[2]], [s.start_zyx_vox[1], s.end_zyx_vox[1]],
                color=COLOURS["streak"], lw=1.4, ls="-")
    return [Line2D([], [], color=COLOURS["streak"], lw=1.4, label="streak direction")] if segs else []


def _draw_rois(ax: Any, overlays: Any, z: int) -> list[Any]:
    rois = [r for r in getattr(overlays, "rois", []) or [] if r.z0 <= z <= r.z1]
    for r in rois:
        ax.add_patch(Rectangle((r.x0 - 0.5, r.y0 - 0.5), r.x1 - r.x0, r.y1 - r.y0,
                               fill=False, ec=COLOURS["roi"], lw=1.0, ls="--"))
    return [Patch(fill=False, ec=COLOURS["roi"], ls="--", label="NPS ROI")] if rois else []


def _draw_edge_points(ax: Any, overlays: Any, z: int) -> list[Any]:
    points = list(getattr(overlays, "points", []) or [])
    here = [p for p in points if abs(p.zyx_vox[0] - z) <= 0.5]
    shown, label = (here, "edge centre") if here else (points, "edge centre (other slices)")
    for p in shown:
        ax.plot(p.zyx_vox[2], p.zyx_vox[1], marker="P", ms=8, mfc=COLOURS["edge"] if here else "none",
                mec=COLOURS["edge"], ls="none")
    if not shown:
        return []
    return [Line2D([], [], marker="P", ms=8, mfc=COLOURS["edge"] if here else "none",
                   mec=COLOURS["edge"], ls="none", label=label)]


def _legend(ax: Any, handles: list[Any]) -> None:
    if handles:
        ax.legend(handles=handles, loc="lower left", fontsize=7, framealpha=0.75, borderpad=0.4)


def draw_axial_thumbnail(volume: Volume, results: Mapping[str, Any], z: int, reason: str, path: Path) -> Path:
    """Slice ``z`` at the soft-tissue window with streaks, NPS ROIs and edge centres."""
    with _series_axes("axial") as ax:
        _draw_axial_thumbnail(ax, volume, results, z, reason)
        _save(ax.figure, path)
    return path


def _draw_axial_thumbnail(ax: Any, volume: Volume, results: Mapping[str, Any], z: int, reason: str) -> None:
    _show_slice(ax, volume, z, SOFT_TISSUE_WINDOW)
    handles = []
    if _record(results, "streaks") is not None:
        handles += _draw_streak_segments(ax, _overlays(results, "streaks"), z)
    if _record(results, "nps") is not None:
        handles += _draw_rois(ax, _overlays(results, "nps"), z)
    if _record(results, "ttf") is not None:
        handles += _draw_edge_points(ax, _overlays(results, "ttf"), z)
    ax.set_xlim(-0.5, volume.shape[2] - 0.5)
    ax.set_ylim(volume.shape[1] - 0.5, -0.5)
    _legend(ax, handles)
    w, l = SOFT_TISSUE_WINDOW
    ax.figure.suptitle(f"slice {z} ({reason})  W {w:.0f} L {l:.0f}", fontsize=9)


def _structure_flags(air: Mapping[str, Any]) -> dict[int, bool]:
    flags: dict[int, bool] = {}
    for s in air.get("structures") or []:
        if isinstance(s, Mapping) and finite_number(s.get("id")) is not None:
            flags[int(s["id"])] = bool(s.get("flagged"))
    return flags


def _draw_air_outlines(ax: Any, labels2d: np.ndarray, flags: dict[int, bool]) -> list[Any]:
    handles = []
    ids = [int(i) for i in np.unique(labels2d) if i > 0]
    groups = {True: [i for i in ids if flags.get(i, False)], False: [i for i in ids if not flags.get(i, False)]}
    for flagged, members in groups.items():
        if not members:
            continue
        mask = np.isin(labels2d, members).astype(float)
        colour = COLOURS["air_flagged" if flagged else "air_other"]
        style = "solid" if flagged else "dotted"
        ax.contour(mask, levels=[0.5], colors=[colour], linewidths=1.3, linestyles=style)
        handles.append(Line2D([], [], color=colour, ls="-" if flagged else ":", lw=1.3,
                              label="air structure, flagged" if flagged else "air structure, below threshold"))
    return handles


def draw_air_thumbnail(volume: Volume, results: Mapping[str, Any], z: int, path: Path) -> Path | None:
    """Slice ``z`` at the air window with the outlines of the air structures on it."""
    air = _record(results, "air")
    if air is None:
        return None
    with _series_axes("axial_air") as ax:
        _draw_air_thumbnail(ax, volume, results, air, z)
        _save(ax.figure, path)
    return path


def _draw_air_thumbnail(ax: Any, volume: Volume, results: Mapping[str, Any], air: Mapping[str, Any],
                        z: int) -> None:
    _show_slice(ax, volume, z, AIR_WINDOW)
    handles: list[Any] = []
    labels = getattr(_overlays(results, "air"), "labels", None)
    if isinstance(labels, np.ndarray) and labels.shape == volume.shape:
        handles = _draw_air_outlines(ax, labels[z], _structure_flags(air))
    ax.set_xlim(-0.5, volume.shape[2] - 0.5)
    ax.set_ylim(volume.shape[1] - 0.5, -0.5)
    _legend(ax, handles)
    w, l = AIR_WINDOW
    ax.figure.suptitle(f"slice {z}, air window  W {w:.0f} L {l:.0f}", fontsize=9)


# ----------------------------------------------------------------------------- curves
def _baseline_record(baseline: Mapping[str, Any] | None, name: str) -> dict[str, Any] | None:
    """The baseline's record of ``name``: analysis -> record, or the baseline store's
    form (``nps`` curve dict, ``ttf_edges`` list)."""
    if not isinstance(baseline, Mapping):
        return None
    if name == "ttf" and isinstance(baseline.get("ttf_edges"), list) and not baseline.get("ttf"):
        return {"edges": baseline["ttf_edges"]}
    return _record(baseline, name)


def _curve(rec: Mapping[str, Any] | None, fkey: str, ykey: str) -> tuple[np.ndarray, np.ndarray] | None:
    if rec is None:
        return None
    f, y = _floats(rec.get(fkey)), _floats(rec.get(ykey))
    if f is None or y is None or f.size != y.size or f.size < 2:
        return None
    return f, y


def draw_nps_curve(nps: Mapping[str, Any], baseline: Mapping[str, Any] | None, path: Path) -> Path | None:
    """The radial (1-D) NPS against frequency, with the baseline's if given.

    References
    ----------
    .. [1] ICRU Report 87 (2012); Samei et al., Med Phys 46(11), 2019 (TG-233).
    .. [2] Solomon, Christianson, Samei, Med Phys 39(10), 2012 (f_peak, f_av).
    """
    cur = _curve(nps, "frequency_per_mm", "nps_1d_hu2mm2")
    if cur is None:
        return None
    with _series_axes("nps") as ax:
        _draw_nps_curve(ax, nps, cur, _curve(baseline, "frequency_per_mm", "nps_1d_hu2mm2"))
        _save(ax.figure, path)
    return path


def _draw_nps_curve(ax: Any, nps: Mapping[str, Any], cur: tuple[np.ndarray, np.ndarray],
                    base: tuple[np.ndarray, np.ndarray] | None) -> None:
    ax.plot(*cur, color=COLOURS["current"], lw=1.8, label="this series")
    if base is not None:
        ax.plot(*base, color=COLOURS["baseline"], lw=1.4, ls="--", label="baseline")
    for key, style, text in (("f_av_per_mm", ":", "f_av"), ("f_peak_per_mm", "-.", "f_peak")):
        v = finite_number(nps.get(key))
        if v is not None:
            ax.axvline(v, color=COLOURS["current"], ls=style, lw=1.0, label=f"{text} {v:.3f} mm⁻¹")
    noise = finite_number(nps.get("noise_hu"))
    title = "Noise power spectrum" + (f" (noise {noise:.1f} HU)" if noise is not None else "")
    _curve_title(ax, title)
    ax.set_xlim(left=0)
    ax.set_ylim(bottom=0)
    ax.legend(fontsize=7)


def _edges(rec: Mapping[str, Any] | None) -> list[Mapping[str, Any]]:
    if rec is None:
        return []
    return [e for e in rec.get("edges") or [] if isinstance(e, Mapping) and _curve(e, "frequency_per_mm", "ttf")]


def _matching_edge(edge: Mapping[str, Any], candidates: list[Mapping[str, Any]]) -> Mapping[str, Any] | None:
    c = finite_number(edge.get("contrast_hu"))
    if c is None or not candidates:
        return None
    scored = [(abs((finite_number(b.get("contrast_hu")) or math.inf) - c), i) for i, b in enumerate(candidates)]
    diff, i = min(scored)
    return candidates[i] if diff <= max(20.0, 0.2 * abs(c)) else None


def _f50_on_curve(edge: Mapping[str, Any]) -> float | None:
    """The edge's f50 when it lies on its recorded curve; None beyond it (not a measurement)."""
    f50 = finite_number(edge.get("f50_per_mm"))
    freqs = _floats(edge.get("frequency_per_mm"))
    if f50 is None or freqs is None or f50 > float(np.nanmax(freqs)):
        return None
    return f50


def _edge_label(edge: Mapping[str, Any]) -> str:
    c = finite_number(edge.get("contrast_hu"))
    text = f"{c:+.0f} HU" if c is not None else "edge"
    f50 = _f50_on_curve(edge)
    if f50 is not None:
        text += f", f50 {f50:.3f}"
    elif finite_number(edge.get("f50_per_mm")) is not None:
        text += ", TTF above 0.5 up to the plotted limit"
    if edge.get("reliable") is False:
        text += " (unreliable)"
    return text


def draw_ttf_curves(ttf: Mapping[str, Any], baseline: Mapping[str, Any] | None, path: Path) -> Path | None:
    """Each edge's TTF with its f50 marked, and the baseline's matching edge (by contrast).

    References
    ----------
    .. [1] Richard, S. et al., Med Phys 39(7), 2012 (task-based TTF from a circular edge).
    .. [2] Samei et al., Med Phys 46(11), 2019 (TG-233).
    """
    edges = _edges(ttf)
    if not edges:
        return None
    with _series_axes("ttf") as ax:
        _draw_ttf_curves(ax, edges, _edges(baseline))
        _save(ax.figure, path)
    return path


def _draw_ttf_curves(ax: Any, edges: list[Mapping[str, Any]], base_edges: list[Mapping[str, Any]]) -> None:
    palette = ["#1f4e79", "#d1495b", "#2a9d8f", "#8e5bb5", "#e07a1f", "#3d5a80"]
    for i, edge in enumerate(edges):
        colour = palette[i % len(palette)]
        f, t = _curve(edge, "frequency_per_mm", "ttf")
        ax.plot(f, t, color=colour, lw=1.7, ls=":" if edge.get("reliable") is False else "-", label=_edge_label(edge))
        f50 = _f50_on_curve(edge)
        if f50 is not None:
            ax.plot([f50], [0.5], marker="o", color=colour, ms=5)
        match = _matching_edge(edge, base_edges)
        if match is not None:
            ax.plot(*_curve(match, "frequency_per_mm", "ttf"), color=colour, lw=1.0, ls="--", alpha=0.6)
    if base_edges:
        ax.plot([], [], color=COLOURS["baseline"], ls="--", lw=1.0, label="baseline (dashed)")
    ax.axhline(0.5, color="#999999", lw=0.8, ls=":")
    _curve_title(ax, "Task transfer function per edge (dot = f50)")
    ax.set_xlim(left=0)
    ax.set_ylim(0, 1.1)
    ax.legend(fontsize=7)


def _angular_energy(streaks: Mapping[str, Any]) -> tuple[np.ndarray, np.ndarray] | None:
    """(angles_deg, energy) from ``angular_profile`` (or flat ``angular_energy`` keys)."""
    profile = streaks.get("angular_profile")
    if isinstance(profile, Mapping):
        energy = _floats(profile.get("relative_energy") or profile.get("energy"))
        angles = _floats(profile.get("angles_deg"))
    else:
        energy = _floats(streaks.get("angular_energy"))
        angles = _floats(streaks.get("angular_energy_angles_deg") or streaks.get("angles_deg"))
    if energy is None:
        return None
    if angles is None or angles.size != energy.size:
        angles = np.arange(energy.size) * (180.0 / energy.size)
    return angles, np.nan_to_num(energy, nan=0.0)


def draw_streak_polar(streaks: Mapping[str, Any], path: Path) -> Path | None:
    """Streak orientation: the angular energy if recorded, else the dominant directions.

    Orientation is defined modulo 180 deg, so the rose is drawn point-symmetric; 0 deg is
    along a row (left-right on screen), angles increase counter-clockwise (the project's
    convention).

    References
    ----------
    .. [1] Kak, A. C. and Slaney, M., "Principles of Computerized Tomographic Imaging",
       IEEE Press, 1988 (Fourier slice theorem; streaks along missing view directions).
    """
    ae = _angular_energy(streaks)
    dominant = _floats(streaks.get("dominant_angles_deg"))
    if ae is None and dominant is None:
        return None
    with _series_axes("streak_polar") as ax:
        _draw_streak_polar(ax, ae, dominant)
        _save(ax.figure, path)
    return path


def _draw_streak_polar(ax: Any, ae: tuple[np.ndarray, np.ndarray] | None, dominant: np.ndarray | None) -> None:
    peak = 1.0
    if ae is not None:
        angles, energy = ae
        theta = np.deg2rad(np.concatenate([angles, angles + 180.0, angles[:1] + 360.0]))
        r = np.concatenate([energy, energy, energy[:1]])
        ax.plot(theta, r, color=COLOURS["current"], lw=1.5)
        ax.fill(theta, r, color=COLOURS["current"], alpha=0.15)
        peak = float(np.nanmax(r)) or 1.0
    if dominant is not None:
        for a in dominant[np.isfinite(dominant)]:
            for t in (a, a + 180.0):
                ax.plot([np.deg2rad(t)] * 2, [0, peak], color=COLOURS["streak"], lw=2.0)
    title = POLAR_TITLES[0 if ae is not None else 1]
    ax.set_title(title, fontsize=10, y=_POLAR_TITLE_Y.__dict__[title])


def _streak_tolerance(streaks: Mapping[str, Any], tolerances: Mapping[str, Any] | None) -> float | None:
    for source in (tolerances or {}, streaks):
        for key in ("index_tolerance", "index_review", "tolerance", "index_limit"):
            v = finite_number(source.get(key)) if isinstance(source, Mapping) else None
            if v is not None:
                return v
    return None


def draw_streak_profile(streaks: Mapping[str, Any], tolerances: Mapping[str, Any] | None, path: Path) -> Path | None:
    """The per-slice streak index along z with the tolerance line and flagged slices."""
    per_slice = _floats(streaks.get("slice_index"))
    if per_slice is None:
        return None
    with _series_axes("streak_profile") as ax:
        _draw_streak_profile(ax, per_slice, streaks, _streak_tolerance(streaks, tolerances))
        _save(ax.figure, path)
    return path


def _draw_streak_profile(ax: Any, per_slice: np.ndarray, streaks: Mapping[str, Any], tol: float | None) -> None:
    z = np.arange(per_slice.size)
    ax.plot(z, per_slice, color=COLOURS["current"], lw=1.4, marker="." if z.size < 80 else None, label="streak index")
    flagged = [int(f) for f in streaks.get("flagged_slices") or [] if finite_number(f) is not None and 0 <= int(f) < z.size]
    if flagged:
        ax.plot(flagged, per_slice[flagged], ls="none", marker="v", color=COLOURS["streak"], ms=6, label="flagged slice")
    if tol is not None:
        ax.axhline(tol, color=COLOURS["tolerance"], ls="--", lw=1.0, label=f"tolerance {tol:g}")
    _curve_title(ax, "Streak index per slice")
    top = max(float(np.nanmax(per_slice)), tol or 0.0)
    ax.set_ylim(0, 1.15 * top if top > 0 else 1.0)
    ax.legend(fontsize=7)


# ------------------------------------------------------------------------- the driver
def render_series_figures(
    volume: Volume,
    regions: Regions | None,
    results: Mapping[str, AnalysisResult],
    out_dir: str | Path,
    series_id: str,
    baseline: Mapping[str, Any] | None = None,
    *,
    tolerances: Mapping[str, Mapping[str, Any]] | None = None,
) -> dict[str, str]:
    """Draw the report's figures of one series as PNG files.

    Parameters
    ----------
    volume : Volume
    regions : Regions or None
        Unused today beyond being accepted (the overlays carry all geometry); kept so the
        caller hands over what the analyses saw.
    results : mapping of str -> AnalysisResult
        What the analyses returned (records and overlays).
    out_dir : path
        The report folder; figures go to ``figures/<series>/`` below it.
    series_id : str
    baseline : mapping, optional
        Analysis name -> baseline record (as in results.json), e.g. ``{"nps": {...},
        "ttf": {...}}``; drawn dashed against the current curves.
    tolerances : mapping, optional
        Analysis name -> tolerance settings; ``tolerances["streaks"]["index_tolerance"]``
        draws the line on the per-slice streak index.

    Returns
    -------
    dict of str -> str
        Figure name (``axial``, ``axial_air``, ``nps``, ``ttf``, ``streak_polar``,
        ``streak_profile``) -> path relative to ``out_dir`` (forward slashes).

    References
    ----------
    .. [1] Samei et al., Med Phys 46(11), 2019 (TG-233): the NPS and TTF curves shown.
    """
    out_dir = Path(out_dir)
    folder = Path("figures") / safe_name(series_id)
    streaks = _record(results, "streaks")
    z, reason = choose_slice(volume, results)
    z_air = largest_air_structure_slice(_record(results, "air"), volume.shape[0])
    jobs: dict[str, Callable[[Path], Path | None]] = {
        "axial": lambda p: draw_axial_thumbnail(volume, results, z, reason, p),
        "axial_air": lambda p: draw_air_thumbnail(volume, results, z if z_air is None else z_air, p),
        "nps": lambda p: _maybe(_record(results, "nps"), lambda r: draw_nps_curve(r, _baseline_record(baseline, "nps"), p)),
        "ttf": lambda p: _maybe(_record(results, "ttf"), lambda r: draw_ttf_curves(r, _baseline_record(baseline, "ttf"), p)),
        "streak_polar": lambda p: _maybe(streaks, lambda r: draw_streak_polar(r, p)),
        "streak_profile": lambda p: _maybe(
            streaks, lambda r: draw_streak_profile(r, (tolerances or {}).get("streaks"), p)
        ),
    }
    made: dict[str, str] = {}
    for name, job in jobs.items():
        rel = folder / f"{name}.png"
        try:
            if job(out_dir / rel) is not None:
                made[name] = rel.as_posix()
        except _DATA_ERRORS as exc:  # malformed record: skip this figure, keep the rest
            log.warning("figure %s of series %s skipped: %s: %s", name, series_id, type(exc).__name__, exc)
    return made


def _maybe(rec: dict[str, Any] | None, draw: Callable[[dict[str, Any]], Path | None]) -> Path | None:
    return None if rec is None else draw(rec)


# ------------------------------------------------------------------------ trend chart
def _as_time(text: str) -> _dt.datetime | None:
    try:
        return _dt.datetime.fromisoformat(str(text))
    except ValueError:
        return None


def draw_trend_chart(
    *,
    title: str,
    times: Sequence[str],
    values: Sequence[float],
    is_baseline: Sequence[bool],
    limits: tuple[float, float, float] | None,
    rule: str,
    out_png: Path,
) -> Path:
    """A constancy chart: points over time, baseline mean and 3-SD limits, outliers crossed.

    References
    ----------
    .. [1] Shewhart, W. A., "Economic Control of Quality of Manufactured Product", 1931.
    """
    parsed = [_as_time(t) for t in times]
    x: Sequence[Any] = parsed if parsed and all(p is not None for p in parsed) else list(range(len(values)))
    v = np.asarray(values, dtype=float)
    base = np.asarray(is_baseline, dtype=bool) if len(is_baseline) == len(values) else np.zeros(v.size, bool)
    fig = _new_figure(6.0, 3.0)
    ax = fig.add_subplot(111)
    if v.size:
        ax.plot(x, v, color="#b8bec8", lw=0.8, zorder=1)
        xs = np.asarray(x, dtype=object)
        if base.any():
            ax.plot(xs[base], v[base], ls="none", marker="o", color=COLOURS["current"], ms=5, label=f"baseline ({rule})")
        if (~base).any():
            ax.plot(xs[~base], v[~base], ls="none", marker="o", mfc="white", mec=COLOURS["current"], ms=5,
                    label="later checks")
    if limits is not None:
        mean, lo, hi = limits
        ax.axhline(mean, color=COLOURS["current"], lw=1.0, label=f"mean {mean:.4g}")
        ax.axhline(lo, color=COLOURS["limit"], lw=1.0, ls="--", label="mean ± 3 SD")
        ax.axhline(hi, color=COLOURS["limit"], lw=1.0, ls="--")
        out = (v < lo) | (v > hi)
        if out.any():
            ax.plot(np.asarray(x, dtype=object)[out], v[out], ls="none", marker="X", ms=11,
                    color=COLOURS["limit"], label=f"outside limits ({int(out.sum())})")
    else:
        ax.text(0.5, 0.92, "too few baseline points for control limits", transform=ax.transAxes,
                ha="center", fontsize=8, color="#555555")
    ax.set_title(title, fontsize=10)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7, loc="best")
    if x is parsed:
        fig.autofmt_xdate()
    fig.tight_layout()
    _save(fig, out_png)
    return out_png
