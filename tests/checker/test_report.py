"""Tests of the HTML report and its figures (synthetic records; a real render when the
analyses have landed)."""
from __future__ import annotations

import json
import os
import shutil
import subprocess
import tempfile
from pathlib import Path

import numpy as np
import pytest
from markupsafe import escape

from reconaudit.checker import SAFETY_NOTICE
from reconaudit.checker.regions import find_regions
from reconaudit.checker.report import choose_slice, render_series_figures, write_report
from reconaudit.checker.report import html as report_html
from reconaudit.checker.results import AnalysisResult, Finding, Overlays, Point, Roi, Segment, Severity
from reconaudit.checker.volume import Volume

CHROMIUM = shutil.which("chromium") or ("/usr/bin/chromium" if os.path.exists("/usr/bin/chromium") else None)


# ------------------------------------------------------------------------ fixtures
def make_phantom(nz: int = 6, n: int = 96) -> Volume:
    """An invented water cylinder (0 HU) with a +340 HU rod, in air, with a faint blob in air."""
    rng = np.random.default_rng(7)
    yy, xx = np.mgrid[:n, :n]
    r = np.hypot(yy - n / 2, xx - n / 2)
    sl = np.where(r < n * 0.35, 0.0, -1000.0)
    sl[np.hypot(yy - n / 2, xx - n * 0.62) < 5] = 340.0
    sl[np.hypot(yy - 8, xx - 10) < 3] = -850.0  # a faint structure in the air
    hu = np.repeat(sl[None], nz, axis=0) + rng.normal(0, 10, (nz, n, n))
    return Volume.from_array(hu.astype(np.float32), spacing_mm=(2.0, 0.8, 0.8), series_uid="1.2.826.0.1.99.1")


def synthetic_results(volume: Volume) -> dict[str, AnalysisResult]:
    nz, ny, nx = volume.shape
    freq = np.linspace(0, 0.6, 31)
    nps_curve = 80.0 * freq * np.exp(-((freq - 0.25) ** 2) / 0.02)
    labels = np.zeros(volume.shape, np.int32)
    yy, xx = np.mgrid[:ny, :nx]
    labels[2:5][:, np.hypot(yy - 8, xx - 10) < 4] = 1
    per_slice = [0.05, 0.06, 0.31, 0.42, 0.12, 0.04][:nz]
    edge_f = np.linspace(0, 1.0, 41)
    return {
        "streaks": AnalysisResult(
            "streaks",
            {"index": 0.42, "flagged": True, "dominant_angles_deg": [30.0, 120.0], "slice_index": per_slice,
             "flagged_slices": [2, 3], "missing_wedge_deg": 24.0, "index_tolerance": 0.25},
            [Finding("streaks", Severity.REVIEW, "streaks at 30 deg on 2 slices")],
            Overlays(segments=[Segment((3, 20, 10), (3, 60, 80), "30 deg", 0.4)]),
        ),
        "air": AnalysisResult(
            "air",
            {"mean_hu": -995.0, "noise_hu": 9.5, "flagged": True,
             "structures": [{"id": 1, "centroid_zyx_vox": [3.0, 8.0, 10.0], "centroid_mm": [8.0, 6.4, 6.0],
                             "bbox_zyx_vox": [[2, 4, 6], [5, 12, 14]], "volume_mm3": 120.0, "mean_hu": -850.0,
                             "max_hu": -820.0, "contrast_to_noise": 15.0, "slices": [2, 4], "kind": "blob",
                             "flagged": True}]},
            [Finding("air", Severity.FAIL, "a structure of 120 mm3 in the air")],
            Overlays(labels=labels),
        ),
        "nps": AnalysisResult(
            "nps",
            {"noise_hu": 10.2, "f_peak_per_mm": 0.26, "f_av_per_mm": 0.29, "frequency_per_mm": freq.tolist(),
             "nps_1d_hu2mm2": nps_curve.tolist(), "roi_count": 4, "method": "synthetic"},
            [],
            Overlays(rois=[Roi(0, nz - 1, 40, 30, 56, 46, "nps")]),
        ),
        "uniformity": AnalysisResult("uniformity", {"water_hu": 1.5, "uniformity_hu": 2.1, "centre_sd_hu": 10.0}),
        "ttf": AnalysisResult(
            "ttf",
            {"method": "circular edge", "edges": [
                {"contrast_hu": 340.0, "contrast_to_noise": 34.0, "f50_per_mm": 0.41, "f10_per_mm": 0.72,
                 "frequency_per_mm": edge_f.tolist(), "ttf": np.exp(-((edge_f / 0.41) ** 2) * np.log(2)).tolist(),
                 "center_mm": [10.0, 0.0, 4.0], "slices": [0, nz - 1], "reliable": True}]},
            [],
            Overlays(points=[Point((z, ny / 2, nx * 0.62), "+340 HU") for z in range(nz)]),
        ),
    }


