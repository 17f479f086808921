"""The fast paths of the shared regions against a plain full-resolution reference.

The reference below labels the whole volume with int32 labels, fills holes slice by
slice with ``ndimage.binary_fill_holes``, dilates with ``ndimage.maximum_filter`` over
the whole volume and takes the centroid with ``ndimage.center_of_mass``: the method of
the module docstring written the simplest way. The fast path must give the same masks.
"""
from __future__ import annotations

import numpy as np
import pytest
from reconaudit.checker.regions import (
    _is_table,
    bounding_box,
    centroid_of,
    fill_holes_in_plane,
    find_fov,
    find_regions,
    label_compact,
)
from reconaudit.checker.volume import Volume
from scipy import ndimage


def reference_regions(volume: Volume, body_threshold_hu: float = -500.0, margin_mm: float = 4.0):
    """(body, table, air, centroid) computed at full resolution with plain scipy calls."""
    hu = volume.hu
    fov, _ = find_fov(volume)
    dense = (hu > body_threshold_hu) & fov[None]
    lab, n = ndimage.label(dense)
    body = np.zeros(hu.shape, dtype=bool)
    table = np.zeros(hu.shape, dtype=bool)
    centroid = None
    if n:
        sizes = np.bincount(lab.ravel(), minlength=n + 1)
        sizes[0] = 0
        body_label = int(np.argmax(sizes))
        objects = ndimage.find_objects(lab)
        body_bbox = objects[body_label - 1]
        raw = lab == body_label
        body = np.stack([ndimage.binary_fill_holes(s) for s in raw])
        for i, sl in enumerate(objects, start=1):
            if i == body_label or sl is None or sizes[i] < 20:
                continue
            comp = lab[sl] == i
            if _is_table(sl, comp, body_bbox, hu.shape[0]):
                table[sl] |= comp
        centroid = tuple(float(c) for c in ndimage.center_of_mass(body))
    half = max(1, int(round(margin_mm / min(volume.spacing_mm[1:]))))
    grown = ndimage.maximum_filter(body | table, size=(1, 2 * half + 1, 2 * half + 1))
    air = ~grown & fov[None]
    if volume.padding_mask is not None:
        air &= ~volume.padding_mask[None]
    return body, table, air, centroid


def random_phantom(seed: int, nz: int = 6, n: int = 64) -> Volume:
    """A noisy slab with a random body (ellipse with holes), a table and small blobs."""
    rng = np.random.default_rng(seed)
    y, x = np.mgrid[0:n, 0:n]
    hu = np.full((nz, n, n), -1000.0, dtype=np.float32)
    cy, cx = n * rng.uniform(0.35, 0.5), n * rng.uniform(0.4, 0.6)
    ay, ax = n * rng.uniform(0.15, 0.25), n * rng.uniform(0.2, 0.35)
    for k in range(nz):
        grow = 1.0 + 0.05 * rng.standard_normal()
        body = ((y - cy) / (ay * grow)) ** 2 + ((x - cx) / (ax * grow)) ** 2 <= 1.0
        hu[k][body] = 40.0
        for _ in range(rng.integers(0, 4)):  # lungs and other holes
            hy, hx = cy + rng.uniform(-0.5, 0.5) * ay, cx + rng.uniform(-0.5, 0.5) * ax
            r = rng.uniform(1.5, 0.3 * ay)
            hu[k][(y - hy) ** 2 + (x - hx) ** 2 <= r * r] = -850.0
    if rng.random() < 0.8:  # a flat table under the body
        top = int(min(n - 6, cy + ay * 1.3 + 2))
        hu[:, top : top + 3, int(0.15 * n) : int(0.85 * n)] = 200.0
    for _ in range(rng.integers(0, 6)):  # small dense blobs in the air
        hu[rng.integers(0, nz), rng.integers(0, n), rng.integers(0, n)] = 300.0
    hu += rng.normal(0.0, 10.0, hu.shape).astype(np.float32)
    pad = (y - n / 2 + 0.5) ** 2 + (x - n / 2 + 0.5) ** 2 > (n / 2 - 1) ** 2
    if rng.random() < 0.5:
        hu[:, pad] = -3024.0
    else:
        pad = None
    return Volume.from_array(hu, spacing_mm=(2.0, 1.0, 1.0), padding_mask=pad)


