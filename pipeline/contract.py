"""The lake contract: every table cardiosieve reads, declared once.

Readers check structure against these declarations and later code trusts them. A column has a
kind (how it is parsed), whether it must exist, whether a row may leave it empty, its unit, and
the bounds outside which a value is impossible (not merely unusual: unusual-but-possible values
are the quality suites' business, see pipeline/quality.py).

Impossible-value bounds are deliberately wide (common practice, physiology): a QRS of 0 ms or
900 ms, a heart rate of 0, a potassium of 45 mmol/L cannot be measurements of a living patient,
so the row is rejected rather than screened. See docs/data-contract.md.
"""
from __future__ import annotations

from dataclasses import dataclass, field

# Lead names: the one place they are spelt (screens/_leads.py and the generator build on these).
LIMB_LEADS = ("I", "II", "III", "aVR", "aVL", "aVF")
PRECORDIAL_LEADS = ("V1", "V2", "V3", "V4", "V5", "V6")
RIGHT_LEADS = ("V3R", "V4R")                 # right-sided precordial
POSTERIOR_LEADS = ("V7", "V8", "V9")
STANDARD_LEADS = LIMB_LEADS + PRECORDIAL_LEADS   # the 12-lead ECG
EXTRA_LEADS = RIGHT_LEADS + POSTERIOR_LEADS
ALL_LEADS = STANDARD_LEADS + EXTRA_LEADS

# Reject reason codes: one place, used by the loader and documented in docs/data-contract.md.
WRONG_TYPE = "wrong_type"
MISSING_VALUE = "missing_value"
UNPARSEABLE_TIMESTAMP = "unparseable_timestamp"
NAIVE_TIMESTAMP = "naive_timestamp"
UNKNOWN_UNIT = "unknown_unit"
IMPOSSIBLE_VALUE = "impossible_value"
DUPLICATE_ID = "duplicate_id"
UNKNOWN_LEAD = "unknown_lead"
INVALID_TEXT = "invalid_text"          # not UTF-8, or a NUL byte (PostgreSQL refuses it in text)
OUTSIDE_PARTITION = "outside_partition"  # timed more than the table's slack outside its date= folder
BAD_PARTITION_NAME = "bad_partition_name"  # in a table subfolder not named date=YYYY-MM-DD (validate)
REJECT_REASONS = (WRONG_TYPE, MISSING_VALUE, UNPARSEABLE_TIMESTAMP, NAIVE_TIMESTAMP, UNKNOWN_UNIT,
                  IMPOSSIBLE_VALUE, DUPLICATE_ID, UNKNOWN_LEAD, INVALID_TEXT, OUTSIDE_PARTITION,
                  BAD_PARTITION_NAME)
REJECT_COLUMNS = ["table", "scope", "row_key", "file", "column", "reason", "detail"]

# Column kinds.
STRING, FLOAT, BOOL, TIMESTAMP, DATE = "string", "float", "bool", "timestamp", "date"


@dataclass(frozen=True)
class Column:
    name: str
    kind: str
    required: bool = True          # the column must exist in every file
    nullable: bool = False         # a row may leave it empty
    unit: str | None = None
    low: float | None = None       # impossible below (exclusive bound: value < low is rejected)
    high: float | None = None      # impossible above (value > high is rejected)


@dataclass(frozen=True)
class Table:
    name: str
    columns: tuple[Column, ...]
    key: tuple[str, ...]           # unique per row; duplicates are rejected
    time_column: str | None        # the UTC timestamp its date partitions follow
    optional: bool = False         # the lake may lack the whole table
    partition_slack_days: int = 1  # partitions may follow a local date: read one more day each side,
    #                                and a row may be timed this many days outside its partition
    column_names: tuple[str, ...] = field(init=False)

    def __post_init__(self):
        object.__setattr__(self, "column_names", tuple(c.name for c in self.columns))

    def column(self, name: str) -> Column:
        return next(c for c in self.columns if c.name == name)


_AMP = 20_000.0   # 20 mV: no surface ECG deflection comes near it (common practice)

