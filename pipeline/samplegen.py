"""Invented lakes for cardiosieve: a seeded, vectorised generator of ECG, lab, patient and
medication tables in the lake layout the loader reads, with planted cases and planted bad rows.

Everything here is invented: the hospital ("Fernhallow General Infirmary"), its patients, their
ECGs and results. No row comes from or describes a real person. The same seed gives
byte-identical Parquet files (no creation times are written; the writer's version string is
the only environment-dependent metadata).

Layout written under OUT (hive partitions by the UTC date of each row's main timestamp):
    ecg/date=YYYY-MM-DD/part-0.parquet        one row per ECG (acquired_at)
    ecg_lead/date=YYYY-MM-DD/part-0.parquet   12 standard leads per ECG, a few V3R/V4R/V7-V9
    lab/date=YYYY-MM-DD/part-0.parquet        results (collected_at)
    medication/date=YYYY-MM-DD/part-0.parquet administrations (administered_at)
    patient/part-0.parquet                    one row per patient
    site.toml                                 the invented site's config
    _planted.csv                              ground truth: planted cases and planted bad rows

Normal values follow the project's sheet of published criteria (practice values: HR, PR, QRS,
QTc by Fridericia, limb and precordial T, ST at J, Sokolow-Lyon); planted abnormal values follow
the published cut points named there (UKKA-2020 potassium bands, AHA-2009-IV and AHA-2010-TDP
QTc limits, Fourth Universal Definition of MI ST cut points, Sgarbossa/Smith for LBBB).

Usage: python -m cardiosieve.pipeline.samplegen --out DIR [--patients N] [--days D] [--seed S] [--end DATE]
"""
from __future__ import annotations

import argparse
import csv
import io
import shutil
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from cardiosieve.pipeline.codes import (LOINC_CALCIUM_MASS, LOINC_CREATININE, LOINC_GLUCOSE, LOINC_HAEMOGLOBIN,
                            LOINC_MAGNESIUM_MASS, LOINC_POTASSIUM_SERUM, LOINC_SODIUM, LOINC_TROPONIN_I_HS)
from cardiosieve.pipeline.contract import EXTRA_LEADS, POSTERIOR_LEADS, RIGHT_LEADS, STANDARD_LEADS

HOSPITAL = "Fernhallow General Infirmary"      # invented; not a real place
PATIENT_PREFIX = "FGI-"
ECG_PREFIX = "FGI-E"
RESULT_PREFIX = "FGI-L"

US_PER_S = 1_000_000
US_PER_MIN = 60 * US_PER_S
US_PER_H = 60 * US_PER_MIN
US_PER_DAY = 24 * US_PER_H

PLANTED_FRACTION = 0.04      # per abnormal kind: 3-5 % of patients per kind (sample-lake design)
CONTROL_FRACTION = 0.01      # near-miss controls (kind "normal", no finding expected)

# ---------------------------------------------------------------- codes and units
# LOINC codes: pipeline/codes.py; lead names: pipeline/contract.py.

TROPONIN_URL_NG_L = 26.0      # example 99th centile written to site.toml; sites set their own

# analyte key: (LOINC, unit, normal low, mode, high, decimals); magnesium and calcium are
# exported in mg/dL on purpose so the loader's molar-mass conversion is exercised
# (Mg 1.9-2.4 mg/dL = 0.78-0.99 mmol/L; Ca 8.9-10.2 mg/dL = 2.22-2.55 mmol/L, docs/references.md).
ANALYTES = {
    "potassium": (LOINC_POTASSIUM_SERUM, "mmol/L", 3.6, 4.2, 5.0, 1),
    "sodium": (LOINC_SODIUM, "mmol/L", 135.5, 140.0, 144.4, 0),
    "creatinine": (LOINC_CREATININE, "mg/dL", 0.60, 0.85, 1.20, 2),
    "glucose": (LOINC_GLUCOSE, "mg/dL", 72.0, 95.0, 140.0, 0),
    "haemoglobin": (LOINC_HAEMOGLOBIN, "g/dL", 11.8, 13.8, 16.5, 1),
    "magnesium": (LOINC_MAGNESIUM_MASS, "mg/dL", 1.9, 2.1, 2.4, 1),
    "calcium": (LOINC_CALCIUM_MASS, "mg/dL", 8.9, 9.5, 10.2, 1),
    "troponin": (LOINC_TROPONIN_I_HS, "ng/L", 2.0, 5.0, 18.0, 0),
}
ANALYTE_KEYS = list(ANALYTES)
A = {k: i for i, k in enumerate(ANALYTE_KEYS)}
UNITS = ["mmol/L", "meq/L", "mg/dL", "g/dL", "ng/L", "mg/L"]
U = {u: i for i, u in enumerate(UNITS)}
MEQ_SHARE = 0.10              # potassium rows exported as "meq/L" (same number for K+, valence 1)

# Chance that an ECG panel / a background panel holds each analyte (potassium always in an ECG panel).
PANEL_P = {"potassium": 1.0, "sodium": 1.0, "creatinine": 0.95, "glucose": 0.6,
           "haemoglobin": 0.8, "magnesium": 0.35, "calcium": 0.35}
BACKGROUND_P = {"potassium": 0.9, "sodium": 1.0, "creatinine": 1.0, "glucose": 0.5,
                "haemoglobin": 0.9, "magnesium": 0.2, "calcium": 0.3}

BAD_LEAD = "V10"              # not a lead of the contract: the planted unknown_lead reject
LEAD_NAMES = [*STANDARD_LEADS, *EXTRA_LEADS, BAD_LEAD]
LD = {name: i for i, name in enumerate(LEAD_NAMES)}
I_, II, III, AVR, AVL, AVF, V1, V2, V3, V4, V5, V6 = range(12)
LIMB = [I_, II, III, AVR, AVL, AVF]
PRECORDIAL = [V1, V2, V3, V4, V5, V6]

# Normal per-lead ranges in uV (practice values, docs/references.md "Units of the ECG";
# limb T 100-450, precordial T 150-800, ST at J within +-40, S(V1)+R(V5) < 3000).
#            I     II    III   aVR   aVL   aVF   V1     V2     V3     V4    V5    V6
_P_LO = [30, 60, -20, -120, -30, 30, -40, 20, 30, 30, 30, 30]
_P_HI = [110, 160, 90, -40, 70, 120, 60, 90, 100, 100, 90, 80]
_R_LO = [300, 500, 100, 0, 100, 200, 100, 200, 400, 700, 700, 500]
_R_HI = [900, 1400, 700, 200, 600, 900, 400, 700, 1100, 1600, 1500, 1300]
_S_LO = [-200, -300, -400, -900, -500, -300, -1100, -1500, -1000, -600, -300, -200]
_S_HI = [0, -50, -50, -300, 0, -50, -300, -500, -300, -100, 0, 0]
_ST_LO = [-30, -30, -30, -30, -30, -30, -30, -20, -20, -30, -30, -30]
_ST_HI = [30, 30, 30, 30, 30, 30, 40, 40, 40, 30, 30, 30]
_T_LO = [120, 150, 100, -400, 100, 100, 150, 200, 250, 200, 180, 150]
_T_HI = [400, 450, 300, -100, 350, 400, 350, 750, 800, 700, 600, 450]
MEN_V2V3_ST_HI = 90           # early repolarisation in men stays below the 150-250 uV cut points

LOCATIONS = ["ED", "CCU", "Ward 4B", "Ward 7A", "AMU", "Dialysis unit", "Outpatients", "Pre-op clinic"]
LOC = {name: i for i, name in enumerate(LOCATIONS)}
_LOC_P = [0.25, 0.08, 0.15, 0.12, 0.12, 0.05, 0.15, 0.08]
CHEST_PAIN_LOCATIONS = [LOC["ED"], LOC["CCU"], LOC["AMU"]]

# Illustrative drug names only; the site's own classification lives in site.toml.
QT_DRUGS = ["amiodarone", "sotalol", "haloperidol", "ondansetron", "clarithromycin",
            "citalopram", "methadone", "domperidone"]
LOOP_DIURETICS = ["furosemide", "bumetanide", "torasemide"]
K_LOWERING = ["sodium zirconium cyclosilicate", "patiromer", "calcium polystyrene sulfonate"]
OTHER_DRUGS = ["paracetamol", "ramipril", "amlodipine", "atorvastatin", "bisoprolol", "enoxaparin",
               "metformin", "omeprazole", "amoxicillin", "aspirin", "apixaban"]
DRUGS = OTHER_DRUGS + LOOP_DIURETICS + QT_DRUGS + K_LOWERING
DR = {name: i for i, name in enumerate(DRUGS)}

ECG_SCHEMA = pa.schema([
    ("ecg_id", pa.string()), ("patient_id", pa.string()),
    ("acquired_at", pa.timestamp("us", tz="UTC")),
    ("heart_rate_bpm", pa.float64()), ("rr_ms", pa.float64()), ("pr_ms", pa.float64()),
    ("qrs_ms", pa.float64()), ("qt_ms", pa.float64()), ("p_axis_deg", pa.float64()),
    ("qrs_axis_deg", pa.float64()), ("t_axis_deg", pa.float64()), ("paced", pa.bool_()),
    ("location", pa.string()),
])
LEAD_SCHEMA = pa.schema([
    ("ecg_id", pa.string()), ("lead", pa.string()), ("p_amp_uv", pa.float64()),
    ("r_amp_uv", pa.float64()), ("s_amp_uv", pa.float64()), ("st_j_uv", pa.float64()),
    ("t_amp_uv", pa.float64()),
])
LAB_SCHEMA = pa.schema([
    ("result_id", pa.string()), ("patient_id", pa.string()),
    ("collected_at", pa.timestamp("us", tz="UTC")), ("resulted_at", pa.timestamp("us", tz="UTC")),
    ("analyte", pa.string()), ("value", pa.float64()), ("unit", pa.string()),
    ("hemolyzed", pa.bool_()),
])
PATIENT_SCHEMA = pa.schema([("patient_id", pa.string()), ("sex", pa.string()),
                            ("birth_date", pa.date32())])
