"""The first screen of thin slices (coarse slabs, lowered refine threshold) checked against simulations.

Source of the simulator: scikit-image (general-purpose reference library),
``skimage.transform.radon`` / ``iradon`` (parallel beam, ramp-filtered back-projection),
with the phantom, noise and view offsets of ``test_streaks_thin_slices.py`` (our own
phantom; attenuation of water 0.02 /mm is a value from memory, only ratios matter).

The streaks are view aliasing (Kak & Slaney, *Principles of Computerized Tomographic
Imaging*, 1988, sampling of the views): the difference between the noiseless
reconstructions from 30 and from 360 views over 180 deg, added with a chosen amplitude
to one slice or to two adjacent slices of a 16-slice series of 1.25 mm from complete,
noisy data. A streak confined to so few slices is the hardest case for slabs: in a
first-screen slab of four slices it keeps half of the whitened excess it has in a
screen slab of two (power as the square of the share of slices that carry it, the
independent noise's power in proportion; analytic), which is what the gate
``1 + (tolerance - 1) / 2`` allows for.

The check: over every position (inside a screen slab, across two screen slabs, across
two first-screen slabs) and amplitude, the default scheme flags exactly the slices the
screen of every two-slice slab flags (``first_screen_slab_mm`` 0), with the same
indices there, and every first-screen slab that holds a slice the latter flags is above
the gate (measured margins in
:func:`test_first_screen_gate_passes_every_slab_the_slab_screen_flags`). The index is not
linear in the streak's power (ring whitening saturates where the streak dominates a
ring; the neighbour mixing keeps a third of an isolated excess), and on these cases the
first screen loses less than the analytic half of the excess.
"""
from __future__ import annotations

import numpy as np
import pytest

skimage_transform = pytest.importorskip("skimage.transform")
radon, iradon = skimage_transform.radon, skimage_transform.iradon

from reconaudit.checker.analyses import streaks
from reconaudit.checker.regions import find_regions
from reconaudit.checker.volume import Volume
from test_streaks_thin_slices import MU_WATER_PER_MM, PIXEL_MM, SLICE_MM, body_phantom, views

N_SLICES = 16
N = 256  # the screen grid of a binned 512 px series: its noise floor (first-screen indices of
# complete data about 1.3) lies below the gate, so the gate decides (at 160 px it is near 1.5)
PLACES = [(5,), (6,), (4, 5), (3, 4), (5, 6)]  # one slice; two inside a slab; across slabs and first-screen slabs
AMPLITUDES = [0.05, 0.1, 0.2, 0.3, 0.5, 1.0]
PRESENT = {"first_screen_slab_mm": 0.0}  # every two-slice slab screened


def attenuation() -> np.ndarray:
    """The phantom's linear attenuation (/mm) on the N x N grid."""
    return np.clip(MU_WATER_PER_MM * (1.0 + body_phantom(N) / 1000.0), 0.0, None)


def to_hu(p: np.ndarray, theta_deg: np.ndarray) -> np.ndarray:
    """Ramp-filtered back-projection of line integrals ``p`` (per pixel), in HU."""
    return 1000.0 * (iradon(p, theta=theta_deg, circle=True, filter_name="ramp") / MU_WATER_PER_MM - 1.0)


def noiseless(theta_deg: np.ndarray) -> np.ndarray:
    """The phantom reconstructed from noiseless projections at ``theta_deg``, in HU."""
    return to_hu(radon(attenuation(), theta=theta_deg, circle=True), theta_deg)


def noisy_series(theta_deg: np.ndarray, n_slices: int, i0: float = 1e5, seed: int = 0) -> np.ndarray:
    """One projection of the phantom, independent Poisson counts per slice, FBP per slice
    (as ``simulate_series`` of test_streaks_thin_slices.py, on the N x N grid)."""
    expected = i0 * np.exp(-radon(attenuation(), theta=theta_deg, circle=True) * PIXEL_MM)
    rng = np.random.default_rng(seed)
    out = np.empty((n_slices, N, N), dtype=np.float32)
    for z in range(n_slices):
        p = -np.log(np.maximum(rng.poisson(expected).astype(float), 1.0) / i0) / PIXEL_MM
        out[z] = to_hu(p, theta_deg)
    return out


@pytest.fixture(scope="module")
def series() -> tuple[np.ndarray, np.ndarray]:
    base = noisy_series(views(0.0, 180.0, 360), N_SLICES, seed=21)
    aliasing = (noiseless(views(0.0, 180.0, 30)) - noiseless(views(0.0, 180.0, 360))).astype(np.float32)
    return base, aliasing


def with_streak(series, places: tuple[int, ...], amplitude: float) -> Volume:
    base, aliasing = series
    hu = base.copy()
    for z in places:
        hu[z] += np.float32(amplitude) * aliasing
    return Volume.from_array(hu, (SLICE_MM, PIXEL_MM, PIXEL_MM))


