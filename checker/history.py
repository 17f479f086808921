"""The measurement history: every checked series and its headline numbers, in SQLite.

A nightly batch asks :meth:`History.already_checked` before it loads a series (same
pixels, same profile -> skip unless forced), records each finished series with
:meth:`History.record_series` (one transaction per series, idempotent, so a run that is
killed and restarted leaves no duplicate rows) and draws constancy charts with
:meth:`History.plot_trend`.

Control limits are the mean +/- 3 standard deviations of the *baseline* points of one
protocol and metric (Shewhart's individuals chart). The baseline is, in this order:

1. the points of runs marked with :meth:`History.mark_baseline`, if any run of that
   protocol is marked;
2. otherwise the first ``baseline_count`` points in time (default 5).

Marking is the physicist's choice (e.g. the runs right after acceptance testing); the
first-N rule is only a fallback so that a new protocol gets limits without any set-up.

References
----------
.. [1] Shewhart, W. A., "Economic Control of Quality of Manufactured Product", 1931
   (control charts, 3-sigma limits).
.. [2] Montgomery, D. C., "Introduction to Statistical Quality Control", Wiley
   (individuals charts; baseline "phase I" data).
"""
from __future__ import annotations

import datetime as _dt
import math
import os
import sqlite3
import uuid
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence
from .results import finite_number

#: Version of the table layout below; stored in ``schema_info``.
SCHEMA_VERSION = 1

#: Points used as the baseline when no run of a protocol is marked as baseline.
DEFAULT_BASELINE_COUNT = 5

_TABLES = (
    """CREATE TABLE IF NOT EXISTS schema_info (
        key TEXT PRIMARY KEY,
        value TEXT NOT NULL
    )""",
    """CREATE TABLE IF NOT EXISTS runs (
        run_id TEXT PRIMARY KEY,
        started TEXT NOT NULL,
        tool_version TEXT NOT NULL DEFAULT '',
        profile_name TEXT NOT NULL DEFAULT '',
        is_baseline INTEGER NOT NULL DEFAULT 0
    )""",
    """CREATE TABLE IF NOT EXISTS series (
        run_id TEXT NOT NULL REFERENCES runs(run_id) ON DELETE CASCADE,
        series_id TEXT NOT NULL,
        content_hash TEXT NOT NULL,
        profile_hash TEXT NOT NULL,
        protocol_key TEXT NOT NULL,
        verdict TEXT,
        status TEXT NOT NULL,
        checked_at TEXT NOT NULL,
        PRIMARY KEY (run_id, series_id)
    )""",
    """CREATE TABLE IF NOT EXISTS measurements (
        run_id TEXT NOT NULL,
        series_id TEXT NOT NULL,
        analysis TEXT NOT NULL,
        metric TEXT NOT NULL,
        value REAL NOT NULL,
        PRIMARY KEY (run_id, series_id, metric),
        FOREIGN KEY (run_id, series_id) REFERENCES series(run_id, series_id) ON DELETE CASCADE
    )""",
    "CREATE INDEX IF NOT EXISTS series_by_hash ON series(content_hash, profile_hash)",
    "CREATE INDEX IF NOT EXISTS series_by_protocol ON series(protocol_key, checked_at)",
    "CREATE INDEX IF NOT EXISTS measurements_by_metric ON measurements(metric)",
)


class HistoryError(Exception):
    """The history database is of an unknown (newer) schema or otherwise unusable."""


# ----------------------------------------------------------------------------- metrics


def _record_of(series_record: Mapping[str, Any], name: str) -> Mapping[str, Any] | None:
    """The applicable record of analysis ``name`` (a dict or an AnalysisResult), else None."""
    rec = series_record.get(name)
    rec = getattr(rec, "record", rec)
    if not isinstance(rec, Mapping) or rec.get("applicable", True) is False:
        return None
    return rec


_SCALARS: dict[str, tuple[str, ...]] = {
    "nps": ("noise_hu", "f_peak_per_mm", "f_av_per_mm", "roi_count"),
    "uniformity": ("water_hu", "uniformity_hu", "centre_sd_hu"),
    "streaks": ("index", "missing_wedge_deg"),
    "air": ("mean_hu", "noise_hu"),
}


def _edge_key(contrast: float | None, seen: dict[str, int]) -> str:
    base = "unknown" if contrast is None else f"{contrast:+.0f}HU"
    seen[base] = seen.get(base, 0) + 1
    return base if seen[base] == 1 else f"{base}#{seen[base]}"


