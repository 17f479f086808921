"""A small invented phantom with known geometry.

The phantom (our own, invented for these tests): a water cylinder (0 HU, radius 40 mm)
with a +300 HU rod (radius 8 mm) at a known place, in air (-1000 HU) inside a circular
field of view, and a small +200 HU blob floating in the air at a known place. Noise is
Gaussian with a fixed seed.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from reconaudit.checker.volume import Volume

NZ, NY, NX = 10, 128, 128
SPACING = (2.0, 1.0, 1.0)
ORIGIN_LPS = (-64.0, -70.0, -120.0)  # x, y, z of voxel [0, 0, 0]
ROD_YX = (64.0, 80.0)
ROD_R_PX = 8.0
ROD_SLICES = 5  # the rod fills slices 0-4; slices 5-9 are uniform water
BLOB_ZYX = (4.0, 18.0, 64.0)  # in the air, above the cylinder
BLOB_R_PX = 3.0


@dataclass(frozen=True)
class PhantomTruth:
    blob_zyx_vox: tuple[float, float, float] = BLOB_ZYX
    rod_yx_vox: tuple[float, float] = ROD_YX


def make_phantom(seed: int = 7, noise_hu: float = 12.0) -> Volume:
    """The test phantom described in the module docstring."""
    rng = np.random.default_rng(seed)
    z, y, x = np.mgrid[0:NZ, 0:NY, 0:NX].astype(np.float32)
    hu = np.full((NZ, NY, NX), -1000.0, dtype=np.float32)
    r_body = np.hypot(y - 72.0, x - 64.0)
    hu[:, r_body[0] <= 40.0] = 0.0
    r_rod = np.hypot(y[0] - ROD_YX[0], x[0] - ROD_YX[1])
    hu[:ROD_SLICES, r_rod <= ROD_R_PX] = 300.0
    blob = ((z - BLOB_ZYX[0]) * SPACING[0]) ** 2 + (y - BLOB_ZYX[1]) ** 2 + (x - BLOB_ZYX[2]) ** 2 <= (BLOB_R_PX ** 2)
    hu[blob] = 200.0
    hu += rng.normal(0.0, noise_hu, hu.shape).astype(np.float32)
    fov = np.hypot(y[0] - 63.5, x[0] - 63.5) > 62.0
    hu[:, fov] = -3024.0
    return Volume.from_array(hu, spacing_mm=SPACING, origin_mm=ORIGIN_LPS, padding_mask=fov,
                             metadata={"modality": "CT", "series_description": "test phantom P1"},
                             series_uid="1.2.826.0.1.3680043.8.498.1", source="test phantom")


# A lesion present only in the reference of a comparison pair (inside the water cylinder,
# away from the rod): a +60 HU ellipsoid of 6 mm radius.
LESION_ZYX = (7.0, 88.0, 48.0)
LESION_R_MM = 6.0
LESION_HU = 60.0


def make_pair() -> tuple[Volume, Volume]:
    """(test, reference): the test phantom twice with independent noise; the lesion only in the reference."""
    test = make_phantom(seed=11)
    reference = make_phantom(seed=7)
    z, y, x = np.mgrid[0:NZ, 0:NY, 0:NX].astype(np.float32)
    d2 = ((z - LESION_ZYX[0]) * SPACING[0]) ** 2 + ((y - LESION_ZYX[1]) * SPACING[1]) ** 2 + ((x - LESION_ZYX[2]) * SPACING[2]) ** 2
    reference.hu[d2 <= LESION_R_MM ** 2] += LESION_HU
    test.metadata["series_description"] = "test phantom P1, test reconstruction"
    reference.metadata["series_description"] = "test phantom P1, reference reconstruction"
    return test, reference
