"""One ``reconaudit check`` over the whole bad-input corpus and two good series.

Every bad input must end as a clear error (a kind and a message naming its file or
folder) or load with a note saying what was done; the batch goes on, exits 2, and the
good series' results are complete.
"""
from __future__ import annotations

import builtins
import csv
import errno
import io
import json
import os
from pathlib import Path

import pytest

from relhelp import make_corpus, run_cli

ANALYSES = ("streaks", "air", "nps", "uniformity", "ttf")


def _records_of(case_dir: Path, records: list[dict]) -> list[dict]:
    prefix = str(case_dir)
    return [r for r in records if r["source"] == prefix or r["source"].startswith(prefix + os.sep)]


@pytest.fixture(scope="module")
def corpus_run(corpus, tmp_path_factory):
    """The check run, with the two run-time cases acted out while it runs.

    ``vanished``: the file is removed right after discovery. ``no_permission``: ``open``
    raises EACCES for that file (the corpus also chmods it 000, which stops non-root
    users only; tests run as root in CI, so ``open`` itself is made to refuse).
    """
    from reconaudit.checker import load

    root, cases = corpus
    out = tmp_path_factory.mktemp("corpus_out") / "out"
    vanishing = next((root / "vanished").iterdir())
    refused = str(next((root / "no_permission").iterdir()))
    real_discover, real_open = load.discover, builtins.open

    def discover_then_remove(inputs):
        found = real_discover(inputs)
        vanishing.unlink()
        return found

    def refusing_open(file, *args, **kwargs):
        if isinstance(file, (str, os.PathLike)) and os.fspath(file) == refused:
            raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), refused)
        return real_open(file, *args, **kwargs)

    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(load, "discover", discover_then_remove)
        mp.setattr(builtins, "open", refusing_open)
        result = run_cli(["check", str(root), "--out", str(out), "--no-history", "--workers", "1", "--no-figures"])
    result["out"] = out
    result["doc"] = json.loads((out / "results.json").read_text(encoding="utf-8"))
    return result


def test_bad_input_count(corpus):
    """The corpus tries many distinct bad inputs (the README quotes this number)."""
    _, cases = corpus
    bad = make_corpus.bad_cases(cases)
    assert len(bad) >= 30
    assert len({c.name for c in bad}) == len(bad)


def test_exit_code_two(corpus_run):
    """Exit code 2: some series could not be read (common practice, no source: cli.py's documented codes)."""
    assert corpus_run["rc"] == 2, corpus_run["stderr"][-2000:]


def test_every_bad_input_is_an_error_or_a_noted_load(corpus, corpus_run):
    root, cases = corpus
    records = corpus_run["doc"]["series"]
    problems = []
    for case in make_corpus.bad_cases(cases):
        mine = _records_of(root / case.name, records)
        if not mine:
            problems.append(f"{case.name}: no record")
            continue
        for r in mine:
            if case.loads:
                if r["status"] != "ok" or r.get("geometry") is None:
                    problems.append(f"{case.name}: expected to load, got {r.get('error')}")
                elif case.note and not any(case.note in n for n in r.get("notes", [])):
                    problems.append(f"{case.name}: loaded without the note '{case.note}': {r.get('notes')}")
            else:
                err = r.get("error") or {}
                if r["status"] != "error" or err.get("kind") not in case.kinds:
                    problems.append(f"{case.name}: expected an error of kind {sorted(case.kinds)}, got {r['status']} {err}")
                elif case.name not in err.get("message", ""):
                    problems.append(f"{case.name}: message does not name the file or folder: {err.get('message')}")
    assert not problems, "\n".join(problems)


def test_no_unplanned_errors(corpus_run):
    """No record is an internal error or a failed analysis: every refusal is a typed one."""
    kinds = [(r["id"], (r.get("error") or {}).get("kind")) for r in corpus_run["doc"]["series"] if r["status"] == "error"]
    assert not [k for k in kinds if k[1] in ("internal_error", "analysis_failed", "worker_died", "error")], kinds


def test_every_record_belongs_to_a_case(corpus, corpus_run):
    root, cases = corpus
    names = {c.name for c in cases}
    for r in corpus_run["doc"]["series"]:
        rel = Path(r["source"]).relative_to(root)
        assert rel.parts[0] in names, r["source"]


def test_good_series_complete(corpus, corpus_run):
    root, _ = corpus
    for name in ("good_water_a", "good_water_b"):
        (rec,) = _records_of(root / name, corpus_run["doc"]["series"])
        assert rec["status"] == "ok" and rec["verdict"] in ("pass", "review", "fail")
        for analysis in ANALYSES:
            assert "applicable" in rec[analysis], (name, analysis)
        assert rec["geometry"]["shape_zyx"] == [5, 40, 40]
        on_disk = json.loads((corpus_run["out"] / "series" / f"{rec['id']}.json").read_text(encoding="utf-8"))
        assert on_disk == rec


def test_outputs_list_every_record(corpus_run):
    out, doc = corpus_run["out"], corpus_run["doc"]
    rows = list(csv.DictReader(io.StringIO((out / "results.csv").read_text(encoding="utf-8"))))
    assert sorted(r["id"] for r in rows) == sorted(r["id"] for r in doc["series"])
    html = (out / "report.html").read_text(encoding="utf-8")
    missing = [r["id"] for r in doc["series"] if r["id"] not in html]
    assert not missing
    assert json.loads((out / "run.json").read_text())["finished"] is True


def test_summary_names_every_error(corpus_run):
    errors = [r["id"] for r in corpus_run["doc"]["series"] if r["status"] == "error"]
    assert len(errors) >= 25
    for sid in errors:
        assert f"  not checked  {sid}:" in corpus_run["stdout"]


@pytest.mark.parametrize("case, text", [("vanished", "No such file"), ("no_permission", "Permission denied"),
                                        ("fifo", "named pipe"), ("symlink_loop", "symbolic links")])
def test_file_system_errors_say_why(corpus, corpus_run, case, text):
    """The run-time and file-system cases fail for the reason they were built for."""
    root, _ = corpus
    mine = _records_of(root / case, corpus_run["doc"]["series"])
    assert mine and all(text in r["error"]["message"] for r in mine), [r.get("error") for r in mine]
