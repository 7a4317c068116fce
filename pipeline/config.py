"""Site settings: one TOML file maps a site's export onto the lake contract.

Every section is optional; the defaults below are what a run uses without a config file. The
format is documented with an example in docs/configuration.md. A setting that cannot be right
(unknown section or key, a unit the contract does not know, a time zone that does not exist)
is a ConfigError, which the CLI turns into exit code 2 with a one-line reason.
"""
from __future__ import annotations

import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from pipeline.codes import (LOINC_CALCIUM_MASS, LOINC_CALCIUM_MOLAR, LOINC_MAGNESIUM_MASS, LOINC_MAGNESIUM_MOLAR,
                            LOINC_POTASSIUM_BLOOD, LOINC_POTASSIUM_SERUM)
from pipeline.contract import AMPLITUDE_UNITS, TABLES, TIME_UNITS
from pipeline.errors import BadInputError


class ConfigError(BadInputError):
    """The site configuration is unusable; the message says which setting and why."""


# LOINC codes read as each analyte by default (pipeline/codes.py names them; sites confirm
# each against their own catalogue).
DEFAULT_ANALYTES = {
    "potassium": (LOINC_POTASSIUM_SERUM, LOINC_POTASSIUM_BLOOD),
    "magnesium": (LOINC_MAGNESIUM_MASS, LOINC_MAGNESIUM_MOLAR),
    "calcium": (LOINC_CALCIUM_MASS, LOINC_CALCIUM_MOLAR),
}

DEFAULT_WINDOWS = {
    "lab_before_h": 24.0,        # default (site config [windows]): labs collected up to 24 h before the ECG ...
    "lab_after_h": 6.0,          # ... or up to 6 h after it
    "k_trend_h": 72.0,           # local choice: an earlier potassium older than 3 days is no trend
    "prior_ecg_min_gap_h": 1.0,  # a repeat within the hour is the same encounter, not a baseline
    "prior_ecg_max_days": 365.0,
    "medication_h": 24.0,
    "episode_h": 72.0,           # findings of one screen and patient this close fold into one item
}

_SECTIONS = {"site", "columns", "units", "lab_codes", "analytes", "troponin", "drugs", "windows", "rules"}


@dataclass(frozen=True)
class Assay:
    code: str
    url_ng_l: float              # upper reference limit (99th centile) of the assay, ng/L


@dataclass(frozen=True)
class Settings:
    source: str = "defaults"
    site_name: str = ""
    timezone: str | None = None
    columns: dict[str, dict[str, str]] = field(default_factory=dict)   # table -> site name -> contract name
    time_units: dict[str, str] = field(default_factory=dict)           # ecg column -> "ms" | "s"
    amplitude_unit: str = "uV"
    lab_codes: dict[str, str] = field(default_factory=dict)            # local code -> LOINC
    analytes: dict[str, tuple[str, ...]] = field(default_factory=lambda: dict(DEFAULT_ANALYTES))
    troponin: tuple[Assay, ...] = ()
    drugs: dict[str, tuple[str, ...]] = field(default_factory=dict)    # class -> lower-case drug names
    windows: dict[str, float] = field(default_factory=lambda: dict(DEFAULT_WINDOWS))
    rules: dict[str, dict] = field(default_factory=dict)               # screen -> threshold overrides

    def analyte_of_code(self) -> dict[str, str]:
        """LOINC code -> analyte name, troponin assays included."""
        out = {code: name for name, codes in self.analytes.items() for code in codes}
        out.update({a.code: "troponin" for a in self.troponin})
        return out


def load_settings(path: str | Path | None = None) -> Settings:
    """Settings from a TOML file, or the defaults when path is None."""
    if path is None:
        return Settings()
    path = Path(path)
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ConfigError(f"config file not found: {path}") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"config file {path} is not valid TOML: {exc}") from None
    return settings_from_dict(raw, source=path.name)


def settings_from_dict(raw: dict, source: str = "config") -> Settings:
    unknown = set(raw) - _SECTIONS
    if unknown:
        raise ConfigError(f"{source}: unknown section(s) {sorted(unknown)}; known: {sorted(_SECTIONS)}")
    site = raw.get("site", {})
    tz = site.get("timezone")
    if tz is not None:
        from zoneinfo import ZoneInfo, ZoneInfoNotFoundError
        try:
            ZoneInfo(tz)
        except (ZoneInfoNotFoundError, ValueError):
            raise ConfigError(f"{source}: [site] timezone {tz!r} is not a known IANA time zone") from None

    columns = {}
    for table, mapping in raw.get("columns", {}).items():
        if table not in TABLES:
            raise ConfigError(f"{source}: [columns.{table}] names no contract table")
        for site_name, contract_name in mapping.items():
            if contract_name not in TABLES[table].column_names:
                raise ConfigError(f"{source}: [columns.{table}] maps {site_name!r} to unknown column {contract_name!r}")
        columns[table] = dict(mapping)

    units = raw.get("units", {})
    time_units = dict(units.get("ecg", {}))
    for col, unit in time_units.items():
        if col not in ("rr_ms", "pr_ms", "qrs_ms", "qt_ms"):
            raise ConfigError(f"{source}: [units.ecg] {col!r} is not an interval column")
        if unit not in TIME_UNITS:
            raise ConfigError(f"{source}: [units.ecg] {col} unit {unit!r} not one of {sorted(TIME_UNITS)}")
    amplitude = units.get("ecg_lead", {}).get("amplitude", "uV")
    if amplitude not in AMPLITUDE_UNITS:
        raise ConfigError(f"{source}: [units.ecg_lead] amplitude {amplitude!r} not one of {sorted(AMPLITUDE_UNITS)}")

    analytes = dict(DEFAULT_ANALYTES)
    for name, codes in raw.get("analytes", {}).items():
        if name not in DEFAULT_ANALYTES:
            raise ConfigError(f"{source}: [analytes] {name!r} is not one of {sorted(DEFAULT_ANALYTES)}")
        analytes[name] = tuple(str(c) for c in codes)

    troponin = []
    for i, assay in enumerate(raw.get("troponin", [])):
        try:
            troponin.append(Assay(str(assay["code"]), float(assay["url_ng_l"])))
        except (KeyError, TypeError, ValueError):
            raise ConfigError(f"{source}: [[troponin]] entry {i + 1} needs code and a numeric url_ng_l") from None

    drugs = {cls: tuple(str(d).strip().lower() for d in names) for cls, names in raw.get("drugs", {}).items()}
    for cls in drugs:
        if cls not in ("qt_prolonging", "loop_diuretic", "k_lowering"):
            raise ConfigError(f"{source}: [drugs] class {cls!r} is not qt_prolonging, loop_diuretic or k_lowering")

    windows = dict(DEFAULT_WINDOWS)
    for key, value in raw.get("windows", {}).items():
        if key not in DEFAULT_WINDOWS:
            raise ConfigError(f"{source}: [windows] unknown key {key!r}; known: {sorted(DEFAULT_WINDOWS)}")
        if not isinstance(value, (int, float)) or value < 0:
            raise ConfigError(f"{source}: [windows] {key} must be a non-negative number")
        windows[key] = float(value)

    return Settings(source=source, site_name=str(site.get("name", "")), timezone=tz, columns=columns,
                    time_units=time_units, amplitude_unit=amplitude,
                    lab_codes={str(k): str(v) for k, v in raw.get("lab_codes", {}).items()},
                    analytes=analytes, troponin=tuple(troponin), drugs=drugs, windows=windows,
                    rules=dict(raw.get("rules", {})))
