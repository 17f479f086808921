"""The slice-local passes of the shared regions on several threads give the single-thread
masks, and the arithmetic block-row words equal the look-up table they replace."""
from __future__ import annotations

import threading

import numpy as np
import pytest
from reconaudit.checker import regions as R
from reconaudit.checker.volume import Volume

from test_regions_speedup import reference_regions


@pytest.mark.parametrize("nz, parts, multiple", [(400, 2, 8), (7, 2, 1), (33, 3, 16), (1, 2, 1), (16, 5, 4)])
def test_z_ranges_cover_every_slice_once_on_multiples(nz: int, parts: int, multiple: int) -> None:
    ranges = R.z_ranges(nz, parts, multiple)
    assert len(ranges) <= parts
    assert ranges[0][0] == 0 and ranges[-1][1] == nz
    for (a, b), (c, _) in zip(ranges, ranges[1:]):
        assert b == c and b % multiple == 0 and a < b


def test_over_z_runs_each_slice_once_on_two_threads_and_raises_errors() -> None:
    seen = np.zeros(100, dtype=np.int64)
    names = set()

    def work(a: int, b: int) -> None:
        seen[a:b] += 1
        names.add(threading.current_thread().name)

    R.over_z(work, 100, min_slices=8, threads=2)
    assert np.all(seen == 1)
    assert len(names) == 2  # the calling thread and one worker

    def fails(a: int, b: int) -> None:
        if a > 0:
            raise ValueError("slab failed")

    with pytest.raises(ValueError, match="slab failed"):
        R.over_z(fails, 100, min_slices=8, threads=2)


def test_row_words_by_multiply_equal_the_table_for_every_pattern() -> None:
    pat = np.arange(1 << 16, dtype=np.uint16).reshape(1, 256, 256)
    words = np.zeros((1, 256, R.BLOCK, 256), dtype=np.uint32)
    R._paint_words(words, pat, 0, 1, empty=True)
    for r in range(R.BLOCK):
        assert np.array_equal(words[:, :, r], R._ROW_WORDS[(pat >> (4 * r)) & 0xF])


def _torso_slab(nz: int = 40, n: int = 256, seed: int = 5) -> Volume:
    """A noisy elliptical body with lungs, a table and specks (on the coarse grid's size)."""
    rng = np.random.default_rng(seed)
    y, x = np.mgrid[0:n, 0:n]
    hu = np.full((nz, n, n), -1000.0, dtype=np.float32)
    for k in range(nz):
        a = 0.3 * n * (1.0 + 0.1 * np.sin(k / 5.0))
        hu[k][((y - 0.45 * n) / (0.7 * a)) ** 2 + ((x - 0.5 * n) / a) ** 2 <= 1.0] = 40.0
        hu[k][(y - 0.42 * n) ** 2 + (x - 0.4 * n) ** 2 <= (0.05 * n) ** 2] = -850.0
    hu[:, int(0.72 * n) : int(0.72 * n) + 4, int(0.1 * n) : int(0.9 * n)] = 200.0
    hu[rng.integers(0, nz, 30), rng.integers(0, n, 30), rng.integers(0, n, 30)] = 300.0
    hu += rng.normal(0.0, 15.0, hu.shape).astype(np.float32)
    pad = (y - n / 2 + 0.5) ** 2 + (x - n / 2 + 0.5) ** 2 > (n / 2 - 1) ** 2
    hu[:, pad] = -3024.0
    return Volume.from_array(hu, spacing_mm=(2.0, 1.0, 1.0), padding_mask=pad)


def test_two_threads_give_the_single_thread_and_full_resolution_masks(monkeypatch) -> None:
    volume = _torso_slab()
    monkeypatch.setattr(R, "REGIONS_THREADS", 1)
    one = R.find_regions(volume)
    monkeypatch.setattr(R, "REGIONS_THREADS", 2)
    two = R.find_regions(volume)
    assert R.uses_coarse_grid(volume.hu.shape)
    for name in ("fov", "body", "table", "air"):
        assert np.array_equal(getattr(one, name), getattr(two, name)), name
    assert one.facts() == two.facts()
    assert one.body_centroid_zyx_vox == two.body_centroid_zyx_vox
    assert two.table.any() and two.air.any()
    body, table, air, centroid = reference_regions(volume)
    assert np.array_equal(two.body, body) and np.array_equal(two.table, table) and np.array_equal(two.air, air)
    assert np.allclose(two.body_centroid_zyx_vox, centroid, atol=1e-9)


def test_padding_screen_on_slabs_equals_the_plain_screen_on_a_non_square_volume(monkeypatch) -> None:
    rng = np.random.default_rng(3)
    hu = rng.normal(-1000.0, 50.0, (40, 52, 70)).astype(np.float32)
    hu[:, :5, :] = -3024.0
    hu[17, :, 60:] = -3024.0
    monkeypatch.setattr(R, "REGIONS_THREADS", 2)
    code = R._padding_code(hu, -1500.0, -3024.0)
    r, c = R.FOV_SCREEN_ROWS, R.FOV_SCREEN_COLS
    samples = np.concatenate([hu[:, ::r, ::c].reshape(40, -1), hu[:, -1, ::c], hu[:, ::c, 0], hu[:, ::c, -1]], axis=1)
    expected = (samples < -1500.0).astype(np.uint8) + 2 * (samples == np.float32(-3024.0)).astype(np.uint8)
    assert np.array_equal(code, expected)
    assert 17 in R.fov_slices(hu, -1500.0, -3024.0)


@pytest.mark.parametrize("threads", [1, 2])
def test_find_objects_on_slabs_equal_ndimage(threads: int, monkeypatch) -> None:
    from scipy import ndimage

    rng = np.random.default_rng(threads)
    lab = rng.integers(0, 9, (48, 20, 30)).astype(np.uint8)
    lab[lab > 5] = 0
    lab[:, :, 29] = 0
    monkeypatch.setattr(R, "REGIONS_THREADS", threads)
    assert R.find_objects_over_z(lab, 8) == ndimage.find_objects(lab, max_label=8)


def test_label_pixel_counts_on_slabs_equal_unpacked_counts(monkeypatch) -> None:
    rng = np.random.default_rng(4)
    pat = rng.integers(0, 1 << 16, (40, 6, 7)).astype(np.uint16)
    pat[rng.random(pat.shape) < 0.4] = R.FULL
    lab = rng.integers(0, 5, pat.shape).astype(np.int32)
    monkeypatch.setattr(R, "REGIONS_THREADS", 2)
    got = R._label_pixel_counts(lab, pat, 4)
    pixels = R.pattern_tables().pop[pat].astype(np.int64)
    expected = np.array([0] + [int(pixels[lab == i].sum()) for i in range(1, 5)])
    assert np.array_equal(got, expected)


def test_over_z_inside_a_slab_stays_on_the_slab_thread() -> None:
    inner_threads: dict[int, set] = {}
    lock = threading.Lock()

    def inner(a: int, b: int) -> None:
        with lock:
            inner_threads.setdefault(threading.get_ident(), set()).add((a, b))

    def outer(a: int, b: int) -> None:
        R.over_z(inner, 64, min_slices=8, threads=2)

    R.over_z(outer, 64, min_slices=8, threads=2)
    assert len(inner_threads) == 2  # one per outer slab, none spawned inside
    assert all(ranges == {(0, 64)} for ranges in inner_threads.values())