def series_entry(sid: str, results: dict[str, AnalysisResult], **extra) -> dict:
    entry = {
        "id": sid, "source": f"/data/invented-centre/{sid}", "series_instance_uid": "1.2.826.0.1.99.1",
        "status": "ok", "error": None, "verdict": "fail",
        "geometry": {"shape_zyx": [6, 96, 96], "spacing_mm_zyx": [2.0, 0.8, 0.8]},
        "metadata": {"series_description": "QA head 2 mm", "convolution_kernel": "SOFT-B", "kvp": 120.0},
        "baseline": None,
        "findings": [f.to_json() for r in results.values() for f in r.findings],
    }
    for name, r in results.items():
        entry[name] = json.loads(json.dumps(r.record))
    entry.update(extra)
    return entry


def make_doc(series: list[dict]) -> dict:
    return {"schema": "reconaudit.results/1", "tool_version": "0.1.0", "started": "2026-03-02T01:00:00+00:00",
            "profile": {"name": "invented-nightly"}, "series": series}


@pytest.fixture()
def phantom_and_results():
    vol = make_phantom()
    return vol, synthetic_results(vol)


def write(tmp_path: Path, series: list[dict], **kwargs) -> str:
    path = write_report(make_doc(series), tmp_path, figures=kwargs.pop("figures", {}), **kwargs)
    assert path == tmp_path / "report.html"
    return path.read_text(encoding="utf-8")


def error_entry(sid: str = "broken", message: str = "gap of 3 slices at z=12") -> dict:
    return {"id": sid, "source": "/data/invented-centre/broken", "series_instance_uid": "1.2.826.0.1.99.2",
            "status": "error", "error": {"kind": "missing_slices", "message": message}, "verdict": None,
            "geometry": None, "metadata": {"series_description": "QA body 5 mm"}, "baseline": None, "findings": []}


# --------------------------------------------------------------------------- escaping
def test_script_in_dicom_strings_is_escaped(tmp_path, phantom_and_results):
    _, results = phantom_and_results
    evil = "<script>alert(1)</script>"
    entry = series_entry("evil", results)
    entry["metadata"]["series_description"] = evil
    entry["metadata"]["convolution_kernel"] = evil
    entry["source"] = f"/data/{evil}"
    entry["findings"].append({"analysis": "air", "severity": "review", "message": evil})
    html = write(tmp_path, [entry, error_entry(message=evil)])
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert evil not in html
    # the only live script element is the report's own sorting code
    assert html.count("<script") == 1
    assert "alert(1)" not in html.split("<script>")[1].split("</script>")[0]


def test_no_external_resources(tmp_path, phantom_and_results):
    _, results = phantom_and_results
    html = write(tmp_path, [series_entry("a", results)])
    assert "http://" not in html and "https://" not in html
    assert "<link" not in html


def test_figure_paths_must_be_relative(tmp_path, phantom_and_results):
    _, results = phantom_and_results
    figures = {"a": {"nps": "javascript:alert(1)", "ttf": "/etc/passwd", "axial": "../up.png",
                     "axial_air": "figures/a/axial_air.png"}}
    html = write(tmp_path, [series_entry("a", results)], figures=figures)
    assert "javascript:" not in html and "/etc/passwd" not in html and "../up.png" not in html
    assert 'src="figures/a/axial_air.png"' in html


