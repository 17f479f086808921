"""Fixtures of the plugin tests (the phantom lives in plugin_phantom.py)."""
from __future__ import annotations

import pytest

from reconaudit.checker.volume import Volume

from plugin_phantom import PhantomTruth, make_phantom


@pytest.fixture(scope="session")
def phantom() -> Volume:
    return make_phantom()


@pytest.fixture
def truth() -> PhantomTruth:
    return PhantomTruth()
