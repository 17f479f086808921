"""napari front end of reconaudit: reader, sample data, the audit bench panel, overlay layers.

Thin by design: no analysis code lives here. The panel calls
:func:`reconaudit.checker.pipeline.analyse_volume` in a thread worker and turns the
viewer-neutral overlays of each result into napari layers with the image's geometry.
"""
from __future__ import annotations

from ._geometry import LayerGeometry, layer_geometry
from ._presets import WINDOW_PRESETS, contrast_limits, preset_limits
from ._reader import napari_get_reader, read_ct, volume_from_layer, volume_layer_data

__all__ = [
    "LayerGeometry",
    "layer_geometry",
    "WINDOW_PRESETS",
    "contrast_limits",
    "preset_limits",
    "napari_get_reader",
    "read_ct",
    "volume_from_layer",
    "volume_layer_data",
    "AuditBench",
]


def __getattr__(name: str):  # the panel imports Qt; load it only when asked
    if name == "AuditBench":
        from ._widget import AuditBench

        return AuditBench
    raise AttributeError(name)