@pytest.mark.parametrize("seed", range(12))
def test_fast_regions_equal_full_resolution_reference(seed: int) -> None:
    volume = random_phantom(seed)
    fast = find_regions(volume)
    body, table, air, centroid = reference_regions(volume)
    assert np.array_equal(fast.body, body)
    assert np.array_equal(fast.table, table)
    assert np.array_equal(fast.air, air)
    if centroid is None:
        assert fast.body_centroid_zyx_vox is None
    else:
        assert np.allclose(fast.body_centroid_zyx_vox, centroid, atol=1e-9)


def test_one_slice_volume_equals_reference() -> None:
    volume = random_phantom(3, nz=1, n=96)
    fast = find_regions(volume)
    body, table, air, _ = reference_regions(volume)
    assert np.array_equal(fast.body, body) and np.array_equal(fast.air, air)
    assert np.array_equal(fast.table, table)


def test_no_body_gives_empty_masks_and_full_air() -> None:
    hu = np.random.default_rng(2).normal(-1000.0, 5.0, (3, 32, 32)).astype(np.float32)  # noisy air only
    volume = Volume.from_array(hu, spacing_mm=(1.0, 1.0, 1.0))
    reg = find_regions(volume)
    assert not reg.body.any() and not reg.table.any()
    assert reg.fov.all() and reg.air.all()
    assert reg.body_centroid_zyx_vox is None and reg.notes


def test_label_compact_equals_ndimage_label_and_falls_back_beyond_uint16() -> None:
    rng = np.random.default_rng(5)
    mask = rng.random((4, 40, 40)) < 0.3
    lab, n = label_compact(mask)
    ref, n_ref = ndimage.label(mask)
    assert lab.dtype == np.uint16 and n == n_ref and np.array_equal(lab, ref)
    many = np.zeros((1, 600, 600), dtype=bool)
    many[0, ::2, ::2] = True  # 90 000 isolated pixels: more labels than uint16 holds
    lab, n = label_compact(many)
    assert n == 90000 and lab.max() == 90000


def test_bounding_box_and_boxed_centroid() -> None:
    mask = np.zeros((5, 20, 30), dtype=bool)
    mask[1:3, 4:9, 10:25] = True
    mask[4, 15, 2] = True
    box = bounding_box(mask)
    assert box == (slice(1, 5), slice(4, 16), slice(2, 25))
    assert bounding_box(np.zeros((2, 3, 4), dtype=bool)) is None
    assert centroid_of(mask, box) == centroid_of(mask)
    assert np.allclose(centroid_of(mask), ndimage.center_of_mass(mask))


def test_fill_holes_with_many_components_falls_back_and_stays_exact() -> None:
    mask = np.ones((1, 600, 600), dtype=bool)
    mask[0, 1:-1:2, 1:-1:2] = False  # about 90 000 one-pixel holes
    filled = fill_holes_in_plane(mask)
    assert filled.all()


def test_two_equal_components_pick_the_one_ndimage_labels_first() -> None:
    """Equal sizes: the body is the component ``ndimage.label`` numbers first (the first in
    z, y, x order), though the other one comes first in the footprint along z."""
    hu = np.random.default_rng(9).normal(-1000.0, 5.0, (3, 64, 64)).astype(np.float32)
    hu[0:2, 30:40, 5:15] = 40.0  # first in 3-D raster order (starts on slice 0)
    hu[1:3, 10:20, 40:50] = 40.0  # first in the footprint (smaller y)
    volume = Volume.from_array(hu, spacing_mm=(1.0, 1.0, 1.0))
    fast = find_regions(volume)
    body, table, air, _ = reference_regions(volume)
    assert fast.body[0, 35, 10] and not fast.body[1, 15, 45]
    assert np.array_equal(fast.body, body) and np.array_equal(fast.air, air)


