"""Shared fixtures of the reliability tests: the bad-input corpus and small good series.

The corpus is generated once per session into a temporary folder by
``tests/corpus/make_corpus.py``; nothing of it is committed.
"""
from __future__ import annotations

from pathlib import Path

import pytest

from relhelp import make_corpus, write_good_series


@pytest.fixture(scope="session")
def corpus(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, list]:
    """(root folder, cases) of the bad-input corpus plus its two good series."""
    root = tmp_path_factory.mktemp("corpus") / "nightly"
    cases = make_corpus.make_corpus(root)
    return root, cases


@pytest.fixture(scope="session")
def four_series(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A folder of four small valid CT series (fault and equivalence tests)."""
    root = tmp_path_factory.mktemp("four") / "in"
    write_good_series(root, 4)
    return root
