"""The one-file HTML report of a run (Jinja2 with autoescape on, no external resources).

:func:`write_report` turns the results.json document into ``report.html``: the run
facts, an overview table (one row per series, sortable by a click on a column header),
one section per series (findings, measurements against the baseline, thumbnails and
curves), constancy charts from the history, and the safety caution. Every string that
comes from the data (DICOM attributes, file names, messages) is escaped by Jinja2's
autoescape. Patient identifiers are left out unless ``include_identifiers=True``; when
they are left out, their values are also masked wherever else they occur (a folder
named after a patient, for instance).
"""
from __future__ import annotations

import datetime as _dt
import functools
import os
import tempfile
from pathlib import Path
from typing import Any, Mapping, Sequence

import jinja2

from .. import SAFETY_NOTICE
from ..history import flatten_metrics
from ..identifiers import WITHHELD
from ..volume import IDENTIFIER_KEYS, SAFE_METADATA_KEYS
from ..results import display_number, finite_number

_TEMPLATES = Path(__file__).with_name("templates")

VERDICTS: dict[str, dict[str, Any]] = {
    "pass": {"word": "pass", "icon": "✓", "rank": 0},
    "review": {"word": "review", "icon": "▲", "rank": 1},
    "fail": {"word": "fail", "icon": "✕", "rank": 2},
    "error": {"word": "not checked", "icon": "!", "rank": 3},
    "none": {"word": "no verdict", "icon": "–", "rank": -1},
}

SEVERITIES: dict[str, dict[str, Any]] = {
    "info": {"word": "note", "icon": "○", "rank": 0},
    "review": {"word": "review", "icon": "▲", "rank": 1},
    "fail": {"word": "fail", "icon": "✕", "rank": 2},
}

#: metric key -> (label, unit); TTF edge keys are labelled by :func:`_metric_label`.
METRIC_LABELS: dict[str, tuple[str, str]] = {
    "nps.noise_hu": ("Noise (pixel SD)", "HU"),
    "nps.f_peak_per_mm": ("NPS peak frequency f_peak", "mm⁻¹"),
    "nps.f_av_per_mm": ("NPS mean frequency f_av", "mm⁻¹"),
    "nps.roi_count": ("NPS ROIs used", ""),
    "uniformity.water_hu": ("Water CT number", "HU"),
    "uniformity.uniformity_hu": ("Uniformity", "HU"),
    "uniformity.centre_sd_hu": ("Centre ROI SD", "HU"),
    "streaks.index": ("Streak index", ""),
    "streaks.missing_wedge_deg": ("Estimated missing angular wedge", "deg"),
    "streaks.flagged_slice_count": ("Slices flagged for streaks", ""),
    "air.mean_hu": ("Air mean", "HU"),
    "air.noise_hu": ("Air noise (SD)", "HU"),
    "air.structure_count": ("Structures found in air", ""),
    "air.flagged_count": ("Structures in air flagged", ""),
}

FIGURE_CAPTIONS: dict[str, str] = {
    "axial": "Axial slice, soft-tissue window, with what the analyses drew",
    "axial_air": "Same region at the air window, with structures found in the air",
    "nps": "Noise power spectrum (radial)",
    "ttf": "Task transfer function of each edge",
    "streak_polar": "Streak orientation",
    "streak_profile": "Streak index along the volume",
}


# ---------------------------------------------------------------------------- values


def fmt(value: Any, digits: int = 4) -> str:
    """A number with ``digits`` significant digits, or an en dash when missing."""
    f = finite_number(value)
    if f is None:
        return "–"
    if f == int(f) and abs(f) < 1e6:
        return str(int(f))
    return f"{f:.{digits}g}"


def fmt_measured(value: Any, unit: str) -> str:
    """A measured value as the report shows it (:func:`~reconaudit.checker.results.display_number`:
    fixed decimals by unit, e.g. CT numbers to 0.01 HU, so a water value near 0 does not
    show noise digits), or an en dash when missing."""
    text = display_number(value, unit)
    return "–" if text is None else text


def fmt_metric(key: str, value: Any, unit: str) -> str:
    """Measured value ``key`` (``analysis.key``) as the report shows it
    (:func:`~reconaudit.checker.results.display_number` with the metric's own decimals
    where it has them), or an en dash when missing."""
    text = display_number(value, unit, key)
    return "–" if text is None else text


def _metric_label(key: str) -> tuple[str, str]:
    if key in METRIC_LABELS:
        return METRIC_LABELS[key]
    if key.startswith("ttf.") and "@" in key:
        metric, edge = key[4:].split("@", 1)
        name = {"f50_per_mm": "TTF f50", "f10_per_mm": "TTF f10"}.get(metric, metric)
        return f"{name}, edge {edge.replace('HU', ' HU')}", "mm⁻¹"
    return key, ""


