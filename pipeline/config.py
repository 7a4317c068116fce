"""Site settings: one TOML file maps a site's export onto the lake contract.

Every section is optional; the defaults below are what a run uses without a config file. The
format is documented with an example in docs/configuration.md. A setting that cannot be right
(unknown section or key, a unit the contract does not know, a time zone that does not exist)
is a ConfigError, which the CLI turns into exit code 2 with a one-line reason.
"""
from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from cardiosieve.pipeline.codes import (LOINC_CALCIUM_MASS, LOINC_CALCIUM_MOLAR, LOINC_MAGNESIUM_MASS, LOINC_MAGNESIUM_MOLAR,
                            LOINC_POTASSIUM_BLOOD, LOINC_POTASSIUM_SERUM)
from cardiosieve.pipeline.contract import AMPLITUDE_UNITS, TABLES, TIME_UNITS
from cardiosieve.pipeline.errors import BadInputError


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

_SECTIONS = {"site", "columns", "units", "lab_codes", "analytes", "troponin", "drugs", "windows", "rules", "quality",
             "audit"}

# A missing feed (no ECG rows tonight; ECGs but no lab rows for their patients) stops the run by
# default: findings would otherwise drop to lower tiers with exit 0. A site may lower it to a
# warning. The lab check is critical only on nights with at least lab_feed_min_ecgs ECGs (a very
# small night may truly have no labs; local choice).
DEFAULT_QUALITY = {"missing_feed": "critical", "lab_feed_min_ecgs": 20.0}

# How soon an item of each tier should be reviewed, in hours from when it was first flagged
# (`cardiosieve audit`, pipeline/audit.py). Local choices, to be set by each site to its own
# protocol: tier 1 within the hour, tier 2 within a shift, tier 3 within three days, tier 4
# within a week.
DEFAULT_AUDIT = {"review_target_h_tier_1": 1.0, "review_target_h_tier_2": 12.0, "review_target_h_tier_3": 72.0,
                 "review_target_h_tier_4": 168.0,
                 # The follow-up rules (pipeline/followup.py, docs/audit.md gives each one's rationale):
                 # a potassium at or above follow_up_k_mmol_l (UKKA-2020's severe band) with no repeat
                 # potassium within follow_up_k_h; an ST-elevation finding with no repeat ECG or
                 # troponin within follow_up_st_h; a QTc above follow_up_qtc_ms (AHA-2010-TDP) with a
                 # QT-prolonging drug given within follow_up_qt_drug_h after the ECG. The windows
                 # are common practice, the drug window a local choice.
                 "follow_up_k_mmol_l": 6.5, "follow_up_k_h": 6.0, "follow_up_st_h": 6.0,
                 "follow_up_qtc_ms": 500.0, "follow_up_qt_drug_h": 24.0}
REVIEW_TARGET_PREFIX = "review_target_h_tier_"


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
    quality: dict[str, object] = field(default_factory=lambda: dict(DEFAULT_QUALITY))
    audit: dict[str, float] = field(default_factory=lambda: dict(DEFAULT_AUDIT))

    def review_target_h(self) -> dict[int, float]:
        """Tier -> hours within which its items should be reviewed ([audit])."""
        return {int(k[len(REVIEW_TARGET_PREFIX):]): v for k, v in self.audit.items()
                if k.startswith(REVIEW_TARGET_PREFIX)}

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


_SITE_KEYS = {"name", "timezone"}
_UNITS_KEYS = {"ecg", "ecg_lead"}
_TROPONIN_KEYS = {"code", "url_ng_l"}


def _table(raw: dict, key: str, source: str, where: str) -> dict:
    value = raw.get(key, {})
    if not isinstance(value, dict):
        raise ConfigError(f"{source}: {where} must be a table of key = value")
    return value