MED_SCHEMA = pa.schema([("patient_id", pa.string()),
                        ("administered_at", pa.timestamp("us", tz="UTC")), ("drug", pa.string())])

TABLES = ["ecg", "ecg_lead", "lab", "patient", "medication"]
MANIFEST_COLUMNS = ["record", "kind", "patient_id", "ecg_id", "date", "detail", "expect_finding",
                    "expect_territories", "expect_tier_at_most", "table", "row_key", "reason", "column", "file"]

SITE_TOML = f'''# Site configuration of the invented sample site (cardiosieve site config format).
[site]
name = "{HOSPITAL} (invented sample site)"
# No timezone: this site's exporter writes UTC, so a timestamp without an offset is an error
# and is rejected (naive_timestamp). A site whose exporter writes local time would set e.g.
# timezone = "Europe/London" to have such timestamps converted, DST-correct.

[analytes]
potassium = ["{LOINC_POTASSIUM_SERUM}"]
magnesium = ["{LOINC_MAGNESIUM_MASS}"]
calcium = ["{LOINC_CALCIUM_MASS}"]

[[troponin]]
code = "{LOINC_TROPONIN_I_HS}"
url_ng_l = {TROPONIN_URL_NG_L}  # example value only: each site sets its own assay's 99th centile

[drugs]
# Illustrative only, not a reference list: each site supplies its own classification.
qt_prolonging = [{", ".join(f'"{d}"' for d in QT_DRUGS)}]
loop_diuretic = [{", ".join(f'"{d}"' for d in LOOP_DIURETICS)}]
k_lowering = [{", ".join(f'"{d}"' for d in K_LOWERING)}]
'''


# ---------------------------------------------------------------- planted case catalogue
@dataclass(frozen=True)
class Variant:
    """One planted pattern: `apply(builder, rows, prior_rows)` edits the index ECGs in place."""
    key: str
    kind: str
    detail: str
    expect_finding: bool
    territories: str                 # comma-joined, sorted; "" = no territory expectation
    apply: Callable
    tier_at_most: int = 4            # the finding must be at this tier or more urgent (1 most urgent)
    prior: str = "maybe"             # "yes": a prior >= 2 days before, "recent": 2-12 h before, "no", "maybe": half
    sex: str | None = None           # force "F" or "M"
    age: tuple[float, float] | None = None
    prior_detail: str | None = None  # when set, the prior ECG is a planted case too


def ecgs_per_patient(days: int) -> float:
    """Mean ECGs of a (not planted) patient in a lake of `days`: 1 + Poisson, about 2 in 30 days
    and 3.5 in a year (benchmark scale). A longer lake holds more ECGs per patient, so the
    benchmarks scale patients by this to keep one night's volume when they add history."""
    return 1.0 + _follow_on_rate(days)


def _follow_on_rate(days: int) -> float:
    return 0.9 + 1.65 * days / 365.0


