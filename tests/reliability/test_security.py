"""Security rules of a check run, one test per rule.

* DICOM-derived text is escaped in the HTML report;
* identifiers with ``../`` write nothing outside ``--out``;
* a text that a spreadsheet would run as a formula is defused in the CSV;
* a check run opens no listening socket;
* patient identifiers stay out of the report, CSV, results.json, history and logs by
  default (and do appear when asked, so the search could find them).

The run is the real ``reconaudit`` command in a subprocess with two workers and ``-v``.
All names and identifiers are invented.
"""
from __future__ import annotations

import csv
import io
import json
import os
import re
import subprocess
import sys
import threading
import time
from pathlib import Path

import pydicom
import pytest

from relhelp import make_corpus, run_cli

SCRIPT = '<script>alert("fernhollow")</script>'
TRAVERSAL = "../../../../../tmp/reconaudit-escape/../x"
FORMULA = "=HYPERLINK(\"http://example.invalid\",\"open\")"
BIRTH_DATE, ACCESSION, OTHER_ID = "19770315", "ACC-QZ-99812", "FH-ALT-40417"
IDENTIFIERS = [make_corpus.PATIENT_NAME, "QUILLFEATHER", "ZEPHYRINE", make_corpus.PATIENT_ID, ACCESSION, OTHER_ID,
               BIRTH_DATE]


def _write_inputs(root: Path) -> Path:
    inputs = root / "in"
    make_corpus.write_series(inputs / "xss", "xss", nz=3, description=SCRIPT)
    make_corpus.write_series(inputs / "traversal", "traversal", nz=3, description=TRAVERSAL)
    make_corpus.write_series(inputs / "formula", "formula", nz=3, description=FORMULA)
    for f in sorted(inputs.rglob("*.dcm")):
        ds = pydicom.dcmread(f)
        ds.PatientBirthDate, ds.AccessionNumber, ds.OtherPatientIDs = BIRTH_DATE, ACCESSION, OTHER_ID
        ds.save_as(f)
    return inputs


def _files_outside(root: Path, out: Path) -> set[str]:
    return {str(p) for p in root.rglob("*") if out not in p.parents and p != out}


@pytest.fixture(scope="module")
def secure_run(tmp_path_factory):
    root = tmp_path_factory.mktemp("security")
    inputs = _write_inputs(root)
    out = root / "out"
    home = root / "home"
    before = _files_outside(root, out) | {str(p) for p in Path("/tmp/reconaudit-escape").glob("**/*")}
    cmd = [sys.executable, "-m", "reconaudit.checker.cli", "-v", "check", str(inputs), "--out", str(out),
           "--workers", "2", "--db", str(home / "history.sqlite"), "--baselines", str(home / "baselines.json")]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=600, env=dict(os.environ, RECONAUDIT_HOME=str(home)))
    after = _files_outside(root, out) | {str(p) for p in Path("/tmp/reconaudit-escape").glob("**/*")}
    return {"root": root, "inputs": inputs, "out": out, "home": home, "proc": proc, "new_outside": after - before}


def test_run_completed(secure_run):
    proc = secure_run["proc"]
    assert proc.returncode in (0, 1), proc.stderr[-3000:]
    doc = json.loads((secure_run["out"] / "results.json").read_text(encoding="utf-8"))
    assert len(doc["series"]) == 3 and all(r["status"] == "ok" for r in doc["series"])


def test_dicom_text_is_escaped_in_the_report(secure_run):
    """A SeriesDescription holding a script tag appears escaped, never as markup."""
    html = (secure_run["out"] / "report.html").read_text(encoding="utf-8")
    assert "<script>alert(" not in html
    assert "&lt;script&gt;alert(" in html
    from reconaudit.checker.report import html as report_html

    template = (Path(report_html.__file__).parent / "templates" / "report.html").read_text(encoding="utf-8")
    assert html.lower().count("<script") == template.lower().count("<script"), "only the report's own scripts"