# --------------------------------------------------------------------------- coarse grid
def _outline_band(mask: np.ndarray) -> np.ndarray:
    """Pixels within one pixel (8-neighbourhood, in-plane) of the outline of ``mask``."""
    st = np.zeros((3, 3, 3), dtype=bool)
    st[1] = ndimage.generate_binary_structure(2, 2)
    outline = (mask ^ ndimage.binary_erosion(mask, st)) | (ndimage.binary_dilation(mask, st) ^ mask)
    return ndimage.binary_dilation(outline, st)


@pytest.mark.parametrize("name", ["torso_clean", "qa_phantom"])
def test_coarse_body_stays_within_one_pixel_of_full_resolution(name: str) -> None:
    """The coarse-grid body against the full-resolution method on a demo torso and a demo
    phantom (the committed 256 x 256 x 16 series): every voxel where they differ lies
    within one pixel of the full-resolution outline; table, centroid and the recorded
    counts agree."""
    from pathlib import Path

    from reconaudit.checker.load import load_path

    folder = Path(__file__).resolve().parents[2] / "sample_volumes" / "fernhollow" / "20240611" / name
    volume = load_path(folder)[0]
    coarse = find_regions(volume, coarse=True)
    full = find_regions(volume, coarse=False)
    differ = coarse.body ^ full.body
    assert not (differ & ~_outline_band(full.body)).any()
    assert differ.sum() <= 0.001 * full.body.sum()
    assert (coarse.table ^ full.table).sum() <= 0.01 * max(1, full.table.sum())
    assert np.allclose(coarse.body_centroid_zyx_vox, full.body_centroid_zyx_vox, atol=0.5)
    facts = coarse.facts()
    assert facts["body_voxels"] == int(coarse.body.sum())
    assert facts["table_voxels"] == int(coarse.table.sum())
    assert facts["air_voxels"] == int(coarse.air.sum())
    assert np.allclose(coarse.body_centroid_zyx_vox, centroid_of(coarse.body), atol=1e-9)


def expected_air_given_body(volume, fast):
    """The field of view less the padding, outside body and table grown by the 4 mm
    margin (``maximum_filter`` reference)."""
    half = max(1, int(round(4.0 / min(volume.spacing_mm[1:]))))
    grown = ndimage.maximum_filter(fast.body | fast.table, size=(1, 2 * half + 1, 2 * half + 1))
    expected_air = ~grown & fast.fov[None]
    if volume.padding_mask is not None:
        expected_air &= ~volume.padding_mask[None]
    return expected_air


def test_coarse_grid_on_a_large_random_phantom_keeps_outline_and_air_exact_given_body() -> None:
    """A 256 x 256 random phantom (uses the coarse grid by default): the body outline is
    within one pixel of the full-resolution one, and the air is exactly the field of view
    outside body and table grown by the margin (``maximum_filter`` reference)."""
    volume = random_phantom(4, nz=5, n=256)
    fast = find_regions(volume)
    body, table, _, _ = reference_regions(volume)
    assert not ((fast.body ^ body) & ~_outline_band(body)).any()
    assert np.array_equal(fast.air, expected_air_given_body(volume, fast))


def test_block_counts_equal_plain_block_sums() -> None:
    rng = np.random.default_rng(11)
    hu = rng.normal(-500.0, 300.0, (3, 16, 24)).astype(np.float32)
    fov = rng.random((16, 24)) > 0.2
    from reconaudit.checker.regions import block_counts

    dense = (hu > -500.0) & fov[None]
    expected = dense.reshape(3, 4, 4, 6, 4).sum(axis=(2, 4))
    assert np.array_equal(block_counts(hu, fov, -500.0, chunk=2), expected)


def test_packed_dilation_equals_maximum_filter() -> None:
    from reconaudit.checker.regions import _or_bits, _packed, _unpacked

    rng = np.random.default_rng(12)
    for nx in (1, 7, 64, 100, 130):
        for half in (1, 4, 63, 64, 70):
            mask = rng.random((2, 3, nx)) > 0.95
            expected = ndimage.maximum_filter(mask, size=(1, 1, 2 * half + 1))
            assert np.array_equal(_unpacked(_or_bits(_packed(mask), half), nx), expected)