class _Builder:
    """Column arrays of one invented lake while it is being built (rows addressed by position)."""

    def __init__(self, rng: np.random.Generator, patients: int, days: int, end_us: int,
                 vary_rng: np.random.Generator | None = None):
        self.rng = rng
        # A generator of its own for the ECG-to-ECG variation of one patient (make_measurements):
        # drawing it from `rng` would shift every later draw, hence every id, time and plant.
        self.vary_rng = vary_rng if vary_rng is not None else np.random.default_rng(0)
        self.n_patients = patients
        self.days = days
        self.end_us = end_us
        self.start_us = end_us - days * US_PER_DAY
        self.lab_chunks: list[dict] = []
        self.med_chunks: list[dict] = []
        self.lead_chunks: list[dict] = []
        self.bad: list[dict] = []

    def u(self, lo, hi, n):
        return self.rng.uniform(lo, hi, n)

    def ri(self, lo, hi, n):
        """Whole numbers in [lo, hi] as floats."""
        return self.rng.integers(lo, hi + 1, n).astype(np.float64)

    # ------------------------------------------------------------ patients
    def make_patients(self):
        rng, n = self.rng, self.n_patients
        r = rng.random(n)
        self.sex = np.where(r < 0.02, -1, np.where(r < 0.51, 0, 1)).astype(np.int8)  # -1 unknown, 0 F, 1 M
        age = 18.0 + 77.0 * rng.beta(2.2, 1.6, n)
        self.set_age(np.arange(n), age)
        self.qt_drug_of = rng.integers(0, len(QT_DRUGS), n)   # the one QT drug a normal patient may get

    def set_age(self, pidx, age_years):
        end_day = self.end_us // US_PER_DAY
        if not hasattr(self, "birth_day"):
            self.birth_day = np.zeros(self.n_patients, dtype=np.int32)
        self.birth_day[pidx] = (end_day - np.round(age_years * 365.25)).astype(np.int32)

    # ------------------------------------------------------------ times
    def clock(self, day, n):
        """Second-resolution times on the given day numbers; 70 % in daytime hours."""
        day_time = np.where(self.rng.random(n) < 0.7, self.u(8 * 3600, 20 * 3600, n), self.u(0, 86_399, n))
        return self.start_us + day.astype(np.int64) * US_PER_DAY + day_time.astype(np.int64) * US_PER_S

    # ------------------------------------------------------------ ECG rows
    def make_ecg_rows(self, planted_pidx, planted_variant, variants, forced_last):
        rng, days = self.rng, self.days
        normal = np.setdiff1d(np.arange(self.n_patients), planted_pidx)
        n_per = 1 + rng.poisson(_follow_on_rate(days), normal.size)
        pidx = np.repeat(normal, n_per)
        t = self.clock(rng.integers(0, days, pidx.size), pidx.size)
        order = np.lexsort((t, pidx))
        pidx, t = pidx[order], t[order]
        # A fifth of follow-on ECGs are repeats within the same encounter (1-12 h later).
        same = np.r_[False, pidx[1:] == pidx[:-1]]
        repeat = same & (rng.random(pidx.size) < 0.2)
        prev_t = np.r_[t[:1], t[:-1]]
        t_rep = prev_t + (self.u(1, 12, pidx.size) * US_PER_H).astype(np.int64) // US_PER_S * US_PER_S
        t = np.where(repeat & (t_rep < self.end_us), t_rep, t)
        n_normal = pidx.size

        # Planted patients: one index ECG (their last), and for some a prior ECG >= 2 days before.
        k = planted_pidx.size
        idx_day = rng.integers(3, days, k)
        idx_day[forced_last] = days - 1
        idx_t = self.clock(idx_day, k)
        need = np.array([variants[v].prior for v in planted_variant]) if k else np.array([], dtype=str)
        has_prior = (need == "yes") | ((need == "maybe") & (rng.random(k) < 0.5))
        latest_prior = idx_t - 2 * US_PER_DAY
        has_prior &= latest_prior > self.start_us
        prior_t = self.start_us + (rng.random(k) * (latest_prior - self.start_us)).astype(np.int64)
        # "recent": the prior ECG of the same encounter, 2-12 h earlier (an episode still going on).
        recent = need == "recent"
        prior_t = np.where(recent, idx_t - (self.u(2, 12, k) * US_PER_H).astype(np.int64), prior_t)
        has_prior |= recent
        prior_t = prior_t // US_PER_S * US_PER_S
        pp = np.flatnonzero(has_prior)

        self.e_pidx = np.concatenate([pidx, planted_pidx, planted_pidx[pp]])
        self.e_t = np.concatenate([t, idx_t, prior_t[pp]])
        self.e_role = np.concatenate([np.zeros(n_normal, np.int8), np.ones(k, np.int8), np.full(pp.size, 2, np.int8)])
        self.case_index_row = n_normal + np.arange(k)
        self.case_prior_row = np.full(k, -1, dtype=np.int64)
        self.case_prior_row[pp] = n_normal + k + np.arange(pp.size)

    def add_bad_ecg_rows(self, n):
        """Extra ECG rows (role 3) for impossible-value plants; returns their row positions."""
        normal_rows = np.flatnonzero(self.e_role == 0)
        pick = self.rng.choice(normal_rows, n, replace=False)
        first = self.e_pidx.size
        self.e_pidx = np.concatenate([self.e_pidx, self.e_pidx[pick]])
        self.e_t = np.concatenate([self.e_t, np.zeros(n, np.int64)])
        self.e_role = np.concatenate([self.e_role, np.full(n, 3, np.int8)])
        return first + np.arange(n)

    # ------------------------------------------------------------ ECG measurements
    def make_measurements(self):
        rng, n = self.rng, self.e_pidx.size
        self.af = (rng.random(n) < 0.03) & (self.e_role == 0)   # rate-controlled AF-like: no P, PR null
        self.hr = np.where(self.af, self.ri(62, 98, n), self.ri(56, 98, n))
        pr_draw = self.ri(125, 195, n)
        self.pr = np.where(self.af, np.nan, pr_draw)
        self.qrs = self.ri(82, 108, n)
        self.qtc = self.u(395, 438, n)            # Fridericia; qt_ms is derived from it at the end
        self.p_axis = np.where(self.af, np.nan, self.ri(10, 70, n))
        self.qrs_axis = self.ri(-20, 80, n)
        self.t_axis = self.ri(10, 70, n)
        self.paced = np.where(rng.random(n) < 0.08, -1, 0).astype(np.int8)   # -1 unknown
        loc = rng.choice(len(LOCATIONS), n, p=_LOC_P)
        self.loc = np.where(rng.random(n) < 0.05, -1, loc).astype(np.int8)
        self.suffix = np.full(n, "", dtype=object)  # per-row note appended to a planted case's detail

        # Lead amplitudes: a per-ECG common draw mixed with a per-lead draw keeps each ECG coherent
        # and every value inside the normal range.
        def draw(lo, hi):
            common = rng.random((n, 1))
            mix = 0.5 * common + 0.5 * rng.random((n, 12))
            return np.asarray(lo, float) + (np.asarray(hi, float) - np.asarray(lo, float)) * mix
        self.L = {"p": draw(_P_LO, _P_HI), "r": draw(_R_LO, _R_HI), "s": draw(_S_LO, _S_HI),
                  "st": rng.uniform(_ST_LO, _ST_HI, (n, 12)), "t": draw(_T_LO, _T_HI)}
        self.L["p"][self.af] = rng.uniform(-15, 15, (int(self.af.sum()), 12))
        male = self.sex[self.e_pidx] == 1
        er = np.flatnonzero(male & (rng.random(n) < 0.3))
        self.L["st"][er[:, None], [V2, V3]] = rng.uniform(20, MEN_V2V3_ST_HI, (er.size, 2))

        # One patient's ECGs are one heart recorded on different days: T, PR and QRS vary modestly
        # around the patient's first ECG (T x 0.9-1.1 per lead, PR +-10 ms, QRS +-5 ms; a local
        # choice, from memory of day-to-day variation), so two ECGs of a normal patient differ by at most ~22 % in T, 20 ms in PR and
        # 10 ms in QRS: below the hyperkalemia screen's changes against the prior ECG (T +50 %,
        # PR +40 ms, QRS +20 ms, screens/rules.toml), which independent draws over the whole
        # normal range crossed (T 100 -> 450 uV is +350 %). Planted variants set their own values
        # afterwards; every value stays inside its normal range.
        vr = self.vary_rng
        _, first, which = np.unique(self.e_pidx, return_index=True, return_inverse=True)
        base = first[which]                                  # each row's patient's first row
        t_lo, t_hi = np.minimum(_T_LO, _T_HI), np.maximum(_T_LO, _T_HI)
        self.L["t"] = np.clip(self.L["t"][base] * vr.uniform(0.9, 1.1, (n, 12)), t_lo, t_hi)
        pr_draw = np.clip(pr_draw[base] + vr.integers(-10, 11, n), 125, 195)
        self.pr = np.where(self.af, np.nan, pr_draw)
        self.qrs = np.clip(self.qrs[base] + vr.integers(-5, 6, n), 82, 108).astype(np.float64)

        # A few normal ECGs also record right-sided or posterior leads, all near the baseline.
        extra = np.flatnonzero((self.e_role == 0) & (rng.random(n) < 0.008))
        half = rng.random(extra.size) < 0.5
        right, post = extra[half], extra[~half]
        for lead in RIGHT_LEADS:
            m = right.size
            self.add_leads(right, lead, self.u(-20, 40, m), self.u(100, 300, m), self.u(-800, -300, m),
                           self.u(-20, 20, m), self.u(50, 200, m))
        for lead in POSTERIOR_LEADS:
            m = post.size
            self.add_leads(post, lead, self.u(0, 60, m), self.u(300, 700, m), self.u(-300, -100, m),
                           self.u(-20, 20, m), self.u(50, 200, m))

    def add_leads(self, rows, lead, p, r, s, st, t):
        self.lead_chunks.append({"row": np.asarray(rows, np.int64), "lead": np.full(len(rows), LD[lead], np.int8),
                                 "p": p, "r": r, "s": s, "st": st, "t": t})

    # ------------------------------------------------------------ labs
    def _panels(self, pidx, t, probs, force_all=None):
        """Rows for panels collected at `t`; returns the chunk and, per analyte, the row of each panel (-1 none)."""
        rng, n = self.rng, pidx.size
        hemo = rng.choice(np.array([0, 1, -1], np.int8), n, p=[0.85, 0.03, 0.12])
        res = t + (self.u(30, 120, n) * US_PER_MIN).astype(np.int64) // US_PER_S * US_PER_S
        cols = {"pidx": [], "t": [], "res": [], "a": [], "v": [], "unit": [], "hemo": []}
        rows_of = {}
        offset = sum(c["pidx"].size for c in self.lab_chunks)
        count = 0
        for key, p in probs.items():
            code, unit, lo, mode, hi, dec = ANALYTES[key]
            has = rng.random(n) < p
            if force_all is not None:
                has |= force_all
            sel = np.flatnonzero(has)
            m = sel.size
            cols["pidx"].append(pidx[sel])
            cols["t"].append(t[sel])
            cols["res"].append(res[sel])
            cols["a"].append(np.full(m, A[key], np.int8))
            cols["v"].append(np.round(rng.triangular(lo, mode, hi, m), dec))
            if key == "potassium":
                units = np.where(rng.random(m) < MEQ_SHARE, U["meq/L"], U["mmol/L"])
            else:
                units = np.full(m, U[unit])
            cols["unit"].append(units.astype(np.int8))
            # Haemoglobin is a whole-blood test: the haemolysis flag is not reported for it.
            cols["hemo"].append(np.full(m, -1, np.int8) if key == "haemoglobin" else hemo[sel])
            where = np.full(n, -1, np.int64)
            where[sel] = offset + count + np.arange(m)
            rows_of[key] = where
            count += m
        self.lab_chunks.append({k: np.concatenate(v) for k, v in cols.items()})
        return rows_of

    def add_lab(self, pidx, t, key, value, hemo=0, unit=None):
        n = len(pidx)
        code, default_unit, *_ = ANALYTES[key]
        t = np.asarray(t, np.int64) // US_PER_S * US_PER_S
        res = t + (self.u(30, 120, n) * US_PER_MIN).astype(np.int64) // US_PER_S * US_PER_S
        offset = sum(c["pidx"].size for c in self.lab_chunks)
        self.lab_chunks.append({
            "pidx": np.asarray(pidx, np.int64), "t": t, "res": res, "a": np.full(n, A[key], np.int8),
            "v": np.round(np.asarray(value, float), ANALYTES[key][5]),
            "unit": np.full(n, U[unit or default_unit], np.int8), "hemo": np.full(n, hemo, np.int8)})
        return offset + np.arange(n)

    def make_labs(self):
        rng, n = self.rng, self.e_pidx.size
        role = self.e_role
        # The ECG's own panel: most ECGs have one in [acquired_at - 24 h, acquired_at + 6 h].
        offset_h = np.select(
            [rng.random(n) < 0.7, rng.random(n) < 0.67],
            [self.u(-3, 1, n), self.u(-23.5, -3, n)], self.u(1, 6, n))
        # Planted ECGs: panel 15-120 min before (index) or -3..+1 h (prior) so it is the closest one.
        offset_h = np.where(role == 1, self.u(-2, -0.25, n), np.where(role == 2, self.u(-3, 1, n), offset_h))
        has = np.where(role == 0, rng.random(n) < 0.88, role != 3)
        rows = np.flatnonzero(has)
        t = self.e_t[rows] + (offset_h[rows] * US_PER_H).astype(np.int64) // US_PER_S * US_PER_S
        probs = dict(PANEL_P)
        got = self._panels(self.e_pidx[rows], t, probs, force_all=role[rows] != 0)
        self.panel = {}
        for key, where in got.items():
            full = np.full(n, -1, np.int64)
            full[rows] = where
            self.panel[key] = full

        # Chest-pain-like encounters of normal patients: two troponins below the URL.
        cp = np.flatnonzero((role == 0) & np.isin(self.loc, CHEST_PAIN_LOCATIONS) & (rng.random(n) < 0.5))
        t1 = self.e_t[cp] + (self.u(-60, 20, cp.size) * US_PER_MIN).astype(np.int64)
        t2 = t1 + (self.u(60, 180, cp.size) * US_PER_MIN).astype(np.int64)
        v1 = np.round(rng.triangular(2, 5, 18, cp.size))
        v2 = np.clip(v1 + self.ri(-3, 4, cp.size), 2, 20)
        both = np.concatenate([cp, cp])
        self.add_lab(self.e_pidx[both], np.concatenate([t1, t2]), "troponin", np.concatenate([v1, v2]))
        hemo = self.lab_chunks[-1]["hemo"]
        hemo[:] = rng.choice(np.array([0, -1], np.int8), hemo.size, p=[0.9, 0.1])

        # Background panels of normal patients (daily bloods of the same stay): lab volume.
        normal_rows = np.flatnonzero(role == 0)
        n_bg = rng.poisson(2.2, normal_rows.size)
        bg = np.repeat(normal_rows, n_bg)
        t_bg = self.e_t[bg] + (self.u(-6, 6, bg.size) * US_PER_DAY).astype(np.int64) // US_PER_S * US_PER_S
        self._panels(self.e_pidx[bg], t_bg, BACKGROUND_P)

    def finish_labs(self):
        self.lab = {k: np.concatenate([c[k] for c in self.lab_chunks]) for k in self.lab_chunks[0]}
        self.lab_chunks = [self.lab]
        self.lab_drop = np.zeros(self.lab["pidx"].size, dtype=bool)
        # Planted index panels are reported not haemolysed unless a variant says otherwise, so a
        # random flag never turns a planted high potassium into a haemolysed one.
        index_rows = np.flatnonzero(self.e_role == 1)
        for key, where in self.panel.items():
            if key != "haemoglobin":
                self.lab["hemo"][where[index_rows]] = 0

    # ------------------------------------------------------------ medication
    def add_med(self, pidx, t, drug_idx):
        pidx = np.asarray(pidx, np.int64)
        self.med_chunks.append({"pidx": pidx,
                                "t": np.asarray(t, np.int64) // US_PER_S * US_PER_S,
                                "drug": np.broadcast_to(np.asarray(drug_idx, np.int16), pidx.shape).copy()})

    def make_medication(self):
        rng = self.rng
        rows = np.flatnonzero((self.e_role == 0) & (rng.random(self.e_pidx.size) < 0.3))
        rows = np.repeat(rows, 1 + rng.poisson(0.8, rows.size))
        m = rows.size
        pidx = self.e_pidx[rows]
        t = self.e_t[rows] - (self.u(0.5, 23.5, m) * US_PER_H).astype(np.int64)
        r = rng.random(m)
        other = rng.choice([DR[d] for d in OTHER_DRUGS], m)
        loop = rng.choice([DR[d] for d in LOOP_DIURETICS], m)
        # At most one distinct QT-prolonging drug per normal patient (keeps Tisdale scores low).
        qt = np.array([DR[d] for d in QT_DRUGS])[self.qt_drug_of[pidx]]
        self.add_med(pidx, t, np.where(r < 0.80, other, np.where(r < 0.92, loop, qt)))

    # ------------------------------------------------------------ helpers for variants
    def set_k(self, rows, lo, hi, hemo=None):
        lab_rows = self.panel["potassium"][rows]
        self.lab["v"][lab_rows] = np.round(self.u(lo, hi, len(rows)), 1)
        if hemo is not None:
            self.lab["hemo"][lab_rows] = hemo

    def peaked_t(self, rows, lo=1050, hi=1500, limb=False):
        n = len(rows)
        for lead in (V2, V3, V4):
            self.L["t"][rows, lead] = self.u(lo, hi, n)
        self.L["t"][rows, V5] = self.u(800, 950, n)
        if limb:
            self.L["t"][rows, II] = self.u(620, 800, n)
            self.L["t"][rows, AVF] = self.u(620, 780, n)

    def st(self, rows, lead, lo, hi, t_cap=None):
        """Set ST at J in `lead`; with t_cap, T follows an elevated ST upward (no higher than t_cap)."""
        n = len(rows)
        v = self.u(lo, hi, n)
        self.L["st"][rows, lead] = v
        if t_cap is not None:
            self.L["t"][rows, lead] = np.minimum(np.maximum(self.L["t"][rows, lead], v + self.u(100, 250, n)), t_cap)
        return v

    def lead(self, rows, lead, **ranges):
        for col, (lo, hi) in ranges.items():
            self.L[col][rows, lead] = self.u(lo, hi, len(rows))

    def troponin_series(self, rows, rising_share=0.5):
        """Half rising (first above the URL, second 2-5x higher 90-180 min later), half one normal value."""
        n = len(rows)
        rise = self.rng.random(n) < rising_share
        rr = rows[rise]
        t1 = self.e_t[rr] + (self.u(-40, 20, rr.size) * US_PER_MIN).astype(np.int64)
        t2 = t1 + (self.u(90, 180, rr.size) * US_PER_MIN).astype(np.int64)
        v1 = self.u(30, 200, rr.size)
        self.add_lab(self.e_pidx[np.r_[rr, rr]], np.r_[t1, t2], "troponin", np.r_[v1, v1 * self.u(2, 5, rr.size)])
        self.suffix[rr] = "; troponin rising"
        nr = rows[~rise]
        self.add_lab(self.e_pidx[nr], self.e_t[nr] + (self.u(-40, 20, nr.size) * US_PER_MIN).astype(np.int64),
                     "troponin", self.u(3, 15, nr.size))


