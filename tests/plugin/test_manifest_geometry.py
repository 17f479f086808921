"""The npe2 manifest, the layer geometry and the window presets (no viewer needed)."""
from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import reconaudit.plugin._reader as reader_mod
from reconaudit.checker.volume import Volume
from reconaudit.plugin._geometry import layer_geometry
from reconaudit.plugin._presets import WINDOW_PRESETS, contrast_limits, preset_limits

MANIFEST = Path(reader_mod.__file__).with_name("napari.yaml")


def test_manifest_validates_with_npe2_api():
    from npe2 import PluginManifest

    pm = PluginManifest.from_file(MANIFEST)
    pm.validate_imports()
    assert pm.name == "reconaudit"
    keys = {s.key for s in pm.contributions.sample_data}
    assert {"qa_phantom", "torso_air_structure", "compare_test"} <= keys
    assert [w.display_name for w in pm.contributions.widgets] == ["Reconstruction audit bench"]
    assert pm.contributions.readers[0].accepts_directories


def test_manifest_validates_with_npe2_command():
    out = subprocess.run([sys.executable, "-m", "npe2", "validate", "reconaudit"], capture_output=True, text=True)
    assert out.returncode == 0, out.stdout + out.stderr
    assert "valid" in (out.stdout + out.stderr)


def test_axial_stack_world_is_lps_mm():
    vol = Volume.from_array(np.zeros((4, 5, 6)), spacing_mm=(2.5, 0.7, 0.8), origin_mm=(-10.0, -20.0, -30.0))
    g = layer_geometry(vol)
    assert g.scale == pytest.approx((2.5, 0.7, 0.8))
    assert g.translate == pytest.approx((-30.0, -20.0, -10.0))  # (z, y, x) of voxel 0
    assert g.axes == ("+S", "+P", "+L")
    idx = np.array([[3, 4, 5], [1, 2, 0]], float)
    lps = vol.index_to_patient(idx)
    assert g.voxel_to_world(idx) == pytest.approx(lps[:, ::-1])


def test_flipped_axes_keep_distances_and_stored_orientation():
    """Column direction toward the patient's right and slices ordered head to feet."""
    affine = np.eye(4)
    affine[:3, 0] = (0.0, 0.0, -3.0)
    affine[:3, 1] = (0.0, 0.5, 0.0)
    affine[:3, 2] = (-0.5, 0.0, 0.0)
    affine[:3, 3] = (100.0, -50.0, 20.0)
    vol = Volume(hu=np.zeros((3, 4, 4), np.float32), spacing_mm=(3.0, 0.5, 0.5), affine=affine)
    g = layer_geometry(vol)
    assert all(s > 0 for s in g.scale)  # displayed as stored: row 0 on top, column 0 left
    assert g.axes == ("-S", "+P", "-L")
    idx = np.array([[0, 0, 0], [2, 3, 1]], float)
    lps = vol.index_to_patient(idx)
    world = g.voxel_to_world(idx)
    # world axis k is the patient coordinate along the array axis' unit vector
    assert world[:, 0] == pytest.approx(-lps[:, 2])
    assert world[:, 1] == pytest.approx(lps[:, 1])
    assert world[:, 2] == pytest.approx(-lps[:, 0])
    assert g.world_to_voxel(world) == pytest.approx(idx)


def test_window_presets_are_the_usual_ones():
    """W/L values from memory, common practice, no source."""
    assert WINDOW_PRESETS["soft tissue"] == (400.0, 40.0)
    assert WINDOW_PRESETS["lung"] == (1500.0, -600.0)
    assert WINDOW_PRESETS["bone"] == (1800.0, 400.0)
    assert WINDOW_PRESETS["air"] == (400.0, -900.0)
    assert preset_limits("soft tissue") == (-160.0, 240.0)
    with pytest.raises(ValueError):
        contrast_limits(0.0, 40.0)
    with pytest.raises(KeyError):
        preset_limits("brain")


def test_manifest_sample_data_are_the_demo_series():
    """Every demo series (reconaudit.checker.demo.SERIES) is a sample, and nothing else is."""
    from npe2 import PluginManifest

    from reconaudit.checker import demo
    from reconaudit.plugin import _sample_data

    pm = PluginManifest.from_file(MANIFEST)
    keys = [s.key for s in pm.contributions.sample_data]
    assert sorted(keys) == sorted(demo.SERIES)
    assert set(_sample_data.SAMPLE_TITLES) == set(demo.SERIES)
    commands = {c.id: c.python_name for c in pm.contributions.commands}
    for sample in pm.contributions.sample_data:
        module, func = commands[sample.command].split(":")
        assert func == f"sample_{sample.key}" and callable(getattr(_sample_data, func))


def test_installed_plugin_offers_reader_samples_and_panel():
    """What `napari` sees once the package is installed: npe2's plugin manager finds all three."""
    from npe2 import PluginManager

    pm = PluginManager.instance()
    pm.discover()
    assert "reconaudit" in pm._manifests
    manifest = pm.get_manifest("reconaudit")
    assert manifest.contributions.readers and manifest.contributions.widgets
    assert {s.key for s in manifest.contributions.sample_data} >= {"torso_air_structure", "torso_limited_angle"}
