"""The analyses. Each module exposes ``NAME`` and
``analyse(volume, regions, settings) -> AnalysisResult``.

The registry below is the one place an analysis joins the checker, the report and the
plugin; nothing else needs to change when a new one is added.
"""
from __future__ import annotations

import importlib
from typing import Any, Callable

from ..regions import Regions
from ..results import AnalysisResult
from ..volume import Volume

AnalyseFn = Callable[[Volume, Regions, dict[str, Any]], AnalysisResult]

#: analysis name -> module (imported lazily so a missing optional piece fails alone)
REGISTRY: dict[str, str] = {
    "streaks": "reconaudit.checker.analyses.streaks",
    "air": "reconaudit.checker.analyses.air",
    "nps": "reconaudit.checker.analyses.nps",
    "uniformity": "reconaudit.checker.analyses.uniformity",
    "ttf": "reconaudit.checker.analyses.ttf",
}


def available() -> list[str]:
    """Names of the analyses whose module imports."""
    names = []
    for name in REGISTRY:
        try:
            get(name)
        except ImportError:
            continue
        names.append(name)
    return names


def get(name: str) -> AnalyseFn:
    if name not in REGISTRY:
        raise KeyError(f"unknown analysis {name!r}; known: {', '.join(REGISTRY)}")
    module = importlib.import_module(REGISTRY[name])
    return module.analyse