# ---------------------------------------------------------------- variant edits
# Each takes the builder, the index ECG rows and the prior ECG rows (-1 where none).
# Hyperkalemia: UKKA-2020 bands 5.5-5.9 / 6.0-6.4 / >= 6.5 mmol/L; ECG signs in textbook order:
# peaked T (precordial >= 1000 uV), PR > 200 ms and flat P, QRS >= 120 ms, bradycardia.

def _hk_signs(b, rows, brady=True):
    n = len(rows)
    b.peaked_t(rows, limb=True)
    b.qrs[rows] = b.ri(124, 160, n)
    b.pr[rows] = b.ri(212, 260, n)
    b.L["p"][rows, II] = b.u(0, 20, n)
    if brady:
        b.hr[rows] = b.ri(40, 49, n)
    b.loc[rows] = LOC["ED"]


def hk_severe_signs(b, rows, prior):
    b.set_k(rows, 6.5, 7.8)
    _hk_signs(b, rows, brady=False)


def hk_moderate_peaked(b, rows, prior):
    b.set_k(rows, 6.0, 6.44)
    b.peaked_t(rows)


def hk_mild_normal(b, rows, prior):
    b.set_k(rows, 5.52, 5.94)


def hk_moderate_normal(b, rows, prior):
    b.set_k(rows, 6.0, 6.44)


def hk_severe_brady(b, rows, prior):
    n = len(rows)
    b.set_k(rows, 6.5, 7.5)
    b.hr[rows] = b.ri(38, 48, n)
    b.pr[rows] = np.nan                      # no visible P: junctional escape
    b.p_axis[rows] = np.nan
    b.L["p"][rows] = b.rng.uniform(0, 15, (n, 12))
    b.qrs[rows] = b.ri(112, 132, n)
    b.loc[rows] = LOC["Dialysis unit"]


def hk_qrs_vs_prior(b, rows, prior):
    n = len(rows)
    b.set_k(rows, 6.0, 6.6)
    b.qrs[prior] = b.ri(86, 94, n)
    b.qrs[rows] = b.qrs[prior] + b.ri(22, 30, n)


def hk_haemolysed(b, rows, prior):
    b.set_k(rows, 5.6, 7.0, hemo=1)


def hk_no_k_none(b, rows, prior):
    _hk_signs(b, rows)
    b.lab_drop[b.panel["potassium"][rows]] = True


def hk_no_k_late(b, rows, prior):
    _hk_signs(b, rows)
    k = b.panel["potassium"][rows]
    late = b.e_t[rows] + (b.u(8, 14, len(rows)) * US_PER_H).astype(np.int64) // US_PER_S * US_PER_S
    b.lab["t"][k] = late
    b.lab["res"][k] = late + 45 * US_PER_MIN
    b.lab["v"][k] = np.round(b.u(6.6, 7.4, len(rows)), 1)
    b.suffix[rows] = "; a potassium 8-14 h after the ECG, outside the window"


def hk_rising(b, rows, prior):
    n = len(rows)
    b.set_k(rows, 5.6, 6.2)
    b.add_lab(b.e_pidx[rows], b.e_t[rows] - (b.u(30, 48, n) * US_PER_H).astype(np.int64),
              "potassium", b.u(4.6, 5.0, n))


def hk_binder(b, rows, prior):
    n = len(rows)
    b.set_k(rows, 6.0, 6.6)
    b.peaked_t(rows)
    b.add_med(b.e_pidx[rows], b.e_t[rows] - (b.u(3, 12, n) * US_PER_H).astype(np.int64),
              b.rng.choice([DR[d] for d in K_LOWERING], n))


# Long QT: AHA-2009-IV limits (>= 450 ms men, >= 460 ms women), AHA-2010-TDP (> 500 ms, rise > 60 ms);
# Tisdale-2013 factors (woman, >= 68 y, QT drugs, loop diuretic, low K).

def lq_moderate(b, rows, prior):
    b.qtc[rows] = b.u(468, 495, len(rows))


def lq_high(b, rows, prior):
    b.qtc[rows] = b.u(510, 570, len(rows))


def lq_low_k(b, rows, prior):
    b.qtc[rows] = b.u(470, 520, len(rows))
    b.set_k(rows, 2.8, 3.34)


def lq_low_mg(b, rows, prior):
    b.qtc[rows] = b.u(470, 520, len(rows))
    # 1.1-1.6 mg/dL = 0.45-0.66 mmol/L (/ 2.4305), below 0.70 mmol/L.
    b.lab["v"][b.panel["magnesium"][rows]] = np.round(b.u(1.1, 1.6, len(rows)), 1)


def lq_rise(b, rows, prior):
    n = len(rows)
    b.qtc[prior] = b.u(395, 415, n)
    b.qtc[rows] = np.maximum(b.qtc[prior] + b.u(65, 90, n), 468)


def lq_drug_woman(b, rows, prior):
    n = len(rows)
    b.qtc[rows] = b.u(468, 500, n)
    b.loc[rows] = LOC["Ward 7A"]
    pidx = b.e_pidx[rows]
    first = b.rng.integers(0, len(QT_DRUGS), n)
    second = (first + b.rng.integers(1, len(QT_DRUGS), n)) % len(QT_DRUGS)
    qt = np.array([DR[d] for d in QT_DRUGS])
    b.add_med(pidx, b.e_t[rows] - (b.u(2, 20, n) * US_PER_H).astype(np.int64), qt[first])
    two = np.arange(n) % 2 == 1              # every other case: two distinct drugs (Tisdale 6 points)
    b.add_med(pidx[two], b.e_t[rows][two] - (b.u(2, 20, two.sum()) * US_PER_H).astype(np.int64), qt[second][two])
    b.suffix[rows[two]] = "; two QT-prolonging drugs"
    loop = b.rng.random(n) < 0.5
    b.add_med(pidx[loop], b.e_t[rows][loop] - (b.u(2, 20, loop.sum()) * US_PER_H).astype(np.int64),
              DR["furosemide"])


def lq_man_boundary(b, rows, prior):
    b.qtc[rows] = b.u(452, 458, len(rows))


# ST deviation: Fourth Universal Definition of MI (Thygesen 2018) cut points; V2-V3 values are
# >= 260 uV so they meet every sex/age variant of the V2-V3 rule; V3R/V4R and V7-V9 >= 100 uV.

def _inferior(b, rows, recip=True):
    n = len(rows)
    b.st(rows, II, 150, 300, t_cap=550)
    b.st(rows, III, 180, 350, t_cap=550)
    b.st(rows, AVF, 160, 320, t_cap=550)
    for lead in (II, III, AVF):
        b.L["r"][rows, lead] = np.maximum(b.L["r"][rows, lead], 300)
    if recip:
        b.st(rows, AVL, -250, -100)
        b.st(rows, I_, -120, -40)
        b.L["t"][rows, AVL] = b.u(-250, -120, n)
    b.loc[rows] = LOC["ED"]