# ------------------------------------------------------------------------ identifiers
def _entry_with_identifiers(results) -> dict:
    entry = series_entry("ident", results)
    entry["identifiers"] = {"patient_name": "INVENTED^PERSON", "patient_id": "ID-778899",
                            "accession_number": "ACC-5566"}
    entry["metadata"]["patient_name"] = "INVENTED^PERSON"  # leaked into metadata by mistake
    entry["source"] = "/data/INVENTED^PERSON/series-1"
    entry["findings"].append({"analysis": "air", "severity": "info", "message": "seen for ID-778899"})
    return entry


def test_identifiers_absent_by_default(tmp_path, phantom_and_results):
    _, results = phantom_and_results
    html = write(tmp_path, [_entry_with_identifiers(results)])
    for secret in ("INVENTED^PERSON", "INVENTED PERSON", "ID-778899", "ACC-5566"):
        assert secret not in html
    assert report_html.WITHHELD in html
    assert "Patient identifiers are left out" in html


def test_identifiers_present_when_asked(tmp_path, phantom_and_results):
    _, results = phantom_and_results
    html = write(tmp_path, [_entry_with_identifiers(results)], include_identifiers=True)
    assert "INVENTED^PERSON" in html and "ID-778899" in html and "ACC-5566" in html
    assert report_html.WITHHELD not in html


# ------------------------------------------------------------------- robustness
def test_error_series_and_missing_analyses(tmp_path, phantom_and_results):
    _, results = phantom_and_results
    bare = {"id": "bare", "status": "ok", "verdict": "pass", "findings": []}  # nothing measured at all
    not_applicable = series_entry("na", {}, verdict="review")
    not_applicable["nps"] = {"applicable": False, "reason": "no uniform region found"}
    malformed = series_entry("odd", {}, verdict="review")
    malformed["nps"] = {"noise_hu": "n/a", "frequency_per_mm": "garbage", "f_av_per_mm": float("nan")}
    malformed["ttf"] = {"edges": [None, {"contrast_hu": "x"}, 5]}
    malformed["air"] = {"structures": "none"}
    html = write(tmp_path, [error_entry(), bare, not_applicable, malformed, series_entry("full", results)])
    assert "missing_slices" in html and "gap of 3 slices at z=12" in html
    assert "no uniform region found" in html
    assert "not run" in html
    assert html.count('class="block series') == 5
    for word in ("not checked", "fail", "review", "pass"):
        assert word in html
    assert str(escape(SAFETY_NOTICE)) in html and "Not for diagnosis" in html


def test_empty_run(tmp_path):
    html = write(tmp_path, [])
    assert "checked no series" in html and str(escape(SAFETY_NOTICE)) in html


def test_verdict_counts_in_header(tmp_path, phantom_and_results):
    _, results = phantom_and_results
    series = [series_entry("a", results), series_entry("b", results, verdict="pass"),
              series_entry("c", results, verdict="pass"), error_entry()]
    ctx = report_html.report_context(make_doc(series), {}, None, False)
    assert ctx["counts"] == {"pass": 2, "review": 0, "fail": 1, "error": 1, "none": 0}


def test_headline_numbers_in_overview(tmp_path, phantom_and_results):
    _, results = phantom_and_results
    html = write(tmp_path, [series_entry("a", results)])
    overview = html.split('<table class="overview sortable">')[1].split("</table>")[0]
    for value in ('data-v="0.42"', 'data-v="1"', 'data-v="10.2"', 'data-v="0.29"', 'data-v="0.41"'):
        assert value in overview


def test_baseline_comparison_shown(tmp_path, phantom_and_results):
    _, results = phantom_and_results
    entry = series_entry("a", results)
    entry["baseline"] = {"recorded_at": "2026-01-05T01:00:00", "from_series": "jan-ref",
                         "changes": {"noise_hu": {"now": 10.2, "baseline": 8.5, "relative_change": 0.2},
                                     "f50_per_mm": [{"contrast_hu": 340.0, "f50_now": 0.41, "f50_baseline": 0.5,
                                                     "relative_change": -0.18}]}}
    html = write(tmp_path, [entry])
    assert "jan-ref" in html
    assert "+1.7 (+20%)" in html  # 10.2 vs 8.5 HU
    assert "−0.09 (−18%)" in html  # f50 0.41 vs 0.5 per mm


