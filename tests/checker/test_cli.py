"""The `reconaudit` command end to end on small series written in tmp_path."""
from __future__ import annotations

import csv
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from reconaudit.checker.cli import main
from reconaudit.checker.dicom_write import write_ct_series
from reconaudit.checker.volume import Volume

DEMO = Path(__file__).resolve().parents[2] / "sample_volumes" / "fernhollow" / "20240611"


def _water_cylinder(seed: int, n: int = 6, size: int = 96) -> Volume:
    rng = np.random.default_rng(seed)
    y, x = np.mgrid[0:size, 0:size]
    r = np.hypot(y - size / 2, x - size / 2)
    hu = np.where(r < size * 0.35, 0.0, -1000.0)[None].repeat(n, 0)
    hu = hu + rng.normal(0, 10, hu.shape)
    return Volume.from_array(hu.astype(np.float32), (2.5, 1.0, 1.0), (-48.0, -48.0, 0.0))


@pytest.fixture()
def two_series(tmp_path: Path) -> Path:
    root = tmp_path / "in"
    write_ct_series(_water_cylinder(1), root / "a", series_description="Cylinder <script>alert(1)</script>",
                    uid_seed="cli-a", patient_name="SECRET^NAME", patient_id="ID-12345")
    write_ct_series(_water_cylinder(2), root / "b", series_description="../../escape", uid_seed="cli-b")
    return root


def _run(args: list[str]) -> int:
    return main(args)


def test_help_version_and_bad_command_line(capsys):
    with pytest.raises(SystemExit) as e:
        main(["--version"])
    assert e.value.code == 0 and "reconaudit" in capsys.readouterr().out
    with pytest.raises(SystemExit) as e:
        main(["check", "--help"])
    assert e.value.code == 0
    assert "64  bad command line" in capsys.readouterr().out
    with pytest.raises(SystemExit) as e:
        main(["check"])  # no inputs, no --out
    assert e.value.code == 64
    with pytest.raises(SystemExit) as e:
        main(["no-such-command"])
    assert e.value.code == 64


def test_check_writes_results_csv_report_and_keeps_identifiers_out(two_series, tmp_path, capsys):
    out = tmp_path / "out"
    code = _run(["check", str(two_series), "--out", str(out), "--db", str(tmp_path / "h.sqlite"),
                 "--baselines", str(tmp_path / "b.json"), "--workers", "1"])
    doc = json.loads((out / "results.json").read_text())
    assert doc["schema"] == "reconaudit.results/1"
    assert len(doc["series"]) == 2 and {s["status"] for s in doc["series"]} == {"ok"}
    assert code == (1 if any(s["verdict"] != "pass" for s in doc["series"]) else 0)
    for s in doc["series"]:
        assert "/" not in s["id"] and not s["id"].startswith(".")
        assert s["geometry"]["shape_zyx"] == [6, 96, 96]
    rows = list(csv.DictReader((out / "results.csv").open()))
    assert len(rows) == 2 and "nps.noise_hu" in rows[0]
    for name in ("results.json", "results.csv", "report.html"):
        text = (out / name).read_text()
        assert "SECRET" not in text and "ID-12345" not in text, name
    html = (out / "report.html").read_text()
    assert "<script>alert(1)" not in html and "&lt;script&gt;" in html
    # nothing outside --out
    assert sorted(p.name for p in tmp_path.iterdir()) == ["b.json", "h.sqlite", "in", "out"] or \
        sorted(p.name for p in tmp_path.iterdir()) == ["h.sqlite", "in", "out"]


def test_second_run_skips_what_the_history_has(two_series, tmp_path):
    db = tmp_path / "h.sqlite"
    _run(["check", str(two_series), "--out", str(tmp_path / "o1"), "--db", str(db), "--no-figures", "--workers", "1"])
    _run(["check", str(two_series), "--out", str(tmp_path / "o2"), "--db", str(db), "--no-figures", "--workers", "1"])
    doc = json.loads((tmp_path / "o2" / "results.json").read_text())
    assert doc["series"] == [] and len(doc["skipped"]) == 2
    _run(["check", str(two_series), "--out", str(tmp_path / "o3"), "--db", str(db), "--no-figures", "--force",
          "--workers", "1"])
    assert len(json.loads((tmp_path / "o3" / "results.json").read_text())["series"]) == 2