def st_inferior(b, rows, prior):
    _inferior(b, rows)
    b.troponin_series(rows)


def _anterior(b, rows):
    b.st(rows, V1, 100, 200, t_cap=800)
    b.st(rows, V2, 260, 450, t_cap=800)
    b.st(rows, V3, 260, 450, t_cap=800)
    b.st(rows, V4, 150, 300, t_cap=800)
    n = len(rows)
    b.L["r"][rows, V1] = b.u(0, 80, n)
    b.L["r"][rows, V2] = b.u(50, 200, n)
    b.L["r"][rows, V3] = b.u(100, 300, n)


def st_anterior(b, rows, prior):
    _anterior(b, rows)
    recip = rows[b.rng.random(len(rows)) < 0.5]
    for lead in (II, III, AVF):
        b.st(recip, lead, -100, -50)
    b.loc[rows] = LOC["ED"]
    b.troponin_series(rows)


def _lateral(b, rows):
    b.st(rows, I_, 100, 200, t_cap=550)
    b.st(rows, AVL, 120, 250, t_cap=550)
    b.st(rows, V5, 100, 220, t_cap=800)
    b.st(rows, V6, 100, 200, t_cap=800)


def st_lateral(b, rows, prior):
    _lateral(b, rows)
    b.st(rows, III, -200, -80)
    b.st(rows, AVF, -120, -50)
    b.L["t"][rows, III] = b.u(-200, -100, len(rows))
    b.loc[rows] = LOC["CCU"]
    b.troponin_series(rows)


def st_inferolateral(b, rows, prior):
    _inferior(b, rows, recip=False)
    b.st(rows, AVL, -120, -60)
    b.st(rows, V5, 110, 200, t_cap=800)
    b.st(rows, V6, 110, 200, t_cap=800)
    b.troponin_series(rows)


def st_posterior(b, rows, prior):
    n = len(rows)
    b.lead(rows, V1, r=(600, 900), s=(-300, -100), st=(-200, -100), t=(200, 450))
    b.lead(rows, V2, r=(900, 1300), s=(-400, -200), st=(-220, -120), t=(300, 600))
    b.lead(rows, V3, r=(900, 1400), s=(-500, -200), st=(-160, -80), t=(300, 600))
    back = rows[b.rng.random(n) < 0.5]
    m = back.size
    for lead in POSTERIOR_LEADS:
        b.add_leads(back, lead, b.u(0, 60, m), b.u(300, 600, m), b.u(-200, -100, m),
                    b.u(110, 180, m), b.u(100, 250, m))
    b.suffix[back] = "; V7-V9 recorded with elevation"
    b.loc[rows] = LOC["ED"]
    b.troponin_series(rows)


def st_right_ventricular(b, rows, prior):
    _inferior(b, rows)
    m = len(rows)
    for lead in RIGHT_LEADS:
        b.add_leads(rows, lead, b.u(-20, 40, m), b.u(100, 250, m), b.u(-700, -300, m),
                    b.u(100, 160, m), b.u(100, 250, m))
    b.troponin_series(rows)


def st_avr(b, rows, prior):
    b.st(rows, AVR, 100, 180)
    for lead in (I_, II, AVF, V4, V5, V6):
        b.st(rows, lead, -200, -100)
    for lead in (III, AVL):
        b.st(rows, lead, -80, -40)
    for lead in (V2, V3):
        b.st(rows, lead, -100, -50)
    b.st(rows, V1, 40, 80)
    b.loc[rows] = LOC["ED"]
    b.troponin_series(rows)


def st_pericarditis(b, rows, prior):
    n = len(rows)
    for lead in (I_, II, AVF, V2, V3, V4, V5, V6):
        b.st(rows, lead, 100, 180, t_cap=550 if lead in LIMB else 800)
    b.st(rows, III, 0, 60)
    b.st(rows, AVL, 0, 60)
    b.st(rows, AVR, -100, -50)               # the only depression: aVR and V1 (pericarditis pattern)
    b.st(rows, V1, -40, 0)
    b.hr[rows] = b.ri(85, 99, n)
    b.loc[rows] = LOC["AMU"]
    b.add_lab(b.e_pidx[rows], b.e_t[rows] - 30 * US_PER_MIN, "troponin", b.u(3, 15, n))


def _lbbb(b, rows, concordant):
    n = len(rows)
    b.qrs[rows] = b.ri(140, 170, n)
    b.qrs_axis[rows] = b.ri(-30, 10, n)
    b.qtc[rows] = b.u(425, 440, n)
    b.paced[rows] = 0
    for lead, r, s, t in ((V1, (50, 150), (-1900, -1400), (200, 450)),
                          (V2, (80, 200), (-2200, -1600), (250, 500)),
                          (V3, (150, 300), (-1800, -1200), (200, 450))):
        b.lead(rows, lead, r=r, s=s, t=t)
        # Discordant ST: 8-16 % of the S depth, so ST/S stays above -0.25 (Smith 2012) and
        # below 500 uV (Sgarbossa 1996 discordant criterion), yet >= 100 uV in V1-V3.
        b.L["st"][rows, lead] = np.round(-b.L["s"][rows, lead] * b.u(0.08, 0.16, n))
    b.lead(rows, V4, r=(400, 800), s=(-1000, -600), st=(20, 80), t=(100, 300))
    b.lead(rows, AVR, r=(0, 100), s=(-900, -600), st=(20, 60), t=(50, 150))
    for lead, r in ((I_, (700, 1100)), (AVL, (600, 1000)), (V5, (1000, 1400)), (V6, (900, 1300))):
        b.lead(rows, lead, r=r, s=(-50, 0))
        if concordant:
            b.st(rows, lead, 120, 250, t_cap=550 if lead in LIMB else 800)
        else:
            b.lead(rows, lead, st=(-120, -50), t=(-300, -150))
    b.loc[rows] = LOC["ED"]


def st_lbbb_discordant(b, rows, prior):
    _lbbb(b, rows, concordant=False)


def st_lbbb_concordant(b, rows, prior):
    _lbbb(b, rows, concordant=True)
    b.troponin_series(rows)


def st_persistent(b, rows, prior):
    for r in (prior, rows):
        b.st(r, V1, 120, 200, t_cap=700)
        b.st(r, V2, 260, 340, t_cap=700)
        b.st(r, V3, 260, 340, t_cap=700)
        b.st(r, V4, 150, 250, t_cap=700)
        b.L["r"][r, V1] = b.u(0, 60, len(r))
        b.L["r"][r, V2] = b.u(0, 80, len(r))
        b.L["r"][r, V3] = b.u(50, 150, len(r))
    b.add_lab(b.e_pidx[rows], b.e_t[rows] - 20 * US_PER_MIN, "troponin", b.u(3, 15, len(rows)))


def st_wraparound(b, rows, prior):
    # Anterior elevation wrapping round the apex to the inferior leads (a long LAD), no
    # reciprocal depression anywhere: still ST elevation with its territories (UDMI-2018).
    _anterior(b, rows)
    b.st(rows, V5, 110, 200, t_cap=800)
    b.st(rows, V6, 100, 180, t_cap=800)
    for lead in (II, III, AVF):
        b.st(rows, lead, 110, 190, t_cap=550)
    b.st(rows, AVR, -80, -20)
    b.loc[rows] = LOC["ED"]
    b.troponin_series(rows)


def st_posterior_no_tall_r(b, rows, prior):
    # V1-V3 depression with the normal S-dominant V1-V2: posterior-equivalent all the same.
    b.lead(rows, V1, st=(-180, -80), t=(50, 200))
    b.lead(rows, V2, st=(-220, -100), t=(100, 300))
    b.lead(rows, V3, st=(-150, -60), t=(100, 300))
    b.loc[rows] = LOC["ED"]
    b.troponin_series(rows)


def st_depression_alone(b, rows, prior):
    # Anterolateral ST depression (V3-V6) without elevation anywhere [UDMI-2018 >= 0.5 mm].
    for lead, lo, hi in ((V3, -120, -60), (V4, -160, -70), (V5, -160, -70), (V6, -120, -60)):
        b.st(rows, lead, lo, hi)
    b.loc[rows] = LOC["AMU"]
    b.troponin_series(rows)


def st_inferior_lvh(b, rows, prior):
    # Inferior elevation with LVH voltage: LVH does not explain inferior elevation.
    _inferior(b, rows, recip=False)
    n = len(rows)
    b.L["s"][rows, V1] = b.u(-2600, -2200, n)
    b.L["r"][rows, V5] = np.maximum(b.L["r"][rows, V5], b.u(1500, 1900, n))
    b.loc[rows] = LOC["ED"]
    b.troponin_series(rows)


def st_persistent_recent(b, rows, prior):
    # The same inferior elevation on an ECG of the same encounter hours earlier: persistent.
    for r in (prior, rows):
        _inferior(b, r, recip=False)


def st_lbbb_smith(b, rows, prior):
    # LBBB with excessively discordant ST in V2-V3: ST/S <= -0.25 (Smith 2012), Sgarbossa < 3.
    _lbbb(b, rows, concordant=False)
    n = len(rows)
    for lead in (V2, V3):
        b.L["st"][rows, lead] = np.round(-b.L["s"][rows, lead] * b.u(0.27, 0.32, n))
    b.troponin_series(rows)


def hk_haemolysed_severe(b, rows, prior):
    # A severe potassium on a haemolysed specimen: unreliable, not reassuring (UKKA-2020 repeat).
    b.set_k(rows, 6.6, 7.4, hemo=1)


# Near-miss controls: just outside each published cut point; no finding expected.

def c_k_below(b, rows, prior):
    b.set_k(rows, 5.1, 5.44)


def c_woman_qtc(b, rows, prior):
    b.qtc[rows] = b.u(451, 457, len(rows))


