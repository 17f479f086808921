"""Checks of the shared regions against the Hounsfield scale: water is 0 HU and air is
-1000 HU by definition. A generated water cylinder on a table, in air, with noise: the
body region measures water, the air region measures air, and the table is found."""
from __future__ import annotations

import numpy as np

from reconaudit.checker.regions import find_regions
from reconaudit.checker.volume import Volume


def water_cylinder_on_table(nz: int = 12, n: int = 128, noise_sd: float = 10.0, seed: int = 2) -> Volume:
    """Invented phantom: a 70 mm water cylinder resting above a flat 250 HU table."""
    rng = np.random.default_rng(seed)
    y, x = np.mgrid[0:n, 0:n]
    img = np.full((n, n), -1000.0, dtype=np.float32)
    img[(y - 54) ** 2 + (x - 64) ** 2 <= 35**2] = 0.0
    img[(y >= 96) & (y < 101) & (np.abs(x - 64) < 50)] = 250.0
    vol = np.repeat(img[None], nz, axis=0) + rng.normal(0.0, noise_sd, (nz, n, n)).astype(np.float32)
    return Volume.from_array(vol, spacing_mm=(2.0, 1.0, 1.0))


def test_body_is_water_and_air_is_air():
    """Hounsfield scale (definition): water 0 HU, air -1000 HU. The body region's mean
    (inside, away from its edge) is 0 +/- 2 HU and the air region's mean is -1000 +/- 2 HU."""
    vol = water_cylinder_on_table()
    regions = find_regions(vol)
    inner = regions.body & (vol.hu > -500)  # the body mask includes its partial-volume rim
    assert abs(float(vol.hu[inner].mean()) - 0.0) <= 2.0
    assert abs(float(vol.hu[regions.air].mean()) - (-1000.0)) <= 2.0
    # the air lies outside body and table grown by the margin
    assert not (regions.air & regions.body).any() and not (regions.air & regions.table).any()


def test_table_found_as_table():
    """Common practice, no source: the patient table is a flat object under the patient
    that runs through every slice. It is found as the table, not as body or air."""
    vol = water_cylinder_on_table()
    regions = find_regions(vol)
    slab = np.zeros(vol.shape, dtype=bool)
    slab[:, 96:101, 20:108] = True
    assert regions.table[slab].mean() > 0.95
    assert not regions.body[slab].any()
    assert regions.has_body
    cz, cy, cx = regions.body_centroid_zyx_vox
    assert abs(cy - 54) < 1.0 and abs(cx - 64) < 1.0