def _ttf_metrics(rec: Mapping[str, Any]) -> dict[str, float]:
    out: dict[str, float] = {}
    edges = rec.get("edges")
    if not isinstance(edges, Sequence) or isinstance(edges, (str, bytes)):
        return out
    seen: dict[str, int] = {}
    for edge in edges:
        if not isinstance(edge, Mapping):
            continue
        key = _edge_key(finite_number(edge.get("contrast_hu")), seen)
        for metric in ("f50_per_mm", "f10_per_mm"):
            v = finite_number(edge.get(metric))
            if v is not None:
                out[f"ttf.{metric}@{key}"] = v
    return out


def _count(value: Any) -> float | None:
    if isinstance(value, Sequence) and not isinstance(value, (str, bytes)):
        return float(len(value))
    return None


def flatten_metrics(series_record: Mapping[str, Any]) -> dict[str, float]:
    """The headline numbers of one series as ``{"analysis.metric": value}``.

    Parameters
    ----------
    series_record : mapping
        A series entry of results.json (analysis name -> record), or a mapping of
        analysis name -> :class:`~reconaudit.checker.results.AnalysisResult`.

    Returns
    -------
    dict of str -> float
        Only finite numbers; analyses that are missing or not applicable give nothing.
        Keys: ``nps.noise_hu``, ``nps.f_peak_per_mm``, ``nps.f_av_per_mm``,
        ``nps.roi_count``, ``uniformity.water_hu``, ``uniformity.uniformity_hu``,
        ``uniformity.centre_sd_hu``, ``streaks.index``, ``streaks.missing_wedge_deg``,
        ``streaks.flagged_slice_count``, ``air.mean_hu``, ``air.noise_hu``,
        ``air.structure_count``, ``air.flagged_count``, and per TTF edge
        ``ttf.f50_per_mm@+340HU`` / ``ttf.f10_per_mm@+340HU`` (keyed by the edge's
        contrast, rounded to 1 HU; a repeated contrast gets ``#2``, ``#3``).

    References
    ----------
    .. [1] Samei, E. et al., "Performance evaluation of computed tomography systems:
       Summary of AAPM Task Group 233", Med Phys 46(11), 2019 (the NPS and TTF metrics).
    """
    out: dict[str, float] = {}
    for name, keys in _SCALARS.items():
        rec = _record_of(series_record, name)
        if rec is None:
            continue
        for key in keys:
            v = finite_number(rec.get(key))
            if v is not None:
                out[f"{name}.{key}"] = v
    streaks = _record_of(series_record, "streaks")
    if streaks is not None and (n := _count(streaks.get("flagged_slices"))) is not None:
        out["streaks.flagged_slice_count"] = n
    air = _record_of(series_record, "air")
    if air is not None and isinstance(air.get("structures"), Sequence):
        structures = [s for s in air["structures"] if isinstance(s, Mapping)]
        out["air.structure_count"] = float(len(structures))
        out["air.flagged_count"] = float(sum(1 for s in structures if s.get("flagged")))
    ttf = _record_of(series_record, "ttf")
    if ttf is not None:
        out.update(_ttf_metrics(ttf))
    return out


# ----------------------------------------------------------------------- control limits
def control_limits(values: Iterable[float]) -> tuple[float, float, float]:
    """Mean and 3-sigma limits ``(mean, mean - 3 SD, mean + 3 SD)`` of ``values``.

    The SD is the sample standard deviation (n - 1). Non-finite values are ignored.

    Raises
    ------
    ValueError
        Fewer than two finite values (no spread can be estimated).

    References
    ----------
    .. [1] Shewhart, W. A., "Economic Control of Quality of Manufactured Product", 1931.
    """
    finite = [float(v) for v in values if finite_number(v) is not None]
    if len(finite) < 2:
        raise ValueError(f"control limits need at least 2 finite baseline values, got {len(finite)}")
    mean = math.fsum(finite) / len(finite)
    var = math.fsum((v - mean) ** 2 for v in finite) / (len(finite) - 1)
    sd = math.sqrt(var)
    return mean, mean - 3.0 * sd, mean + 3.0 * sd


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


