"""Curves drawn in the panel's embedded matplotlib canvas (no pyplot, no Qt here).

Each ``draw_*`` takes a matplotlib Figure and an analysis record (the JSON keys the
analysis defines) and returns True if it drew something, else writes why not on the figure.
"""
from __future__ import annotations

from typing import Any, Callable, Mapping

import numpy as np
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

_LINE = "#1b6ca8"
_MARK = "#d1495b"
_GRID = dict(alpha=0.3)


def _floats(value: Any) -> np.ndarray | None:
    try:
        arr = np.asarray(value, dtype=float).ravel()
    except (TypeError, ValueError):
        return None
    return arr if arr.size else None


def _scalar(value: Any) -> float | None:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return None
    return v if np.isfinite(v) else None


def _nothing(fig: Figure, text: str) -> bool:
    ax = fig.add_subplot(111)
    ax.set_axis_off()
    ax.text(0.5, 0.5, text, ha="center", va="center", wrap=True, fontsize=9, color="#555555")
    return False


def draw_nps(fig: Figure, record: Mapping[str, Any] | None) -> bool:
    """Radial NPS against spatial frequency, with f_peak and f_av marked.

    References
    ----------
    ICRU Report 87 (2012); Samei et al., Med Phys 46(11), 2019 (AAPM TG-233);
    Solomon, Christianson, Samei, Med Phys 39(10), 2012 (f_peak, f_av).
    """
    if not record or not record.get("applicable", True):
        return _nothing(fig, "no NPS: " + str((record or {}).get("reason", "run the nps analysis")))
    f, nps = _floats(record.get("frequency_per_mm")), _floats(record.get("nps_1d_hu2mm2"))
    if f is None or nps is None or f.size != nps.size:
        return _nothing(fig, "the nps record has no radial NPS curve")
    ax = fig.add_subplot(111)
    ax.plot(f, nps, color=_LINE, lw=1.6)
    for key, style, text in (("f_peak_per_mm", "-.", "f_peak"), ("f_av_per_mm", ":", "f_av")):
        v = _scalar(record.get(key))
        if v is not None:
            ax.axvline(v, color=_MARK, ls=style, lw=1.0, label=f"{text} = {v:.3f} /mm")
    noise = _scalar(record.get("noise_hu"))
    ax.set_title("NPS" + (f"  (noise {noise:.2f} HU)" if noise is not None else ""), fontsize=9)
    ax.set_xlabel("spatial frequency (cycles/mm)", fontsize=8)
    ax.set_ylabel("NPS (HU² mm²)", fontsize=8)
    ax.set_xlim(left=0)
    ax.set_ylim(bottom=0)
    ax.grid(**_GRID)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(fontsize=7)
    return True


def _edge_curve(edge: Mapping[str, Any]) -> tuple[np.ndarray, np.ndarray] | None:
    f = _floats(edge.get("frequency_per_mm"))
    t = _floats(edge.get("ttf", edge.get("ttf_values", edge.get("mtf"))))
    if f is None or t is None or f.size != t.size:
        return None
    return f, t


def draw_ttf(fig: Figure, record: Mapping[str, Any] | None) -> bool:
    """TTF of every measured edge, f50 marked.

    References
    ----------
    Richard et al., Med Phys 39(7), 2012 (TTF from a circular edge); AAPM TG-233 (2019).
    """
    if not record or not record.get("applicable", True):
        return _nothing(fig, "no TTF: " + str((record or {}).get("reason", "run the ttf analysis")))
    edges = [e for e in record.get("edges") or [] if isinstance(e, Mapping) and _edge_curve(e) is not None]
    if not edges and _edge_curve(record) is not None:
        edges = [record]
    if not edges:
        return _nothing(fig, "the ttf record has no curve")
    ax = fig.add_subplot(111)
    for i, edge in enumerate(edges, start=1):
        f, t = _edge_curve(edge)  # type: ignore[misc]
        f50 = _scalar(edge.get("f50_per_mm"))
        label = str(edge.get("label") or f"edge {i}")
        if f50 is not None and "f50" not in label:
            label += f", f50 {f50:.3f} /mm"
        line = ax.plot(f, t, lw=1.5, label=label)[0]
        if f50 is not None:
            ax.plot([f50], [0.5], "o", color=line.get_color(), ms=4)
    ax.axhline(0.5, color="#999999", lw=0.8, ls=":")
    ax.set_title("TTF per edge (dot: f50)", fontsize=9)
    ax.set_xlabel("spatial frequency (cycles/mm)", fontsize=8)
    ax.set_ylabel("TTF", fontsize=8)
    ax.set_xlim(left=0)
    ax.set_ylim(0, 1.1)
    ax.grid(**_GRID)
    ax.legend(fontsize=7)
    return True


