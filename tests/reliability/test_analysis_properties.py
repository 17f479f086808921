"""Property-based tests: every analysis, on any volume, gives a result or a typed error.

Random shapes (down to 1 x 1 x 1), constant volumes, noise, a water disc, NaN and Inf
voxels, extreme float32 values and odd spacings go straight to each analysis of
``REGISTRY`` (and to the comparison module), bypassing the pipeline's own safety net:
the only acceptable outcomes are an ``AnalysisResult`` whose record encodes as strict
JSON, or a ``ReconauditError``.
"""
from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from reconaudit.checker import analyses
from reconaudit.checker.errors import ReconauditError
from reconaudit.checker.regions import find_regions
from reconaudit.checker.results import AnalysisResult, dumps
from reconaudit.checker.volume import Volume

FAST = settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow], derandomize=True)
F32_MAX = float(np.finfo(np.float32).max)


@st.composite
def volumes(draw) -> Volume:
    nz = draw(st.integers(1, 3))
    ny = draw(st.integers(1, 32))
    nx = draw(st.integers(1, 32))
    kind = draw(st.sampled_from(["constant", "noise", "disc", "extreme", "two_level"]))
    rng = np.random.default_rng(draw(st.integers(0, 2**16)))
    if kind == "constant":
        hu = np.full((nz, ny, nx), draw(st.sampled_from([-3024.0, -1000.0, 0.0, 40.0, 3071.0])), np.float32)
    elif kind == "noise":
        hu = rng.normal(draw(st.floats(-1000, 1000)), draw(st.floats(0, 500)), (nz, ny, nx)).astype(np.float32)
    elif kind == "disc":
        y, x = np.mgrid[:ny, :nx]
        disc = np.hypot(y - ny / 2, x - nx / 2) < 0.4 * min(ny, nx)
        hu = np.where(disc, 0.0, -1000.0)[None] + rng.normal(0, 10, (nz, ny, nx))
        hu = hu.astype(np.float32)
    elif kind == "extreme":
        hu = rng.choice(np.array([-F32_MAX, F32_MAX, 0.0, -1000.0, 1e30], np.float32), (nz, ny, nx))
    else:
        hu = np.where(rng.random((nz, ny, nx)) < 0.5, -1000.0, 1000.0).astype(np.float32)
    n_bad = draw(st.integers(0, 3))
    for _ in range(n_bad):
        idx = tuple(int(rng.integers(0, s)) for s in hu.shape)
        hu[idx] = draw(st.sampled_from([np.nan, np.inf, -np.inf]))
    spacing = (draw(st.floats(0.1, 10.0)), draw(st.floats(0.05, 3.0)), draw(st.floats(0.05, 3.0)))
    return Volume.from_array(hu, spacing_mm=spacing)


def _regions_or_typed_error(volume: Volume):
    try:
        return find_regions(volume)
    except ReconauditError:
        return None


def _check_outcome(name: str, volume: Volume, regions) -> None:
    fn = analyses.get(name)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            result = fn(volume, regions, None)
    except ReconauditError as err:
        assert str(err), f"{name}: a typed error without a message"
        return
    assert isinstance(result, AnalysisResult)
    assert result.analysis == name
    text = dumps(result.record)  # strict JSON: NaN/Inf must not leak out
    assert isinstance(json.loads(text), dict)
    assert isinstance(result.record.get("applicable"), bool), result.record.keys()


@pytest.mark.parametrize("name", sorted(analyses.REGISTRY))
@FAST
@given(volume=volumes())
def test_analysis_never_raises_untyped(name, volume):
    regions = _regions_or_typed_error(volume)
    if regions is not None:
        _check_outcome(name, volume, regions)


@FAST
@given(volume=volumes())
def test_regions_result_or_typed_error(volume):
    """find_regions, shared by every analysis, gives masks of the volume's shape or a typed error."""
    regions = _regions_or_typed_error(volume)
    if regions is not None:
        assert regions.air.shape == volume.shape
        assert regions.fov.shape == volume.shape[1:]


@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.too_slow], derandomize=True)
@given(test=volumes(), same_grid=st.booleans(), seed=st.integers(0, 1000))
def test_compare_result_or_typed_error(test, same_grid, seed):
    from reconaudit.checker.analyses import compare
    if same_grid:
        rng = np.random.default_rng(seed)
        noisy = test.hu + rng.normal(0, 5, test.shape).astype(np.float32)
        reference = Volume(hu=noisy, spacing_mm=test.spacing_mm, affine=test.affine.copy())
    else:
        reference = Volume.from_array(np.full((2, 16, 16), -1000.0, np.float32), spacing_mm=(2.0, 1.0, 1.0))
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            result = compare.compare_volumes(test, reference)
    except ReconauditError as err:
        assert str(err)
        return
    json.loads(dumps(result.record))