# ------------------------------------------------------------------------------ History
class History:
    """SQLite history of runs, checked series and their measurements.

    Parameters
    ----------
    db_path : str or Path
        The database file; created (with its folder) if missing. WAL journal mode, so a
        report can read while a batch writes.
    baseline_count : int
        Points used as the baseline of a protocol with no marked baseline run.

    Examples
    --------
    >>> h = History(tmp / "history.sqlite")                    # doctest: +SKIP
    >>> run = h.start_run(tool_version="0.1.0", profile_name="nightly")
    >>> if not h.already_checked(chash, phash):
    ...     h.record_series(run, series_entry, chash, phash, "head-std")
    """

    def __init__(self, db_path: str | os.PathLike[str], *, baseline_count: int = DEFAULT_BASELINE_COUNT):
        self.db_path = Path(db_path)
        self.db_path.parent.mkdir(parents=True, exist_ok=True)
        self.baseline_count = int(baseline_count)
        self._conn = sqlite3.connect(str(self.db_path), isolation_level=None, timeout=30.0)
        self._conn.execute("PRAGMA busy_timeout = 30000")
        self._conn.execute("PRAGMA foreign_keys = ON")
        self.journal_mode = str(self._conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]).lower()
        self._conn.execute("PRAGMA synchronous = NORMAL")
        self._create_schema()

    # ------------------------------------------------------------------ housekeeping
    def _create_schema(self) -> None:
        with self._transaction():
            for statement in _TABLES:
                self._conn.execute(statement)
            row = self._conn.execute("SELECT value FROM schema_info WHERE key = 'schema_version'").fetchone()
            if row is None:
                self._conn.execute(
                    "INSERT INTO schema_info(key, value) VALUES ('schema_version', ?)", (str(SCHEMA_VERSION),)
                )
            elif int(row[0]) > SCHEMA_VERSION:
                raise HistoryError(
                    f"{self.db_path}: history schema version {row[0]} is newer than this "
                    f"reconaudit understands (expected <= {SCHEMA_VERSION})"
                )

    def _transaction(self) -> "_Transaction":
        return _Transaction(self._conn)

    @property
    def schema_version(self) -> int:
        row = self._conn.execute("SELECT value FROM schema_info WHERE key = 'schema_version'").fetchone()
        return int(row[0])

    def close(self) -> None:
        self._conn.close()

    def __enter__(self) -> "History":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # ------------------------------------------------------------------------ writing
    def start_run(
        self,
        run_id: str | None = None,
        *,
        started: str | None = None,
        tool_version: str = "",
        profile_name: str = "",
    ) -> str:
        """Create (or, for a restarted run with the same id, keep) a run row; returns its id."""
        run_id = run_id or uuid.uuid4().hex
        with self._transaction():
            self._conn.execute(
                "INSERT INTO runs(run_id, started, tool_version, profile_name) VALUES (?, ?, ?, ?) "
                "ON CONFLICT(run_id) DO UPDATE SET tool_version = excluded.tool_version, "
                "profile_name = excluded.profile_name",
                (run_id, started or _now(), tool_version, profile_name),
            )
        return run_id

    def mark_baseline(self, run_id: str, baseline: bool = True) -> None:
        """Mark (or unmark) a run as part of the baseline its protocols' limits come from."""
        with self._transaction():
            cur = self._conn.execute("UPDATE runs SET is_baseline = ? WHERE run_id = ?", (int(baseline), run_id))
            if cur.rowcount == 0:
                raise KeyError(f"no run {run_id!r} in {self.db_path}")

    def record_series(
        self,
        run_id: str,
        series_record: Mapping[str, Any],
        content_hash: str,
        profile_hash: str,
        protocol_key: str,
        *,
        checked_at: str | None = None,
    ) -> int:
        """Store one checked series and its headline metrics in ONE transaction.

        Re-recording the same ``run_id`` + series id replaces the earlier rows, so a run
        that was killed and restarted never leaves duplicates. A missing run row is
        created. Returns the number of measurements stored.
        """
        series_id = str(series_record.get("id") or series_record.get("series_id") or "")
        if not series_id:
            raise ValueError("series_record has no 'id'")
        status = str(series_record.get("status") or "ok")
        verdict = series_record.get("verdict")
        metrics = flatten_metrics(series_record) if status == "ok" else {}
        with self._transaction():
            self._conn.execute(
                "INSERT OR IGNORE INTO runs(run_id, started) VALUES (?, ?)", (run_id, _now())
            )
            self._conn.execute("DELETE FROM series WHERE run_id = ? AND series_id = ?", (run_id, series_id))
            self._conn.execute(
                "INSERT INTO series(run_id, series_id, content_hash, profile_hash, protocol_key, verdict, "
                "status, checked_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                (run_id, series_id, content_hash, profile_hash, protocol_key,
                 None if verdict is None else str(verdict), status, checked_at or _now()),
            )
            self._conn.executemany(
                "INSERT INTO measurements(run_id, series_id, analysis, metric, value) VALUES (?, ?, ?, ?, ?)",
                [(run_id, series_id, k.split(".", 1)[0], k, v) for k, v in sorted(metrics.items())],
            )
        return len(metrics)

    # ------------------------------------------------------------------------ reading
    def already_checked(self, content_hash: str, profile_hash: str) -> bool:
        """True when a series with these pixels was checked successfully with this profile.

        Series whose check ended in an error are not counted, so they are retried.
        """
        row = self._conn.execute(
            "SELECT 1 FROM series WHERE content_hash = ? AND profile_hash = ? AND status = 'ok' LIMIT 1",
            (content_hash, profile_hash),
        ).fetchone()
        return row is not None

    def count_rows(self, table: str) -> int:
        """Rows in one of the history tables (for tests and diagnostics)."""
        if table not in {"runs", "series", "measurements"}:
            raise ValueError(f"unknown table {table!r}")
        return int(self._conn.execute(f"SELECT COUNT(*) FROM {table}").fetchone()[0])

    def protocols(self) -> list[str]:
        rows = self._conn.execute("SELECT DISTINCT protocol_key FROM series ORDER BY protocol_key").fetchall()
        return [r[0] for r in rows]

    def metrics(self, protocol_key: str) -> list[str]:
        """Metric names recorded for a protocol."""
        rows = self._conn.execute(
            "SELECT DISTINCT m.metric FROM measurements m JOIN series s "
            "ON s.run_id = m.run_id AND s.series_id = m.series_id WHERE s.protocol_key = ? ORDER BY m.metric",
            (protocol_key,),
        ).fetchall()
        return [r[0] for r in rows]

    def _trend_rows(self, protocol_key: str, metric: str) -> list[tuple[str, float, str, bool]]:
        return [
            (str(t), float(v), str(r), bool(b))
            for t, v, r, b in self._conn.execute(
                "SELECT s.checked_at, m.value, s.run_id, COALESCE(r.is_baseline, 0) FROM measurements m "
                "JOIN series s ON s.run_id = m.run_id AND s.series_id = m.series_id "
                "LEFT JOIN runs r ON r.run_id = s.run_id "
                "WHERE s.protocol_key = ? AND m.metric = ? AND s.status = 'ok' "
                "ORDER BY s.checked_at, s.run_id, s.series_id",
                (protocol_key, metric),
            ).fetchall()
        ]

    def trend(self, protocol_key: str, metric: str) -> list[tuple[str, float, str]]:
        """``(checked_at, value, run_id)`` of every successful check, oldest first."""
        return [(t, v, r) for t, v, r, _ in self._trend_rows(protocol_key, metric)]

    def baseline_values(self, protocol_key: str, metric: str) -> tuple[list[float], str]:
        """The baseline points of a protocol's metric and which rule chose them.

        Returns the values and ``"marked"`` (runs marked with :meth:`mark_baseline`) or
        ``"first N"`` (the first ``baseline_count`` points).
        """
        rows = self._trend_rows(protocol_key, metric)
        marked = [v for _, v, _, b in rows if b]
        if marked:
            return marked, "marked"
        return [v for _, v, _, _ in rows[: self.baseline_count]], f"first {self.baseline_count}"

    def limits(self, protocol_key: str, metric: str) -> tuple[float, float, float] | None:
        """Control limits of a protocol's metric, or None when the baseline is too short."""
        values, _ = self.baseline_values(protocol_key, metric)
        try:
            return control_limits(values)
        except ValueError:
            return None

    def outside_limits(self, protocol_key: str, metric: str) -> list[tuple[str, float, str]]:
        """The trend points outside the control limits (empty when there are no limits)."""
        lim = self.limits(protocol_key, metric)
        if lim is None:
            return []
        _, lo, hi = lim
        return [p for p in self.trend(protocol_key, metric) if p[1] < lo or p[1] > hi]

    # ----------------------------------------------------------------------- plotting
    def plot_trend(self, protocol_key: str, metric: str, out_png: str | os.PathLike[str]) -> Path:
        """Draw a constancy chart of one metric: points, mean, 3-SD limits, outliers marked.

        Points outside the limits are drawn as large red crosses and named in the legend;
        baseline points are filled, later points hollow. With fewer than two baseline
        points the chart says that no limits can be drawn yet.

        References
        ----------
        .. [1] Shewhart, W. A., "Economic Control of Quality of Manufactured Product", 1931.
        """
        from .report.figures import draw_trend_chart

        rows = self._trend_rows(protocol_key, metric)
        _, rule = self.baseline_values(protocol_key, metric)
        if rule == "marked":
            in_baseline = [b for _, _, _, b in rows]
        else:
            in_baseline = [i < self.baseline_count for i in range(len(rows))]
        return draw_trend_chart(
            title=f"{protocol_key} — {metric}",
            times=[t for t, _, _, _ in rows],
            values=[v for _, v, _, _ in rows],
            is_baseline=in_baseline,
            limits=self.limits(protocol_key, metric),
            rule=rule,
            out_png=Path(out_png),
        )


class _Transaction:
    """``BEGIN IMMEDIATE`` ... ``COMMIT`` (``ROLLBACK`` on any exception)."""

    def __init__(self, conn: sqlite3.Connection):
        self._conn = conn

    def __enter__(self) -> sqlite3.Connection:
        self._conn.execute("BEGIN IMMEDIATE")
        return self._conn

    def __exit__(self, exc_type: type | None, *exc: object) -> None:
        self._conn.execute("ROLLBACK" if exc_type is not None else "COMMIT")