def _angular_profile(record: Mapping[str, Any]) -> tuple[np.ndarray, np.ndarray] | None:
    nested = record.get("angular_profile")
    if isinstance(nested, Mapping):
        a, e = _floats(nested.get("angles_deg")), _floats(nested.get("relative_energy"))
        if a is not None and e is not None and a.size == e.size and np.isfinite(e).any():
            return a, np.where(np.isfinite(e), e, 0.0)
        return None
    for key in ("angular_energy", "angular_profile", "energy_by_angle"):
        energy = _floats(record.get(key))
        if energy is not None:
            break
    else:
        return None
    angles = None
    for key in ("angular_energy_angles_deg", "angles_deg", "angle_bins_deg"):
        angles = _floats(record.get(key))
        if angles is not None and angles.size == energy.size:
            break
        angles = None
    if angles is None:
        angles = np.arange(energy.size) * (180.0 / energy.size)
    return angles, energy


def draw_streak_polar(fig: Figure, record: Mapping[str, Any] | None) -> bool:
    """Streak orientation rose (orientation modulo 180 deg, drawn point-symmetric).

    0 deg is along a row (left-right on screen), increasing counter-clockwise, as in the
    project's angle convention.

    References
    ----------
    Kak and Slaney, Principles of Computerized Tomographic Imaging, IEEE Press, 1988
    (Fourier slice theorem; streaks along missing view directions).
    """
    if not record or not record.get("applicable", True):
        return _nothing(fig, "no streak screen: " + str((record or {}).get("reason", "run the streaks analysis")))
    profile = _angular_profile(record)
    dominant = _floats(record.get("dominant_angles_deg"))
    if profile is None and dominant is None:
        return _nothing(fig, "the streaks record has no angular profile")
    ax = fig.add_subplot(111, projection="polar")
    peak = 1.0
    if profile is not None:
        a, e = profile
        theta = np.deg2rad(np.concatenate([a, a + 180.0, a[:1] + 360.0]))
        r = np.concatenate([e, e, e[:1]])
        ax.plot(theta, r, color=_LINE, lw=1.3)
        ax.fill(theta, r, color=_LINE, alpha=0.15)
        peak = float(np.max(r)) or 1.0
    if dominant is not None:
        for d in dominant[np.isfinite(dominant)]:
            for t in (d, d + 180.0):
                ax.plot([np.deg2rad(t)] * 2, [0, peak], color=_MARK, lw=1.8)
    ax.set_yticklabels([])
    ax.set_title("streak orientation: relative directional energy", fontsize=9)
    ax.text(0.5, -0.12, "0° = along a row (left-right), counter-clockwise on screen; red: dominant",
            transform=ax.transAxes, ha="center", va="top", fontsize=7, color="#555555")
    return True


def draw_streak_slices(fig: Figure, record: Mapping[str, Any] | None) -> bool:
    """The per-slice streak index along z, flagged slices marked."""
    if not record or not record.get("applicable", True):
        return _nothing(fig, "no streak screen: " + str((record or {}).get("reason", "run the streaks analysis")))
    per_slice = None
    for key in ("slice_index", "per_slice_index", "index_per_slice"):
        per_slice = _floats(record.get(key))
        if per_slice is not None:
            break
    if per_slice is None:
        return _nothing(fig, "the streaks record has no per-slice index")
    z = np.arange(per_slice.size) + int(record.get("_z_offset", 0))
    ax = fig.add_subplot(111)
    ax.plot(z, per_slice, color=_LINE, lw=1.3, marker="." if z.size < 80 else None)
    flagged = [int(v) for v in record.get("flagged_slices") or [] if 0 <= int(v) < per_slice.size]
    if flagged:
        ax.plot(z[flagged], per_slice[flagged], "v", color=_MARK, ms=5, label="flagged")
        ax.legend(fontsize=7)
    tolerance = _scalar(record.get("tolerance", record.get("tolerance_index")))
    if tolerance is not None:
        ax.axhline(tolerance, color=_MARK, ls="--", lw=1.0, label=f"tolerance {tolerance:g}")
        ax.legend(fontsize=7)
    ax.set_title("streak index per slice", fontsize=9)
    ax.set_xlabel("slice (z index)", fontsize=8)
    ax.set_ylabel("streak index (relative, no unit)", fontsize=8)
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_ylim(bottom=0)
    ax.grid(**_GRID)
    return True


#: plot title -> (analysis name, drawing function); titles are our own
PLOTS: dict[str, tuple[str, Callable[[Figure, Mapping[str, Any] | None], bool]]] = {
    "Noise power spectrum": ("nps", draw_nps),
    "Edge TTF": ("ttf", draw_ttf),
    "Streak orientation": ("streaks", draw_streak_polar),
    "Streak index by slice": ("streaks", draw_streak_slices),
}