def _applicable(series: Mapping[str, Any], name: str) -> Mapping[str, Any] | None:
    rec = series.get(name)
    if not isinstance(rec, Mapping) or rec.get("applicable", True) is False:
        return None
    return rec


def headline_f50(ttf: Mapping[str, Any] | None) -> tuple[float | None, float | None]:
    """f50 of the most trustworthy edge (reliable first, then highest contrast-to-noise)."""
    if ttf is None:
        return None, None
    edges = [e for e in ttf.get("edges") or [] if isinstance(e, Mapping) and finite_number(e.get("f50_per_mm")) is not None]
    if not edges:
        return None, None
    best = max(edges, key=lambda e: (e.get("reliable") is not False, finite_number(e.get("contrast_to_noise")) or 0.0))
    return finite_number(best.get("f50_per_mm")), finite_number(best.get("contrast_hu"))


def _verdict_key(series: Mapping[str, Any]) -> str:
    if series.get("status") == "error":
        return "error"
    v = str(series.get("verdict") or "none").lower()
    return v if v in VERDICTS else "none"


# ------------------------------------------------------------------------- redaction
def identifier_values(series: Mapping[str, Any]) -> list[str]:
    """The patient-identifier strings known for a series (from ``identifiers``/metadata)."""
    found: list[str] = []
    for source in (series.get("identifiers"), series.get("metadata")):
        if not isinstance(source, Mapping):
            continue
        for key in IDENTIFIER_KEYS:
            v = source.get(key)
            if v is None:
                continue
            text = str(v).strip()
            if len(text) >= 3:
                found.append(text)
                if "^" in text:
                    found += [p for p in (text.replace("^", " "), text.replace("^", ", ")) if len(p) >= 3]
    return sorted(set(found), key=len, reverse=True)