def c_v2v3_man(b, rows, prior):
    b.st(rows, V2, 140, 180)
    b.st(rows, V3, 140, 180)
    b.st(rows, V1, -10, 30)
    b.st(rows, V4, -10, 30)


def c_single_lead(b, rows, prior):
    b.st(rows, III, 120, 180, t_cap=450)
    b.st(rows, II, -10, 30)
    b.st(rows, AVF, -10, 30)


def c_trop_only(b, rows, prior):
    n = len(rows)
    v = b.u(40, 90, n)
    b.add_lab(b.e_pidx[np.r_[rows, rows]],
              np.r_[b.e_t[rows] - 20 * US_PER_MIN, b.e_t[rows] + 100 * US_PER_MIN],
              "troponin", np.r_[v, v + b.u(-3, 3, n)])


def c_haemolysed_normal(b, rows, prior):
    b.set_k(rows, 4.6, 5.2, hemo=1)


VARIANTS: dict[str, list[Variant]] = {
    "hyperkalemia": [
        Variant("hk_severe_signs", "hyperkalemia", "K >= 6.5 with peaked T, wide QRS, PR > 200 and flat P in II",
                True, "", hk_severe_signs, tier_at_most=1),
        Variant("hk_moderate_peaked", "hyperkalemia", "K 6.0-6.4 with peaked precordial T", True, "", hk_moderate_peaked, tier_at_most=1),
        Variant("hk_mild_normal", "hyperkalemia", "K 5.5-5.9 with a normal ECG", True, "", hk_mild_normal, tier_at_most=4),
        Variant("hk_moderate_normal", "hyperkalemia", "K 6.0-6.4 with a normal ECG", True, "", hk_moderate_normal, tier_at_most=3),
        Variant("hk_severe_brady", "hyperkalemia", "K >= 6.5 with heart rate < 50 and no visible P",
                True, "", hk_severe_brady, tier_at_most=1),
        Variant("hk_qrs_vs_prior", "hyperkalemia", "K 6.0-6.6 with QRS widened >= 20 ms vs prior",
                True, "", hk_qrs_vs_prior, prior="yes", tier_at_most=1),
        Variant("hk_haemolysed", "hyperkalemia", "haemolysed specimen, K 5.6-7.0, normal ECG",
                True, "", hk_haemolysed, tier_at_most=4),
        Variant("hk_no_k_none", "hyperkalemia", "peaked T, wide QRS and bradycardia; no potassium in window",
                True, "", hk_no_k_none, prior="no", tier_at_most=3),
        Variant("hk_no_k_late", "hyperkalemia", "peaked T, wide QRS and bradycardia; no potassium in window",
                True, "", hk_no_k_late, prior="no", tier_at_most=3),
        Variant("hk_rising", "hyperkalemia", "K 5.6-6.2 risen from 4.6-5.0 30-48 h earlier",
                True, "", hk_rising, prior="no", tier_at_most=4),
        Variant("hk_binder", "hyperkalemia", "K 6.0-6.6 with peaked T after a potassium binder",
                True, "", hk_binder, tier_at_most=1),
        Variant("hk_haemolysed_severe", "hyperkalemia", "haemolysed specimen, K 6.6-7.4, normal ECG",
                True, "", hk_haemolysed_severe, tier_at_most=2),
    ],
    "long_qt": [
        Variant("lq_moderate", "long_qt", "QTc 468-495 ms", True, "", lq_moderate, tier_at_most=3),
        Variant("lq_high", "long_qt", "QTc above 500 ms", True, "", lq_high, tier_at_most=1),
        Variant("lq_low_k", "long_qt", "QTc 470-520 ms with K < 3.5 mmol/L", True, "", lq_low_k, tier_at_most=2),
        Variant("lq_low_mg", "long_qt", "QTc 470-520 ms with Mg < 0.70 mmol/L", True, "", lq_low_mg, tier_at_most=2),
        Variant("lq_rise", "long_qt", "QTc rise > 60 ms vs prior ECG", True, "", lq_rise, prior="yes", tier_at_most=2),
        Variant("lq_drug_woman", "long_qt", "woman >= 68 y, QTc 468-500 ms, QT-prolonging drug in 24 h",
                True, "", lq_drug_woman, sex="F", age=(70, 90), tier_at_most=2),
        Variant("lq_man_boundary", "long_qt", "man, QTc 452-458 ms (at or above the male limit)",
                True, "", lq_man_boundary, sex="M", tier_at_most=3),
    ],
    "st_deviation": [
        Variant("st_inferior", "st_deviation", "inferior with reciprocal aVL", True, "inferior", st_inferior, tier_at_most=1),
        Variant("st_anterior", "st_deviation", "anterior V1-V4", True, "anterior", st_anterior, tier_at_most=1),
        Variant("st_lateral", "st_deviation", "lateral with reciprocal III/aVF", True, "lateral", st_lateral, tier_at_most=1),
        Variant("st_inferolateral", "st_deviation", "inferior and lateral V5-V6", True, "inferior,lateral",
                st_inferolateral, tier_at_most=1),
        Variant("st_posterior", "st_deviation", "posterior: ST depression V1-V3 with dominant R", True,
                "posterior", st_posterior, tier_at_most=2),
        Variant("st_right_ventricular", "st_deviation", "inferior with V3R/V4R elevation", True,
                "inferior,right_ventricular", st_right_ventricular, tier_at_most=1),
        Variant("st_avr", "st_deviation", "avr pattern: aVR elevation with widespread depression", True, "", st_avr, tier_at_most=2),
        Variant("st_pericarditis", "st_deviation", "pericarditis-like diffuse elevation without reciprocal depression",
                True, "anterior,inferior,lateral", st_pericarditis, tier_at_most=2),
        Variant("st_lbbb_discordant", "st_deviation", "lbbb with discordant ST only (Sgarbossa-negative)",
                False, "", st_lbbb_discordant),
        Variant("st_lbbb_concordant", "st_deviation", "lbbb with concordant lateral elevation (Sgarbossa-positive)",
                True, "lateral", st_lbbb_concordant, tier_at_most=1),
        Variant("st_persistent", "st_deviation", "anterior elevation already on the prior ECG", True, "anterior",
                st_persistent, prior="yes", prior_detail="prior ECG of a persistent anterior elevation", tier_at_most=2),
        Variant("st_wraparound", "st_deviation", "wrap-around anterior elevation V1-V6 with inferior leads, no reciprocal",
                True, "anterior,inferior,lateral,septal", st_wraparound, tier_at_most=2),
        Variant("st_posterior_no_tall_r", "st_deviation", "posterior: ST depression V1-V3 without dominant R",
                True, "posterior", st_posterior_no_tall_r, tier_at_most=2),
        Variant("st_depression_alone", "st_deviation", "ST depression V3-V6 without elevation", True, "",
                st_depression_alone, tier_at_most=3),
        Variant("st_inferior_lvh", "st_deviation", "inferior elevation with LVH voltage", True, "inferior",
                st_inferior_lvh, tier_at_most=2),
        Variant("st_persistent_recent", "st_deviation", "inferior elevation also on an ECG 2-12 h earlier", True,
                "inferior", st_persistent_recent, tier_at_most=1, prior="recent",
                prior_detail="earlier ECG of a persistent inferior elevation"),
        Variant("st_lbbb_smith", "st_deviation", "lbbb with excessively discordant ST in V2-V3 (Smith-modified positive)",
                True, "anterior,septal", st_lbbb_smith, tier_at_most=1),
    ],
    "normal": [
        Variant("c_k_below", "normal", "K 5.1-5.4, below the 5.5 band", False, "", c_k_below),
        Variant("c_woman_qtc", "normal", "woman, QTc 451-457 ms (below the female limit)", False, "",
                c_woman_qtc, sex="F"),
        Variant("c_v2v3_man", "normal", "man >= 40 y, ST 140-180 uV in V2-V3 (below 200)", False, "",
                c_v2v3_man, sex="M", age=(45, 75)),
        Variant("c_single_lead", "normal", "ST elevation in III only (no contiguous lead)", False, "", c_single_lead),
        Variant("c_trop_only", "normal", "troponin above the URL with a normal ECG", False, "", c_trop_only),
        Variant("c_haemolysed_normal", "normal", "haemolysed specimen with K 4.6-5.2", False, "",
                c_haemolysed_normal),
    ],
}
KINDS = list(VARIANTS)


# ---------------------------------------------------------------- writing
def _ids(prefix: str, n: int, width: int) -> pa.Array:
    digits = pc.utf8_lpad(pc.cast(pa.array(np.arange(1, n + 1, dtype=np.int64)), pa.string()),
                          width=width, padding="0")
    return pc.binary_join_element_wise(prefix, digits, "")


def _take(values: list[str], idx: np.ndarray, null: np.ndarray | None = None) -> pa.Array:
    arr = pc.take(pa.array(values, pa.string()), pa.array(np.where(idx < 0, 0, idx).astype(np.int64)))
    if null is not None and null.any():
        arr = pc.if_else(pa.array(null), pa.scalar(None, pa.string()), arr)
    return arr


def _f(x: np.ndarray) -> pa.Array:
    """float64 column; NaN becomes null; -0.0 becomes 0.0."""
    x = np.asarray(x, np.float64) + 0.0
    return pa.array(x, pa.float64(), mask=np.isnan(x))


def _ts(x: np.ndarray, tz: str | None = "UTC") -> pa.Array:
    return pa.array(np.asarray(x, np.int64), pa.timestamp("us", tz=tz))


def _bool(code: np.ndarray) -> pa.Array:
    code = np.asarray(code)
    return pa.array(code == 1, pa.bool_(), mask=code < 0)


def _write(table: pa.Table, path: Path) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    pq.write_table(table, path, compression="zstd", use_dictionary=True, write_statistics=True)