def first_screen_indices(vol: Volume, regions) -> tuple[list[float | None], int, int]:
    """Index of every slice from the first screen alone (slabs of four 1.25 mm slices)."""
    cfg = streaks.resolve_settings(None)
    factor = streaks.screen_factor(vol.shape[1:], int(cfg["screen_max_px"]))
    shape_b = (vol.shape[1] // factor, vol.shape[2] // factor)
    bins = streaks.spectral_bins(shape_b, tuple(cfg["band_cycles_per_px"]), float(cfg["angle_bin_deg"]))
    masks = streaks.AllowedMasks(regions, factor, shape_b, cfg)
    slab = streaks.slab_size(SLICE_MM, cfg)
    first = streaks.first_screen_size(SLICE_MM, slab, cfg)
    found = streaks.screen_slabs(vol, masks, factor, bins, cfg, first, [(0, vol.shape[0])], slab_masks=True)
    profiles = {z: o for z, o in found.items() if not isinstance(o, str)}
    return streaks.slab_indices(profiles, vol.shape[0], first, float(cfg["neighbour_weight"])), slab, first


@pytest.fixture(scope="module")
def outcomes(series):
    out = {}
    for places in PLACES:
        for a in AMPLITUDES:
            vol = with_streak(series, places, a)
            regions = find_regions(vol)
            out[places, a] = (
                streaks.analyse(vol, regions).record,
                streaks.analyse(vol, regions, PRESENT).record,
                first_screen_indices(vol, regions),
            )
    return out


def test_first_screen_size_and_gate():
    """1.25 mm slices: screen slabs of 2, first-screen slabs of 4 (5 mm), gate 1.5 at the
    default tolerance 2.0; 2.5 mm and thicker slices have no first screen; 0.625 mm: 4 and 8."""
    cfg = streaks.resolve_settings(None)
    assert cfg["first_screen_slab_mm"] == 5.0
    sizes = {mm: (streaks.slab_size(mm, cfg), streaks.first_screen_size(mm, streaks.slab_size(mm, cfg), cfg))
             for mm in (0.625, 1.0, 1.25, 2.5, 5.0)}
    assert sizes == {0.625: (4, 8), 1.0: (2, 4), 1.25: (2, 4), 2.5: (1, 1), 5.0: (1, 1)}
    assert streaks.first_screen_size(1.25, 2, {**cfg, "first_screen_slab_mm": 0.0}) == 2
    assert streaks.first_screen_size(float("nan"), 2, cfg) == 2
    assert streaks.first_screen_gate(2.0, 2, 4) == pytest.approx(1.5)


def test_first_screen_setting_validated():
    for bad in (-1.0, float("nan"), float("inf")):
        with pytest.raises(streaks.ProfileError):
            streaks.resolve_settings({"first_screen_slab_mm": bad})


def test_first_screen_flags_what_the_slab_screen_flags(outcomes):
    """Streaks on one slice or two adjacent slices (five places, six amplitudes): the
    default scheme flags exactly the slices the screen of every two-slice slab flags,
    with the same index on them; the sweep spans both sides of the tolerance."""
    flagged_cases = 0
    for (places, a), (new, present, _) in outcomes.items():
        assert new["flagged_slices"] == present["flagged_slices"], (places, a)
        for z in present["flagged_slices"]:
            assert new["slice_index"][z] == present["slice_index"][z], (places, a, z)
        flagged_cases += bool(present["flagged_slices"])
    assert 0 < flagged_cases < len(outcomes)  # some cases below the tolerance, some above
    # a streak on one slice only is found by both schemes at some amplitude of the sweep
    for z in (5, 6):
        assert any(outcomes[(z,), a][1]["flagged_slices"] == [z] for a in AMPLITUDES), z


def test_first_screen_gate_passes_every_slab_the_slab_screen_flags(outcomes):
    """Every first-screen slab holding a slice that the two-slice slab screen flags is
    above the gate 1.5 on its own (the first screen's index, before any refinement),
    while in every case some first-screen slab of complete data stays below it (the
    gate decides; nothing is refined there). Measured on these cases: smallest margin
    of a flagged slice's first-screen slab over the gate 0.35 (slices 5 and
    6, amplitude 0.3: slab screen 2.09 and 2.03, first screen 1.85; the one-slice streaks
    of amplitude 1.0: 2.03 and 2.01 against 2.01); first-screen indices of the slabs
    without streak (slices 8-15) at most 1.39."""
    margins, floor = [], []
    for (places, a), (_, present, (first_index, slab, first)) in outcomes.items():
        gate = streaks.first_screen_gate(present["tolerance"], slab, first)
        for z in present["flagged_slices"]:
            assert first_index[z] > gate, (places, a, z, first_index[z])
            margins.append(first_index[z] - gate)
        assert min(first_index[z] for z in range(0, N_SLICES, first)) < gate, (places, a)
        floor.append(max(first_index[z] for z in range(8, N_SLICES)))
    assert margins
    print("smallest margin over the gate", min(margins), "floor", max(floor))
