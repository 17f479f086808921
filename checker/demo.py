"""The demo scenario: one night of reconstructions at an invented imaging centre.

The *Fernhollow Imaging Centre* (invented) scans its two-module water QA phantom
"FH-QA2" and its anthropomorphic torso phantom "FH-T1" (both invented) every night in
"CT room 3" and reconstructs them several ways. :func:`make_volume` simulates each of
those series from scratch, deterministically (fixed seeds):

1. a phantom is drawn slice by slice as a map of linear attenuation (2x2 supersampled,
   so edges carry partial-volume pixels);
2. its parallel-beam projections are computed with scikit-image's ``radon``; small
   extra objects (metal implants, structures in the air, a lesion) are added to the
   sinogram from the analytic projection of an ellipse;
3. quantum noise: detector counts are Poisson with mean ``I0 exp(-p)``, and the measured
   line integral is ``-log(counts / I0)`` (counts below one are set to one, as a
   starved detector reading is clipped);
4. the slice is reconstructed by filtered back-projection (scikit-image ``iradon``,
   Shepp-Logan filter for the "STANDARD" kernel), converted to HU with the water
   attenuation, and the pixels outside the reconstruction circle are written as padding
   (-3024 HU, ``Volume.padding_mask``) as scanners do.

A 3-D object is a stack of 2-D sections; every slice is simulated on its own.

Coordinates: the image is [row, column] = [y, x] with x to the patient's left and y to
the patient's back (DICOM LPS, ``Volume.from_array``); object positions below are in mm
from the centre of the field of view. The projection angle ``theta`` of scikit-image
measures the detector direction counter-clockwise on screen from the image row, so the
rays of view ``theta`` run at the in-plane angle ``(theta + 90) mod 180`` of the project
convention (DEVELOPERS.md).

References
----------
A. C. Kak and M. Slaney, Principles of Computerized Tomographic Imaging, IEEE Press,
1988 (filtered back-projection, analytic projection of an ellipse, Fourier slice
theorem, view aliasing, limited-angle artefacts).
L. I. Rudin, S. Osher and E. Fatemi, "Nonlinear total variation based noise removal
algorithms", Physica D 60, 1992; A. Chambolle, "An algorithm for total variation
minimization and applications", J. Math. Imaging Vis. 20, 2004 (the nonlinear
reconstruction).
"""
from __future__ import annotations

from dataclasses import dataclass, replace
from functools import lru_cache
from pathlib import Path
from typing import Callable, Sequence

import numpy as np

from .volume import Volume

#: The invented scenario (no real site, product or person).
CENTRE_NAME = "Fernhollow Imaging Centre"
SCANNER_ROOM = "CT room 3"
SCANNER_MODEL = "FH-SIM-1"
SCAN_DATE = "20240611"
QA_PHANTOM_NAME = "FH-QA2"
TORSO_PHANTOM_NAME = "FH-T1"

#: Every series of the scenario: name -> short description.
SERIES: dict[str, str] = {
    "qa_phantom": "FH-QA2 water phantom (rod module + uniform module), FBP STANDARD",
    "qa_phantom_nonlinear": "FH-QA2, same scan, nonlinear (TV-regularised) reconstruction",
    "torso_clean": "FH-T1 torso with arms, table, mattress and cable, FBP STANDARD",
    "torso_limited_angle": "FH-T1 from a 120 degree arc of views (missing wedge)",
    "torso_sparse_views": "FH-T1 from 36 views over 180 degrees (view aliasing)",
    "torso_metal": "FH-T1 with two dense metal implants (beam hardening, starvation)",
    "torso_air_structure": "FH-T1 with two small structures floating in the air beside it",
    "compare_reference": "FH-T1 reference reconstruction (FBP) for comparison",
    "compare_test": "FH-T1 test reconstruction: anterior wall moved out, lesion missing",
}

#: SeriesDescription written into the DICOM files (<= 64 characters, the LO limit).
DICOM_DESCRIPTIONS: dict[str, str] = {
    "qa_phantom": "QA2 water phantom, daily QA",
    "qa_phantom_nonlinear": "QA2 water phantom, daily QA, TV recon",
    "torso_clean": "Torso FH-T1, clean FBP",
    "torso_limited_angle": "Torso FH-T1, 120 deg arc",
    "torso_sparse_views": "Torso FH-T1, 36 views",
    "torso_metal": "Torso FH-T1, two metal implants",
    "torso_air_structure": "Torso FH-T1, structures in air",
    "compare_reference": "Torso FH-T1, reference FBP",
    "compare_test": "Torso FH-T1, test recon for comparison",
}

#: Hounsfield scale: water 0 HU, air -1000 HU by definition.
WATER_HU = 0.0
AIR_HU = -1000.0
#: Linear attenuation of water used to turn HU into attenuation, 1/mm (about 70 keV;
#: from memory; any positive value gives the same HU images, it only sets the noise).
MU_WATER_PER_MM = 0.0192
#: The value scanners write outside the reconstruction circle.
PADDING_HU = -3024.0

