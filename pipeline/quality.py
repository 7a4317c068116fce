"""Data-quality gate: what the contract cannot say about the night's tables, checked with
Great Expectations in code (an in-memory context: no project folder, no Data Docs).

The contract (pipeline/contract.py, applied row by row by the loader) owns structure and
identity: columns, types, units, impossible values, ids present, keys unique, lead names, sex
codes, analyte codes in scope. This gate does not check those again; it owns what the rows
cannot say one by one: values in a plausible range, timestamps neither in the future nor
before a sane floor, columns consistent with each other (QT longer than QRS, resulted after
collected), every ECG with its 12 standard leads, how much of tonight the contract rejected,
and each feed's volume against the previous nights.

Each check has a stable name, a one-line reason and a severity rule:
- row checks (one GE expectation each) reject their failing rows (reason "quality:<name>") and
  are a *warning* while at most `critical_above_pct` (default 5 %) of the rows checked fail;
  above that the table is broken rather than the rows (a unit mix-up, an export fault, all ids
  empty) and the check is *critical*: `enforce` stops the run before anything is published;
- "flag" checks (ECGs lacking a standard lead) keep the row, list it in `flagged` so that
  screens can say so in their caveats, and follow the same 5 % rule;
- the row-count band is a warning only: a quiet night or a busy one is no reason to stop.

Privacy: Great Expectations runs with `exclude_unexpected_values` and no partial lists or index
queries, so its results hold counts and row positions only; positions are turned into row keys
for the rejects table (which is internal, like the loader's), never for the report or logs.

Local choices are documented in docs/quality.md. "Common practice" ranges are physiological
plausibility limits, deliberately wider than any clinical reference interval.
"""
from __future__ import annotations

import copy
import html
import json
import logging
import warnings
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Mapping

import numpy as np
import pandas as pd

from cardiosieve.pipeline import contract as c
from cardiosieve.pipeline.config import Settings
from cardiosieve.pipeline.errors import BadInputError
from cardiosieve.pipeline.files import write_text_atomic
from cardiosieve.pipeline.frames import isin
from cardiosieve.pipeline.jsontext import plain
from cardiosieve.pipeline.normalise import FILE_COLUMN

log = logging.getLogger(__name__)

CRITICAL, WARNING = "critical", "warning"
REJECT, FLAG = "reject", "flag"          # what happens to a failing row
OWN, BOTH = "own", "both"                # run_quality's evaluators
SCOPE = "night"
REASON_PREFIX = "quality:"
CHECK_COLUMNS = ["check", "table", "column", "severity", "rows_checked", "rows_failed", "pct_failed",
                 "passed", "expectation", "critical_above_pct", "reason", "detail"]
FLAG_COLUMNS = ["table", "row_key", "check", "severity"]

# GE result format: counts and row positions only. COMPLETE is needed for the full list of
# failing positions; exclude_unexpected_values drops the values themselves, partial lists are
# off and no index query (which would name the rows' keys) is built.
NO_VALUES = {"result_format": "COMPLETE", "exclude_unexpected_values": True,
             "partial_unexpected_count": 0, "return_unexpected_index_query": False}
# The only result keys kept from GE: counts. Anything else (observed values, lists) is dropped.
_KEPT_RESULT_KEYS = ("element_count", "unexpected_count", "unexpected_percent", "missing_count")

# Plausible ranges (common practice, physiology; wider than reference intervals, narrower than
# the contract's impossible bounds). A value outside is possible in principle but far more often
# a measurement or unit error, so the row is kept out of screening and listed as a reject.
ECG_RANGES = {                     # column: (low, high), inclusive
    "heart_rate_bpm": (20.0, 300.0),
    "rr_ms": (200.0, 3000.0),      # 60 000 / 300 and 60 000 / 20: the heart-rate range in RR
    "pr_ms": (60.0, 500.0),
    "qrs_ms": (40.0, 250.0),
    "qt_ms": (200.0, 700.0),
}
LAB_RANGES = {                     # analyte: (low, high) in the analyte's canonical unit
    "potassium": (1.5, 10.0),      # mmol/L
    "magnesium": (0.2, 3.0),       # mmol/L
    "calcium": (1.0, 4.0),         # mmol/L, total calcium
}
# Lead amplitudes (local choice, generous; uV, 1 mm = 100 uV at standard calibration): beyond
# these a single-lead measurement is almost surely an artefact or a mis-declared unit.
LEAD_RANGES = {
    "p_amp_uv": (-1000.0, 1000.0),
    "r_amp_uv": (0.0, 7000.0),
    "s_amp_uv": (-7000.0, 0.0),
    "st_j_uv": (-2000.0, 2000.0),
    "t_amp_uv": (-3000.0, 3000.0),
}