def redact(value: Any, secrets: Sequence[str]) -> Any:
    """``value`` with every occurrence of each secret replaced (recursively in lists/dicts)."""
    if not secrets:
        return value
    if isinstance(value, str):
        for s in secrets:
            if s in value:
                value = value.replace(s, WITHHELD)
        return value
    if isinstance(value, Mapping):
        return {k: redact(v, secrets) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [redact(v, secrets) for v in value]
    return value


def _safe_relative(path: Any) -> str | None:
    """A relative path usable as an img src (no scheme, not absolute, no parent hops)."""
    if not isinstance(path, str) or not path or ":" in path or path.startswith(("/", "\\")):
        return None
    if ".." in Path(path).parts:
        return None
    return path.replace("\\", "/")


# ------------------------------------------------------------------------ per series
def _metadata_rows(series: Mapping[str, Any], include_identifiers: bool) -> list[tuple[str, str]]:
    meta = series.get("metadata") if isinstance(series.get("metadata"), Mapping) else {}
    labels = {
        "series_description": "SeriesDescription", "convolution_kernel": "ConvolutionKernel",
        "kvp": "KVP", "slice_thickness_mm": "SliceThickness (mm)",
        "manufacturer_model_name": "ManufacturerModelName", "study_date": "StudyDate",
        "series_number": "SeriesNumber", "modality": "Modality",
    }
    rows = [(labels.get(k, k), str(meta[k])) for k in SAFE_METADATA_KEYS if meta.get(k) not in (None, "")]
    geometry = series.get("geometry") if isinstance(series.get("geometry"), Mapping) else {}
    if geometry.get("shape_zyx"):
        rows.append(("Voxels (z × y × x)", " × ".join(str(n) for n in geometry["shape_zyx"])))
    if geometry.get("spacing_mm_zyx"):
        rows.append(("Spacing (mm, z y x)", " ".join(fmt(s) for s in geometry["spacing_mm_zyx"])))
    if include_identifiers:
        ids = series.get("identifiers") if isinstance(series.get("identifiers"), Mapping) else {}
        for key in IDENTIFIER_KEYS:
            v = ids.get(key, meta.get(key))
            if v not in (None, ""):
                rows.append((key.replace("_", " "), str(v)))
    return rows


#: names the baseline store uses -> our metric keys
_BASELINE_NAMES = {
    "noise_hu": "nps.noise_hu",
    "f_av_per_mm": "nps.f_av_per_mm",
    "f_peak_per_mm": "nps.f_peak_per_mm",
    "air_noise_hu": "air.noise_hu",
}


def _baseline_metrics(baseline: Any) -> dict[str, float]:
    """Baseline numbers keyed like :func:`flatten_metrics`, from any of the forms a
    baseline takes: a comparison (``changes``), a stored entry (``metrics``) or a
    series-like record (analysis name -> record)."""
    if not isinstance(baseline, Mapping):
        return {}
    out: dict[str, float] = {}
    changes = baseline.get("changes")
    if isinstance(changes, Mapping):
        for name, change in changes.items():
            if isinstance(change, Mapping) and finite_number(change.get("baseline")) is not None:
                out[_BASELINE_NAMES.get(str(name), str(name))] = float(change["baseline"])
    metrics = baseline.get("metrics")
    if isinstance(metrics, Mapping):
        for name, value in metrics.items():
            if finite_number(value) is not None:
                out.setdefault(_BASELINE_NAMES.get(str(name), str(name)), float(value))
    if not out:
        out = {k: v for k, v in flatten_metrics(baseline).items() if not k.startswith("ttf.")}
    return out


def _baseline_edges(baseline: Any) -> list[Mapping[str, Any]]:
    """Baseline TTF edges ``{contrast_hu, f50_per_mm, ...}`` from any baseline form."""
    if not isinstance(baseline, Mapping):
        return []
    edges = baseline.get("ttf_edges")
    if not edges and isinstance(baseline.get("changes"), Mapping):
        edges = [{"contrast_hu": e.get("contrast_hu"), "f50_per_mm": e.get("f50_baseline")}
                 for e in baseline["changes"].get("f50_per_mm") or [] if isinstance(e, Mapping)]
    if not edges and isinstance(baseline.get("ttf"), Mapping):
        edges = baseline["ttf"].get("edges")
    return [e for e in edges or [] if isinstance(e, Mapping)]


def _change(now: float | None, then: float | None) -> str:
    if now is None or then is None:
        return "–"
    diff = now - then
    text = ("+" if diff >= 0 else "−") + fmt(abs(diff), 3)
    if then != 0:
        text += f" ({diff / abs(then):+.0%})".replace("-", "−")
    return text


def _measurement_rows(series: Mapping[str, Any]) -> list[dict[str, str]]:
    current = {k: v for k, v in flatten_metrics(series).items() if not k.startswith("ttf.")}
    base = _baseline_metrics(series.get("baseline"))
    rows = []
    for key in list(current) + [k for k in base if k not in current]:
        label, unit = _metric_label(key)
        now, then = current.get(key), base.get(key)
        rows.append({"key": key, "label": label, "unit": unit, "value": fmt_metric(key, now, unit),
                     "baseline": fmt_metric(key, then, unit),
                     "change": _change(now, then)})
    return rows


def _nearest(edges: list[Mapping[str, Any]], contrast: float | None) -> Mapping[str, Any] | None:
    if contrast is None:
        return None
    scored = [(abs(c - contrast), e) for e in edges if (c := finite_number(e.get("contrast_hu"))) is not None]
    if not scored:
        return None
    diff, edge = min(scored, key=lambda t: t[0])
    return edge if diff <= max(20.0, 0.2 * abs(contrast)) else None


def _edge_rows(series: Mapping[str, Any]) -> list[dict[str, str]]:
    """One row per TTF edge: kind, contrast, CNR, f50, f10, trust, baseline f50."""
    ttf = _applicable(series, "ttf")
    if ttf is None:
        return []
    base_edges = _baseline_edges(series.get("baseline"))
    rows = []
    for e in ttf.get("edges") or []:
        if not isinstance(e, Mapping):
            continue
        contrast = finite_number(e.get("contrast_hu"))
        f50 = finite_number(e.get("f50_per_mm"))
        ref = _nearest(base_edges, contrast)
        ref_f50 = finite_number(ref.get("f50_per_mm")) if ref else None
        reliable = e.get("reliable") is not False
        rows.append({
            "kind": str(e.get("kind") or "edge"),
            "contrast": "–" if contrast is None else f"{contrast:+.0f}",
            "cnr": fmt(e.get("contrast_to_noise"), 3),
            "f50": fmt_measured(f50, "mm⁻¹"),
            "f10": fmt_measured(e.get("f10_per_mm"), "mm⁻¹"),
            "reliable": reliable,
            "reason": "" if reliable else str(e.get("reason") or "marked unreliable"),
            "baseline": fmt_measured(ref_f50, "mm⁻¹"),
            "change": _change(f50, ref_f50),
        })
    return rows


def _baseline_note(baseline: Any) -> str:
    if not isinstance(baseline, Mapping) or not baseline:
        return ""
    origin = baseline.get("from_series") or baseline.get("series_id")
    when = baseline.get("recorded_at")
    parts = ["Baseline"]
    if origin:
        parts.append(f"from {origin}")
    if when:
        parts.append(f"recorded {when}")
    return " ".join(parts)


def _not_measured(series: Mapping[str, Any]) -> list[tuple[str, str]]:
    out = []
    for name in ("streaks", "air", "nps", "uniformity", "ttf"):
        rec = series.get(name)
        if rec is None:
            out.append((name, "not run"))
        elif isinstance(rec, Mapping) and rec.get("applicable", True) is False:
            out.append((name, str(rec.get("reason") or "not applicable")))
    return out


def _said_under_not_measured(finding: Mapping[str, Any], not_measured: list[tuple[str, str]]) -> bool:
    """Whether ``finding`` is an analysis' "not applicable" note that the series' "Not
    measured" list gives already (with the same reason): shown once, not twice."""
    return finding["severity"] == "info" and any(
        finding["analysis"] == name and finding["message"] == f"not applicable: {why}" for name, why in not_measured
    )


def _findings(series: Mapping[str, Any]) -> list[dict[str, Any]]:
    items = []
    for f in series.get("findings") or []:
        if not isinstance(f, Mapping):
            continue
        sev = str(f.get("severity") or "info").lower()
        sev = sev if sev in SEVERITIES else "info"
        items.append({"severity": sev, **SEVERITIES[sev], "analysis": str(f.get("analysis") or ""),
                      "message": str(f.get("message") or "")})
    return sorted(items, key=lambda f: -f["rank"])


def _figures(series_figures: Mapping[str, Any] | None) -> list[dict[str, str]]:
    out = []
    for name, path in (series_figures or {}).items():
        src = _safe_relative(path)
        if src:
            kind = "image" if str(name) in ("axial", "axial_air") else "curve"
            out.append({"name": str(name), "src": src, "kind": kind,
                        "caption": FIGURE_CAPTIONS.get(str(name), str(name))})
    order = list(FIGURE_CAPTIONS)
    return sorted(out, key=lambda f: order.index(f["name"]) if f["name"] in order else len(order))


def _headline(series: Mapping[str, Any]) -> dict[str, Any]:
    streaks, air = _applicable(series, "streaks"), _applicable(series, "air")
    nps, ttf = _applicable(series, "nps"), _applicable(series, "ttf")
    flagged_air = None
    if air is not None and isinstance(air.get("structures"), list):
        flagged_air = sum(1 for s in air["structures"] if isinstance(s, Mapping) and s.get("flagged"))
    f50, f50_contrast = headline_f50(ttf)
    return {
        "streak_index": finite_number(streaks.get("index")) if streaks else None,
        "air_flagged": flagged_air,
        "noise_hu": finite_number(nps.get("noise_hu")) if nps else None,
        "f_av_per_mm": finite_number(nps.get("f_av_per_mm")) if nps else None,
        "f50_per_mm": f50,
        "f50_contrast_hu": f50_contrast,
    }


def series_context(
    series: Mapping[str, Any], index: int, figures: Mapping[str, Any] | None, include_identifiers: bool
) -> dict[str, Any]:
    """Everything the template shows about one series (identifiers masked unless asked)."""
    meta = series.get("metadata") if isinstance(series.get("metadata"), Mapping) else {}
    verdict = _verdict_key(series)
    error = series.get("error") if isinstance(series.get("error"), Mapping) else None
    not_measured = _not_measured(series) if verdict != "error" else []
    ctx = {
        "anchor": f"s{index}",
        "id": str(series.get("id") or f"series {index}"),
        "source": str(series.get("source") or ""),
        "uid": str(series.get("series_instance_uid") or ""),
        "description": str(meta.get("series_description") or "(no description)"),
        "kernel": str(meta.get("convolution_kernel") or "–"),
        "verdict": verdict,
        "verdict_info": VERDICTS[verdict],
        "error": {"kind": str(error.get("kind") or "error"), "message": str(error.get("message") or "")} if error else None,
        "facts": _metadata_rows(series, include_identifiers),
        "headline": _headline(series),
        "measurements": _measurement_rows(series) if verdict != "error" else [],
        "edges": _edge_rows(series) if verdict != "error" else [],
        "baseline_note": _baseline_note(series.get("baseline")),
        "not_measured": not_measured,
        "findings": [f for f in _findings(series) if not _said_under_not_measured(f, not_measured)],
        "figures": _figures(figures),
        "has_baseline": isinstance(series.get("baseline"), Mapping) and bool(series.get("baseline")),
    }
    return ctx if include_identifiers else redact(ctx, identifier_values(series))


# ---------------------------------------------------------------------------- run
def _run_time(doc: Mapping[str, Any]) -> str:
    run = doc.get("run") if isinstance(doc.get("run"), Mapping) else {}
    for value in (doc.get("started"), run.get("started"), doc.get("created"), doc.get("checked_at")):
        if value:
            return str(value)
    return ""


def _profile_name(doc: Mapping[str, Any]) -> str:
    profile = doc.get("profile")
    if isinstance(profile, Mapping):
        return str(profile.get("name") or profile.get("path") or "unnamed profile")
    return str(profile or "unnamed profile")


def _trends(trends: Mapping[str, Any] | None) -> list[dict[str, Any]]:
    out = []
    for key, value in (trends or {}).items():
        paths = value.values() if isinstance(value, Mapping) else (value if isinstance(value, (list, tuple)) else [value])
        srcs = [s for s in (_safe_relative(p) for p in paths) if s]
        if srcs:
            out.append({"protocol": str(key), "srcs": srcs})
    return out


def report_context(
    doc: Mapping[str, Any],
    figures: Mapping[str, Mapping[str, str]],
    trends: Mapping[str, Any] | None,
    include_identifiers: bool,
) -> dict[str, Any]:
    """The template context of the whole report."""
    raw = [s for s in doc.get("series") or [] if isinstance(s, Mapping)]
    series = [
        series_context(s, i, (figures or {}).get(str(s.get("id"))), include_identifiers) for i, s in enumerate(raw, 1)
    ]
    counts = {k: sum(1 for s in series if s["verdict"] == k) for k in ("pass", "review", "fail", "error", "none")}
    secrets = [] if include_identifiers else sorted({v for s in raw for v in identifier_values(s)}, key=len, reverse=True)
    return {
        "tool_version": str(doc.get("tool_version") or "unknown"),
        "profile_name": redact(_profile_name(doc), secrets),
        "run_time": redact(_run_time(doc), secrets),
        "written_at": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "schema": str(doc.get("schema") or ""),
        "skipped_count": len(doc.get("skipped") or []),
        "counts": counts,
        "verdicts": VERDICTS,
        "series": series,
        "trends": redact(_trends(trends), secrets),
        "include_identifiers": include_identifiers,
        "safety_notice": SAFETY_NOTICE,
        "fmt": fmt,
        "fmt_measured": fmt_measured,
        "fmt_metric": fmt_metric,
    }


@functools.lru_cache(maxsize=1)
def _environment() -> jinja2.Environment:
    """The report templates' environment, made once per process: compiling the templates
    costs about 0.2 s, rendering them milliseconds. The loader still reloads a template
    whose file changed; each render gets its own context, so threads may share it."""
    return jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(_TEMPLATES)),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )


