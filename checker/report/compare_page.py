"""The comparison sheet of ``reconaudit compare``: side-by-side and difference thumbnails."""
from __future__ import annotations

import time
from pathlib import Path
from typing import Any

import numpy as np

from .. import SAFETY_NOTICE, __version__
from ..fsutil import atomic_write_text
from .figures import _new_figure, _save
from .html import _environment, fmt

SOFT_TISSUE = (400.0, 40.0)  # window width, level (HU); common practice, no source


def comparison_slice(record: dict[str, Any], nz: int) -> int:
    """The slice of the first structure difference, else of the largest surface shift."""
    for kind in ("only_in_test", "only_in_reference"):
        if record.get(kind):
            return int(round(record[kind][0]["centroid_zyx_vox"][0]))
    at = (record.get("body_surface_shift_mm") or {}).get("max_at_zyx_vox")
    return int(at[0]) if at else nz // 2


def draw_comparison(test_hu: np.ndarray, ref_hu: np.ndarray, labels: np.ndarray, shift_mask: np.ndarray,
                    z: int, path: Path) -> Path:
    """Reference, test and their difference on slice ``z``, differences outlined."""
    width, level = SOFT_TISSUE
    fig = _new_figure(11.0, 3.9)
    axes = fig.subplots(1, 3)
    for ax, img, title in ((axes[0], ref_hu[z], "reference"), (axes[1], test_hu[z], "test")):
        ax.imshow(img, cmap="gray", vmin=level - width / 2, vmax=level + width / 2, interpolation="nearest")
        ax.set_title(f"{title}, slice {z}, W {width:.0f} L {level:.0f}", fontsize=9)
    diff = test_hu[z] - ref_hu[z]
    im = axes[2].imshow(diff, cmap="RdBu_r", vmin=-100, vmax=100, interpolation="nearest")
    axes[2].set_title("test − reference (HU)", fontsize=9)
    fig.colorbar(im, ax=axes[2], fraction=0.046, pad=0.02)
    for ax in axes:
        if labels[z].any():
            ax.contour(labels[z] > 0, levels=[0.5], colors=["#e8a317"], linewidths=1.2)
        if shift_mask[z].any():
            ys, xs = np.nonzero(shift_mask[z])
            ax.plot(xs, ys, ",", color="#d62fbf")
        ax.set_xticks([])
        ax.set_yticks([])
    fig.tight_layout()
    _save(fig, path)
    return path


def write_comparison_page(result, out_dir: Path, *, test_label: str, reference_label: str) -> Path:
    """Write ``comparison.html`` (and its figure) into ``out_dir``; returns its path."""
    out_dir = Path(out_dir)
    ref, test = result.reference, result.test_on_grid
    z = comparison_slice(result.record, ref.shape[0])
    rel = Path("figures") / "comparison.png"
    shift_mask = result.overlays.maps.get("surface_shift_beyond_tolerance", np.zeros(ref.shape, np.float32)) > 0
    draw_comparison(test.hu, ref.hu, result.overlays.labels, shift_mask, z, out_dir / rel)
    html = _environment().get_template("compare.html").render(
        tool_version=__version__,
        written_at=time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        test_label=test_label,
        reference_label=reference_label,
        verdict=result.verdict,
        findings=[f.to_json() for f in result.findings],
        record=result.record,
        shift=result.record["body_surface_shift_mm"],
        offset=[round(v, 2) for v in result.record["rigid_offset_mm"]],
        stats=result.record["difference_statistics"],
        figures=[{"src": str(rel), "caption": "Reference, test and difference on the slice of the first difference "
                  "(orange: structures in one image only; magenta: surface displaced beyond tolerance)"}],
        safety_notice=SAFETY_NOTICE,
        fmt=fmt,
    )
    return atomic_write_text(out_dir / "comparison.html", html)