class QualityGateError(BadInputError):
    """A critical quality check failed; the message names tables, checks and counts only."""

    def __init__(self, failures: list[str]):
        self.failures = list(failures)
        super().__init__("quality gate stopped the run: " + "; ".join(self.failures))


@dataclass(frozen=True)
class QualitySettings:
    """Tunables of the gate. `site` supplies the analyte codes, troponin assays and windows."""
    site: Settings = field(default_factory=Settings)
    critical_above_pct: float = 5.0                    # local choice, see module docstring
    # per-check override of the critical limit; None makes a check warning-only
    critical_above_pct_by_check: Mapping[str, float | None] = field(default_factory=dict)
    future_tolerance: pd.Timedelta = pd.Timedelta(minutes=15)   # clock skew between devices
    event_floor: pd.Timestamp = pd.Timestamp("1990-01-01", tz="UTC")   # local choice: older
    birth_floor: pd.Timestamp = pd.Timestamp("1900-01-01", tz="UTC")   # rows are date errors
    ecg_ranges: Mapping[str, tuple[float, float]] = field(default_factory=lambda: dict(ECG_RANGES))
    lab_ranges: Mapping[str, tuple[float, float]] = field(default_factory=lambda: dict(LAB_RANGES))
    lead_ranges: Mapping[str, tuple[float, float]] = field(default_factory=lambda: dict(LEAD_RANGES))
    # Row-count band (local choice on Iglewicz & Hoaglin's modified z-score, |z| > 3.5 is an
    # outlier; from memory): band = median +- max(3.5 / 0.6745 * MAD, min_rel * median, min_abs).
    row_count_min_nights: int = 5
    row_count_max_nights: int = 28
    row_count_z: float = 3.5
    row_count_min_rel: float = 0.25
    row_count_min_abs: float = 5.0
    # The contract's rejects of tonight's ECGs and labs follow the 5 % rule too, on tables of at
    # least this many rows (local choice; smaller nights get a warning): an export that lost
    # every patient id is rejected row by row by the contract, and must not pass as a quiet night.
    contract_rejects_min_rows: int = 20


@dataclass(frozen=True)
class Check:
    """One quality check: a GE expectation (`expectation`, `kwargs`) or a pandas computation."""
    name: str
    table: str
    column: str
    reason: str
    expectation: str                 # GE class name, or "pandas"
    kwargs: Mapping = field(default_factory=dict)
    action: str = REJECT
    critical_above_pct: float | None = 5.0


@dataclass
class QualityResult:
    clean: dict[str, pd.DataFrame]
    rejects: pd.DataFrame            # contract.REJECT_COLUMNS, reason "quality:<check>"
    checks: pd.DataFrame             # CHECK_COLUMNS, one row per check and table
    critical_failures: list[str]     # one line each: table, check, expectation, counts
    flagged: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=FLAG_COLUMNS))
    ge_results: list[dict] = field(default_factory=list)   # counts only, for audit
    rows_in: dict[str, int] = field(default_factory=dict)  # rows per checked table before the gate
    run_end: pd.Timestamp | None = None

    @property
    def passed(self) -> bool:
        return not self.critical_failures


# ---------------------------------------------------------------------------------------------
# The catalogue

def _as_settings(settings) -> QualitySettings:
    if settings is None:
        return QualitySettings()
    if isinstance(settings, QualitySettings):
        return settings
    if isinstance(settings, Settings):
        return QualitySettings(site=settings)
    if isinstance(settings, Mapping):
        return replace(QualitySettings(), **settings)
    raise TypeError("settings must be QualitySettings, pipeline.config.Settings, a dict or None")


def _only_where(column: str, values) -> dict:
    """Limit an expectation to rows whose `column` is in `values` (codes from the site config,
    never row data); turned into a GE row condition when the expectation is built."""
    return {"only_where": (column, tuple(sorted(values)))}