def render_report(
    doc: Mapping[str, Any],
    *,
    figures: Mapping[str, Mapping[str, str]] | None = None,
    trends: Mapping[str, Any] | None = None,
    include_identifiers: bool = False,
) -> str:
    """The report as an HTML string (see :func:`write_report`)."""
    context = report_context(doc, figures or {}, trends, include_identifiers)
    return _environment().get_template("report.html").render(**context)


def write_report(
    doc: Mapping[str, Any],
    out_dir: str | os.PathLike[str],
    *,
    figures: Mapping[str, Mapping[str, str]] | None = None,
    trends: Mapping[str, Any] | None = None,
    include_identifiers: bool = False,
) -> Path:
    """Write ``out_dir/report.html`` atomically (temporary file, then ``os.replace``).

    Parameters
    ----------
    doc : mapping
        The results.json document (schema ``reconaudit.results/1``).
    out_dir : path
        Report folder; figure paths are relative to it.
    figures : mapping
        Series id -> (figure name -> relative path), from :func:`render_series_figures`.
    trends : mapping, optional
        Protocol key -> relative PNG path (or a list/mapping of them) from
        :meth:`reconaudit.checker.history.History.plot_trend`.
    include_identifiers : bool
        Show patient identifiers (off by default; when off they are also masked in
        every other string of the report).

    Returns
    -------
    Path
        ``out_dir/report.html``. If rendering fails nothing is written and an earlier
        report stays as it was.

    References
    ----------
    .. [1] Samei et al., Med Phys 46(11), 2019 (TG-233): the NPS/TTF metrics reported.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    html = render_report(doc, figures=figures, trends=trends, include_identifiers=include_identifiers)
    target = out / "report.html"
    fd, tmp = tempfile.mkstemp(prefix=".report-", suffix=".html.tmp", dir=str(out))
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(html)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return target