def _write_partitions(table: pa.Table, day: np.ndarray, out: Path, name: str) -> dict:
    """Write `table` (sorted by day) as out/name/date=YYYY-MM-DD/part-0.parquet; returns {date: offset range}."""
    days, first = np.unique(day, return_index=True)
    bounds = np.r_[first, day.size]
    written = {}
    for d, lo, hi in zip(days, bounds[:-1], bounds[1:]):
        date = str(np.datetime64(int(d), "D"))
        _write(table.slice(int(lo), int(hi - lo)), out / name / f"date={date}" / "part-0.parquet")
        written[date] = (int(lo), int(hi))
    return written


def _date(t_us: int) -> str:
    return str(np.datetime64(int(t_us) // US_PER_DAY, "D"))


def _clear(out: Path) -> None:
    """Remove only what a previous generation wrote (table folders, site.toml, _planted.csv)."""
    for name in TABLES:
        if (out / name).is_dir():
            shutil.rmtree(out / name)
    for name in ("site.toml", "_planted.csv"):
        if (out / name).exists():
            (out / name).unlink()


# ---------------------------------------------------------------- the generator
def generate(out_dir, patients: int = 2000, days: int = 30, end: str = "2026-11-30", seed: int = 20261130,
             plant_bad_rows: bool = True, write_manifest: bool = True) -> dict:
    """Write an invented lake to `out_dir` and return row counts per table (plus planted counts).

    The lake covers [end - days, end) UTC. Same arguments give byte-identical files. Files of an
    earlier generation in `out_dir` are replaced; other files (e.g. README.md) are left alone.
    """
    if patients < 10:
        raise ValueError("patients must be at least 10")
    if days < 4:
        raise ValueError("days must be at least 4 (planted prior ECGs need room)")
    out = Path(out_dir)
    rng = np.random.default_rng(seed)
    end_us = int(np.datetime64(str(end)[:10], "D").astype("datetime64[us]").astype(np.int64))
    b = _Builder(rng, patients, days, end_us, vary_rng=np.random.default_rng([seed, 1]))
    b.make_patients()

    # ------------------------------------------------------------ who is planted with what
    variants = [v for kind in KINDS for v in VARIANTS[kind]]
    vindex = {v.key: i for i, v in enumerate(variants)}
    perm = rng.permutation(patients)
    per_kind = {k: max(1, int(round((CONTROL_FRACTION if k == "normal" else PLANTED_FRACTION) * patients)))
                for k in KINDS}
    planted_pidx, planted_variant, forced_last = [], [], []
    pos = 0
    for kind in KINDS:
        n = per_kind[kind]
        nv = len(VARIANTS[kind])
        planted_pidx.append(perm[pos:pos + n])
        planted_variant.append(np.array([vindex[VARIANTS[kind][i % nv].key] for i in range(n)], dtype=np.int64))
        forced_last.append(np.arange(n) < nv)        # the first case of each variant: on the last night
        pos += n
    planted_pidx = np.concatenate(planted_pidx)
    planted_variant = np.concatenate(planted_variant)
    forced_last = np.concatenate(forced_last)
    for i, v in enumerate(variants):
        who = planted_pidx[planted_variant == i]
        if v.sex is not None:
            b.sex[who] = 0 if v.sex == "F" else 1
        if v.age is not None:
            b.set_age(who, b.u(v.age[0], v.age[1], who.size))

    b.make_ecg_rows(planted_pidx, planted_variant, variants, forced_last)
    bad_ecg_rows = b.add_bad_ecg_rows(2) if plant_bad_rows else np.array([], np.int64)
    b.make_measurements()
    b.make_labs()
    b.make_medication()
    b.finish_labs()

    for i, v in enumerate(variants):
        cases = np.flatnonzero(planted_variant == i)
        if cases.size:
            v.apply(b, b.case_index_row[cases], b.case_prior_row[cases])

    # ------------------------------------------------------------ planted bad rows (before ids)
    last_day0 = end_us - US_PER_DAY
    normal_ecg = np.flatnonzero(b.e_role == 0)
    on_last = normal_ecg[b.e_t[normal_ecg] >= last_day0]
    if on_last.size == 0:
        on_last = normal_ecg
    mid_day = days // 2
    bad_lab_rows = {}
    if plant_bad_rows:
        # QRS 0 ms mid-period, QRS 900 ms on the last night: impossible values.
        b.e_t[bad_ecg_rows[0]] = b.clock(np.array([mid_day]), 1)[0]
        b.e_t[bad_ecg_rows[1]] = b.clock(np.array([days - 1]), 1)[0]
        b.qrs[bad_ecg_rows] = [0.0, 900.0]
        r = rng.choice(on_last, 2, replace=False)
        bad_lab_rows["unknown_unit"] = b.add_lab(
            b.e_pidx[r[:1]], b.e_t[r[:1]] - 40 * US_PER_MIN, "potassium", [160.0], unit="mg/L")[0]
        r_mid = rng.choice(normal_ecg, 1)
        bad_lab_rows["impossible_value"] = b.add_lab(
            b.e_pidx[r_mid], np.array([b.clock(np.array([mid_day - 1]), 1)[0]]), "potassium", [45.0])[0]
        v10_row = r[1]
        b.add_leads([v10_row], BAD_LEAD, b.u(0, 60, 1), b.u(300, 600, 1), b.u(-200, -100, 1),
                    b.u(-20, 20, 1), b.u(100, 200, 1))

    lab = {k: np.concatenate([c[k] for c in b.lab_chunks]) for k in b.lab_chunks[0]}
    lab_drop = np.r_[b.lab_drop, np.zeros(lab["pidx"].size - b.lab_drop.size, dtype=bool)]
    counts = {}

    # ------------------------------------------------------------ ECG table
    # Fridericia: QT = QTc * RR^(1/3) with RR in seconds (FRID-1920, docs/references.md).
    rr = np.round(60000.0 / b.hr)
    qt = np.round(b.qtc * (rr / 1000.0) ** (1 / 3))
    rr_out = np.where(rng.random(rr.size) < 0.2, np.nan, rr)    # the loader derives the missing ones
    n_ecg = b.e_pidx.size
    order = np.lexsort((b.e_pidx, b.e_t))
    rank = np.empty(n_ecg, np.int64)
    rank[order] = np.arange(n_ecg)
    ecg_ids_sorted = _ids(ECG_PREFIX, n_ecg, max(7, len(str(n_ecg))))
    patient_ids = _ids(PATIENT_PREFIX, patients, max(6, len(str(patients))))
    ecg_id_of_row = pc.take(ecg_ids_sorted, pa.array(rank)).to_numpy(zero_copy_only=False)
    pid = patient_ids.to_numpy(zero_copy_only=False)

    _clear(out)
    out.mkdir(parents=True, exist_ok=True)
    o = order
    ecg_table = pa.table([
        ecg_ids_sorted, pc.take(patient_ids, pa.array(b.e_pidx[o])), _ts(b.e_t[o]),
        _f(b.hr[o]), _f(rr_out[o]), _f(b.pr[o]), _f(b.qrs[o]), _f(qt[o]), _f(b.p_axis[o]),
        _f(b.qrs_axis[o]), _f(b.t_axis[o]), _bool(b.paced[o]), _take(LOCATIONS, b.loc[o], b.loc[o] < 0),
    ], schema=ECG_SCHEMA)
    ecg_day = b.e_t[o] // US_PER_DAY
    _write_partitions(ecg_table, ecg_day, out, "ecg")
    counts["ecg"] = n_ecg

    # ------------------------------------------------------------ ECG leads
    L = {k: np.round(v) for k, v in b.L.items()}
    L["r"] = np.maximum(L["r"], 0.0)           # r_amp_uv >= 0, s_amp_uv <= 0 by the contract
    L["s"] = np.minimum(L["s"], 0.0)
    lead_row = np.concatenate([np.repeat(np.arange(n_ecg), 12)] + [c["row"] for c in b.lead_chunks])
    lead_code = np.concatenate([np.tile(np.arange(12, dtype=np.int8), n_ecg)] + [c["lead"] for c in b.lead_chunks])
    vals = {k: np.concatenate([L[k].ravel()] + [np.round(c[k]) for c in b.lead_chunks]) for k in L}
    vals["r"] = np.maximum(vals["r"], 0.0)
    vals["s"] = np.minimum(vals["s"], 0.0)
    lo = np.lexsort((lead_code, rank[lead_row]))
    lead_table = pa.table([
        pc.take(ecg_ids_sorted, pa.array(rank[lead_row][lo])), _take(LEAD_NAMES, lead_code[lo]),
        _f(vals["p"][lo]), _f(vals["r"][lo]), _f(vals["s"][lo]), _f(vals["st"][lo]), _f(vals["t"][lo]),
    ], schema=LEAD_SCHEMA)
    _write_partitions(lead_table, b.e_t[lead_row][lo] // US_PER_DAY, out, "ecg_lead")
    counts["ecg_lead"] = lead_table.num_rows

    # ------------------------------------------------------------ labs
    keep = ~lab_drop & (lab["t"] >= b.start_us) & (lab["t"] < end_us)
    kept = np.flatnonzero(keep)
    lorder = kept[np.lexsort((lab["a"][kept], lab["pidx"][kept], lab["t"][kept]))]
    n_lab = lorder.size
    result_ids = _ids(RESULT_PREFIX, n_lab, max(8, len(str(n_lab + 10))))
    lab_rank = np.full(lab["pidx"].size, -1, np.int64)
    lab_rank[lorder] = np.arange(n_lab)
    lab_table = pa.table([
        result_ids, pc.take(patient_ids, pa.array(lab["pidx"][lorder])), _ts(lab["t"][lorder]),
        _ts(lab["res"][lorder]), _take([ANALYTES[k][0] for k in ANALYTE_KEYS], lab["a"][lorder]),
        _f(lab["v"][lorder]), _take(UNITS, lab["unit"][lorder]), _bool(lab["hemo"][lorder]),
    ], schema=LAB_SCHEMA)
    _write_partitions(lab_table, lab["t"][lorder] // US_PER_DAY, out, "lab")
    counts["lab"] = n_lab

    # ------------------------------------------------------------ patients and medication
    sex_null = b.sex < 0
    patient_table = pa.table([
        patient_ids, _take(["F", "M"], b.sex.astype(np.int64), sex_null),
        pa.array(b.birth_day, pa.date32()),
    ], schema=PATIENT_SCHEMA)
    _write(patient_table, out / "patient" / "part-0.parquet")
    counts["patient"] = patients

    med = {k: np.concatenate([c[k] for c in b.med_chunks]) for k in b.med_chunks[0]}
    mkeep = np.flatnonzero((med["t"] >= b.start_us) & (med["t"] < end_us))
    morder = mkeep[np.lexsort((med["drug"][mkeep], med["pidx"][mkeep], med["t"][mkeep]))]
    med_table = pa.table([
        pc.take(patient_ids, pa.array(med["pidx"][morder])), _ts(med["t"][morder]),
        _take(DRUGS, med["drug"][morder].astype(np.int64)),
    ], schema=MED_SCHEMA)
    _write_partitions(med_table, med["t"][morder] // US_PER_DAY, out, "medication")
    counts["medication"] = med_table.num_rows

    (out / "site.toml").write_text(SITE_TOML, encoding="utf-8")

    # ------------------------------------------------------------ planted bad rows in their own files
    bad_records = []
    if plant_bad_rows:
        def rec(table, key, reason, column, file, patient, date, detail, ecg=""):
            bad_records.append({"record": "bad_row", "patient_id": patient, "ecg_id": ecg, "date": date,
                                "detail": detail, "table": table, "row_key": key, "reason": reason,
                                "column": column, "file": file})
        for row, detail in zip(bad_ecg_rows, ["QRS 0 ms", "QRS 900 ms"]):
            d = _date(b.e_t[row])
            rec("ecg", ecg_id_of_row[row], "impossible_value", "qrs_ms", f"ecg/date={d}/part-0.parquet",
                pid[b.e_pidx[row]], d, detail, ecg_id_of_row[row])
        for reason, detail in (("unknown_unit", "potassium in mg/L"), ("impossible_value", "potassium 45 mmol/L")):
            lr = bad_lab_rows[reason]
            d = _date(lab["t"][lr])
            rec("lab", result_ids[int(lab_rank[lr])].as_py(), reason, "unit" if reason == "unknown_unit" else "value",
                f"lab/date={d}/part-0.parquet", pid[lab["pidx"][lr]], d, detail)
        d = _date(b.e_t[v10_row])
        rec("ecg_lead", f"{ecg_id_of_row[v10_row]}|{BAD_LEAD}", "unknown_lead", "lead",
            f"ecg_lead/date={d}/part-0.parquet", pid[b.e_pidx[v10_row]], d, "lead V10", ecg_id_of_row[v10_row])

        # Duplicate ecg_id with different values: a second file in the same ecg partition.
        dup = int(rng.choice(np.setdiff1d(on_last, r) if on_last.size > 2 else on_last))
        d = _date(b.e_t[dup])
        hr2 = b.hr[dup] + 7
        dup_table = pa.table([
            pa.array([ecg_id_of_row[dup]]), pa.array([pid[b.e_pidx[dup]]]), _ts([b.e_t[dup] + 90 * US_PER_S]),
            _f([hr2]), _f([np.round(60000 / hr2)]), _f([b.pr[dup]]), _f([b.qrs[dup] + 4]), _f([qt[dup] + 14]),
            _f([b.p_axis[dup]]), _f([b.qrs_axis[dup]]), _f([b.t_axis[dup]]), _bool([0]), _take(LOCATIONS, np.array([0])),
        ], schema=ECG_SCHEMA)
        _write(dup_table, out / "ecg" / f"date={d}" / "part-1.parquet")
        rec("ecg", ecg_id_of_row[dup], "duplicate_id", "ecg_id", f"ecg/date={d}/part-1.parquet",
            pid[b.e_pidx[dup]], d, "same ecg_id as a row of part-0 with different values", ecg_id_of_row[dup])

        # Naive timestamps: a second lab file on the last night whose timestamps carry no time zone.
        # Europe/London is UTC+0 in late November, so a converting loader gets the same instants.
        # Not the duplicated ECG's patient: with every copy of that ECG rejected the run reads
        # none of that patient's labs, and the plant would go unexercised.
        others = on_last[b.e_pidx[on_last] != b.e_pidx[dup]]
        p_naive = b.e_pidx[int(rng.choice(others if others.size else on_last))]
        t0 = int(b.clock(np.array([days - 1]), 1)[0])
        n_naive = 3
        naive_keys = [f"{RESULT_PREFIX}{i:0{max(8, len(str(n_lab + 10)))}d}" for i in range(n_lab + 1, n_lab + 1 + n_naive)]
        naive_codes = [LOINC_POTASSIUM_SERUM, LOINC_SODIUM, LOINC_CREATININE]
        naive_table = pa.table([
            pa.array(naive_keys), pa.array([pid[p_naive]] * n_naive), _ts([t0] * n_naive, tz=None),
            _ts([t0 + 55 * US_PER_MIN] * n_naive, tz=None), pa.array(naive_codes), _f([4.3, 139.0, 0.84]),
            pa.array(["mmol/L", "mmol/L", "mg/dL"]), pa.array([False, False, False]),
        ], schema=pa.schema([f if f.name not in ("collected_at", "resulted_at") else pa.field(f.name, pa.timestamp("us"))
                             for f in LAB_SCHEMA]))
        d = _date(t0)
        _write(naive_table, out / "lab" / f"date={d}" / "part-1.parquet")
        for key in naive_keys:
            rec("lab", key, "naive_timestamp", "collected_at", f"lab/date={d}/part-1.parquet", pid[p_naive], d,
                "timestamp without time zone (rejected when the site config has no timezone)")

        # Wrong type: a lab file whose value column is stored as text, one entry not a number.
        p_wt = b.e_pidx[int(rng.choice(normal_ecg))]
        t1 = int(b.clock(np.array([mid_day + 1]), 1)[0])
        wt_keys = [f"{RESULT_PREFIX}{i:0{max(8, len(str(n_lab + 10)))}d}" for i in range(n_lab + 1 + n_naive, n_lab + 4 + n_naive)]
        wt_table = pa.table([
            pa.array(wt_keys), pa.array([pid[p_wt]] * 3), _ts([t1] * 3), _ts([t1 + 70 * US_PER_MIN] * 3),
            pa.array([LOINC_POTASSIUM_SERUM, LOINC_SODIUM, LOINC_GLUCOSE]), pa.array(["4.1", "138", "see comment"]),
            pa.array(["mmol/L", "mmol/L", "mg/dL"]), pa.array([False, False, None], pa.bool_()),
        ], schema=pa.schema([f if f.name != "value" else pa.field("value", pa.string()) for f in LAB_SCHEMA]))
        d = _date(t1)
        _write(wt_table, out / "lab" / f"date={d}" / "part-1.parquet")
        rec("lab", wt_keys[2], "wrong_type", "value", f"lab/date={d}/part-1.parquet", pid[p_wt], d,
            "value stored as text; this entry is not a number")
        counts["ecg"] += 1
        counts["lab"] += n_naive + 3

    # ------------------------------------------------------------ manifest
    case_rows = []
    for i, v in enumerate(variants):
        cases = np.flatnonzero(planted_variant == i)
        for rows, detail in ((b.case_index_row[cases], v.detail),
                             (b.case_prior_row[cases], v.prior_detail)):
            rows = rows[rows >= 0]
            if detail is None or rows.size == 0:
                continue
            for r in rows:   # a loop over the planted cases only, to build their text rows
                case_rows.append({
                    "record": "case", "kind": v.kind, "patient_id": pid[b.e_pidx[r]], "ecg_id": ecg_id_of_row[r],
                    "date": _date(b.e_t[r]), "detail": detail + b.suffix[r],
                    "expect_finding": "true" if v.expect_finding else "false", "expect_territories": v.territories,
                    "expect_tier_at_most": str(v.tier_at_most) if v.expect_finding and detail == v.detail else ""})
    case_rows.sort(key=lambda c: (KINDS.index(c["kind"]), c["ecg_id"]))
    counts["planted_cases"] = {k: int(per_kind[k]) for k in KINDS}
    counts["planted_bad_rows"] = len(bad_records)
    if write_manifest:
        buf = io.StringIO()
        w = csv.DictWriter(buf, fieldnames=MANIFEST_COLUMNS, lineterminator="\n", restval="")
        w.writeheader()
        w.writerows(case_rows + bad_records)
        (out / "_planted.csv").write_text(buf.getvalue(), encoding="utf-8")
    return counts


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m cardiosieve.pipeline.samplegen",
                                 description="Write an invented cardiosieve lake (seeded, deterministic).")
    ap.add_argument("--out", required=True, help="output folder (its earlier lake files are replaced)")
    ap.add_argument("--patients", type=int, default=2000)
    ap.add_argument("--days", type=int, default=30)
    ap.add_argument("--seed", type=int, default=20261130)
    ap.add_argument("--end", default="2026-11-30", help="exclusive end date (UTC), YYYY-MM-DD")
    ap.add_argument("--no-bad-rows", action="store_true", help="do not plant bad rows")
    args = ap.parse_args(argv)
    t0 = time.perf_counter()
    counts = generate(args.out, patients=args.patients, days=args.days, end=args.end, seed=args.seed,
                      plant_bad_rows=not args.no_bad_rows)
    print(f"wrote {args.out} in {time.perf_counter() - t0:.1f} s: "
          + ", ".join(f"{k}={v}" for k, v in counts.items()), file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
