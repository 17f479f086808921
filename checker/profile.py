"""Profiles: which analyses run, their settings and tolerances, each with its source.

A profile is a TOML file (``checker/profiles/default.toml`` is shipped). Every setting
a profile leaves out takes the analysis module's ``DEFAULTS``; the source of each
default tolerance is in the module's ``SOURCES``. A site profile is merged over the
shipped default, key by key, so it only states what it changes.
"""
from __future__ import annotations

import copy
import hashlib
import importlib
import json
import sys
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

from . import analyses as _analyses
from .errors import ProfileError

BASELINE_METRICS = ("noise_hu", "f_av_per_mm", "f50_per_mm", "air_noise_hu")


@dataclass
class Profile:
    name: str
    description: str
    path: str
    protocol_key: list[str]
    enabled: dict[str, bool]
    overrides: dict[str, dict[str, Any]]
    baseline: dict[str, dict[str, Any]] = field(default_factory=dict)

    # ------------------------------------------------------------ analyses
    def enabled_analyses(self) -> list[str]:
        return [n for n in _analyses.REGISTRY if self.enabled.get(n, False) and _importable(n)]

    def settings_for(self, name: str) -> dict[str, Any]:
        """The effective settings of one analysis: DEFAULTS, then the profile's."""
        merged = copy.deepcopy(_module_defaults(name))
        merged.update(copy.deepcopy(self.overrides.get(name, {})))
        return merged

    def all_settings(self) -> dict[str, dict[str, Any]]:
        return {n: self.settings_for(n) for n in self.enabled_analyses()}

    def baseline_tolerance(self, metric: str) -> float:
        return float(self.baseline.get(metric, {}).get("tolerance", float("inf")))

    # ------------------------------------------------------------ identity
    def effective(self) -> dict[str, Any]:
        """The whole effective profile as a JSON-ready dict."""
        return {
            "name": self.name,
            "description": self.description,
            "path": self.path,
            "protocol_key": list(self.protocol_key),
            "analyses": {
                n: {"enabled": self.enabled.get(n, False), "settings": self.settings_for(n)}
                for n in _analyses.REGISTRY
                if _importable(n)
            },
            "baseline": self.baseline,
        }

    def digest(self) -> str:
        """Hash of the effective profile: a series checked under another one is re-run."""
        text = json.dumps(self.effective(), sort_keys=True, default=str)
        return hashlib.sha256(text.encode()).hexdigest()[:16]

    def summary(self) -> dict[str, Any]:
        return {"name": self.name, "path": self.path, "digest": self.digest(), "analyses": self.enabled_analyses()}

    def to_toml(self) -> str:
        """The effective profile as TOML, with each tolerance's source as a comment."""
        lines = [
            "# reconaudit effective profile",
            f"# from: {self.path}",
            "",
            "[profile]",
            f"name = {_toml_value(self.name)}",
            f"description = {_toml_value(self.description)}",
            f"protocol_key = {_toml_value(self.protocol_key)}",
        ]
        for name in _analyses.REGISTRY:
            if not _importable(name):
                continue
            sources = _module_sources(name)
            lines += ["", f"[analyses.{name}]", f"enabled = {_toml_value(self.enabled.get(name, False))}"]
            lines += ["", f"[analyses.{name}.settings]"]
            for key, value in self.settings_for(name).items():
                src = "profile" if key in self.overrides.get(name, {}) else sources.get(key)
                comment = f"  # source: {src}" if src else ""
                lines.append(f"{key} = {_toml_value(value)}{comment}")
        for metric, entry in self.baseline.items():
            lines += ["", f"[baseline.{metric}]"]
            for key, value in entry.items():
                lines.append(f"{key} = {_toml_value(value)}")
        return "\n".join(lines) + "\n"


def _importable(name: str) -> bool:
    try:
        importlib.import_module(_analyses.REGISTRY[name])
    except ImportError:
        return False
    return True