def test_unreadable_input_gives_exit_2_and_the_rest_is_checked(two_series, tmp_path):
    (two_series / "junk.dcm").write_bytes(b"this is not DICOM at all" * 10)
    out = tmp_path / "out"
    code = _run(["check", str(two_series), "--out", str(out), "--no-history", "--no-figures", "--workers", "1"])
    doc = json.loads((out / "results.json").read_text())
    errors = [s for s in doc["series"] if s["status"] == "error"]
    assert code == 2
    assert len(errors) == 1 and "junk.dcm" in errors[0]["error"]["message"]
    assert sum(s["status"] == "ok" for s in doc["series"]) == 2


def test_baseline_then_check_reports_changes(two_series, tmp_path):
    out = tmp_path / "o"
    base = tmp_path / "b.json"
    _run(["check", str(two_series), "--out", str(out), "--no-history", "--no-figures", "--workers", "1"])
    assert _run(["baseline", str(out / "results.json"), "--baselines", str(base)]) == 0
    stored = json.loads(base.read_text())
    assert len(stored["protocols"]) == 2
    _run(["check", str(two_series), "--out", str(tmp_path / "o2"), "--no-history", "--no-figures",
          "--baselines", str(base), "--workers", "1"])
    doc = json.loads((tmp_path / "o2" / "results.json").read_text())
    for s in doc["series"]:
        assert s["baseline"] is not None
        change = s["baseline"]["changes"].get("noise_hu")
        assert change is None or abs(change["relative_change"]) < 1e-9  # the same pixels


def test_profile_command_prints_sources(capsys):
    assert main(["profile"]) == 0
    out = capsys.readouterr().out
    assert "[analyses.streaks.settings]" in out and "# source:" in out


def test_compare_command_on_the_demo_pair(tmp_path, capsys):
    """The demo pair: wall moved out by 10 mm and a lesion missing (checker/demo.py)."""
    from reconaudit.checker import demo

    out = tmp_path / "cmp"
    code = main(["compare", str(DEMO / "compare_test"), str(DEMO / "compare_reference"), "--out", str(out)])
    assert code == 1
    doc = json.loads((out / "comparison.json").read_text())
    assert abs(doc["body_surface_shift_mm"]["max"] - demo.WALL_SHIFT_MM) <= 1.5
    assert doc["body_surface_shift_mm"]["max_at_mm"][1] < -60  # anterior (LPS y negative)
    lost = doc["only_in_reference"]
    assert len(lost) == 1
    z0 = doc["reference"]["geometry"]["origin_mm"][2]
    truth = np.array([demo.LESION.section.cx, demo.LESION.section.cy, z0 + demo.LESION.cz])
    assert np.linalg.norm(np.array(lost[0]["centroid_mm"]) - truth) <= 3.0
    assert (out / "comparison.html").exists()


def test_console_script_runs():
    out = subprocess.run([sys.executable, "-m", "reconaudit.checker.cli", "--version"], capture_output=True, text=True)
    assert out.returncode == 0 and out.stdout.startswith("reconaudit ")


def test_the_command_prefers_small_pages_unless_the_site_chose():
    from reconaudit.checker.cli import prefer_small_pages

    env: dict[str, str] = {}
    prefer_small_pages(env)
    assert env["NUMPY_MADVISE_HUGEPAGE"] == "0"
    site = {"NUMPY_MADVISE_HUGEPAGE": "1"}
    prefer_small_pages(site)
    assert site["NUMPY_MADVISE_HUGEPAGE"] == "1"


def test_the_command_module_sets_it_before_numpy_is_imported():
    import subprocess
    import sys as _sys

    code = ("import os; os.environ.pop('NUMPY_MADVISE_HUGEPAGE', None)\n"
            "import sys\n"
            "from reconaudit.checker import cli\n"
            "early = 'numpy' in sys.modules  # too late for the setting if numpy is already in\n"
            "cli.prefer_small_pages()\n"
            "sys.exit(0 if not early and os.environ['NUMPY_MADVISE_HUGEPAGE'] == '0' else 1)\n")
    assert subprocess.run([_sys.executable, "-c", code], timeout=120).returncode == 0


def test_a_check_with_figures_off_does_not_import_matplotlib(two_series, tmp_path):
    out = tmp_path / "out"
    code = ("import sys\n"
            "from reconaudit.checker.cli import main\n"
            f"rc = main(['check', {str(two_series)!r}, '--out', {str(out)!r}, '--no-figures', '--no-history',"
            " '--workers', '1'])\n"
            "sys.exit(3 if 'matplotlib' in sys.modules else rc)\n")
    done = subprocess.run([sys.executable, "-c", code], timeout=300, capture_output=True, text=True)
    assert done.returncode in (0, 1), done.stderr[-2000:]
    assert (out / "report.html").exists() and (out / "results.json").exists()


