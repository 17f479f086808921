"""Checks of the air analysis against the Hounsfield scale and against known truth.

The phantoms are made here (not the demo scenario): an invented torso of water with
lungs, arms, a patient table, a foam mattress and a cable, in air, with spatially
correlated noise (white noise band-pass filtered like a filtered back-projection: the
noise power peaks at mid frequencies and vanishes at zero frequency and at the Nyquist
frequency, common practice, no source) and a Gaussian blur standing in for the system's
resolution. Structures of known size, CT number and position are inserted into the air.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import ndimage

from reconaudit.checker.analyses import air
from reconaudit.checker.regions import find_regions
from reconaudit.checker.volume import Volume

AIR_HU = -1000.0  # Hounsfield scale: air -1000 HU by definition
WATER_HU = 0.0  # Hounsfield scale: water 0 HU by definition


# ------------------------------------------------------------------ phantom builders
def correlated_noise(shape: tuple[int, int, int], sd: float, seed: int) -> np.ndarray:
    """Band-pass (FBP-like) correlated noise of standard deviation ``sd``."""
    rng = np.random.default_rng(seed)
    w = rng.standard_normal(shape).astype(np.float32)
    fine = ndimage.gaussian_filter(w, (0.6, 0.9, 0.9))
    coarse = ndimage.gaussian_filter(w, (0.6, 2.2, 2.2))
    n = fine - coarse  # difference of Gaussians: zero at zero frequency, ramp-like, then falls
    return (n * (sd / n.std())).astype(np.float32)


def ellipsoid_fraction(shape, centre_zyx_mm, semi_zyx_mm, spacing, supersample: int = 3) -> np.ndarray:
    """Fraction of each voxel inside an ellipsoid (supersampled partial volume)."""
    dz, dy, dx = spacing
    cz, cy, cx = centre_zyx_mm
    az, ay, ax = semi_zyx_mm
    out = np.zeros(shape, dtype=np.float32)
    z0 = max(0, int((cz - az) / dz) - 1)
    z1 = min(shape[0], int((cz + az) / dz) + 2)
    y0 = max(0, int((cy - ay) / dy) - 1)
    y1 = min(shape[1], int((cy + ay) / dy) + 2)
    x0 = max(0, int((cx - ax) / dx) - 1)
    x1 = min(shape[2], int((cx + ax) / dx) + 2)
    off = (np.arange(supersample) + 0.5) / supersample - 0.5
    zz = (np.arange(z0, z1)[:, None] + off[None]).ravel() * dz
    yy = (np.arange(y0, y1)[:, None] + off[None]).ravel() * dy
    xx = (np.arange(x0, x1)[:, None] + off[None]).ravel() * dx
    inside = (
        ((zz[:, None, None] - cz) / az) ** 2
        + ((yy[None, :, None] - cy) / ay) ** 2
        + ((xx[None, None, :] - cx) / ax) ** 2
    ) <= 1.0
    s = supersample
    frac = inside.reshape(z1 - z0, s, y1 - y0, s, x1 - x0, s).mean(axis=(1, 3, 5))
    out[z0:z1, y0:y1, x0:x1] = frac
    return out


def ellipse_mask(ny: int, nx: int, cy: float, cx: float, ay: float, ax: float) -> np.ndarray:
    y, x = np.mgrid[0:ny, 0:nx]
    return ((y - cy) / ay) ** 2 + ((x - cx) / ax) ** 2 <= 1.0


def torso_phantom(
    nz: int = 40,
    n: int = 160,
    spacing: tuple[float, float, float] = (2.0, 1.25, 1.25),
    noise_sd: float = 12.0,
    seed: int = 1,
    arms: bool = True,
    table: bool = True,
    mattress: bool = True,
    cable: bool = True,
    padding_hu: float | None = None,
    inserts: list[tuple[tuple[float, float, float], tuple[float, float, float], float]] = (),
) -> Volume:
    """An invented torso in air; ``inserts``: (centre_zyx_mm, semi_zyx_mm, HU) in the air.

    In-plane coordinates in pixels of an ``n`` x ``n`` image (FOV circle of radius
    0.49 n); the body is centred slightly anterior so that the table fits below it.
    """
    dz, dy, dx = spacing
    img = np.full((n, n), AIR_HU, dtype=np.float32)
    c = n / 2.0
    body = ellipse_mask(n, n, c - 0.06 * n, c, 0.20 * n, 0.28 * n)
    img[body] = WATER_HU
    for side in (-1, 1):
        lung = ellipse_mask(n, n, c - 0.08 * n, c + side * 0.12 * n, 0.10 * n, 0.07 * n)
        img[lung] = -820.0
        if arms:
            arm = ellipse_mask(n, n, c - 0.04 * n, c + side * 0.38 * n, 0.06 * n, 0.045 * n)
            img[arm] = 40.0
    if mattress:
        mat = ellipse_mask(n, n, c + 0.17 * n, c, 0.045 * n, 0.30 * n) & ~body
        img[mat] = -880.0
    if table:
        y, x = np.mgrid[0:n, 0:n]
        slab = (y >= c + 0.205 * n) & (y < c + 0.24 * n) & (np.abs(x - c) < 0.33 * n)
        img[slab] = 250.0
    if cable:
        img[ellipse_mask(n, n, c - 0.34 * n, c + 0.22 * n, 2.0 / dy, 2.0 / dx)] = 300.0
    vol = np.repeat(img[None], nz, axis=0)
    for centre, semi, value in inserts:
        f = ellipsoid_fraction(vol.shape, centre, semi, spacing)
        vol += f * (value - vol)
    vol = ndimage.gaussian_filter(vol, (0.4, 0.6, 0.6))
    vol += correlated_noise(vol.shape, noise_sd, seed)
    padding = None
    if padding_hu is not None:
        fov = ellipse_mask(n, n, c - 0.5, c - 0.5, 0.49 * n, 0.49 * n)
        vol[:, ~fov] = padding_hu
        padding = ~fov
    return Volume.from_array(vol, spacing_mm=spacing, origin_mm=(-100.0, -100.0, 0.0), padding_mask=padding)