# ------------------------------------------------------------------ atomic writing
def test_atomic_write_keeps_old_report_when_rendering_fails(tmp_path, monkeypatch, phantom_and_results):
    _, results = phantom_and_results
    (tmp_path / "report.html").write_text("OLD REPORT", encoding="utf-8")

    def broken(*args, **kwargs):
        raise RuntimeError("renderer broke half-way")

    monkeypatch.setattr(report_html, "render_report", broken)
    with pytest.raises(RuntimeError):
        write_report(make_doc([series_entry("a", results)]), tmp_path, figures={})
    assert (tmp_path / "report.html").read_text(encoding="utf-8") == "OLD REPORT"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report.html"]


def test_atomic_write_leaves_no_temp_file_when_replace_fails(tmp_path, monkeypatch, phantom_and_results):
    _, results = phantom_and_results

    def no_replace(src, dst):
        raise OSError("disk went away")

    monkeypatch.setattr(report_html.os, "replace", no_replace)
    with pytest.raises(OSError):
        write_report(make_doc([series_entry("a", results)]), tmp_path, figures={})
    assert list(tmp_path.iterdir()) == []


# ------------------------------------------------------------------------- figures
def _is_picture(path: Path) -> bool:
    from matplotlib.image import imread

    img = imread(str(path))
    return img.ndim == 3 and img.shape[0] > 50 and float(img[..., :3].std()) > 0.02


def test_all_figures_drawn(tmp_path, phantom_and_results):
    vol, results = phantom_and_results
    base = {"nps": results["nps"].record, "ttf_edges": results["ttf"].record["edges"]}
    figs = render_series_figures(vol, find_regions(vol), results, tmp_path, "QA/1", baseline=base)
    assert set(figs) == {"axial", "axial_air", "nps", "ttf", "streak_polar", "streak_profile"}
    for rel in figs.values():
        assert not Path(rel).is_absolute() and rel.startswith("figures/QA_1/")
        assert _is_picture(tmp_path / rel)


def test_figures_skip_missing_and_not_applicable(tmp_path, phantom_and_results):
    vol, results = phantom_and_results
    partial = {"nps": AnalysisResult.not_applicable("nps", "no uniform region"), "ttf": results["ttf"]}
    figs = render_series_figures(vol, None, partial, tmp_path, "p")
    assert set(figs) == {"axial", "ttf"}


def test_figures_survive_malformed_records(tmp_path, phantom_and_results):
    vol, _ = phantom_and_results
    odd = {
        "streaks": AnalysisResult("streaks", {"slice_index": "oops", "flagged_slices": [99, "x"], "dominant_angles_deg": None}),
        "nps": AnalysisResult("nps", {"frequency_per_mm": [0.1, 0.2], "nps_1d_hu2mm2": [1.0]}),
        "ttf": AnalysisResult("ttf", {"edges": [{"frequency_per_mm": None}]}),
        "air": AnalysisResult("air", {"structures": [{"centroid_zyx_vox": "?"}]}),
    }
    figs = render_series_figures(vol, None, odd, tmp_path, "odd")
    assert set(figs) == {"axial", "axial_air"}