def test_fov_slices_pick_a_slice_whose_padding_differs() -> None:
    """The padding screen reads first, middle and last slices, and any slice whose
    padding differs from the first slice's; the field of view then matches the plain
    every-slice rule."""
    from reconaudit.checker.regions import fov_slices

    n, nz = 64, 9
    inside = _disc_mask(n, 31.5, 31.5, 30)
    hu = np.where(inside, -1000.0, -3024.0).astype(np.float32)[None].repeat(nz, 0)
    hu[6, 20:28, 0:8] = -1000.0  # one slice has fewer padded pixels in a corner
    assert set(fov_slices(hu).tolist()) == {0, 4, 6, 8}
    fov, _ = find_fov(Volume.from_array(hu))
    expected = ndimage.binary_fill_holes(~(hu < -1500.0).all(axis=0))
    assert np.array_equal(fov, expected)


def _disc_mask(n: int, cy: float, cx: float, r: float) -> np.ndarray:
    y, x = np.mgrid[0:n, 0:n]
    return (y - cy) ** 2 + (x - cx) ** 2 <= r * r


@pytest.mark.parametrize("seed", range(3))
def test_one_slice_512_volume_on_the_coarse_grid(seed: int) -> None:
    """The viewer's one-slice volume at 512 x 512 takes the coarse grid: body and table
    within one pixel of the full-resolution outline, air exact given them."""
    from reconaudit.checker.regions import uses_coarse_grid

    volume = random_phantom(seed, nz=1, n=512)
    assert uses_coarse_grid(volume.shape)
    fast = find_regions(volume)
    body, table, _, _ = reference_regions(volume)
    assert not ((fast.body ^ body) & ~_outline_band(body)).any()
    assert not ((fast.table ^ table) & ~_outline_band(table)).any()
    assert np.array_equal(fast.air, expected_air_given_body(volume, fast))


# --------------------------------------------------------------------------- exact coarse grid
def _unpack(pat: np.ndarray) -> np.ndarray:
    """Block patterns (z, by, bx) as the bool mask (z, 4 by, 4 bx) they stand for."""
    bits = (pat[..., None] >> np.arange(16, dtype=np.uint16)) & 1
    nz, by, bx = pat.shape
    return bits.reshape(nz, by, bx, 4, 4).transpose(0, 1, 3, 2, 4).reshape(nz, 4 * by, 4 * bx).astype(bool)


def _same_partition(a: np.ndarray, b: np.ndarray) -> bool:
    """Whether two label volumes split the same voxels into the same groups."""
    if not np.array_equal(a > 0, b > 0):
        return False
    pairs = np.unique(np.stack([a[a > 0], b[b > 0]]), axis=1)
    return pairs.shape[1] == np.unique(pairs[0]).size == np.unique(pairs[1]).size