def build_checks(qs: QualitySettings, run_end: pd.Timestamp) -> dict[str, list[Check]]:
    """Every check by table. Bounds that depend on the run are fixed here from `run_end`."""
    E = "ExpectColumnValuesToBeBetween"
    not_after = run_end + qs.future_tolerance
    # Labs are loaded up to lab_after_h past the last ECG, so "future" starts there for them.
    lab_not_after = not_after + pd.Timedelta(hours=qs.site.windows.get("lab_after_h", 6.0))
    out: dict[str, list[Check]] = {}

    def times(table, column, upper, floor):
        return [Check(f"{table}_{column}_not_future", table, column, f"{column} after the run's end",
                      E, {"column": column, "max_value": upper}),
                Check(f"{table}_{column}_after_floor", table, column,
                      f"{column} before {floor:%Y-%m-%d}", E, {"column": column, "min_value": floor})]

    def ranges(table, spec, unit_of):
        return [Check(f"{table}_{col}_plausible", table, col,
                      f"{col} outside {lo:g}-{hi:g} {unit_of(col)}", E,
                      {"column": col, "min_value": lo, "max_value": hi})
                for col, (lo, hi) in spec.items()]

    out["ecg"] = [
        *times("ecg", "acquired_at", not_after, qs.event_floor),
        *ranges("ecg", qs.ecg_ranges, lambda col: c.ECG.column(col).unit),
        # QT runs from QRS onset to T end, so it must be longer than the QRS (common practice).
        Check("ecg_qt_longer_than_qrs", "ecg", "qt_ms,qrs_ms", "qt_ms not longer than qrs_ms",
              "ExpectColumnPairValuesAToBeGreaterThanB",
              {"column_A": "qt_ms", "column_B": "qrs_ms", "or_equal": False,
               "ignore_row_if": "either_value_is_missing"}),
        Check("ecg_standard_leads_complete", "ecg", "lead", "ECG lacks one of the 12 standard lead rows",
              "pandas", action=FLAG),
    ]
    out["ecg_lead"] = [*ranges("ecg_lead", qs.lead_ranges, lambda col: "uV")]

    codes = {name: set(v) for name, v in qs.site.analytes.items()}
    lab = []
    for name, (lo, hi) in qs.lab_ranges.items():
        if codes.get(name):
            unit = c.ANALYTE_UNITS[name][0]
            lab.append(Check(f"lab_{name}_plausible", "lab", "value", f"{name} outside {lo:g}-{hi:g} {unit}", E,
                             {"column": "value", "min_value": lo, "max_value": hi,
                              **_only_where("analyte", codes[name])}))
    lab += [
        *times("lab", "collected_at", lab_not_after, qs.event_floor),
        # resulted_at has no "future" check: on a rerun, results of labs collected inside the
        # window may legitimately post-date the run's end; its order is checked instead.
        Check("lab_resulted_not_before_collected", "lab", "resulted_at,collected_at",
              "resulted_at before collected_at", "ExpectColumnPairValuesAToBeGreaterThanB",
              {"column_A": "resulted_at", "column_B": "collected_at", "or_equal": True,
               "ignore_row_if": "either_value_is_missing"}),
    ]
    out["lab"] = lab
    out["patient"] = [*times("patient", "birth_date", not_after, qs.birth_floor)]
    out["medication"] = [*times("medication", "administered_at", not_after, qs.event_floor)]
    for checks in out.values():
        for i, chk in enumerate(checks):
            if chk.name in qs.critical_above_pct_by_check:
                checks[i] = replace(chk, critical_above_pct=qs.critical_above_pct_by_check[chk.name])
            elif chk.critical_above_pct is not None:
                checks[i] = replace(chk, critical_above_pct=qs.critical_above_pct)
    return out


def contract_rejects_check(table: str, qs: QualitySettings, rows_in: int) -> Check:
    """The contract owns ids, keys, units, lead names and impossible values (docs/quality.md);
    the gate sees how many rows it rejected, and stops a night where that is too many."""
    limit = qs.critical_above_pct if rows_in >= qs.contract_rejects_min_rows else None
    limit = qs.critical_above_pct_by_check.get(f"{table}_contract_rejects", limit)
    return Check(f"{table}_contract_rejects", table, "", "the contract rejected too many of tonight's rows: "
                 "an export or column-mapping fault", "contract", critical_above_pct=limit)


def evaluators_agree_check(table: str) -> Check:
    """Critical at the first disagreement: the rows the run acted on would not be the gate's."""
    return Check(f"{table}_evaluators_agree", table, "", "Great Expectations and the row checks disagree: "
                 "an internal fault, report it", "pandas", critical_above_pct=0.0)


def row_count_check(table: str) -> Check:
    return Check(f"{table}_row_count_in_band", table, "", "row count outside the trailing nights' band",
                 "pandas", critical_above_pct=None)


# ---------------------------------------------------------------------------------------------
# Running

