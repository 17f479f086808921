"""The committed demo series get the verdicts they were built for.

The invented Fernhollow scenario holds four series built to be caught (a 120 degree arc,
36 views, two metal implants, structures painted into the air) and five that should pass
(a clean FBP torso, the reference and test reconstructions of the comparison pair, the
daily water phantom and its nonlinear reconstruction). A method change that flags a
clean series or misses a built-in fault shows here first.
"""
from __future__ import annotations

from pathlib import Path

import pytest

from reconaudit.checker.runner import CheckOptions, check

DEMO = Path(__file__).resolve().parents[2] / "sample_volumes"

#: series id prefix -> (verdict, the analyses that flag and no others). The limited-angle
#: series also flags the air: its missing wedge leaves the air about 100 HU above
#: -1000 HU, which the calibration check reports.
EXPECTED = {
    "Torso-FH-T1-120-deg-arc": ("review", ["streaks", "air"]),
    "Torso-FH-T1-36-views": ("review", ["streaks"]),
    "Torso-FH-T1-two-metal-implants": ("review", ["streaks"]),
    "Torso-FH-T1-structures-in-air": ("review", ["air"]),
    "Torso-FH-T1-clean-FBP": ("pass", []),
    "Torso-FH-T1-reference-FBP": ("pass", []),
    "Torso-FH-T1-test-recon-for-comparison": ("pass", []),
    "QA2-water-phantom-daily-QA-TV-recon": ("pass", []),
    "QA2-water-phantom-daily-QA-": ("pass", []),
}


@pytest.fixture(scope="module")
def demo_records(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo-verdicts")
    outcome = check(CheckOptions(inputs=[DEMO], out_dir=out, workers=2, figures=False))
    return {s["id"]: s for s in outcome.document["series"]}


def _record_for(records, prefix):
    # the longest matching prefix wins (the TV reconstruction shares the phantom's prefix)
    hits = [sid for sid in records
            if sid.startswith(prefix) and not any(p != prefix and len(p) > len(prefix) and sid.startswith(p) for p in EXPECTED)]
    assert len(hits) == 1, (prefix, sorted(records))
    return records[hits[0]]


def test_nine_series_are_checked(demo_records):
    assert len(demo_records) == 9
    assert all(s["status"] == "ok" for s in demo_records.values())


@pytest.mark.parametrize("prefix", sorted(EXPECTED))
def test_each_demo_series_gets_its_verdict(demo_records, prefix):
    verdict, analyses = EXPECTED[prefix]
    record = _record_for(demo_records, prefix)
    assert record["verdict"] == verdict, [f["message"] for f in record["findings"]]
    flagged = [name for name in ("streaks", "air", "nps", "uniformity", "ttf")
               if isinstance(record.get(name), dict) and record[name].get("flagged")]
    assert flagged == analyses  # the built-in fault, and nothing else