def test_the_figures_are_there_when_asked_for():
    from reconaudit.checker import report

    assert callable(report.render_series_figures) and callable(report.draw_trend_chart)
    assert report.figures.choose_slice is report.choose_slice
    with pytest.raises(AttributeError):
        report.no_such_thing  # noqa: B018


def test_a_two_worker_check_gives_the_one_worker_results_and_unfreezes_the_collector(two_series, tmp_path):
    import gc

    for workers in ("1", "2"):
        _run(["check", str(two_series), "--out", str(tmp_path / workers), "--no-history", "--no-figures",
              "--workers", workers])
    assert gc.get_freeze_count() == 0
    one, two = (json.loads((tmp_path / w / "results.json").read_text())["series"] for w in ("1", "2"))
    assert [s["id"] for s in one] == [s["id"] for s in two]
    assert [s["nps"] for s in one] == [s["nps"] for s in two]
    assert [s["verdict"] for s in one] == [s["verdict"] for s in two]


def test_the_largest_series_is_handed_out_first_and_the_outputs_stay_sorted(tmp_path, monkeypatch):
    """Three series of 2, 9 and 5 slices: the tasks go out 9, 5, 2 slices (largest
    first); results.json still lists the series by id."""
    from reconaudit.checker import runner

    root = tmp_path / "in"
    for name, nz in (("a-short", 2), ("b-long", 9), ("c-mid", 5)):
        write_ct_series(_water_cylinder(nz, n=nz, size=64), root / name, series_description=f"Fernhollow {name}",
                        uid_seed=f"order-{name}")
    handed_out: list[int] = []
    real_run_local = runner.run_local

    def recording(tasks, on_done, **kw):
        handed_out.extend(len(t.source.files) for t in tasks)
        return real_run_local(tasks, on_done, **kw)

    monkeypatch.setattr(runner, "run_local", recording)
    _run(["check", str(root), "--out", str(tmp_path / "out"), "--no-history", "--no-figures", "--workers", "1"])
    assert handed_out == [9, 5, 2]
    ids = [r["id"] for r in json.loads((tmp_path / "out" / "results.json").read_text())["series"]]
    assert ids == sorted(ids) and len(ids) == 3


def test_series_of_about_the_same_size_keep_the_discovery_order(tmp_path):
    """Sizes 1000, 1040, 5000 and 990 bytes: the 5000-byte series first, the others (the
    same two leading digits: no telling which takes longer) in the order found."""
    from types import SimpleNamespace

    from reconaudit.checker.runner import largest_first

    from reconaudit.checker.fsutil import fingerprint_and_bytes

    tasks = []
    for name, size in (("a", 1000), ("b", 1040), ("c", 5000), ("d", 990)):
        f = tmp_path / f"{name}.dcm"
        f.write_bytes(b"\0" * size)
        tasks.append(SimpleNamespace(name=name, size_bytes=fingerprint_and_bytes([f])[1]))
    assert [t.size_bytes for t in tasks] == [1000, 1040, 5000, 990]
    assert [t.name for t in largest_first(tasks)] == ["c", "a", "b", "d"]


def test_summary_names_each_verdict_in_words():
    """The terminal summary says 'review', 'fail' or 'not checked' beside each series that
    needs a look (not a bare symbol), and the counts of each verdict."""
    from reconaudit.checker.cli import _summary_text

    doc = {"series": [
        {"id": "s-ok", "status": "ok", "verdict": "pass", "findings": []},
        {"id": "s-look", "status": "ok", "verdict": "review",
         "findings": [{"analysis": "streaks", "severity": "review", "message": "streaks: index 3.4 exceeds 2.0"}]},
        {"id": "s-bad", "status": "error", "verdict": None, "error": {"kind": "unreadable_file", "message": "truncated"}},
    ]}
    text = _summary_text(doc, Path("out"), skipped=0)
    assert "  review       s-look: streaks: index 3.4 exceeds 2.0" in text
    assert "  not checked  s-bad: unreadable_file: truncated" in text
    assert "s-ok" not in text and "  1 pass, 1 review, 1 not checked\n" in text
    assert "?" not in text