def run_quality(tables: Mapping[str, pd.DataFrame], run_end, trailing_counts: Mapping[str, list] | None = None,
                settings=None, tonight_counts: Mapping[str, int] | None = None,
                lab_volume: tuple[list, float] | None = None, evaluator: str = BOTH,
                contract_rejects: Mapping[str, tuple[int, int]] | None = None) -> QualityResult:
    """Check the night's contract tables; return clean tables, rejects and the checks table.

    `tables`: contract tables after loading (ecg, ecg_lead, lab, patient; medication optional;
    other names pass through unchecked). `run_end`: tz-aware end of the run's interval, the
    "now" of the future checks (the wall clock is never read). `trailing_counts`: table ->
    row counts of the previous nights, oldest first; `tonight_counts`: table -> tonight's count
    counted the same way, when the table handed over is not one night's rows (a lab table
    loaded over its look-back window); default: the table's length. `lab_volume`: (lab rows of
    the whole lab partitions on the previous nights, tonight's): a drop far under the band is a
    missing feed. `contract_rejects`: table -> (rows read tonight, rows the contract rejected):
    the `<table>_contract_rejects` checks. Raises nothing on bad data: call `enforce`.

    `evaluator`: the row decisions always come from `own_counts`. BOTH (the gate) also has Great
    Expectations evaluate every expectation and adds, per table, the critical check
    `<table>_evaluators_agree`, failed when the two disagree on any check's rows checked or
    failing rows; OWN skips Great Expectations (its 2.5 s import included): what a run uses to
    go on with alignment while the gate's verdict is computed in another process
    (pipeline/gateworker.py), and whose row decisions equal that verdict's by construction.
    """
    if evaluator not in (OWN, BOTH):
        raise ValueError(f"evaluator must be {OWN!r} or {BOTH!r}")
    run_end = pd.Timestamp(run_end)
    if run_end.tzinfo is None:
        raise ValueError("run_end must be tz-aware (UTC)")
    run_end = run_end.tz_convert("UTC")
    qs = _as_settings(settings)
    catalogue = build_checks(qs, run_end)
    present = {name: df for name, df in tables.items() if df is not None}

    clean = dict(present)
    rows, rejects, flags, ge_results = [], [], [], []
    ctx = None
    for table, checks in catalogue.items():
        if table not in present:
            continue
        df = present[table].reset_index(drop=True)       # labels == positions for GE
        ge_checks = [chk for chk in checks if chk.expectation != "pandas"]
        _require_columns(df, table, ge_checks)
        counts = own_counts(table, df, ge_checks)
        if evaluator == BOTH and ge_checks:
            if ctx is None:
                ctx = ge_context()
            ge = _validate(ctx, table, df, ge_checks)
            ge_results.extend(kept for _, _, kept in ge.values())
            differ = _disagreements(counts, ge)
            rows.append(_check_row(evaluators_agree_check(table), len(ge_checks), len(differ),
                                   detail=f"Great Expectations and the row checks differ on: {', '.join(differ)}"
                                   if differ else f"{len(ge_checks)} checks evaluated twice, same rows"))
        failing = np.zeros(len(df), dtype=bool)
        for chk in ge_checks:
            checked, positions = counts[chk.name]
            rows.append(_check_row(chk, checked, len(positions)))
            if len(positions):
                rejects.append(_rejects(df, table, chk, positions))
                failing[positions] = True
        clean[table] = present[table].iloc[np.flatnonzero(~failing)].reset_index(drop=True)
    if "ecg" in present:
        chk = next(k for k in catalogue["ecg"] if k.name == "ecg_standard_leads_complete")
        row, flagged = _leads_complete(chk, clean["ecg"], clean.get("ecg_lead"))
        rows.append(row)
        flags.append(flagged)
    for table, counts in (trailing_counts or {}).items():
        if table in present:
            n = (tonight_counts or {}).get(table, len(present[table]))
            rows.append(_row_count(row_count_check(table), int(n), counts, qs))

    rows.extend(_feed_checks(present, tonight_counts, qs, lab_volume))
    for table, (n_in, n_rejected) in (contract_rejects or {}).items():
        # Passed while under the limit: the rejects themselves are listed, each with its reason.
        within = 100.0 * n_rejected <= qs.critical_above_pct * n_in
        rows.append(_check_row(contract_rejects_check(table, qs, n_in), n_in, n_rejected, passed=within,
                               detail=f"{n_rejected} of {n_in} rows rejected by the contract"))

    checks = pd.DataFrame(rows, columns=CHECK_COLUMNS).astype({"passed": "boolean"})
    bad = checks[checks["severity"].eq(CRITICAL) & checks["passed"].eq(False)]
    critical = [_critical_message(r) for r in bad.itertuples(index=False)]
    result = QualityResult(
        clean=clean,
        rejects=(pd.concat(rejects, ignore_index=True) if rejects else _empty_rejects()),
        checks=checks, critical_failures=critical,
        flagged=(pd.concat(flags, ignore_index=True) if flags else pd.DataFrame(columns=FLAG_COLUMNS)),
        ge_results=ge_results, run_end=run_end,
        rows_in={t: len(present[t]) for t in catalogue if t in present})
    for table, n in result.rows_in.items():
        log.info("quality: table %s: %d rows in, %d rejected", table, n, n - len(clean[table]))
    for line in critical:                  # the gate's error carries them too
        log.debug("quality: critical: %s", line)
    return result