#: FBP filter of each kernel name written to ConvolutionKernel.
KERNEL_FILTERS = {"STANDARD": "shepp-logan"}

#: The arc of the limited-angle series (scikit-image theta, degrees) and the in-plane
#: orientations (project convention) of its boundary rays, along which streaks run.
LIMITED_ARC_DEG = (0.0, 120.0)
LIMITED_STREAK_ANGLES_DEG = (90.0, 30.0)
#: Number of views (over 180 degrees) of the sparse-view series.
SPARSE_VIEWS = 36
#: In-plane orientation of the line joining the two metal implants (project convention).
METAL_LINE_ANGLE_DEG = 0.0
#: TV weight of the nonlinear reconstruction (Chambolle), on HU / 1000.
TV_WEIGHT = 0.006
#: Radially averaged NPS mean frequency f_av (cycles/mm) of the uniform water module,
#: measured on the "small" series by tests/checker/test_demo.py (100 x 100 pixel ROIs,
#: mean subtracted): FBP STANDARD and nonlinear. See sample_volumes/README.md.
F_AV_PER_MM = {"qa_phantom": 0.265, "qa_phantom_nonlinear": 0.148}
#: Pixel noise (HU, square root of the NPS integral) measured the same way.
NOISE_SD_HU = {"qa_phantom": 11.3, "qa_phantom_nonlinear": 4.0}


# --------------------------------------------------------------------------- grids
@dataclass(frozen=True)
class Grid:
    """Sampling of one simulated series."""

    n: int  # pixels per row and column
    pixel_mm: float
    nz: int  # slices
    slice_mm: float
    n_views: int  # views over 180 degrees of the full scan
    i0: float  # unattenuated counts per detector bin and view
    z0_mm: float  # patient z of slice 0

    @property
    def coverage_mm(self) -> float:
        return self.nz * self.slice_mm

    def slice_z_mm(self, k: int) -> float:
        """Depth of slice ``k`` into the scanned range (0 .. coverage), in mm."""
        return (k + 0.5) * self.slice_mm

    def theta(self, n_views: int | None = None, arc_deg: tuple[float, float] = (0.0, 180.0)) -> np.ndarray:
        step = 180.0 / self.n_views if n_views is None else 180.0 / n_views
        return np.arange(arc_deg[0], arc_deg[1] - 1e-9, step)


_GRIDS = {
    ("phantom", "small"): Grid(256, 0.9, 16, 2.5, 360, 8.0e5, -20.0),
    ("phantom", "full"): Grid(512, 0.45, 32, 1.25, 720, 8.0e5, -20.0),
    ("torso", "small"): Grid(256, 1.4, 16, 2.5, 360, 4.0e5, -420.0),
    ("torso", "full"): Grid(512, 0.7, 32, 1.25, 720, 4.0e5, -420.0),
}


def grid_for(name: str, size: str = "small") -> Grid:
    """The sampling grid of series ``name`` at ``size`` ("small" or "full")."""
    _check_name(name)
    if size not in ("small", "full"):
        raise ValueError(f"size must be 'small' or 'full', got {size!r}")
    kind = "phantom" if name.startswith("qa_") else "torso"
    return _GRIDS[(kind, size)]


def _check_name(name: str) -> None:
    if name not in SERIES:
        raise KeyError(f"unknown demo series {name!r}; known: {', '.join(SERIES)}")


# --------------------------------------------------------------------------- shapes
@dataclass(frozen=True)
class Ellipse:
    """An elliptical section at (cx, cy) mm with semi-axes (ax, ay) mm and a CT number."""

    cx: float
    cy: float
    ax: float
    ay: float
    hu: float
    angle_deg: float = 0.0  # rotation counter-clockwise on screen

    def scaled(self, s: float) -> "Ellipse":
        return replace(self, ax=self.ax * s, ay=self.ay * s)


@dataclass(frozen=True)
class Ellipsoid:
    """An ellipsoid: its section at depth ``z`` mm is an :class:`Ellipse`."""

    section: Ellipse
    cz: float  # depth of the centre into the scanned range, mm
    az: float  # semi-axis along z, mm

    def at(self, z: float) -> Ellipse | None:
        u = (z - self.cz) / self.az
        if abs(u) >= 1.0:
            return None
        return self.section.scaled(float(np.sqrt(1.0 - u * u)))


def hu_to_mu(hu: float | np.ndarray) -> float | np.ndarray:
    """Linear attenuation (1/mm) of a material of CT number ``hu``."""
    return MU_WATER_PER_MM * (1.0 + np.asarray(hu) / 1000.0)