def _known_keys(table: dict, known: set[str], source: str, where: str) -> None:
    unknown = set(table) - known
    if unknown:
        raise ConfigError(f"{source}: {where} unknown key(s) {sorted(unknown)}; known: {sorted(known)}")


def _string_list(value, source: str, where: str) -> tuple[str, ...]:
    """A list of strings. A plain string is refused: `potassium = "2823-3"` would otherwise be
    read letter by letter, and every potassium would silently drop out."""
    if not isinstance(value, list) or not all(isinstance(v, str) and v.strip() for v in value):
        raise ConfigError(f"{source}: {where} must be a list of strings, e.g. [\"a\", \"b\"]")
    return tuple(value)


def _number(value, source: str, where: str, *, positive: bool = False) -> float:
    """A finite number, not negative (not zero when `positive`); true/false are not numbers."""
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) \
            or value < 0 or (positive and value == 0):
        kind = "a positive" if positive else "a non-negative"
        raise ConfigError(f"{source}: {where} must be {kind} finite number")
    return float(value)


def settings_from_dict(raw: dict, source: str = "config") -> Settings:
    """Settings from a parsed config. Strict: every section, key and type is checked here, before
    anything is read or written; a slip is a ConfigError naming the setting."""
    unknown = set(raw) - _SECTIONS
    if unknown:
        raise ConfigError(f"{source}: unknown section(s) {sorted(unknown)}; known: {sorted(_SECTIONS)}")
    site = _table(raw, "site", source, "[site]")
    _known_keys(site, _SITE_KEYS, source, "[site]")
    if not isinstance(site.get("name", ""), str):
        raise ConfigError(f"{source}: [site] name must be a string")
    tz = site.get("timezone")
    if tz is not None and not isinstance(tz, str):
        raise ConfigError(f"{source}: [site] timezone must be a string such as \"Europe/London\"")
    if tz is not None:
        from zoneinfo import ZoneInfo, ZoneInfoNotFoundError
        try:
            ZoneInfo(tz)
        except (ZoneInfoNotFoundError, ValueError):
            raise ConfigError(f"{source}: [site] timezone {tz!r} is not a known IANA time zone") from None

    columns = {}
    for table, mapping in _table(raw, "columns", source, "[columns]").items():
        if table not in TABLES:
            raise ConfigError(f"{source}: [columns.{table}] names no contract table")
        if not isinstance(mapping, dict):
            raise ConfigError(f"{source}: [columns.{table}] must be a table of site name = contract name")
        for site_name, contract_name in mapping.items():
            if contract_name not in TABLES[table].column_names:
                raise ConfigError(f"{source}: [columns.{table}] maps {site_name!r} to unknown column {contract_name!r}")
        columns[table] = dict(mapping)

    units = _table(raw, "units", source, "[units]")
    _known_keys(units, _UNITS_KEYS, source, "[units]")
    time_units = dict(_table(units, "ecg", source, "[units.ecg]"))
    _known_keys(_table(units, "ecg_lead", source, "[units.ecg_lead]"), {"amplitude"}, source, "[units.ecg_lead]")
    for col, unit in time_units.items():
        if col not in ("rr_ms", "pr_ms", "qrs_ms", "qt_ms"):
            raise ConfigError(f"{source}: [units.ecg] {col!r} is not an interval column")
        if unit not in TIME_UNITS:
            raise ConfigError(f"{source}: [units.ecg] {col} unit {unit!r} not one of {sorted(TIME_UNITS)}")
    amplitude = units.get("ecg_lead", {}).get("amplitude", "uV")
    if amplitude not in AMPLITUDE_UNITS:
        raise ConfigError(f"{source}: [units.ecg_lead] amplitude {amplitude!r} not one of {sorted(AMPLITUDE_UNITS)}")

    analytes = dict(DEFAULT_ANALYTES)
    for name, codes in _table(raw, "analytes", source, "[analytes]").items():
        if name not in DEFAULT_ANALYTES:
            raise ConfigError(f"{source}: [analytes] {name!r} is not one of {sorted(DEFAULT_ANALYTES)}")
        analytes[name] = _string_list(codes, source, f"[analytes] {name}")

    troponin = []
    entries = raw.get("troponin", [])
    if not isinstance(entries, list):
        raise ConfigError(f"{source}: troponin must be written as [[troponin]] entries")
    for i, assay in enumerate(entries):
        where = f"[[troponin]] entry {i + 1}"
        if not isinstance(assay, dict) or not isinstance(assay.get("code"), str) or "url_ng_l" not in assay:
            raise ConfigError(f"{source}: {where} needs code (a string) and url_ng_l")
        _known_keys(assay, _TROPONIN_KEYS, source, where)
        troponin.append(Assay(assay["code"], _number(assay["url_ng_l"], source, f"{where} url_ng_l", positive=True)))

    drugs = {cls: tuple(d.strip().lower() for d in _string_list(names, source, f"[drugs] {cls}"))
             for cls, names in _table(raw, "drugs", source, "[drugs]").items()}
    for cls in drugs:
        if cls not in ("qt_prolonging", "loop_diuretic", "k_lowering"):
            raise ConfigError(f"{source}: [drugs] class {cls!r} is not qt_prolonging, loop_diuretic or k_lowering")

    windows = dict(DEFAULT_WINDOWS)
    for key, value in _table(raw, "windows", source, "[windows]").items():
        if key not in DEFAULT_WINDOWS:
            raise ConfigError(f"{source}: [windows] unknown key {key!r}; known: {sorted(DEFAULT_WINDOWS)}")
        windows[key] = _number(value, source, f"[windows] {key}")
    lab_codes = _table(raw, "lab_codes", source, "[lab_codes]")
    if not all(isinstance(v, str) for v in lab_codes.values()):
        raise ConfigError(f"{source}: [lab_codes] maps each local code to a LOINC code string")
    rules = _table(raw, "rules", source, "[rules]")
    _check_rules(rules, source)
    quality_raw = _table(raw, "quality", source, "[quality]")
    _known_keys(quality_raw, set(DEFAULT_QUALITY), source, "[quality]")
    quality = dict(DEFAULT_QUALITY)
    if "missing_feed" in quality_raw:
        if quality_raw["missing_feed"] not in ("critical", "warning"):
            raise ConfigError(f"{source}: [quality] missing_feed must be \"critical\" or \"warning\"")
        quality["missing_feed"] = quality_raw["missing_feed"]
    if "lab_feed_min_ecgs" in quality_raw:
        quality["lab_feed_min_ecgs"] = _number(quality_raw["lab_feed_min_ecgs"], source, "[quality] lab_feed_min_ecgs")
    audit_raw = _table(raw, "audit", source, "[audit]")
    _known_keys(audit_raw, set(DEFAULT_AUDIT), source, "[audit]")
    audit = {**DEFAULT_AUDIT, **{k: _number(v, source, f"[audit] {k}", positive=True) for k, v in audit_raw.items()}}

    return Settings(source=source, site_name=str(site.get("name", "")), timezone=tz, columns=columns,
                    time_units=time_units, amplitude_unit=amplitude,
                    lab_codes={str(k): v for k, v in lab_codes.items()},
                    analytes=analytes, troponin=tuple(troponin), drugs=drugs, windows=windows,
                    rules=dict(rules), quality=quality, audit=audit)


def _check_rules(rules: dict, source: str) -> None:
    """[rules.<screen>] overrides are checked at start-up against the shipped rule file, not after
    alignment: an unknown screen or key, or a value of the wrong kind, is a ConfigError."""
    from cardiosieve.screens.criteria import load_rules   # the rule file and its checks live with the screens

    try:
        load_rules(rules or None, source_name=source)
    except ValueError as exc:
        raise ConfigError(f"{source}: [rules] {exc}") from None
