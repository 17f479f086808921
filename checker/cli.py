"""The ``reconaudit`` command.

Exit codes (also in ``--help`` and the README):

* 0 — every series checked passed;
* 1 — at least one series asks for review or failed a tolerance;
* 2 — at least one series could not be read or analysed (all others are still
  checked and written); takes precedence over 1;
* 64 — bad command line.
"""
from __future__ import annotations

import argparse
import csv
import io
import json
import logging
import os
import sys
from pathlib import Path
from typing import Any, Sequence

from . import SAFETY_NOTICE, __version__
from .errors import ReconauditError

log = logging.getLogger("reconaudit")

EXIT_PASS, EXIT_REVIEW, EXIT_ERROR, EXIT_USAGE = 0, 1, 2, 64

EXIT_TEXT = """exit codes:
  0   every series passed
  1   at least one series needs review or failed a tolerance
  2   at least one series could not be read or analysed (the others are still
      checked and written); takes precedence over 1
  64  bad command line
"""


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # argparse exits 2; ours is 64
        self.print_usage(sys.stderr)
        self.exit(EXIT_USAGE, f"{self.prog}: error: {message}\n")


def home_dir() -> Path:
    """Where history and baselines live unless told otherwise ($RECONAUDIT_HOME)."""
    env = os.environ.get("RECONAUDIT_HOME")
    if env:
        return Path(env)
    base = os.environ.get("XDG_DATA_HOME") or str(Path.home() / ".local" / "share")
    return Path(base) / "reconaudit"


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(
        prog="reconaudit",
        description="Find what is wrong with CT reconstructions: streaks, structures in the air, "
        "noise texture and sharpness, against tolerances, baselines and history.",
        epilog=EXIT_TEXT + "\n" + SAFETY_NOTICE,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--version", action="version", version=f"reconaudit {__version__}")
    p.add_argument("-v", "--verbose", action="store_true", help="more log output")
    sub = p.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    c = sub.add_parser("check", help="check every series under the inputs and write results and a report",
                       epilog=EXIT_TEXT, formatter_class=argparse.RawDescriptionHelpFormatter)
    c.add_argument("inputs", nargs="+", metavar="INPUT", help="DICOM folders/files, NIfTI/MHA/NRRD files, .npy")
    c.add_argument("--out", required=True, metavar="DIR", help="folder for results.json, results.csv, report.html")
    c.add_argument("--profile", metavar="TOML", help="site profile merged over the shipped default")
    c.add_argument("--workers", type=int, default=None, metavar="N",
                   help="cores the check may use: local worker processes, one series each "
                   "(default: all cores; 1 keeps the check on one core)")
    c.add_argument("--scheduler", metavar="ADDRESS", help="send the series to a Dask scheduler instead")
    c.add_argument("--db", metavar="SQLITE", help="history database (default: $RECONAUDIT_HOME/history.sqlite)")
    c.add_argument("--no-history", action="store_true", help="neither read nor write the history database")
    c.add_argument("--baselines", metavar="JSON", help="baseline file (default: $RECONAUDIT_HOME/baselines.json)")
    c.add_argument("--force", action="store_true", help="re-check series already in the history")
    c.add_argument("--include-identifiers", action="store_true", help="put patient identifiers in the outputs")
    c.add_argument("--no-figures", action="store_true", help="skip thumbnails and curves (faster)")

    pr = sub.add_parser("profile", help="print the effective profile with the source of each tolerance")
    pr.add_argument("--profile", metavar="TOML")
    pr.add_argument("--json", action="store_true", help="as JSON instead of TOML")

    b = sub.add_parser("baseline", help="record accepted series of a check run as their protocols' baselines")
    b.add_argument("results", metavar="RESULTS_JSON", help="results.json of a check run a physicist accepted")
    b.add_argument("--series", nargs="*", metavar="ID", help="only these series ids (default: all that are ok)")
    b.add_argument("--baselines", metavar="JSON")

    cp = sub.add_parser("compare", help="compare a reconstruction with a reference reconstruction of the same scan",
                        epilog=EXIT_TEXT, formatter_class=argparse.RawDescriptionHelpFormatter)
    cp.add_argument("test", metavar="TEST", help="the reconstruction under test (a series folder or file)")
    cp.add_argument("reference", metavar="REFERENCE", help="the reference reconstruction (e.g. filtered back-projection)")
    cp.add_argument("--out", required=True, metavar="DIR", help="folder for comparison.json and comparison.html")
    cp.add_argument("--shift-tolerance-mm", type=float, default=None, metavar="MM",
                    help="body surface displacement that asks for review (default 3 mm, site choice)")
    cp.add_argument("--include-identifiers", action="store_true", help="put patient identifiers in the outputs")

    h = sub.add_parser("history", help="print (and plot) trends per protocol with control limits")
    h.add_argument("--db", metavar="SQLITE")
    h.add_argument("--protocol", metavar="KEY", help="one protocol key (default: all)")
    h.add_argument("--metric", action="append", metavar="NAME", help="metric, e.g. nps.noise_hu (repeatable)")
    h.add_argument("--plot", metavar="DIR", help="write one PNG trend chart per protocol and metric here")
    return p


# ---------------------------------------------------------------------- logging / progress
def _setup_logging(verbose: bool) -> None:
    logging.basicConfig(level=logging.DEBUG if verbose else logging.INFO,
                        format="%(asctime)s %(levelname)s %(message)s", stream=sys.stderr)


class Progress:
    """A one-line progress bar on a terminal; plain log lines otherwise."""

    def __init__(self, total: int, stream=sys.stderr):
        self.total, self.done, self.stream = total, 0, stream
        self.tty = hasattr(stream, "isatty") and stream.isatty()

    def step(self, record: dict[str, Any]) -> None:
        self.done += 1
        state = record.get("verdict") or record.get("status")
        if self.tty:
            width = 30
            filled = int(width * self.done / max(1, self.total))
            self.stream.write(f"\r[{'#' * filled}{'.' * (width - filled)}] {self.done}/{self.total} {record['id'][:40]:<40}")
            if self.done == self.total:
                self.stream.write("\n")
            self.stream.flush()
        else:
            log.info("series %d/%d %s: %s", self.done, self.total, record["id"], state)


# ---------------------------------------------------------------------- check
def _headline_rows(records: list[dict[str, Any]]) -> str:
    from .history import flatten_metrics

    rows, metric_keys = [], set()
    for r in records:
        metrics = flatten_metrics(r) if r.get("status") == "ok" else {}
        metric_keys.update(metrics)
        meta = r.get("metadata") or {}
        rows.append(({"id": r["id"], "status": r.get("status"), "verdict": r.get("verdict") or "",
                      "series_description": meta.get("series_description", ""),
                      "convolution_kernel": meta.get("convolution_kernel", ""),
                      "error_kind": (r.get("error") or {}).get("kind", "")}, metrics))
    fixed = ["id", "status", "verdict", "series_description", "convolution_kernel", "error_kind"]
    cols = fixed + sorted(metric_keys)
    buf = io.StringIO()
    w = csv.writer(buf)
    w.writerow(cols)
    for base, metrics in rows:
        w.writerow([_csv_safe(base.get(c, "")) for c in fixed] + [_fmt(metrics.get(c)) for c in sorted(metric_keys)])
    return buf.getvalue()


def _csv_safe(value: Any) -> str:
    """Text for a CSV cell that a spreadsheet will not run as a formula."""
    s = "" if value is None else str(value)
    return "'" + s if s[:1] in ("=", "+", "-", "@", "\t", "\r") else s


def _fmt(v: Any) -> str:
    return "" if v is None else f"{v:.6g}"


def exit_code(records: list[dict[str, Any]]) -> int:
    if any(r.get("status") == "error" for r in records):
        return EXIT_ERROR
    if any(r.get("verdict") in ("review", "fail") for r in records):
        return EXIT_REVIEW
    return EXIT_PASS


def _summary_text(doc: dict[str, Any], out: Path, skipped: int) -> str:
    counts: dict[str, int] = {}
    for r in doc["series"]:
        key = r.get("verdict") or r.get("status")
        counts[key] = counts.get(key, 0) + 1
    lines = [f"reconaudit {__version__}: {len(doc['series'])} series checked"
             + (f", {skipped} already in the history (skipped; --force re-checks)" if skipped else "")]
    words = (("pass", "pass"), ("review", "review"), ("fail", "fail"), ("error", "not checked"))
    tally = ", ".join(f"{counts[key]} {word}" for key, word in words if counts.get(key))
    if tally:
        lines.append(f"  {tally}")
    for r in doc["series"]:
        if r.get("status") == "error":
            lines.append(f"  not checked  {r['id']}: {r['error']['kind']}: {r['error']['message']}")
        elif r.get("verdict") in ("review", "fail"):
            worst = [f["message"] for f in r.get("findings", []) if f["severity"] in ("review", "fail")]
            lines.append(f"  {r['verdict']:<11}  {r['id']}: {worst[0] if worst else r['verdict']}")
    lines += [f"results: {out / 'results.json'}", f"report:  {out / 'report.html'}", "", SAFETY_NOTICE]
    return "\n".join(lines)


def cmd_check(args: argparse.Namespace) -> int:
    from .runner import CheckOptions, check

    opts = CheckOptions(
        inputs=[Path(i) for i in args.inputs],
        out_dir=Path(args.out),
        profile_path=args.profile,
        workers=args.workers,
        scheduler=args.scheduler,
        db_path=None if args.no_history else Path(args.db) if args.db else home_dir() / "history.sqlite",
        baselines_path=Path(args.baselines) if args.baselines else home_dir() / "baselines.json",
        force=args.force,
        include_identifiers=args.include_identifiers,
        figures=not args.no_figures,
    )
    outcome = check(opts, progress_factory=Progress)
    print(_summary_text(outcome.document, opts.out_dir, len(outcome.skipped)))
    return exit_code(outcome.document["series"])


def cmd_profile(args: argparse.Namespace) -> int:
    from .profile import load_profile

    prof = load_profile(args.profile)
    print(json.dumps(prof.effective(), indent=2, default=str) if args.json else prof.to_toml(), end="")
    return EXIT_PASS


def cmd_baseline(args: argparse.Namespace) -> int:
    from .baseline import BaselineStore, baseline_entry

    path = Path(args.results)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise ReconauditError(f"not a readable results.json: {exc}", source=str(path)) from None
    store = BaselineStore(Path(args.baselines) if args.baselines else home_dir() / "baselines.json")
    wanted = set(args.series or [])
    n = 0
    for rec in doc.get("series", []):
        if rec.get("status") != "ok" or (wanted and rec["id"] not in wanted):
            continue
        store.set(rec["protocol_key"], baseline_entry(rec))
        print(f"baseline for protocol '{rec['protocol_key']}' from {rec['id']}")
        n += 1
    if wanted - {r["id"] for r in doc.get("series", [])}:
        missing = ", ".join(sorted(wanted - {r["id"] for r in doc.get("series", [])}))
        raise ReconauditError(f"no such series in the results: {missing}", source=str(path))
    store.save()
    print(f"{n} baseline(s) written to {store.path}")
    return EXIT_PASS


def cmd_history(args: argparse.Namespace) -> int:
    from .history import History

    db = Path(args.db) if args.db else home_dir() / "history.sqlite"
    if not db.exists():
        raise ReconauditError("no history database yet (run `reconaudit check` first)", source=str(db))
    with History(db) as hist:
        protocols = [args.protocol] if args.protocol else hist.protocols()
        for proto in protocols:
            metrics = args.metric or hist.metrics(proto)
            print(f"protocol: {proto}")
            for metric in metrics:
                points = hist.trend(proto, metric)
                limits = hist.limits(proto, metric)
                outside = {run for _, _, run in hist.outside_limits(proto, metric)}
                lim = f"limits {limits[1]:.4g} .. {limits[2]:.4g} (mean {limits[0]:.4g})" if limits else "limits: too few points"
                print(f"  {metric}: {len(points)} point(s); {lim}")
                for when, value, run in points:
                    mark = "  << outside the limits" if run in outside else ""
                    print(f"    {when}  {value:.5g}{mark}")
                if args.plot:
                    from .fsutil import safe_name

                    png = Path(args.plot) / f"{safe_name(proto)}__{safe_name(metric)}.png"
                    hist.plot_trend(proto, metric, png)
                    print(f"    chart: {png}")
    return EXIT_PASS


def _one_volume(path: str, role: str, include_identifiers: bool):
    from .load import load_path

    p = Path(path)
    if not p.exists():
        raise ReconauditError(f"{role} not found", source=str(p))
    volumes = load_path(p, include_identifiers=include_identifiers)
    if len(volumes) != 1:
        raise ReconauditError(f"the {role} must be one series; found {len(volumes)}", source=str(p))
    return volumes[0]


def _volume_facts(volume, include_identifiers: bool) -> dict[str, Any]:
    facts = {"source": volume.source, "series_instance_uid": volume.series_uid, "metadata": dict(volume.metadata),
             "geometry": volume.geometry_record()}
    if include_identifiers:
        facts["identifiers"] = dict(volume.identifiers)
    return facts


def cmd_compare(args: argparse.Namespace) -> int:
    from .analyses.compare import compare_volumes
    from .fsutil import atomic_write_text
    from .report.compare_page import write_comparison_page
    from .results import dumps

    test = _one_volume(args.test, "test", args.include_identifiers)
    ref = _one_volume(args.reference, "reference", args.include_identifiers)
    settings = {} if args.shift_tolerance_mm is None else {"surface_shift_tolerance_mm": args.shift_tolerance_mm}
    result = compare_volumes(test, ref, settings)
    out = Path(args.out)
    doc = {"schema": "reconaudit.comparison/1", "tool_version": __version__, "verdict": result.verdict,
           "test": _volume_facts(test, args.include_identifiers),
           "reference": _volume_facts(ref, args.include_identifiers),
           **result.record, "findings": [f.to_json() for f in result.findings]}
    atomic_write_text(out / "comparison.json", dumps(doc))
    page = write_comparison_page(result, out, test_label=test.metadata.get("series_description") or args.test,
                                 reference_label=ref.metadata.get("series_description") or args.reference)
    shift = result.record["body_surface_shift_mm"]
    print(f"reconaudit {__version__}: comparison {result.verdict}")
    if shift.get("max") is not None:
        print(f"  body surface shift: max {shift['max']:+.1f} mm at LPS {shift['max_at_mm']} mm, p95 {shift['p95']:.1f} mm")
    print(f"  only in test: {len(result.record['only_in_test'])}; only in reference: {len(result.record['only_in_reference'])}")
    for f in result.findings:
        print(f"  {f.severity.value}: {f.message}")
    print(f"results: {out / 'comparison.json'}\nreport:  {page}\n\n{SAFETY_NOTICE}")
    return EXIT_REVIEW if result.findings else EXIT_PASS


COMMANDS = {"check": cmd_check, "compare": cmd_compare, "profile": cmd_profile, "baseline": cmd_baseline, "history": cmd_history}


def prefer_small_pages(environ: dict[str, str] | None = None) -> None:
    """Ask numpy (imported later, by the command's work) not to request huge pages.

    numpy advises the kernel to back large arrays with 2 MiB pages. A check writes its
    full-size masks only inside the body's box, and huge pages make every touched 2 MiB
    count; with 4 KiB pages one series' ``reconaudit check --no-figures`` of the
    512 x 512 x 400 benchmark took 4.6-5.2 s instead of 5.9-6.0 s, with peak memory
    0.82 GB instead of 1.00 GB (two runs each, fresh processes). A site that sets
    ``NUMPY_MADVISE_HUGEPAGE`` itself keeps its choice; worker processes inherit it.
    """
    env = os.environ if environ is None else environ
    env.setdefault("NUMPY_MADVISE_HUGEPAGE", "0")


def main(argv: Sequence[str] | None = None) -> int:
    prefer_small_pages()
    parser = build_parser()
    args = parser.parse_args(argv)
    if not args.command:
        parser.print_help(sys.stderr)
        return EXIT_USAGE
    _setup_logging(args.verbose)
    try:
        return COMMANDS[args.command](args)
    except ReconauditError as exc:
        print(f"reconaudit: {exc}", file=sys.stderr)
        return EXIT_ERROR if args.command in ("check", "compare") else EXIT_USAGE
    except KeyboardInterrupt:
        print("reconaudit: interrupted; rerun with the same --out to resume", file=sys.stderr)
        return 130
    except Exception as exc:  # a bug: never let a scheduler read it as "review" (exit 1)
        log.exception("internal error")
        print(f"reconaudit: internal error: {type(exc).__name__}: {exc}", file=sys.stderr)
        return EXIT_ERROR


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
