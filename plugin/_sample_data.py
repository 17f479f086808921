"""The demo scenario's series as napari sample data (File > Open Sample > reconaudit).

The scenario is invented (see :mod:`reconaudit.checker.demo`); the volumes are
simulated, deterministic and small.
"""
from __future__ import annotations

from typing import Callable

from ._reader import LayerData, volume_layer_data

#: demo series name -> menu title (our own wording)
SAMPLE_TITLES: dict[str, str] = {
    "qa_phantom": "Demo QA phantom (filtered back-projection)",
    "qa_phantom_nonlinear": "Demo QA phantom (nonlinear reconstruction)",
    "torso_clean": "Demo torso, full view set",
    "torso_limited_angle": "Demo torso, limited angle",
    "torso_sparse_views": "Demo torso, sparse views",
    "torso_metal": "Demo torso with metal",
    "torso_air_structure": "Demo torso, structure in the air",
    "compare_reference": "Demo comparison: reference",
    "compare_test": "Demo comparison: test",
}


def sample_layer(name: str) -> list[LayerData]:
    """The demo series ``name`` (small size) as one Image layer."""
    from reconaudit.checker import demo

    volume = demo.make_volume(name, size="small")
    return [volume_layer_data(volume, name=f"demo {name}")]


def _make(name: str) -> Callable[[], list[LayerData]]:
    def sample() -> list[LayerData]:
        return sample_layer(name)

    sample.__name__ = f"sample_{name}"
    sample.__doc__ = f"{SAMPLE_TITLES[name]} (demo series {name!r})."
    return sample


sample_qa_phantom = _make("qa_phantom")
sample_qa_phantom_nonlinear = _make("qa_phantom_nonlinear")
sample_torso_clean = _make("torso_clean")
sample_torso_limited_angle = _make("torso_limited_angle")
sample_torso_sparse_views = _make("torso_sparse_views")
sample_torso_metal = _make("torso_metal")
sample_torso_air_structure = _make("torso_air_structure")
sample_compare_reference = _make("compare_reference")
sample_compare_test = _make("compare_test")