def _module_defaults(name: str) -> dict[str, Any]:
    if not _importable(name):
        return {}
    return dict(getattr(importlib.import_module(_analyses.REGISTRY[name]), "DEFAULTS", {}))


def _module_sources(name: str) -> dict[str, str]:
    if not _importable(name):
        return {}
    return dict(getattr(importlib.import_module(_analyses.REGISTRY[name]), "SOURCES", {}))


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        if isinstance(value, float) and value != value:
            return "nan"
        if isinstance(value, float) and value in (float("inf"), float("-inf")):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        return json.dumps(value)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{k} = {_toml_value(v)}" for k, v in value.items()) + " }"
    if value is None:
        return '""'
    return json.dumps(str(value))


def _read_toml(path: str | Path | None) -> tuple[dict[str, Any], str]:
    if path is None:
        text = resources.files("reconaudit.checker").joinpath("profiles/default.toml").read_text()
        return tomllib.loads(text), "default (shipped)"
    p = Path(path)
    try:
        return tomllib.loads(p.read_text(encoding="utf-8")), str(p)
    except FileNotFoundError:
        raise ProfileError("profile file not found", source=str(p)) from None
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(f"not valid TOML: {exc}", source=str(p)) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ProfileError(f"cannot read the profile: {exc}", source=str(p)) from None


def _merge(base: dict[str, Any], over: dict[str, Any]) -> dict[str, Any]:
    out = copy.deepcopy(base)
    for key, value in over.items():
        if isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = _merge(out[key], value)
        else:
            out[key] = copy.deepcopy(value)
    return out


def _validate(data: dict[str, Any], source: str) -> None:
    for section in data:
        if section not in ("profile", "analyses", "baseline"):
            raise ProfileError(f"unknown section [{section}]; expected [profile], [analyses.*] or [baseline.*]", source=source)
    for name, entry in data.get("analyses", {}).items():
        if name not in _analyses.REGISTRY:
            raise ProfileError(f"unknown analysis [analyses.{name}]; known: {', '.join(_analyses.REGISTRY)}", source=source)
        extra = set(entry) - {"enabled", "settings"}
        if extra:
            raise ProfileError(f"[analyses.{name}] has unknown keys {sorted(extra)}; expected 'enabled' and [analyses.{name}.settings]", source=source)
        defaults = _module_defaults(name)
        unknown = set(entry.get("settings", {})) - set(defaults)
        if defaults and unknown:
            raise ProfileError(f"[analyses.{name}.settings] has unknown settings {sorted(unknown)}; known: {', '.join(sorted(defaults))}", source=source)
    for metric, entry in data.get("baseline", {}).items():
        if metric not in BASELINE_METRICS:
            raise ProfileError(f"unknown baseline metric [baseline.{metric}]; known: {', '.join(BASELINE_METRICS)}", source=source)
        if not isinstance(entry, dict) or not isinstance(entry.get("tolerance"), (int, float)):
            raise ProfileError(f"[baseline.{metric}] needs a numeric 'tolerance' (relative change) and a 'source'", source=source)


def load_profile(path: str | Path | None = None) -> Profile:
    """The shipped default profile, with the site profile at ``path`` merged over it."""
    data, _ = _read_toml(None)
    source = "default (shipped)"
    if path is not None:
        site, source = _read_toml(path)
        _validate(site, source)
        data = _merge(data, site)
    _validate(data, source)
    meta = data.get("profile", {})
    analyses = data.get("analyses", {})
    return Profile(
        name=str(meta.get("name", Path(source).stem)),
        description=str(meta.get("description", "")),
        path=source,
        protocol_key=list(meta.get("protocol_key", ["series_description", "convolution_kernel", "slice_thickness_mm"])),
        enabled={n: bool(e.get("enabled", True)) for n, e in analyses.items()},
        overrides={n: dict(e.get("settings", {})) for n, e in analyses.items()},
        baseline={m: dict(e) for m, e in data.get("baseline", {}).items()},
    )