def _pixel_coords(grid: Grid, supersample: int = 2) -> tuple[np.ndarray, np.ndarray]:
    """x (left+) and y (posterior+) in mm of sub-pixel centres, shape (n*s, n*s)."""
    m = grid.n * supersample
    c = (np.arange(m) + 0.5) / supersample - 0.5 - grid.n // 2
    x = c * grid.pixel_mm
    return np.meshgrid(x, x, indexing="xy")[0], np.meshgrid(x, x, indexing="ij")[0]


def _inside(e: Ellipse, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    a = np.deg2rad(e.angle_deg)
    dx, dy_up = x - e.cx, -(y - e.cy)
    u = dx * np.cos(a) + dy_up * np.sin(a)
    v = -dx * np.sin(a) + dy_up * np.cos(a)
    return (u / e.ax) ** 2 + (v / e.ay) ** 2 <= 1.0


def _paint(hu: np.ndarray, x: np.ndarray, y: np.ndarray, shapes: Sequence[Ellipse]) -> None:
    """Paint ``shapes`` in order (later ones cover earlier ones), each in its bounding box."""
    xs, ys = x[0, :], y[:, 0]
    for e in shapes:
        r = max(e.ax, e.ay)
        c0, c1 = np.searchsorted(xs, [e.cx - r, e.cx + r])
        r0, r1 = np.searchsorted(ys, [e.cy - r, e.cy + r])
        if c1 <= c0 or r1 <= r0:
            continue
        block = hu[r0:r1, c0:c1]
        block[_inside(e, x[r0:r1, c0:c1], y[r0:r1, c0:c1])] = e.hu


def _downsample(a: np.ndarray, s: int) -> np.ndarray:
    n = a.shape[0] // s
    return a.reshape(n, s, n, s).mean(axis=(1, 3))


# --------------------------------------------------------------------------- QA phantom
#: FH-QA2 rod inserts: CT number of each 25 mm rod, placed 60 mm from the axis.
QA_ROD_HU = (-1000.0, -100.0, 120.0, 340.0, 900.0)
QA_ROD_RADIUS_MM = 12.5
QA_ROD_RING_MM = 60.0
QA_WATER_RADIUS_MM = 100.0
QA_SHELL_MM = 3.0
QA_SHELL_HU = 120.0


def qa_rod_centres_mm() -> list[tuple[float, float]]:
    """(x, y) mm of the rods, in the order of :data:`QA_ROD_HU`."""
    out = []
    for k in range(len(QA_ROD_HU)):
        a = np.deg2rad(90.0 + 72.0 * k)
        out.append((QA_ROD_RING_MM * np.cos(a), -QA_ROD_RING_MM * np.sin(a)))
    return out


def qa_rod_module_depth_mm(grid: Grid) -> tuple[float, float]:
    """The rod module fills the first half of the scanned range; the rest is water."""
    return 0.0, grid.coverage_mm / 2.0


def qa_phantom_shapes(grid: Grid, z: float) -> list[Ellipse]:
    """Sections of FH-QA2 at depth ``z`` mm."""
    shapes = [
        Ellipse(0.0, 0.0, QA_WATER_RADIUS_MM + QA_SHELL_MM, QA_WATER_RADIUS_MM + QA_SHELL_MM, QA_SHELL_HU),
        Ellipse(0.0, 0.0, QA_WATER_RADIUS_MM, QA_WATER_RADIUS_MM, WATER_HU),
    ]
    lo, hi = qa_rod_module_depth_mm(grid)
    if lo <= z < hi:
        for (cx, cy), hu in zip(qa_rod_centres_mm(), QA_ROD_HU):
            shapes.append(Ellipse(cx, cy, QA_ROD_RADIUS_MM, QA_ROD_RADIUS_MM, hu))
    return shapes


# --------------------------------------------------------------------------- torso
#: Structures placed in the air for "torso_air_structure": an organ-like +30 HU
#: ellipsoid (20 x 16 mm in plane, 15 mm long) and a faint -900 HU one, both anterior
#: to the body and clear of it, each starting and ending inside the scanned range.
AIR_STRUCTURES = (
    Ellipsoid(Ellipse(45.0, -118.0, 10.0, 8.0, 30.0, angle_deg=20.0), cz=17.5, az=7.5),
    Ellipsoid(Ellipse(-60.0, -112.0, 8.0, 8.0, -900.0), cz=22.5, az=8.0),
)
#: The liver lesion (+40 HU above the liver, 10 mm sphere) seen by the reference.
LIVER_HU = 60.0
LESION = Ellipsoid(Ellipse(-50.0, -12.0, 5.0, 5.0, LIVER_HU + 40.0), cz=20.0, az=5.0)
#: Metal implants (CT number of a dense metal, invented) through all slices.
METAL_HU = 12000.0
METAL_IMPLANTS = (Ellipse(-58.0, 12.0, 10.0, 10.0, METAL_HU), Ellipse(58.0, 12.0, 10.0, 10.0, METAL_HU))
#: Beam-hardening strength: measured p = p - BH * p_metal**2 (p in line-integral units).
BEAM_HARDENING = 0.02
#: Body outline (mm): centre and semi-axes of the skin ellipse.
BODY_CENTRE_Y_MM = -8.0
BODY_AX_MM, BODY_AY_MM = 100.0, 78.0
#: compare_test: outward displacement of the anterior wall (mm) and half-width (deg).
WALL_SHIFT_MM = 10.0
WALL_HALF_WIDTH_DEG = 35.0
#: Cable (copper core, insulation) lying on the mattress beside the body.
CABLE_XY_MM = (-100.0, 66.0)


def _body_ax(z: float, grid: Grid) -> float:
    return BODY_AX_MM - 4.0 * z / grid.coverage_mm


def torso_outline_shapes(grid: Grid, z: float) -> list[Ellipse]:
    """Skin, subcutaneous fat and muscle wall of FH-T1 at depth ``z`` mm."""
    ax, ay, cy = _body_ax(z, grid), BODY_AY_MM, BODY_CENTRE_Y_MM
    return [
        Ellipse(0.0, cy, ax, ay, 30.0),  # skin
        Ellipse(0.0, cy, ax - 2.0, ay - 2.0, -100.0),  # fat
        Ellipse(0.0, cy + 1.0, ax - 14.0, ay - 11.0, 50.0),  # muscle wall
        Ellipse(0.0, cy + 1.0, ax - 20.0, ay - 17.0, 35.0),  # abdominal contents
    ]


def torso_organ_shapes(grid: Grid, z: float) -> list[Ellipse]:
    """Organs, lungs and spine of FH-T1 at depth ``z`` mm."""
    u = z / grid.coverage_mm
    shapes = [
        Ellipse(-40.0, -8.0, 42.0, 38.0, LIVER_HU, angle_deg=-15.0),
        Ellipse(55.0, 12.0, 17.0, 24.0, 50.0, angle_deg=25.0),  # spleen
        Ellipse(8.0, 22.0, 9.0, 9.0, 200.0),  # aorta (contrast)
        Ellipse(0.0, 37.0, 15.0, 13.0, 800.0),  # vertebral cortex
        Ellipse(0.0, 37.0, 13.0, 11.0, 250.0),  # cancellous bone
        Ellipse(0.0, 57.0, 19.0, 4.0, 600.0),  # lamina
        Ellipse(0.0, 54.0, 5.5, 5.0, 20.0),  # spinal canal
    ]
    lung = max(0.0, 1.0 - u / 0.6)
    if lung > 0.05:
        for side in (-1.0, 1.0):
            shapes.append(Ellipse(side * 45.0, -22.0, 30.0 * lung, 36.0 * lung, -850.0))
    if u > 0.35:
        s = min(1.0, (u - 0.35) / 0.2)
        for side in (-1.0, 1.0):
            shapes.append(Ellipse(side * 48.0, 38.0, 12.0 * s, 18.0 * s, 150.0, angle_deg=side * 20.0))
    if 0.2 < u < 0.8:
        shapes.append(Ellipse(22.0, -32.0, 9.0, 6.0, -1000.0))  # bowel gas
    return shapes


def torso_surroundings_shapes() -> list[Ellipse]:
    """Arms, mattress, table and cable (constant along z)."""
    shapes: list[Ellipse] = []
    for side in (-1.0, 1.0):
        cx = side * (BODY_AX_MM + 8.0 + 26.0)
        shapes += [
            Ellipse(cx, 0.0, 26.0, 30.0, 40.0),  # arm soft tissue
            Ellipse(cx, 0.0, 24.0, 28.0, -80.0),  # arm fat
            Ellipse(cx, 2.0, 18.0, 22.0, 45.0),  # arm muscle
            Ellipse(cx, 2.0, 9.0, 9.0, 1000.0),  # humerus cortex
            Ellipse(cx, 2.0, 6.0, 6.0, 120.0),  # marrow
        ]
    shapes += [
        Ellipse(CABLE_XY_MM[0], CABLE_XY_MM[1], 3.5, 3.5, 100.0),
        Ellipse(CABLE_XY_MM[0], CABLE_XY_MM[1], 1.2, 1.2, 2000.0),
    ]
    return shapes


def _paint_mattress_and_table(hu: np.ndarray, x: np.ndarray, y: np.ndarray) -> None:
    """Foam mattress (-850 HU) under the body and a shallow curved table shell (+250 HU)."""
    hu[(y >= 70.0) & (y < 78.0) & (np.abs(x) < 118.0)] = -850.0
    outer = (x / 400.0) ** 2 + ((y - 45.0) / 40.0) ** 2 <= 1.0
    inner = (x / 400.0) ** 2 + ((y - 45.0) / 34.0) ** 2 <= 1.0
    hu[outer & ~inner & (y > 70.0) & (np.abs(x) < 125.0)] = 250.0


def _wall_shift_mask(grid: Grid, z: float, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Pixels added in front of the body when the anterior wall moves out (compare_test).

    The skin ellipse's radius grows by ``WALL_SHIFT_MM`` times a raised cosine of the
    angle from straight anterior (half-width ``WALL_HALF_WIDTH_DEG``), on the middle
    60 % of the scanned range.
    """
    u = z / grid.coverage_mm
    if not 0.2 <= u <= 0.8:
        return np.zeros(x.shape, dtype=bool)
    ax, ay, cy = _body_ax(z, grid), BODY_AY_MM, BODY_CENTRE_Y_MM
    phi = np.degrees(np.arctan2(-(y - cy), x))  # 90 = anterior (up on screen)
    off = np.abs(phi - 90.0)
    w = np.where(off < WALL_HALF_WIDTH_DEG, 0.5 * (1 + np.cos(np.pi * off / WALL_HALF_WIDTH_DEG)), 0.0)
    rho = np.sqrt((x / ax) ** 2 + ((y - cy) / ay) ** 2)
    return (rho > 1.0) & (rho <= 1.0 + w * WALL_SHIFT_MM / ay)


# --------------------------------------------------------------------------- sections
def _blank(grid: Grid, supersample: int) -> np.ndarray:
    m = grid.n * supersample
    return np.full((m, m), AIR_HU, dtype=np.float64)


def section_hu(name: str, grid: Grid, k: int, supersample: int = 2) -> np.ndarray:
    """Noise-free ground truth (HU, partial volume from supersampling) of slice ``k``.

    Includes everything the series' object contains (lesion, metal, air structures,
    displaced wall), so that a test can compare a reconstruction with its truth.
    """
    z = grid.slice_z_mm(k)
    x, y = _pixel_coords(grid, supersample)
    hu = _blank(grid, supersample)
    if name.startswith("qa_"):
        _paint(hu, x, y, qa_phantom_shapes(grid, z))
        return _downsample(hu, supersample)
    _paint_mattress_and_table(hu, x, y)
    _paint(hu, x, y, torso_surroundings_shapes())
    _paint(hu, x, y, torso_outline_shapes(grid, z))
    if name == "compare_test":
        hu[_wall_shift_mask(grid, z, x, y)] = -100.0  # the wall moved out: more fat
    _paint(hu, x, y, torso_organ_shapes(grid, z))
    _paint(hu, x, y, _extra_ellipses(name, grid, k))
    return _downsample(hu, supersample)


def _torso_base(grid: Grid, k: int) -> np.ndarray:
    z = grid.slice_z_mm(k)
    x, y = _pixel_coords(grid, 2)
    hu = _blank(grid, 2)
    _paint_mattress_and_table(hu, x, y)
    _paint(hu, x, y, torso_surroundings_shapes())
    _paint(hu, x, y, torso_outline_shapes(grid, z))
    _paint(hu, x, y, torso_organ_shapes(grid, z))
    return _downsample(hu, 2)


def _extra_ellipses(name: str, grid: Grid, k: int) -> list[Ellipse]:
    """Small objects added analytically to the sinogram (and painted in the truth)."""
    z = grid.slice_z_mm(k)
    out: list[Ellipse] = []
    if name != "compare_test":
        lesion = LESION.at(z)
        if lesion is not None:
            out.append(lesion)
    if name == "torso_metal":
        out += list(METAL_IMPLANTS)
    if name == "torso_air_structure":
        out += [s for s in (e.at(z) for e in AIR_STRUCTURES) if s is not None]
    return out


# --------------------------------------------------------------------------- projection
def ellipse_projection(e: Ellipse, mu_delta: float, grid: Grid, theta_deg: np.ndarray) -> np.ndarray:
    """Analytic parallel-beam projection of a uniform ellipse, in scikit-image's layout.

    Parameters
    ----------
    e : Ellipse
        Position and size in mm.
    mu_delta : float
        Attenuation (1/mm) the ellipse adds to what lies under it.
    grid : Grid
        Detector bins are the image pixels (bin ``i`` at ``t = i - n // 2`` pixels).
    theta_deg : ndarray
        View angles as scikit-image's ``radon`` takes them.

    Returns
    -------
    ndarray, shape (n, len(theta_deg))
        Line integrals (dimensionless), averaged over each detector bin.

    References
    ----------
    Kak & Slaney (1988), section 3.1: the projection of an ellipse of density rho and
    semi-axes A, B is 2 rho A B sqrt(a^2 - t^2) / a^2, a^2 = A^2 cos^2 + B^2 sin^2.
    """
    th = np.deg2rad(theta_deg)[None, :]
    rot = np.deg2rad(e.angle_deg)
    s2 = (e.ax * np.cos(th - rot)) ** 2 + (e.ay * np.sin(th - rot)) ** 2
    shift = e.cx * np.cos(th) + (-e.cy) * np.sin(th)
    sub = (np.arange(4) + 0.5) / 4 - 0.5  # four samples per bin
    t_bins = (np.arange(grid.n) - grid.n // 2) * grid.pixel_mm
    t = t_bins[:, None, None] + sub[None, None, :] * grid.pixel_mm
    tau2 = (t - shift[..., None]) ** 2
    chord = np.where(tau2 < s2[..., None], 2.0 * e.ax * e.ay * np.sqrt(np.maximum(s2[..., None] - tau2, 0.0)) / s2[..., None], 0.0)
    return mu_delta * chord.mean(axis=-1)


def _radon(image_mu_mm: np.ndarray, grid: Grid, theta: np.ndarray) -> np.ndarray:
    from skimage.transform import radon

    return radon(image_mu_mm * grid.pixel_mm, theta=theta, circle=True)


@lru_cache(maxsize=8)
def _base_sinograms(kind: str, size: str) -> tuple[np.ndarray, np.ndarray]:
    """Noise-free sinograms (z, n, views) of the phantom or torso base, and their theta."""
    name = "qa_phantom" if kind == "phantom" else "torso_clean"
    grid = grid_for(name, size)
    theta = grid.theta()
    sinos = np.empty((grid.nz, grid.n, theta.size))
    for k in range(grid.nz):
        base = section_hu("qa_phantom", grid, k) if kind == "phantom" else _torso_base(grid, k)
        sinos[k] = _radon(hu_to_mu(base), grid, theta)
    sinos.setflags(write=False)
    return sinos, theta


def _underlying_hu(e: Ellipse, name: str, grid: Grid, k: int) -> float:
    """CT number of what an extra ellipse replaces (so its added attenuation is right)."""
    if e.hu == METAL_HU:
        return 35.0
    if abs(e.hu - (LIVER_HU + 40.0)) < 1e-9:
        return LIVER_HU
    return AIR_HU


def _wall_sinogram(grid: Grid, k: int, theta: np.ndarray) -> np.ndarray:
    """Projection of the fat added in front of the body by the moved wall (compare_test)."""
    x, y = _pixel_coords(grid, 2)
    grown = _downsample(_wall_shift_mask(grid, grid.slice_z_mm(k), x, y).astype(float), 2)
    if not grown.any():
        return np.zeros((grid.n, theta.size))
    return _radon_patch(grown * float(hu_to_mu(-100.0) - hu_to_mu(AIR_HU)), grid, theta)


def _radon_patch(diff_mu: np.ndarray, grid: Grid, theta: np.ndarray) -> np.ndarray:
    """``radon`` of a mostly-zero image: project its bounding square, shift per view.

    Exact up to linear interpolation in the detector coordinate (Radon transform is
    translation covariant: moving the object by (dx, dy) moves each projection by
    dx cos(theta) + dy sin(theta)).
    """
    from skimage.transform import radon

    rows, cols = np.nonzero(np.abs(diff_mu) > 1e-12)
    r0, r1, c0, c1 = rows.min(), rows.max() + 1, cols.min(), cols.max() + 1
    side = int(max(r1 - r0, c1 - c0)) + 4
    patch = np.zeros((side, side))
    patch[: r1 - r0, : c1 - c0] = diff_mu[r0:r1, c0:c1] * grid.pixel_mm
    proj = radon(patch, theta=theta, circle=False)
    # patch pixel (0, 0) is image pixel (r0, c0); patch centre index side // 2
    dx = c0 + side // 2 - grid.n // 2
    dy_up = -(r0 + side // 2 - grid.n // 2)
    t_patch = np.arange(proj.shape[0]) - proj.shape[0] // 2
    th = np.deg2rad(theta)
    shift = dx * np.cos(th) + dy_up * np.sin(th)  # (views,)
    pos = (np.arange(grid.n) - grid.n // 2)[:, None] - shift[None, :] - t_patch[0]
    i0 = np.floor(pos).astype(int)
    w = pos - i0
    padded = np.vstack([np.zeros((1, theta.size)), proj, np.zeros((1, theta.size))])
    lo = np.clip(i0 + 1, 0, padded.shape[0] - 1)
    hi = np.clip(i0 + 2, 0, padded.shape[0] - 1)
    cols = np.arange(theta.size)[None, :]
    return (1.0 - w) * padded[lo, cols] + w * padded[hi, cols]


def _noisy(p: np.ndarray, i0: float, rng: np.random.Generator) -> np.ndarray:
    """Poisson quantum noise: counts ~ Poisson(I0 exp(-p)), measured p = -log(counts/I0)."""
    counts = rng.poisson(i0 * np.exp(-p)).astype(float)
    return -np.log(np.maximum(counts, 1.0) / i0)


def _fbp_hu(sino: np.ndarray, theta: np.ndarray, grid: Grid, kernel: str = "STANDARD") -> np.ndarray:
    """Filtered back-projection (scikit-image ``iradon``) of one slice, in HU."""
    from skimage.transform import iradon

    mu_px = iradon(sino, theta=theta, circle=True, filter_name=KERNEL_FILTERS[kernel], output_size=grid.n)
    return 1000.0 * (mu_px / (MU_WATER_PER_MM * grid.pixel_mm) - 1.0)


def _tv_denoise(hu: np.ndarray, weight: float) -> np.ndarray:
    """Total-variation regularised image (Chambolle) of one slice, in HU."""
    from skimage.restoration import denoise_tv_chambolle

    return 1000.0 * denoise_tv_chambolle(hu / 1000.0, weight=weight)


# --------------------------------------------------------------------------- series
@dataclass(frozen=True)
class _Recipe:
    kind: str  # "phantom" or "torso"
    seed: int
    views: str = "full"  # "full", "limited", "sparse"
    nonlinear: bool = False
    description: str = ""
    kernel: str = "STANDARD"


_RECIPES = {
    "qa_phantom": _Recipe("phantom", 101),
    "qa_phantom_nonlinear": _Recipe("phantom", 101, nonlinear=True, kernel="TVREG"),
    "torso_clean": _Recipe("torso", 201),
    "torso_limited_angle": _Recipe("torso", 202, views="limited"),
    "torso_sparse_views": _Recipe("torso", 203, views="sparse"),
    "torso_metal": _Recipe("torso", 204),
    "torso_air_structure": _Recipe("torso", 205),
    "compare_reference": _Recipe("torso", 206),
    "compare_test": _Recipe("torso", 206, nonlinear=True, kernel="TVREG"),
}


def _view_subset(recipe: _Recipe, grid: Grid, theta: np.ndarray) -> np.ndarray:
    """Indices of the views a series is reconstructed from."""
    if recipe.views == "limited":
        lo, hi = LIMITED_ARC_DEG
        return np.nonzero((theta >= lo) & (theta < hi))[0]
    if recipe.views == "sparse":
        step = grid.n_views // SPARSE_VIEWS
        return np.arange(0, theta.size, step)
    return np.arange(theta.size)


def _slice_sinogram(name: str, grid: Grid, k: int, base: np.ndarray, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Noise-free line integrals of slice ``k`` of ``name``, and the metal part of them."""
    p = base.copy()
    p_metal = np.zeros_like(p)
    for e in _extra_ellipses(name, grid, k):
        delta = float(hu_to_mu(e.hu) - hu_to_mu(_underlying_hu(e, name, grid, k)))
        proj = ellipse_projection(e, delta, grid, theta)
        p += proj
        if e.hu == METAL_HU:
            p_metal += proj
    if name == "compare_test":
        p += _wall_sinogram(grid, k, theta)
    return p, p_metal


def reconstruct_slice(name: str, grid: Grid, k: int, base: np.ndarray, theta: np.ndarray) -> np.ndarray:
    """Simulate the noisy measurement of slice ``k`` of ``name`` and reconstruct it (HU)."""
    recipe = _RECIPES[name]
    p, p_metal = _slice_sinogram(name, grid, k, base, theta)
    rng = np.random.default_rng([recipe.seed, k, grid.n])
    measured = _noisy(p, grid.i0, rng) - BEAM_HARDENING * p_metal**2
    keep = _view_subset(recipe, grid, theta)
    hu = _fbp_hu(measured[:, keep], theta[keep], grid)
    if recipe.nonlinear:
        hu = _tv_denoise(hu, TV_WEIGHT)
    return hu


def padding_mask(grid: Grid) -> np.ndarray:
    """Pixels outside the reconstruction circle (written as padding)."""
    c = np.arange(grid.n) - grid.n // 2
    r2 = c[:, None] ** 2 + c[None, :] ** 2
    return r2 > (grid.n // 2 - 1) ** 2


def series_metadata(name: str, grid: Grid, series_number: int | None = None) -> dict:
    """The safe metadata subset of a demo series (no identifiers)."""
    recipe = _RECIPES[name]
    return {
        "modality": "CT",
        "convolution_kernel": recipe.kernel,
        "kvp": 120.0,
        "slice_thickness_mm": grid.slice_mm,
        "series_description": name,
        "manufacturer_model_name": SCANNER_MODEL,
        "study_date": SCAN_DATE,
        "series_number": list(SERIES).index(name) + 1 if series_number is None else series_number,
    }


def make_volume(
    name: str,
    *,
    size: str = "small",
    progress: Callable[[str, float], None] | None = None,
) -> Volume:
    """Simulate demo series ``name`` (a key of :data:`SERIES`) as a :class:`Volume`.

    Parameters
    ----------
    name : str
        Series name, e.g. "qa_phantom" or "torso_limited_angle".
    size : {"small", "full"}
        "small": 256 x 256 x 16 slices at 2.5 mm (phantom 0.9 mm pixels, torso 1.4 mm);
        "full": 512 x 512 x 32 slices at 1.25 mm, same objects, twice the views.
    progress : callable, optional
        Called as ``progress(message, fraction)`` after each slice.

    Returns
    -------
    Volume
        HU float32 (z, y, x), padding -3024 HU outside the reconstruction circle, with
        ``padding_mask`` set; deterministic (same name and size -> identical arrays).

    References
    ----------
    Kak & Slaney (1988) for the projection and reconstruction; Chambolle (2004) for the
    TV-regularised series; see the module docstring.
    """
    grid = grid_for(name, size)
    recipe = _RECIPES[name]
    base, theta = _base_sinograms(recipe.kind, size)
    pad = padding_mask(grid)
    hu = np.empty((grid.nz, grid.n, grid.n), dtype=np.float32)
    for k in range(grid.nz):
        sl = reconstruct_slice(name, grid, k, base[k], theta)
        hu[k] = _clip_stored_range(sl, pad)
        if progress is not None:
            progress(f"{name}: slice {k + 1}/{grid.nz}", (k + 1) / grid.nz)
    origin = (-(grid.n // 2) * grid.pixel_mm, -(grid.n // 2) * grid.pixel_mm, grid.z0_mm + 0.5 * grid.slice_mm)
    return Volume.from_array(
        hu,
        spacing_mm=(grid.slice_mm, grid.pixel_mm, grid.pixel_mm),
        origin_mm=origin,
        series_uid=f"demo-{name}-{size}",
        metadata=series_metadata(name, grid),
        padding_mask=pad.copy(),
        notes=[f"simulated demo series ({CENTRE_NAME}, invented)"],
        source=f"reconaudit.checker.demo:{name}",
    )


def _clip_stored_range(sl: np.ndarray, pad: np.ndarray) -> np.ndarray:
    """Clip to what a scanner stores (-1024 .. 30000 HU), keeping the padding value."""
    out = np.clip(sl, -1024.0, 30000.0)
    out[pad] = PADDING_HU
    return out


# --------------------------------------------------------------------------- writing
#: Invented identifiers written into the demo DICOM files (not patient data).
DEMO_IDENTIFIERS = {
    "phantom": {"patient_name": "DEMO^QA PHANTOM FH-QA2", "patient_id": "FH-QA2-0001"},
    "torso": {"patient_name": "DEMO^TORSO PHANTOM FH-T1", "patient_id": "FH-T1-0001"},
}


def series_folder(out_dir: str | Path, name: str) -> Path:
    """Where :func:`write_scenario` puts series ``name``: <centre>/<date>/<name>."""
    return Path(out_dir) / "fernhollow" / SCAN_DATE / name


def write_scenario(
    out_dir: str | Path,
    *,
    size: str = "small",
    names: Sequence[str] | None = None,
    progress: Callable[[str, float], None] | None = None,
) -> list[Path]:
    """Write every demo series as a CT DICOM series, one folder per series.

    Parameters
    ----------
    out_dir : str or Path
        Root folder; series go to ``out_dir/fernhollow/<date>/<series name>/``.
    size : {"small", "full"}
        See :func:`make_volume`.
    names : sequence of str, optional
        Only these series (default: all of :data:`SERIES`).
    progress : callable, optional
        ``progress(message, fraction)`` per series.

    Returns
    -------
    list of Path
        Every file written, in series order. Deterministic: UIDs come from fixed seeds
        and nothing depends on the clock, so two runs give byte-identical files.

    References
    ----------
    DICOM PS3.3, CT Image IOD (written by :func:`reconaudit.checker.dicom_write.write_ct_series`).
    """
    from .dicom_write import write_ct_series

    names = list(SERIES) if names is None else list(names)
    for n in names:
        _check_name(n)
    written: list[Path] = []
    for i, n in enumerate(names):
        vol = make_volume(n, size=size)
        kind = _RECIPES[n].kind
        written += write_ct_series(
            vol,
            series_folder(out_dir, n),
            series_description=DICOM_DESCRIPTIONS[n],
            convolution_kernel=_RECIPES[n].kernel,
            series_number=list(SERIES).index(n) + 1,
            uid_seed=f"fernhollow-{SCAN_DATE}-{size}-{n}",
            study_uid=_study_uid(kind, size),
            padding_value=int(PADDING_HU + 1024.0),
            patient_name=DEMO_IDENTIFIERS[kind]["patient_name"],
            patient_id=DEMO_IDENTIFIERS[kind]["patient_id"],
            manufacturer_model_name=SCANNER_MODEL,
            institution_name=CENTRE_NAME,
        )
        if progress is not None:
            progress(f"wrote {n}", (i + 1) / len(names))
    return written


def _study_uid(kind: str, size: str) -> str:
    """A fixed 2.25 UID per phantom study (derived from a fixed string)."""
    import hashlib

    digest = hashlib.sha256(f"fernhollow-{SCAN_DATE}-{size}-{kind}-study".encode()).hexdigest()
    return "2.25." + str(int(digest[:30], 16))
