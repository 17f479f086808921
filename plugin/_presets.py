"""Window/level presets (trade terms); the widths and levels are from memory, common practice."""
from __future__ import annotations

#: name -> (window width W, window level L) in HU. From memory, common practice, no source.
WINDOW_PRESETS: dict[str, tuple[float, float]] = {
    "soft tissue": (400.0, 40.0),
    "air": (400.0, -900.0),  # shows faint structures in the air around the patient
    "lung": (1500.0, -600.0),
    "bone": (1800.0, 400.0),
}

DEFAULT_PRESET = "soft tissue"


def contrast_limits(width: float, level: float) -> tuple[float, float]:
    """napari contrast limits (low, high) of a window of ``width`` centred on ``level``.

    References
    ----------
    DICOM PS3.3 C.11.2.1.2 (Window Center and Window Width; the linear form).
    """
    if width <= 0:
        raise ValueError(f"window width must be positive, got {width}")
    return (level - width / 2.0, level + width / 2.0)


def preset_limits(name: str) -> tuple[float, float]:
    """Contrast limits of the named preset (see :data:`WINDOW_PRESETS`)."""
    if name not in WINDOW_PRESETS:
        raise KeyError(f"unknown window preset {name!r}; known: {', '.join(WINDOW_PRESETS)}")
    return contrast_limits(*WINDOW_PRESETS[name])