@pytest.mark.parametrize("density", [0.3, 0.5, 0.6, 0.75, 0.95])
def test_pattern_components_equal_full_resolution_labelling(density: float) -> None:
    """Components found on the 4 x 4 block patterns against ``ndimage.label`` of the
    unpacked mask (6-connected in 3-D, and 4-connected per slice): the same groups."""
    from reconaudit.checker.regions import (
        _INPLANE,
        _nodes_of,
        block_patterns,
        pattern_components,
    )

    rng = np.random.default_rng(int(density * 100))
    hu = np.where(rng.random((4, 32, 40)) < density, 100.0, -1000.0).astype(np.float32)
    fov = np.ones((32, 40), dtype=bool)
    pat = block_patterns(hu, fov, -500.0)
    assert np.array_equal(_unpack(pat), hu > -500.0)
    for in_plane in (False, True):
        comps = pattern_components(pat, in_plane=in_plane)
        ref, _ = ndimage.label(hu > -500.0, structure=_INPLANE if in_plane else None)
        ours = np.zeros(hu.shape, dtype=np.int64)
        z, y, x = np.nonzero(hu > -500.0)
        blocks = (z * 8 + y // 4) * 10 + x // 4
        ours[z, y, x] = 1 + comps.final[_nodes_of(comps, pat.reshape(-1), blocks, (y % 4) * 4 + x % 4)]
        assert _same_partition(ours, ref)


@pytest.mark.parametrize("density", [0.2, 0.45, 0.6, 0.8])
def test_hole_filling_on_patterns_equals_binary_fill_holes(density: float) -> None:
    from reconaudit.checker.regions import block_patterns, fill_holes_in_patterns

    rng = np.random.default_rng(int(density * 1000))
    mask = rng.random((3, 24, 28)) < density
    mask[1, 4:20, 4:24] = True
    mask[1, 8:16, 8:20] = False  # one big hole and many small ones
    pat = block_patterns(np.where(mask, 0.0, -1000.0).astype(np.float32), np.ones((24, 28), dtype=bool), -500.0)
    expected = np.stack([ndimage.binary_fill_holes(m) for m in mask])
    assert np.array_equal(_unpack(fill_holes_in_patterns(pat)), expected)


def _assert_coarse_equals_full(volume: Volume) -> None:
    coarse = find_regions(volume, coarse=True)
    full = find_regions(volume, coarse=False)
    assert np.array_equal(coarse.body, full.body)
    assert np.array_equal(coarse.table, full.table)
    assert np.array_equal(coarse.air, full.air)
    assert coarse.facts() == full.facts()
    if full.body_centroid_zyx_vox is not None:
        assert np.allclose(coarse.body_centroid_zyx_vox, full.body_centroid_zyx_vox, atol=1e-9)


DEMO_SERIES = ["compare_reference", "compare_test", "qa_phantom", "qa_phantom_nonlinear", "torso_air_structure",
               "torso_clean", "torso_limited_angle", "torso_metal", "torso_sparse_views"]


@pytest.mark.parametrize("name", DEMO_SERIES)
def test_coarse_grid_equals_full_resolution_on_demo_series(name: str) -> None:
    """Body, table and air from the block patterns equal the full-resolution method voxel
    for voxel on every demo series (among them structures a few pixels apart: the table
    under the body of the sparse-view and limited-angle torsos)."""
    from pathlib import Path

    from reconaudit.checker.load import load_path

    folder = Path(__file__).resolve().parents[2] / "sample_volumes" / "fernhollow" / "20240611" / name
    _assert_coarse_equals_full(load_path(folder)[0])


def test_coarse_grid_equals_full_resolution_on_benchmark_torso() -> None:
    """The benchmark-like 512 x 512 torso (noise SD 12 HU) at 6 slices."""
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).resolve().parents[2] / "benchmarks"))
    import harness

    _assert_coarse_equals_full(harness.benchmark_volume(6))


@pytest.mark.parametrize("seed", range(6))
def test_coarse_grid_equals_full_resolution_on_random_phantoms(seed: int) -> None:
    """256 x 256 random phantoms with specks, holes and a table close to the body."""
    _assert_coarse_equals_full(random_phantom(seed, nz=4, n=256))


def test_face_touch_equals_pixel_pairs() -> None:
    """The shifted-mask face test against the pixel pairs it stands for, on all faces."""
    from reconaudit.checker.regions import _FACE_PAIRS, _FACE_SHIFT, _touch

    rng = np.random.default_rng(13)
    pi = (rng.integers(0, 65536, 5000) & rng.integers(0, 65536, 5000)).astype(np.uint16)
    pj = (rng.integers(0, 65536, 5000) & rng.integers(0, 65536, 5000)).astype(np.uint16)
    for face, pairs in _FACE_PAIRS.items():
        expected = np.zeros(pi.size, dtype=bool)
        for a, b in pairs:
            expected |= ((pi >> a) & (pj >> b) & 1).astype(bool)
        got = _touch(pi, pj, _FACE_SHIFT[face])
        assert np.array_equal(got, expected) and 0 < got.sum() < got.size