def test_traversal_in_identifiers_writes_nothing_outside_out(secure_run):
    """A description with ../ becomes a safe file name; every file written is inside --out."""
    out = secure_run["out"]
    allowed = {str(secure_run["home"]), str(secure_run["home"] / "history.sqlite"),
               str(secure_run["home"] / "baselines.json")}
    assert not (secure_run["new_outside"] - allowed), secure_run["new_outside"]
    for p in out.rglob("*"):
        assert p.resolve().is_relative_to(out.resolve())
        assert ".." not in p.relative_to(out).parts
    names = [p.name for p in (out / "series").iterdir()]
    assert len(names) == 3 and all(re.fullmatch(r"[A-Za-z0-9._-]+\.json", n) and not n.startswith(".") for n in names)


def test_csv_defuses_formulas(secure_run):
    """A cell starting with '=' is prefixed with an apostrophe (OWASP, "CSV Injection")."""
    rows = list(csv.DictReader(io.StringIO((secure_run["out"] / "results.csv").read_text(encoding="utf-8"))))
    descriptions = [r["series_description"] for r in rows]
    assert "'" + FORMULA in descriptions
    assert not any(d.startswith(("=", "+", "-", "@")) for d in descriptions)


def _all_output_bytes(run) -> dict[str, bytes]:
    texts = {str(p): p.read_bytes() for base in (run["out"], run["home"]) for p in base.rglob("*") if p.is_file()}
    texts["<stdout>"] = run["proc"].stdout.encode()
    texts["<stderr and log>"] = run["proc"].stderr.encode()
    return texts


def test_no_patient_identifiers_in_any_output(secure_run):
    """PatientName, PatientID, OtherPatientIDs, AccessionNumber, PatientBirthDate: in no file, log or summary."""
    outputs = _all_output_bytes(secure_run)
    assert any(name.endswith(".png") for name in outputs), "figures were written and searched too"
    assert "<stderr and log>" in outputs and secure_run["proc"].stderr.count("INFO") >= 3
    leaks = [(name, ident) for name, data in outputs.items() for ident in IDENTIFIERS
             if ident.encode() in data or ident.replace("^", " ").encode() in data]
    assert not leaks, leaks


def test_the_identifier_search_can_find_them(secure_run, tmp_path):
    """With --include-identifiers the same search finds them: the previous test can fail."""
    out = tmp_path / "with_ids"
    res = run_cli(["check", str(secure_run["inputs"] / "xss"), "--out", str(out), "--no-history", "--workers", "1",
                   "--no-figures", "--include-identifiers"])
    assert res["rc"] in (0, 1)
    text = (out / "results.json").read_text(encoding="utf-8")
    assert make_corpus.PATIENT_ID in text and "QUILLFEATHER" in text


def test_check_opens_no_listening_socket(tmp_path):
    """No socket listens in the checking process or its workers during a 2-worker run.

    The watcher must have seen a worker process of the run at least once (else it looked
    at the wrong time and the test proves nothing): it polls every 5 ms, however fast
    the check is.
    """
    psutil = pytest.importorskip("psutil")
    inputs = tmp_path / "in"
    for name in "abcd":
        make_corpus.write_series(inputs / name, f"listen-{name}", nz=3)
    me = psutil.Process()
    seen: list[tuple] = []
    polls_with_workers = [0]
    stop = threading.Event()

    before = {p.pid for p in me.children(recursive=True)}  # e.g. the virtual screen's server

    def listening() -> tuple[list[tuple], int]:
        found = []
        children = me.children(recursive=True)
        for proc in [me] + children:
            try:
                conns = proc.net_connections(kind="all")
            except (psutil.NoSuchProcess, psutil.AccessDenied):
                continue
            found += [(proc.pid, c.laddr) for c in conns if c.status == psutil.CONN_LISTEN]
        return found, len({p.pid for p in children} - before)

    def watch() -> None:
        while not stop.is_set():
            found, n_children = listening()
            seen.extend(found)
            polls_with_workers[0] += n_children >= 1
            time.sleep(0.005)

    baseline, _ = listening()
    watcher = threading.Thread(target=watch, daemon=True)
    watcher.start()
    try:
        res = run_cli(["check", str(inputs), "--out", str(tmp_path / "out"), "--no-history", "--workers", "2"])
    finally:
        stop.set()
        watcher.join()
    assert res["rc"] in (0, 1)
    assert polls_with_workers[0] >= 1
    assert not set(seen) - set(baseline), seen