ECG = Table("ecg", (
    Column("ecg_id", STRING),
    Column("patient_id", STRING),
    Column("acquired_at", TIMESTAMP),
    Column("heart_rate_bpm", FLOAT, unit="/min", low=10, high=400),
    Column("rr_ms", FLOAT, required=False, nullable=True, unit="ms", low=150, high=6000),
    Column("pr_ms", FLOAT, required=False, nullable=True, unit="ms", low=20, high=1000),
    Column("qrs_ms", FLOAT, unit="ms", low=20, high=500),
    Column("qt_ms", FLOAT, unit="ms", low=100, high=1000),
    Column("p_axis_deg", FLOAT, required=False, nullable=True, unit="deg", low=-180, high=360),
    Column("qrs_axis_deg", FLOAT, required=False, nullable=True, unit="deg", low=-180, high=360),
    Column("t_axis_deg", FLOAT, required=False, nullable=True, unit="deg", low=-180, high=360),
    Column("paced", BOOL, required=False, nullable=True),
    Column("location", STRING, required=False, nullable=True),
), key=("ecg_id",), time_column="acquired_at")

ECG_LEAD = Table("ecg_lead", (
    Column("ecg_id", STRING),
    Column("lead", STRING),
    Column("p_amp_uv", FLOAT, nullable=True, unit="uV", low=-_AMP, high=_AMP),
    Column("r_amp_uv", FLOAT, nullable=True, unit="uV", low=0, high=_AMP),
    Column("s_amp_uv", FLOAT, nullable=True, unit="uV", low=-_AMP, high=0),
    Column("st_j_uv", FLOAT, nullable=True, unit="uV", low=-_AMP, high=_AMP),
    Column("t_amp_uv", FLOAT, nullable=True, unit="uV", low=-_AMP, high=_AMP),
), key=("ecg_id", "lead"), time_column=None)

LAB = Table("lab", (
    Column("result_id", STRING),
    Column("patient_id", STRING),
    Column("collected_at", TIMESTAMP),
    Column("resulted_at", TIMESTAMP, required=False, nullable=True),
    Column("analyte", STRING),
    Column("value", FLOAT),
    Column("unit", STRING),
    Column("hemolyzed", BOOL, required=False, nullable=True),
), key=("result_id",), time_column="collected_at")

PATIENT = Table("patient", (
    Column("patient_id", STRING),
    Column("sex", STRING, nullable=True),
    Column("birth_date", DATE, nullable=True),
), key=("patient_id",), time_column=None)

MEDICATION = Table("medication", (
    Column("patient_id", STRING),
    Column("administered_at", TIMESTAMP),
    Column("drug", STRING),
), key=(), time_column="administered_at", optional=True)

TABLES = {t.name: t for t in (ECG, ECG_LEAD, LAB, PATIENT, MEDICATION)}
SEXES = ("F", "M")

# Per-analyte units, the factor to the analyte's canonical unit, and impossible bounds in it.
# Molar masses: IUPAC standard atomic weights (Mg 24.305, Ca 40.078 g/mol); 1 mg/dL = 10 mg/L,
# so mg/dL -> mmol/L divides by (molar mass / 10). meq/L -> mmol/L divides by the ion's valence
# (K+ 1, Mg2+ 2, Ca2+ 2). Troponin: 1 ng/mL = 1 ug/L = 1000 ng/L.
MG_MOLAR_MASS = 24.305
CA_MOLAR_MASS = 40.078
ANALYTE_UNITS = {
    "potassium": ("mmol/L", {"mmol/L": 1.0, "meq/L": 1.0}, (0.5, 15.0)),
    "magnesium": ("mmol/L", {"mmol/L": 1.0, "meq/L": 0.5, "mg/dL": 10.0 / MG_MOLAR_MASS}, (0.05, 10.0)),
    "calcium": ("mmol/L", {"mmol/L": 1.0, "meq/L": 0.5, "mg/dL": 10.0 / CA_MOLAR_MASS}, (0.2, 10.0)),
    "troponin": ("ng/L", {"ng/L": 1.0, "pg/mL": 1.0, "ng/mL": 1000.0, "ug/L": 1000.0}, (0.0, 1.0e6)),
}
# Units written by people rather than UCUM, accepted as their UCUM equivalents.
UNIT_ALIASES = {"mEq/L": "meq/L", "mmol/l": "mmol/L", "mg/dl": "mg/dL", "ng/l": "ng/L", "µg/L": "ug/L"}

# ECG interval and amplitude units a site may declare for its export (factor to ms / uV).
TIME_UNITS = {"ms": 1.0, "s": 1000.0}
AMPLITUDE_UNITS = {"uV": 1.0, "mV": 1000.0, "mm": 100.0}   # 10 mm/mV standard calibration
