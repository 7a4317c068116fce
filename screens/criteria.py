"""Thresholds and the rule set the screens run under.

Every cut point a screen applies is a `Threshold` read from the one versioned rule file,
`screens/rules.toml`, which also lists each source with its full citation. A site may
override any threshold's value (or a screen setting) from its config section
`[rules.<screen>]`; `load_rules` then

- replaces the value and sets the threshold's source to "site: <source_name>",
- suffixes that screen's rule version with "+site.<digest>", where <digest> is the first
  8 hex digits of a SHA-256 over the screen's overrides, so two sites with different local
  values never share a version string, and a finding records exactly what it was made under.

An unknown screen or key raises ValueError naming it (a misspelt override must never be
silently ignored). Overrides change values, never operators: "above 500" stays "above".
"""

from __future__ import annotations

import hashlib
import json
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any, Mapping

import numpy as np
import pandas as pd

RULES_PATH = Path(__file__).with_name("rules.toml")

_OPS = {
    ">=": np.greater_equal,
    ">": np.greater,
    "<=": np.less_equal,
    "<": np.less,
}

# Settings with a closed set of values; other settings keep the type of their shipped value.
SETTING_CHOICES = {
    "qtc_formula": ("fridericia", "bazett", "framingham", "hodges"),
}


def as_float_array(x: Any) -> np.ndarray:
    """`x` (scalar, list, ndarray, Series of float/Int64/Float64/boolean) as a float ndarray, NA as NaN."""
    if isinstance(x, (pd.Series, pd.Index)):
        return pd.to_numeric(pd.Series(x), errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    return np.asarray(x, dtype=float)


@dataclass(frozen=True)
class Threshold:
    """One cut point: `x <op> value` in `unit`, as worded by `source` (an id of rules.toml [sources])."""

    key: str
    op: str
    value: float
    unit: str
    source: str

    def __post_init__(self) -> None:
        if self.op not in _OPS:
            raise ValueError(f"threshold {self.key!r}: unknown operator {self.op!r}")

    def met(self, x: Any) -> Any:
        """Whether `x` meets the threshold, elementwise. Missing (NaN/NA) never meets it;
        the screens keep "not evaluable" visible separately. A Series or DataFrame keeps its
        labels, an array gives a bool array, a scalar gives a bool."""
        if isinstance(x, pd.DataFrame):
            arr = x.to_numpy(dtype=float, na_value=np.nan)
            with np.errstate(invalid="ignore"):
                res = _OPS[self.op](arr, self.value) & ~np.isnan(arr)
            return pd.DataFrame(res, index=x.index, columns=x.columns)
        arr = as_float_array(x)
        with np.errstate(invalid="ignore"):
            res = _OPS[self.op](arr, self.value) & ~np.isnan(arr)
        if isinstance(x, pd.Series):
            return pd.Series(res, index=x.index, name=self.key)
        if res.ndim == 0:
            return bool(res)
        return res

    def as_dict(self) -> dict[str, Any]:
        """The threshold as evidence JSON: key, op, value, unit, source."""
        value = int(self.value) if float(self.value).is_integer() else float(self.value)
        return {"key": self.key, "op": self.op, "value": value, "unit": self.unit, "source": self.source}

    def describe(self) -> str:
        """Plain words, e.g. "qtc_high_risk > 500 ms"."""
        return f"{self.key} {self.op} {self.as_dict()['value']} {self.unit}"


@dataclass(frozen=True)
class ScreenRules:
    """The thresholds and settings one screen runs under, and their version."""

    screen: str
    version: str
    thresholds: Mapping[str, Threshold]
    settings: Mapping[str, Any] = field(default_factory=dict)

    def __getitem__(self, key: str) -> Threshold:
        try:
            return self.thresholds[key]
        except KeyError:
            raise KeyError(f"screen {self.screen!r} has no threshold {key!r}") from None

    def setting(self, key: str) -> Any:
        try:
            return self.settings[key]
        except KeyError:
            raise KeyError(f"screen {self.screen!r} has no setting {key!r}") from None

    @property
    def locally_modified(self) -> bool:
        return "+" in self.version


@dataclass(frozen=True)
class Rules:
    """All screens' rules (`rules["long_qt"]`) and the citation of every source id."""

    screens: Mapping[str, ScreenRules]
    sources: Mapping[str, str]
    source_name: str = "site"

    def __getitem__(self, screen: str) -> ScreenRules:
        try:
            return self.screens[screen]
        except KeyError:
            raise KeyError(f"no rules for screen {screen!r}") from None

    def versions(self) -> dict[str, str]:
        return {name: sr.version for name, sr in self.screens.items()}


def _check_setting(screen: str, key: str, shipped: Any, value: Any) -> Any:
    choices = SETTING_CHOICES.get(key)
    if choices is not None:
        if value not in choices:
            raise ValueError(f"rules.{screen}.{key}: must be one of {', '.join(choices)}")
        return value
    if isinstance(shipped, bool):
        if not isinstance(value, bool):
            raise ValueError(f"rules.{screen}.{key}: must be true or false")
        return value
    if isinstance(shipped, (int, float)):
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise ValueError(f"rules.{screen}.{key}: must be a finite number")
        return type(shipped)(value)
    if not isinstance(value, type(shipped)):
        raise ValueError(f"rules.{screen}.{key}: must be a {type(shipped).__name__}")
    return value


def _digest(overrides: Mapping[str, Any]) -> str:
    blob = json.dumps(dict(overrides), sort_keys=True, default=str).encode()
    return hashlib.sha256(blob).hexdigest()[:8]


def load_rules(
    overrides: dict | None = None, source_name: str = "site", *, path: str | Path | None = None
) -> Rules:
    """The shipped rules of screens/rules.toml (or `path`), with a site's overrides applied.

    `overrides` is like {"long_qt": {"qtc_high_risk": 480, "qtc_formula": "bazett"}}: per screen,
    threshold keys take a number, setting keys a value of the setting's kind. Raises ValueError
    naming the screen or key when either is unknown or a value has the wrong kind.
    """
    rules_path = Path(path) if path is not None else RULES_PATH
    with open(rules_path, "rb") as fh:
        raw = tomllib.load(fh)
    sources = dict(raw.get("sources", {}))
    overrides = dict(overrides or {})
    screen_names = [k for k in raw if k != "sources"]

    for screen in overrides:
        if screen not in screen_names:
            raise ValueError(f"rules override names an unknown screen: {screen!r}")

    screens: dict[str, ScreenRules] = {}
    for screen in screen_names:
        section = raw[screen]
        thresholds: dict[str, Threshold] = {}
        for key, spec in section.get("thresholds", {}).items():
            if spec["source"] not in sources:
                raise ValueError(f"{rules_path.name}: threshold {screen}.{key} cites unknown source {spec['source']!r}")
            thresholds[key] = Threshold(key, spec["op"], float(spec["value"]), spec["unit"], spec["source"])
        settings = dict(section.get("settings", {}))
        version = section["version"]

        local = overrides.get(screen) or {}
        if not isinstance(local, Mapping):
            raise ValueError(f"rules override for screen {screen!r} must be a table of key = value")
        for key, value in local.items():
            if key in thresholds:
                if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
                    raise ValueError(f"rules.{screen}.{key}: threshold override must be a finite number")
                old = thresholds[key]
                thresholds[key] = Threshold(key, old.op, float(value), old.unit, f"site: {source_name}")
            elif key in settings:
                settings[key] = _check_setting(screen, key, settings[key], value)
            else:
                raise ValueError(f"rules override for screen {screen!r} names an unknown key: {key!r}")
        if local:
            version = f"{version}+site.{_digest(local)}"

        screens[screen] = ScreenRules(
            screen=screen,
            version=version,
            thresholds=MappingProxyType(thresholds),
            settings=MappingProxyType(settings),
        )
    return Rules(screens=MappingProxyType(screens), sources=MappingProxyType(sources), source_name=source_name)