def enforce(result: QualityResult) -> None:
    """Raise QualityGateError when any critical check failed; do nothing otherwise."""
    if result.critical_failures:
        raise QualityGateError(result.critical_failures)


def ge_context():
    import great_expectations as gx      # 2.6 s import: only when a gate actually runs
    from great_expectations.data_context.types.base import (DataContextConfig, InMemoryStoreBackendDefaults,
                                                            ProgressBarsConfig)
    # In memory, no project folder and no Data Docs site at all (the default ephemeral
    # context reserves a temporary docs folder); no analytics, no progress bars.
    config = DataContextConfig(store_backend_defaults=InMemoryStoreBackendDefaults(init_temp_docs_sites=False),
                               analytics_enabled=False, progress_bars=ProgressBarsConfig(globally=False))
    ctx = gx.get_context(mode="ephemeral", project_config=config)
    ctx.data_sources.add_pandas("cardiosieve")
    return ctx


def _expectation(chk: Check):
    import great_expectations.expectations as gxe
    from great_expectations.expectations.row_conditions import Column
    kwargs = copy.deepcopy(dict(chk.kwargs))
    if "only_where" in kwargs:
        column, values = kwargs.pop("only_where")
        kwargs["row_condition"] = Column(column).is_in(values)   # a Condition, not a query string
    return getattr(gxe, chk.expectation)(**kwargs, meta={"check": chk.name})


def _require_columns(df: pd.DataFrame, table: str, checks: list[Check]) -> None:
    need = {col for chk in checks for col in chk.column.split(",") if col}
    missing = sorted(need - set(df.columns))
    if missing:
        raise ValueError(f"quality: table {table} lacks column(s) {missing}; "
                         "structure is checked by pipeline/contract.py before this gate")


def run_suite(ctx, table: str, df: pd.DataFrame, checks: list[Check], result_format=NO_VALUES):
    """One GE validation of `df` (labels == positions) with all of the table's expectations in
    one suite. Returns GE's own validation result. Keep the default result format: any other
    lets GE copy row values into the result (the test uses SUMMARY to show exactly that)."""
    import great_expectations as gx
    asset = ctx.data_sources.get("cardiosieve").add_dataframe_asset(table)
    batch = asset.add_batch_definition_whole_dataframe(f"{table}_all")
    suite = ctx.suites.add(gx.ExpectationSuite(name=f"{table}_suite", expectations=[_expectation(k) for k in checks]))
    vd = ctx.validation_definitions.add(gx.ValidationDefinition(name=f"{table}_validation", data=batch, suite=suite))
    with warnings.catch_warnings():
        # GE reads tz-aware columns through Series.values, which pandas 3.1 deprecates; the
        # comparison itself is correct. Silenced here only, so `-W error` runs keep working.
        warnings.filterwarnings("ignore", message="Series.values returning an ndarray that drops timezone")
        return vd.run(batch_parameters={"dataframe": df}, result_format=result_format)


def _validate(ctx, table: str, df: pd.DataFrame, checks: list[Check]) -> dict:
    """check name -> (rows checked, failing positions, counts-only summary) for `df`."""
    if not checks:
        return {}
    out = {}
    for r in run_suite(ctx, table, df, checks).results:
        cfg, info = r.expectation_config, r.exception_info or {}
        name = cfg.meta["check"]
        # A crashing expectation comes back unsuccessful with no positions: never treat as a pass.
        if info.get("raised_exception") or any(isinstance(v, dict) and v.get("raised_exception")
                                               for v in info.values()):
            raise RuntimeError(f"quality: expectation {cfg.type} of check {name} on table {table} errored")
        positions = np.asarray(r.result.get("unexpected_index_list") or [], dtype=np.int64)
        checked = int(r.result.get("element_count", len(df)))
        kept = {"check": name, "table": table, "expectation": cfg.type, "success": bool(r.success),
                **{k: r.result[k] for k in _KEPT_RESULT_KEYS if k in r.result}}
        out[name] = (checked, np.unique(positions), kept)
    return out