def test_graph_components_equal_scipy_connected_components():
    """Against scipy.sparse.csgraph.connected_components (a general-purpose reference
    library): the same number of components and the same numbering, on random sparse
    graphs, paths (long chains) and graphs without edges."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    from reconaudit.checker.regions import graph_components

    rng = np.random.default_rng(11)
    cases = []
    for n, m in [(1, 0), (5, 0), (50, 20), (500, 300), (2000, 1900), (3000, 6000)]:
        cases.append((n, rng.integers(0, n, m), rng.integers(0, n, m)))
    chain = rng.permutation(1000)
    cases.append((1000, chain[:-1], chain[1:]))  # one long path in random node order
    for n, u, v in cases:
        want_n, want = connected_components(coo_matrix((np.ones(u.size), (u, v)), shape=(n, n)), directed=False)
        got_n, got = graph_components(n, u, v)
        assert got_n == want_n
        assert np.array_equal(got, want)


def test_pattern_tables_equal_labelling_each_pattern_alone() -> None:
    """Every table row equals a 4 x 4 ``ndimage.label`` (4-connected) of that pattern
    alone, for all patterns of up to three set pixels and a random sample of the rest."""
    from reconaudit.checker.regions import pattern_tables

    t = pattern_tables()
    codes = np.arange(65536)
    few = codes[np.array([bin(c).count("1") <= 3 for c in codes])]
    sample = np.unique(np.concatenate([few, np.random.default_rng(5).integers(0, 65536, 3000), [0, 65535, 0x5A5A, 0xA5A5]]))
    for code in sample:
        pix = ((code >> np.arange(16)) & 1).astype(bool)
        lab, n = ndimage.label(pix.reshape(4, 4))
        lab = lab.reshape(16)
        assert np.array_equal(t.pixels[code], pix)
        assert t.pop[code] == pix.sum() and t.nsub[code] == n
        assert np.array_equal(t.sub[code], lab)
        expected = [int(sum(1 << i for i in range(16) if lab[i] == k + 1)) for k in range(8)]
        assert t.submask[code].tolist() == expected


def test_pattern_tables_equal_one_ndimage_label_of_every_pattern() -> None:
    """All 65536 rows of the tables equal ``ndimage.label`` (4-connected, each 4 x 4 block
    alone) of the stacked patterns: the pieces grown by bit shifts are the same pieces,
    numbered the same way."""
    from reconaudit.checker.regions import pattern_tables

    t = pattern_tables()
    n = 65536
    pix = ((np.arange(n)[:, None] >> np.arange(16)) & 1).astype(bool)
    st = np.zeros((3, 3, 3), dtype=bool)
    st[1] = ndimage.generate_binary_structure(2, 1)
    lab, _ = ndimage.label(pix.reshape(n, 4, 4), structure=st)
    lab = lab.reshape(n, 16)
    first = lab[np.arange(n), pix.argmax(axis=1)]
    local = np.where(pix, lab - (first - 1)[:, None], 0)  # labels 1.. within each pattern
    assert np.array_equal(t.pixels, pix)
    assert np.array_equal(t.sub, local)
    assert np.array_equal(t.nsub, local.max(axis=1))
    for k in range(8):
        weights = (local == k + 1) * (1 << np.arange(16))
        assert np.array_equal(t.submask[:, k], weights.sum(axis=1))


@pytest.mark.parametrize("table_lookup", [False, True])
def test_count_and_centroid_of_patterns_equal_the_unpacked_mask(table_lookup: bool, monkeypatch) -> None:
    """Voxel count and centre of mass from the block patterns (population counts of block
    rows and columns) equal ``centroid_of`` of the unpacked mask placed in the volume,
    with numpy's population count and with the look-up table used without it."""
    from reconaudit.checker import regions

    if table_lookup:
        monkeypatch.delattr(np, "bitwise_count", raising=False)
    rng = np.random.default_rng(11)
    pat = rng.integers(0, 65536, size=(5, 6, 7), dtype=np.uint16)
    pat[rng.random(pat.shape) < 0.3] = regions.FULL
    pat[rng.random(pat.shape) < 0.2] = 0
    cbox = (slice(3, 8), slice(2, 8), slice(1, 8))
    volume = np.zeros((10, 40, 40), dtype=bool)
    volume[3:8, 8:32, 4:32] = _unpack(pat)
    count, centre = regions._count_and_centroid(pat, cbox)
    assert count == int(np.count_nonzero(volume))
    assert np.allclose(centre, centroid_of(volume), rtol=0, atol=1e-12)
    assert regions._count_and_centroid(np.zeros_like(pat), cbox) == (0, None)
