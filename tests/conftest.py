"""Suite-wide settings."""
from __future__ import annotations

import os

import pytest


def pytest_sessionstart(session: pytest.Session) -> None:
    # In CI the GUI tests must run, never skip: insist on a display (pytest-xvfb
    # provides one when Xvfb is installed; .ci/run installs it).
    if os.environ.get("CI") and not os.environ.get("DISPLAY"):
        raise pytest.UsageError(
            "CI is set but there is no DISPLAY: install Xvfb (see .ci/run) so the napari tests run"
        )