def own_counts(table: str, df: pd.DataFrame, checks: list[Check]) -> dict:
    """check name -> (rows checked, failing positions) for `df` (labels == positions), computed
    with numpy and pyarrow: the same expectations as Great Expectations' classes of the same
    names, with their handling of missing values and row conditions. The run takes its row
    decisions from here; `run_quality(evaluator="both")` has Great Expectations evaluate the
    same checks and compares (tests/test_quality.py holds the two to each other)."""
    out = {}
    for chk in checks:
        try:
            out[chk.name] = _own_count(df, chk)
        except (TypeError, ValueError) as exc:     # e.g. naive against aware times: never a pass
            raise RuntimeError(f"quality: check {chk.name} ({chk.expectation}) on table {table} cannot be "
                               f"evaluated ({type(exc).__name__})") from None
    return out


def _own_count(df: pd.DataFrame, chk: Check) -> tuple[int, np.ndarray]:
    n = len(df)
    kw = dict(chk.kwargs)
    scope = np.ones(n, dtype=bool)
    if "only_where" in kw:
        column, values = kw.pop("only_where")
        scope = isin(df[column], values)
    e = chk.expectation
    if e == "ExpectColumnValuesToBeBetween":
        v = df[kw["column"]]
        ok = v.isna().to_numpy().copy()
        inside = np.ones(n, dtype=bool)
        if kw.get("min_value") is not None:
            inside &= (v >= kw["min_value"]).fillna(False).to_numpy(dtype=bool)
        if kw.get("max_value") is not None:
            inside &= (v <= kw["max_value"]).fillna(False).to_numpy(dtype=bool)
        bad = ~(ok | inside)
    elif e == "ExpectColumnPairValuesAToBeGreaterThanB":
        a, b = df[kw["column_A"]], df[kw["column_B"]]
        both = (a.notna() & b.notna()).to_numpy()      # ignore_row_if="either_value_is_missing":
        #                                                still counted among the rows checked
        greater = (a >= b) if kw.get("or_equal") else (a > b)
        bad = both & ~greater.fillna(False).to_numpy(dtype=bool)
    else:
        raise NotImplementedError(f"quality: no evaluator for expectation {e} (check {chk.name})")
    return int(scope.sum()), np.flatnonzero(bad & scope)


def _disagreements(own: dict, ge: dict) -> list[str]:
    """The checks whose failing rows Great Expectations and `own_counts` see differently."""
    return sorted(name for name, (checked, positions) in own.items()
                  if name not in ge or ge[name][0] != checked or not np.array_equal(ge[name][1], positions))


def _check_row(chk: Check, checked: int, failed: int, passed=None, detail: str = "") -> dict:
    pct = 100.0 * failed / checked if checked else 0.0
    limit = chk.critical_above_pct
    if limit is None:
        severity = WARNING
    elif limit == 0:
        severity = CRITICAL
    else:
        severity = CRITICAL if pct > limit else WARNING
    return {"check": chk.name, "table": chk.table, "column": chk.column, "severity": severity,
            "rows_checked": int(checked), "rows_failed": int(failed), "pct_failed": round(pct, 2),
            "passed": (failed == 0) if passed is None else passed,
            "expectation": chk.expectation, "critical_above_pct": np.nan if limit is None else float(limit),
            "reason": chk.reason, "detail": detail}


def _row_keys(df: pd.DataFrame, table: str) -> pd.Series:
    """The loader's row key: the contract key joined with "|" ("" for tables without one)."""
    key = c.TABLES[table].key if table in c.TABLES else ()
    if not key:
        return pd.Series("", index=df.index, dtype="str")
    parts = df[list(key)].astype("str").fillna("")
    return parts.iloc[:, 0].str.cat([parts[k] for k in key[1:]], sep="|") if len(key) > 1 else parts.iloc[:, 0]


def _rejects(df: pd.DataFrame, table: str, chk: Check, positions: np.ndarray) -> pd.DataFrame:
    sub = df.iloc[positions]
    file = sub[FILE_COLUMN].astype("str").fillna("") if FILE_COLUMN in sub.columns else ""
    return pd.DataFrame({"table": table, "scope": SCOPE, "row_key": _row_keys(sub, table), "file": file,
                         "column": chk.column, "reason": REASON_PREFIX + chk.name, "detail": chk.reason},
                        columns=c.REJECT_COLUMNS).astype("str").reset_index(drop=True)


