"""Wording helpers of the results table and layer names (no viewer needed)."""
from __future__ import annotations

import numpy as np

from reconaudit.checker.results import Segment
from reconaudit.checker.results import AnalysisResult
from reconaudit.plugin._layers import format_value, overlay_rows, record_rows, segment_rows, short_source, split_unit


def test_units_come_from_the_key_suffix():
    assert split_unit("noise_hu") == ("noise", "HU")
    assert split_unit("f50_per_mm") == ("f50", "cycles/mm")
    assert split_unit("nps_1d_hu2mm2") == ("nps 1d", "HU² mm²")
    assert split_unit("volume_mm3") == ("volume", "mm³")
    assert split_unit("missing_wedge_deg") == ("missing wedge", "°")
    assert split_unit("flagged") == ("flagged", "")


def test_record_rows_carry_units_and_readable_values():
    rows = {r.item: r for r in record_rows("nps", {"noise_hu": 11.834, "flagged": False, "f_av_per_mm": None})}
    assert rows["noise"].value == "11.83" and rows["noise"].unit == "HU"
    assert rows["flagged"].value == "no"
    assert rows["f av"].value == "—" and rows["f av"].unit == ""  # no unit beside a missing value
    assert format_value(float("nan")) == "n/a" and format_value(True) == "yes"


def test_table_values_have_the_reports_decimals():
    """The viewer's table shows a value as the report does (fixed decimals by unit)."""
    from reconaudit.checker.report.html import fmt_measured

    rows = {r.item: r for r in record_rows("air", {"noise_hu": 7.2634, "mean_hu": -999.96, "f50_per_mm": 0.17})}
    assert rows["noise"].value == "7.26" and rows["mean"].value == "-1000.0" and rows["f50"].value == "0.170"
    for value, unit in ((7.2634, "HU"), (0.17, "mm⁻¹"), (0.08363, "cycles/mm"), (12.5, "")):
        report_unit = "mm⁻¹" if unit == "cycles/mm" else unit
        assert format_value(value, unit) == fmt_measured(value, report_unit)
    from reconaudit.checker.report.html import fmt_metric

    index = {r.item: r for r in record_rows("streaks", {"index": 7.1864})}["index"]
    assert index.value == "7.19" == fmt_metric("streaks.index", 7.1864, "")


def test_layer_tags_are_short():
    assert short_source("Torso FH-T1, 120 deg arc (series 4)") == "series 4"
    assert short_source("Torso FH-T1, 120 deg arc (series 4) [2/3]") == "series 4 [2/3]"
    assert short_source("phantom P1") == "phantom P1"
    long = "a very long layer name without any series number"
    assert len(short_source(long)) <= 26 and short_source(long).endswith("…")


def test_segment_rows_one_per_slice_pointing_at_the_strongest():
    segs = [Segment((2, 0, 0), (2, 0, 10), "streak 90 deg", 3.0), Segment((2, 5, 0), (2, 5, 10), "streak 0 deg", 7.0),
            Segment((4, 0, 0), (4, 10, 0), "streak 0 deg", 1.0)]
    rows = segment_rows("streaks", segs, z_offset=10)
    assert [r.slice_index for r in rows] == [12, 14]
    assert rows[0].value == "7" and rows[0].centre_zyx_vox == (12.0, 5.0, 5.0)
    assert "2 lines" in rows[0].note and "strongest: streak 0 deg" in rows[0].note


def test_structure_rows_name_the_kind_in_words():
    """The table says what a structure in the air is in words ("leaving the scanned
    slices"), not the record's key."""
    result = AnalysisResult("air", {"structures": [{"id": 1, "kind": "leaves_scan", "flagged": False},
                                                   {"id": 2, "kind": "isolated", "flagged": True}]})
    rows = overlay_rows("air", result, 0, [(1, (8.0, 10.0, 12.0), 19712), (2, (6.0, 5.0, 5.0), 512)])
    notes = {r.item: r for r in rows}
    assert notes["structure 1"].unit == "voxels" and notes["structure 1"].value == "19712"
    assert notes["structure 1"].note == "leaving the scanned slices"
    assert notes["structure 2"].note == "isolated, flagged"
