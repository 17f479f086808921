"""reconaudit engine: load CT volumes, find the shared regions, run the analyses.

This package never imports Qt, napari or magicgui (``tests/checker/test_headless.py``).
"""
from __future__ import annotations

from importlib import metadata as _metadata

try:
    __version__ = _metadata.version("reconaudit")
except _metadata.PackageNotFoundError:  # running from a source tree without install
    __version__ = "0.0.0+unknown"

SAFETY_NOTICE = (
    "reconaudit supports, and never replaces, the judgement of a qualified medical "
    "physicist. It is not a medical device and not for diagnosis. Results depend on the "
    "phantom, protocol and settings; acceptance and constancy testing follow local "
    "regulations and the site's physicist."
)

__all__ = ["__version__", "SAFETY_NOTICE"]