def _empty_rejects() -> pd.DataFrame:
    return pd.DataFrame({name: pd.Series([], dtype="str") for name in c.REJECT_COLUMNS})


def _leads_complete(chk: Check, ecg: pd.DataFrame, leads: pd.DataFrame | None):
    """ECGs lacking at least one of the 12 standard leads among the lead rows that passed."""
    if leads is None:
        row = _check_row(chk, len(ecg), 0, passed=pd.NA, detail="not evaluable: no ecg_lead table")
        return row, pd.DataFrame(columns=FLAG_COLUMNS)
    std = leads[leads["lead"].isin(c.STANDARD_LEADS)]
    n_std = std.drop_duplicates(["ecg_id", "lead"]).groupby("ecg_id").size()
    have = ecg["ecg_id"].map(n_std).fillna(0).to_numpy()
    short = have < len(c.STANDARD_LEADS)
    row = _check_row(chk, len(ecg), int(short.sum()),
                     detail=f"{int(short.sum())} of {len(ecg)} ECGs lack a standard lead row")
    flagged = pd.DataFrame({"table": "ecg", "row_key": ecg.loc[short, "ecg_id"].astype("str").fillna("").to_numpy(),
                            "check": chk.name, "severity": row["severity"]}, columns=FLAG_COLUMNS)
    return row, flagged


def row_count_band(counts, qs: QualitySettings) -> tuple[float, float] | None:
    """(low, high) row-count band from the previous nights, or None with too few nights."""
    x = np.asarray(list(counts)[-qs.row_count_max_nights:], dtype=float)
    if len(x) < qs.row_count_min_nights:
        return None
    med = float(np.median(x))
    mad = float(np.median(np.abs(x - med)))
    half = max(qs.row_count_z / 0.6745 * mad, qs.row_count_min_rel * med, qs.row_count_min_abs)
    return max(med - half, 0.0), med + half


def _row_count(chk: Check, n: int, counts, qs: QualitySettings) -> dict:
    band = row_count_band(counts, qs)
    if band is None:
        return _check_row(chk, n, 0, passed=pd.NA,
                          detail=f"not evaluable: fewer than {qs.row_count_min_nights} previous nights")
    low, high = band
    nights = min(len(list(counts)), qs.row_count_max_nights)
    where = "drop" if n < low else "surge" if n > high else "within band"
    detail = f"{n} rows tonight; band {low:.0f}-{high:.0f} from {nights} previous nights: {where}"
    return _check_row(chk, n, 0, passed=bool(low <= n <= high), detail=detail)


def _feed_checks(present, tonight_counts, qs: QualitySettings, lab_volume=None) -> list[dict]:
    """Is a feed missing? No ECG rows tonight, or ECGs but no lab rows for their patients: a
    critical failure by default (site config [quality] missing_feed), since the screens would
    otherwise rank hyperkalaemia without any potassium and exit 0. Counts only, no values."""
    site = qs.site.quality
    limit = 0.0 if site["missing_feed"] == "critical" else None
    out = []
    if "ecg" not in present:
        return out
    n_ecg = int((tonight_counts or {}).get("ecg", len(present["ecg"])))
    chk = Check("ecg_feed_present", "ecg", "", "no ECG rows tonight: the ECG export may be missing",
                "pandas", critical_above_pct=limit)
    out.append(_check_row(chk, 1, int(n_ecg == 0), detail=f"{n_ecg} ECG rows tonight"))
    if n_ecg and "lab" in present:
        n_lab = len(present["lab"])
        lab_limit = limit if n_ecg >= site["lab_feed_min_ecgs"] else None
        chk = Check("lab_feed_present", "lab", "", "ECGs tonight but no lab rows for their patients: the lab "
                    "feed may be missing", "pandas", critical_above_pct=lab_limit)
        out.append(_check_row(chk, 1, int(n_lab == 0), detail=f"{n_lab} lab rows for the patients of {n_ecg} ECGs"))
    if lab_volume is not None:
        counts, n = lab_volume
        band = row_count_band(counts, qs)
        chk = Check("lab_feed_volume", "lab", "", "the lab partitions hold far fewer rows than on recent nights: "
                    "the lab feed may be incomplete", "pandas", critical_above_pct=limit)
        if band is None:
            out.append(_check_row(chk, 1, 0, passed=pd.NA,
                                  detail=f"not evaluable: fewer than {qs.row_count_min_nights} previous nights"))
        else:
            low = band[0]
            out.append(_check_row(chk, 1, int(n < low),
                                  detail=f"{n:.0f} lab rows tonight; at least {low:.0f} expected from recent nights"))
    return out


