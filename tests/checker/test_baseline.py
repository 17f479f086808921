from __future__ import annotations

from reconaudit.checker.baseline import BaselineStore, baseline_entry, compare_to_baseline, protocol_key


def _series(noise, f_av, f50):
    return {
        "id": "s1",
        "nps": {"noise_hu": noise, "f_av_per_mm": f_av, "f_peak_per_mm": 0.2, "frequency_per_mm": [0.1, 0.2],
                "nps_1d_hu2mm2": [1.0, 2.0]},
        "air": {"noise_hu": 10.0},
        "ttf": {"edges": [{"contrast_hu": 120.0, "f50_per_mm": f50, "f10_per_mm": 0.7, "reliable": True}]},
    }


def test_protocol_key_joins_fields():
    meta = {"series_description": "Abdomen", "convolution_kernel": "B30", "slice_thickness_mm": 2.5}
    assert protocol_key(meta, ["series_description", "convolution_kernel", "slice_thickness_mm"]) == "Abdomen | B30 | 2.5"
    assert protocol_key({}, ["series_description"]) == "?"


def test_changes_beyond_tolerance_ask_for_review(tmp_path):
    store = BaselineStore(tmp_path / "b.json")
    store.set("p", baseline_entry(_series(10.0, 0.30, 0.40)))
    store.save()
    entry = BaselineStore(tmp_path / "b.json").get("p")
    tol = {"noise_hu": 0.15, "f_av_per_mm": 0.10, "f50_per_mm": 0.10}
    comparison, findings = compare_to_baseline(_series(10.5, 0.29, 0.39), entry, tol)
    assert findings == []
    assert abs(comparison["changes"]["noise_hu"]["relative_change"] - 0.05) < 1e-9
    comparison, findings = compare_to_baseline(_series(6.0, 0.20, 0.30), entry, tol)
    messages = " ".join(f.message for f in findings)
    assert len(findings) == 3 and "noise_hu" in messages and "f_av_per_mm" in messages and "f50" in messages