def test_slice_choice(phantom_and_results):
    vol, results = phantom_and_results
    assert choose_slice(vol, results) == (3, "most-flagged streak slice")
    no_streaks = {k: v for k, v in results.items() if k != "streaks"}
    assert choose_slice(vol, no_streaks) == (3, "largest flagged air structure")
    assert choose_slice(vol, {}) == (vol.shape[0] // 2, "middle slice")


# ------------------------------------------------- figures reused within a thread
def _pixels(folder: Path, figs: dict[str, str]) -> dict[str, np.ndarray]:
    from PIL import Image

    return {name: np.asarray(Image.open(folder / rel)) for name, rel in figs.items()}


def _in_new_thread(draw):
    """Run ``draw`` in a thread of its own: it starts with no figures built."""
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(max_workers=1) as pool:
        return pool.submit(draw).result()


def _other_series() -> tuple[Volume, dict[str, AnalysisResult], dict]:
    """A second series unlike the fixture's: larger, other curves, a baseline, a tolerance."""
    vol = make_phantom(nz=8, n=128)
    results = synthetic_results(vol)
    results["nps"].record["nps_1d_hu2mm2"] = [3.0 * v for v in results["nps"].record["nps_1d_hu2mm2"]]
    results["streaks"].record["slice_index"] = [0.9, 0.1, 0.2, 0.7, 0.3, 0.2, 0.1, 0.05]
    results["streaks"].record["angular_profile"] = {"angles_deg": list(range(0, 180, 10)),
                                                    "relative_energy": [1.0 + (a % 30) / 30 for a in range(0, 180, 10)]}
    base = {"nps": results["nps"].record, "ttf_edges": results["ttf"].record["edges"]}
    return vol, results, base


def test_a_reused_figure_keeps_nothing_of_the_series_before(tmp_path, phantom_and_results):
    """Series A then B on this thread's figures give B the same pixels as B drawn on
    fresh figures (a new thread), for every figure kind."""
    from reconaudit.checker.report import figures

    vol_b, results_b = phantom_and_results
    vol_a, results_a, base_a = _other_series()
    fresh = _in_new_thread(lambda: render_series_figures(vol_b, None, results_b, tmp_path / "fresh", "b"))
    figs_a = render_series_figures(vol_a, None, results_a, tmp_path / "reused", "a", baseline=base_a,
                                   tolerances={"streaks": {"index_tolerance": 0.5}})
    built = dict(figures._THREAD_FIGURES.__dict__)
    figs_b = render_series_figures(vol_b, None, results_b, tmp_path / "reused", "b")
    assert set(figs_a) == set(figs_b) == set(fresh) == {"axial", "axial_air", "nps", "ttf", "streak_polar",
                                                         "streak_profile"}
    assert all(figures._THREAD_FIGURES.__dict__[k][0] is built[k][0] for k in figs_b), "figures were not reused"
    pixels_a, pixels_b = _pixels(tmp_path / "reused", figs_a), _pixels(tmp_path / "reused", figs_b)
    pixels_fresh = _pixels(tmp_path / "fresh", fresh)
    for name in fresh:
        assert not np.array_equal(pixels_a[name], pixels_b[name]), f"{name}: A and B alike, the test proves nothing"
        assert np.array_equal(pixels_b[name], pixels_fresh[name]), f"{name}: series A shows in series B"


def test_a_figure_that_failed_to_save_leaves_nothing_behind(tmp_path, phantom_and_results, monkeypatch):
    """Every figure of A fails at writing (its artists are all on the axes by then); B
    drawn next on the same figures equals B on fresh ones."""
    from reconaudit.checker.report import figures

    vol_b, results_b = phantom_and_results
    vol_a, results_a, base_a = _other_series()
    fresh = _in_new_thread(lambda: render_series_figures(vol_b, None, results_b, tmp_path / "fresh", "b"))
    save = figures._save

    def failing_save(fig, path):
        raise ValueError("invented failure while writing")

    monkeypatch.setattr(figures, "_save", failing_save)
    assert render_series_figures(vol_a, None, results_a, tmp_path / "reused", "a", baseline=base_a) == {}
    monkeypatch.setattr(figures, "_save", save)
    figs_b = render_series_figures(vol_b, None, results_b, tmp_path / "reused", "b")
    pixels_b, pixels_fresh = _pixels(tmp_path / "reused", figs_b), _pixels(tmp_path / "fresh", fresh)
    assert set(pixels_b) == set(pixels_fresh)
    for name in fresh:
        assert np.array_equal(pixels_b[name], pixels_fresh[name]), f"{name}: the failed series shows"


def test_figures_drawn_by_two_threads_at_once_match_those_drawn_alone(tmp_path, phantom_and_results):
    """Each thread draws on figures of its own: two series drawn over and over by two
    threads at the same time give the pixels each gives drawn alone."""
    from concurrent.futures import ThreadPoolExecutor

    vol_b, results_b = phantom_and_results
    vol_a, results_a, base_a = _other_series()
    series = {"a": (vol_a, results_a, base_a), "b": (vol_b, results_b, None)}

    def draw(key: str, folder: Path) -> dict[str, np.ndarray]:
        vol, results, base = series[key]
        return _pixels(folder, render_series_figures(vol, None, results, folder, key, baseline=base))

    alone = {key: _in_new_thread(lambda key=key: draw(key, tmp_path / "alone")) for key in series}
    jobs = [(key, tmp_path / f"busy{i}") for i in range(3) for key in series]
    with ThreadPoolExecutor(max_workers=2) as pool:
        drawn = list(pool.map(lambda job: (job[0], draw(*job)), jobs))
    for key, pixels in drawn:
        assert set(pixels) == set(alone[key])
        for name, img in pixels.items():
            assert np.array_equal(img, alone[key][name]), f"series {key}, {name}: differs when drawn in parallel"


def test_figures_are_opaque_rgb_pngs(tmp_path, phantom_and_results):
    """The PNGs carry no alpha channel (every figure is drawn on an opaque background)."""
    from PIL import Image

    vol, results = phantom_and_results
    for rel in render_series_figures(vol, None, results, tmp_path, "a").values():
        with Image.open(tmp_path / rel) as img:
            assert (img.format, img.mode) == ("PNG", "RGB")


# ------------------------------------------------------------- a real analysis run
def test_real_render_through_the_analyses(tmp_path):
    """A small invented phantom through every analysis that is available, then figures
    and the report: the whole path the batch takes, with real records and overlays."""
    from reconaudit.checker.pipeline import analyse_volume
    from reconaudit.checker.results import to_jsonable

    vol = make_phantom(nz=8, n=128)
    vol.metadata = {"series_description": "invented rod phantom", "convolution_kernel": "SOFT-B"}
    analysis = analyse_volume(vol)
    assert analysis.results, "no analysis ran"
    figs = render_series_figures(vol, analysis.regions, analysis.results, tmp_path, "rod")
    assert "axial" in figs
    entry = {"id": "rod", "source": "memory", "series_instance_uid": vol.series_uid, "status": "ok", "error": None,
             "verdict": analysis.verdict.value, "geometry": vol.geometry_record(), "metadata": vol.metadata,
             "baseline": None, "findings": [f.to_json() for f in analysis.findings]}
    entry.update({k: to_jsonable(r.record) for k, r in analysis.results.items()})
    json.dumps(entry)  # the document is JSON-ready
    html = write(tmp_path, [entry], figures={"rod": figs})
    assert "invented rod phantom" in html
    for rel in figs.values():
        assert f'src="{rel}"' in html and (tmp_path / rel).is_file()


# ------------------------------------------------------------------ headless browser
def _screenshot(html_path: Path, png: Path) -> None:
    profile = tempfile.mkdtemp(prefix="reconaudit-chromium-")
    try:
        subprocess.run(
            [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             f"--user-data-dir={profile}", f"--screenshot={png}", "--window-size=1280,1600",
             html_path.resolve().as_uri()],
            check=True, stdout=subprocess.PIPE, stderr=subprocess.PIPE, timeout=180,
        )
    finally:
        shutil.rmtree(profile, ignore_errors=True)


def test_report_renders_in_headless_chromium(tmp_path, phantom_and_results):
    if CHROMIUM is None:
        if os.environ.get("CI"):
            pytest.fail("chromium is required in CI but was not found")
        pytest.skip("chromium not installed")
    vol, results = phantom_and_results
    figs = render_series_figures(vol, None, results, tmp_path, "a")
    html_path = write_report(make_doc([series_entry("a", results), error_entry()]), tmp_path, figures={"a": figs})
    png = tmp_path / "shot.png"
    _screenshot(html_path, png)
    from matplotlib.image import imread

    img = imread(str(png))
    assert img.shape[0] >= 1000 and img.shape[1] >= 1000
    grey = img[..., :3].mean(axis=2)
    assert float(grey.var()) > 1e-3, "the screenshot is blank"
    # the top band holds the masthead text and the overview, not an empty page
    assert float(grey[:400].std()) > 0.02


def test_thumbnail_slice_falls_back_to_the_measured_inserts():
    from reconaudit.checker.report.figures import edge_slice

    ttf = {"edges": [{"kind": "circular", "slices": [0, 7]}, {"kind": "circular", "slices": [0, 7]},
                     {"kind": "skin", "slices": [0, 15]}]}
    assert edge_slice(ttf, 16) == 4  # middle of slices 0-7 (round half to even of 3.5)
    assert edge_slice({"edges": [{"kind": "skin", "slices": [0, 15]}]}, 16) is None
    assert edge_slice(None, 16) is None


def test_report_says_how_many_series_were_skipped(tmp_path):
    from reconaudit.checker.report import render_report

    doc = {"schema": "reconaudit.results/1", "tool_version": "0", "profile": {"name": "p"}, "series": [],
           "skipped": [{"id": "a", "source": "x", "content_hash": "h"}, {"id": "b", "source": "y", "content_hash": "k"}]}
    html = render_report(doc, figures={})
    assert "2 more series had been checked before" in html
    doc["skipped"] = []
    assert "checked before" not in render_report(doc, figures={})


def test_an_f50_beyond_the_recorded_curve_is_not_shown_as_a_value():
    from reconaudit.checker.report import figures

    edge = {"contrast_hu": 900.0, "f50_per_mm": 3.05, "frequency_per_mm": [0.0, 0.35, 0.7], "ttf": [1.0, 0.99, 0.97]}
    assert figures._f50_on_curve(edge) is None
    assert "f50" not in figures._edge_label(edge) and "above 0.5" in figures._edge_label(edge)
    edge["f50_per_mm"] = 0.31
    assert figures._f50_on_curve(edge) == 0.31
    assert "f50 0.310" in figures._edge_label(edge)


@pytest.mark.parametrize("value, unit, shown", [
    (-0.07615, "HU", "-0.08"), (4.789, "HU", "4.79"), (-1000.0, "HU", "-1000"), (-711.46, "HU", "-711.5"),
    (0.08363, "mm⁻¹", "0.084"), (0.17, "mm⁻¹", "0.170"), (59.6, "deg", "60"), (None, "HU", "–"),
    (float("nan"), "HU", "–"), (35, "", "35"), (0.004321, "", "0.004321"),
])
def test_measured_values_show_fixed_decimals_by_unit(value, unit, shown):
    """CT numbers to 0.01 HU, spatial frequencies to 0.001 mm⁻¹ with trailing zeros kept (a
    column lines up, and 0.170 is not shown as 0.17), angles to a degree; a number without
    a unit keeps 4 significant digits."""
    from reconaudit.checker.report.html import fmt_measured

    assert fmt_measured(value, unit) == shown


def test_streak_index_shows_two_decimals():
    from reconaudit.checker.report.html import fmt_metric

    assert fmt_metric("streaks.index", 1.629, "") == "1.63"
    assert fmt_metric("streaks.index", 2.0, "") == "2"
    assert fmt_metric("nps.f_av_per_mm", 0.17, "mm⁻¹") == "0.170"


def test_a_not_applicable_analysis_is_said_once(tmp_path):
    """An analysis that does not apply is listed under "Not measured" with its reason, and
    its "not applicable" note is not repeated under the findings; other notes stay."""
    from reconaudit.checker.report.html import series_context

    reason = "no water cylinder found"
    series = {"id": "t", "status": "ok", "verdict": "pass", "metadata": {},
              "uniformity": {"applicable": False, "reason": reason},
              "findings": [{"analysis": "uniformity", "severity": "info", "message": f"not applicable: {reason}"},
                           {"analysis": "air", "severity": "info", "message": "air -1000.0 HU"}]}
    ctx = series_context(series, 1, None, include_identifiers=False)
    assert ("uniformity", reason) in ctx["not_measured"]
    assert [f["message"] for f in ctx["findings"]] == ["air -1000.0 HU"]