def _critical_message(r) -> str:
    if r.expectation == "pandas" and not r.column:
        return f"table {r.table}: check {r.check} failed: {r.reason} ({r.detail})"
    if not r.column:
        return (f"table {r.table}: check {r.check} failed: {r.reason} ({r.detail}, {r.pct_failed:.1f} %, "
                f"above the {r.critical_above_pct:g} % critical limit)")
    return (f"table {r.table}: check {r.check} ({r.expectation} on {r.column}) failed for "
            f"{r.rows_failed} of {r.rows_checked} rows ({r.pct_failed:.1f} %), "
            f"above the {r.critical_above_pct:g} % critical limit")


# ---------------------------------------------------------------------------------------------
# Report

PRIVACY_NOTE = ("This report contains counts and percentages only: no patient identifiers "
                "and no values copied from rows.")


def report_dict(result: QualityResult) -> dict:
    """The report's content: per-table totals and per-check counts. No row keys, no values."""
    tables = {}
    for name, rows_in in result.rows_in.items():
        n_rej = rows_in - len(result.clean[name])
        tables[name] = {"rows_in": rows_in, "rows_rejected": n_rej,
                        "pct_rejected": round(100.0 * n_rej / rows_in, 2) if rows_in else 0.0,
                        "rows_flagged": int(result.flagged["table"].eq(name).sum())}
    checks = plain(result.checks.to_dict("records"))
    return {"report": "cardiosieve data quality", "privacy": PRIVACY_NOTE,
            "run_end": None if result.run_end is None else result.run_end.isoformat(),
            "passed": result.passed, "critical_failures": list(result.critical_failures),
            "tables": tables, "checks": checks}


def write_report(result: QualityResult, out_dir) -> dict[str, str]:
    """Write quality.json and quality.html to out_dir; return their paths."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    data = report_dict(result)
    paths = {"json": str(out / "quality.json"), "html": str(out / "quality.html")}
    write_text_atomic(json.dumps(data, indent=2), paths["json"])
    write_text_atomic(_html(data), paths["html"])
    return paths


def _html(data: dict) -> str:
    e = html.escape
    verdict = ("All critical checks passed." if data["passed"]
               else "Critical checks failed: nothing from this run may be published.")
    parts = ["<!doctype html>", '<html lang="en"><head><meta charset="utf-8">',
             "<title>cardiosieve data quality</title>",
             "<style>body{font-family:sans-serif;margin:2em}table{border-collapse:collapse}"
             "td,th{border:1px solid #999;padding:3px 8px;text-align:left}"
             ".critical{background:#f6d5d5}.warning{background:#fbf0c9}</style></head><body>",
             "<h1>cardiosieve data quality</h1>",
             f"<p>Run interval ending {e(str(data['run_end']))}.</p>",
             f"<p><strong>{e(verdict)}</strong></p>", f"<p>{e(data['privacy'])}</p>"]
    if data["critical_failures"]:
        parts.append("<h2>Critical failures</h2><ul>")
        parts += [f"<li>{e(m)}</li>" for m in data["critical_failures"]]
        parts.append("</ul>")
    parts.append("<h2>Tables</h2><table><tr><th>table</th><th>rows in</th><th>rows rejected</th>"
                 "<th>% rejected</th><th>rows flagged</th></tr>")
    for name, t in data["tables"].items():
        parts.append(f"<tr><td>{e(name)}</td><td>{t['rows_in']}</td><td>{t['rows_rejected']}</td>"
                     f"<td>{t['pct_rejected']:.2f}</td><td>{t['rows_flagged']}</td></tr>")
    parts.append("</table><h2>Checks</h2><table><tr><th>check</th><th>table</th><th>column</th>"
                 "<th>severity</th><th>rows checked</th><th>rows failed</th><th>% failed</th>"
                 "<th>result</th><th>reason</th><th>detail</th></tr>")
    for k in data["checks"]:
        status = "not evaluable" if k["passed"] is None else "pass" if k["passed"] else "FAIL"
        cls = k["severity"] if k["passed"] is False else ""
        parts.append(f'<tr class="{cls}"><td>{e(k["check"])}</td><td>{e(k["table"])}</td>'
                     f'<td>{e(k["column"])}</td><td>{e(k["severity"])}</td><td>{k["rows_checked"]}</td>'
                     f'<td>{k["rows_failed"]}</td><td>{k["pct_failed"]:.2f}</td><td>{status}</td>'
                     f'<td>{e(k["reason"])}</td><td>{e(k["detail"])}</td></tr>')
    parts.append("</table></body></html>")
    return "\n".join(parts) + "\n"
