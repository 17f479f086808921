"""The panel's jobs without a viewer: slice views, the regions cache, slice-only layer conversion."""
from __future__ import annotations

import threading
from types import SimpleNamespace

import numpy as np
import pytest

from reconaudit.plugin._geometry import layer_geometry
from reconaudit.plugin._jobs import RegionsCache, run_checks, slice_volume, volume_fingerprint
from reconaudit.plugin._reader import volume_from_layer

from plugin_phantom import BLOB_ZYX, ORIGIN_LPS, SPACING, make_phantom


def finish(job):
    try:
        while True:
            next(job)
    except StopIteration as stop:
        return stop.value


def test_one_slice_is_a_view_not_a_copy():
    vol = make_phantom()
    one = slice_volume(vol, 4)
    assert one.shape == (1,) + vol.shape[1:]
    assert np.shares_memory(one.hu, vol.hu)


def test_cached_regions_are_reused_and_give_the_same_results():
    vol = make_phantom()
    g = layer_geometry(vol)
    cache = RegionsCache()
    z = int(BLOB_ZYX[0])
    first = finish(run_checks(vol, ["air"], {}, g, "P1", z_index=z, regions_cache=cache, stop=threading.Event()))
    assert (cache.hits, cache.misses) == (0, 1)
    second = finish(run_checks(vol, ["air"], {}, g, "P1", z_index=z, regions_cache=cache))
    assert (cache.hits, cache.misses) == (1, 1)
    assert second.analysis.regions is first.analysis.regions
    fresh = finish(run_checks(vol, ["air"], {}, g, "P1", z_index=z))
    a, b = second.analysis.results["air"].record, fresh.analysis.results["air"].record
    assert a["flagged"] == b["flagged"] and len(a["structures"]) == len(b["structures"])
    assert np.array_equal(second.analysis.results["air"].overlays.labels, fresh.analysis.results["air"].overlays.labels)


def test_an_edited_slice_misses_the_cache():
    vol = make_phantom()
    key = volume_fingerprint(slice_volume(vol, 2))
    vol.hu[2, 60, 60] += 100.0  # as painting on the layer would
    assert volume_fingerprint(slice_volume(vol, 2)) != key
    assert volume_fingerprint(slice_volume(vol, 3)) != key


def test_cache_drops_the_oldest_beyond_its_byte_limit():
    vol = make_phantom()
    from reconaudit.checker.regions import find_regions

    cache = RegionsCache(size=10, max_bytes=1)  # room for one entry only
    r1, r2 = find_regions(slice_volume(vol, 1)), find_regions(slice_volume(vol, 2))
    cache.put(("a",), r1)
    cache.put(("b",), r2)
    assert cache.get(("a",)) is None and cache.get(("b",)) is r2


def test_foreign_layer_slice_reads_only_that_slice():
    """A lazy (dask) layer: building the one-slice Volume computes one chunk only."""
    da = pytest.importorskip("dask.array")
    vol = make_phantom()
    touched: list[int] = []

    def load(block, block_info=None):
        touched.append(block_info[0]["chunk-location"][0])
        return block

    lazy = da.from_array(vol.hu.astype(np.int16), chunks=(1,) + vol.shape[1:]).map_blocks(load, dtype=np.int16)
    layer = SimpleNamespace(data=lazy, metadata={}, name="lazy", scale=SPACING, translate=ORIGIN_LPS[::-1])
    one = volume_from_layer(layer, z_index=4)
    assert one.shape == (1,) + vol.shape[1:] and one.hu.dtype == np.float32
    assert touched == [4]
    assert one.index_to_patient([0, 0, 0]) == pytest.approx(vol.index_to_patient([4, 0, 0]))
    assert np.array_equal(one.hu[0], vol.hu[4].astype(np.int16).astype(np.float32))
