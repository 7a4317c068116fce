"""Long-QT risk: ECGs whose rate-corrected QT crosses a published limit or rose sharply.

What it flags
    - prolonged QTc: >= 450 ms men, >= 460 ms women (AHA-2009-IV);
    - high risk: QTc > 500 ms, or a rise of > 60 ms from the prior ECG (AHA-2010-TDP; a rise
      counts whether or not this QTc is itself prolonged, as Drew 2010 words it);
    - (setting report_not_evaluable) an ECG with no usable QT, or neither RR nor heart rate:
      a tier-4 "not evaluable" finding, never a silent pass.

QT correction (RR in s, QT in ms), all four always in the evidence:
    Bazett      QT / RR^(1/2)                  [BAZETT-1920]
    Fridericia  QT / RR^(1/3)                  [FRID-1920]
    Framingham  QT + 154 * (1 - RR)            [SAGIE-1992]
    Hodges      QT + 1.75 * (HR - 60)          [HODGES-1983]
    The deciding one is the setting `qtc_formula`, Fridericia by default: Bazett over-corrects
    at fast rates (AHA-2009-IV advises against it). RR is the machine's rr_ms (derived from the
    rate when absent) and the Hodges HR is 60000 / rr_ms, so the four agree exactly at 60 bpm.
    With QRS >= 120 ms the QT holds a long depolarisation: we correct the Bogossian modified
    QT = QT - 0.485 * QRS [BOGOSSIAN-2014] and say so; JT = QT - QRS is in the evidence too,
    but it is not compared with QTc limits (it has its own, which we do not ship).
    Bogossian derived the formula in left bundle branch block (LBBB made by right-ventricular
    pacing in 60 patients with narrow QRS); we apply it to every QRS at or above the qrs_wide
    cut point (RBBB, paced, IVCD too), which is an extrapolation. It is a step, not a slope:
    at QRS = 120 ms it subtracts 0.485 * 120 = 58.2 ms from QT, so between QRS 119 and 120 ms
    the QTc drops by 58.2 ms / RR^(1/3) with Fridericia (58.2 ms at 60 bpm, about 55 ms at
    50 bpm, about 63 ms at 75 bpm; 58.2 ms at any rate with Framingham and Hodges, 58.2 ms /
    RR^(1/2) with Bazett). A QTc near a limit with QRS near 120 ms is therefore fragile, and
    the caveat gives the unadjusted QTc beside the adjusted one.
    The rise compares like with like: the prior ECG's QTc by the same formula and adjustment.

Risk modifiers (any one counts)
    K < 3.5 mmol/L, Mg < 0.70 mmol/L, total Ca < 2.10 mmol/L (PRACTICE), heart rate < 50 bpm,
    female sex, age >= 68 y (TISDALE-2013), a QT-prolonging drug or a loop diuretic given in
    the previous 24 h (the site's own drug classes, site config [drugs]).
    An input that is missing (no K, Mg or Ca in the lab window, sex or age not recorded, no
    medication data: qt_drug_count_24h / loop_diuretic_24h null) leaves its modifier UNKNOWN,
    never absent: the summary names what was not measured and a caveat says the tier counts
    only the modifiers that could be assessed. "No risk modifier" is said only when every
    input was present. An unknown modifier does not raise the tier (local choice: medication
    data are missing for whole sites, and lifting every such ECG would flood tier 2).

Tiers (1 most urgent)
    1  QTc > 500 ms, whatever the modifiers (AHA-2010-TDP: high risk of torsade)
    2  a rise > 60 ms from the prior ECG (AHA-2010-TDP); or prolonged with a modifier
    3  prolonged alone
    4  not evaluable (setting report_not_evaluable)
    Tier is monotone in QTc: a higher QTc (all else equal) never gives a less urgent tier,
    since each mask above only grows with QTc and the most urgent one is QTc alone.
    Before 1.1.0: 1 QTc > 500 with a modifier; 2 QTc > 500 or rise > 60; 3 prolonged with a
    modifier; 4 prolonged alone or not evaluable.

Tisdale et al. 2013 score, from the inputs present [TISDALE-2013]
    age >= 68 y 1; female 1; loop diuretic 1; K <= 3.5 mmol/L 2; QTc >= 450 ms 2; acute MI 2;
    one QT-prolonging drug 3, two or more 6; sepsis 3; heart failure 3 (max 21;
    low 0-6, moderate 7-10, high >= 11). Acute MI, sepsis and heart failure are not in the
    lake, so the score is always "partial" and lists what is missing; the band named is a
    lower bound ("at least moderate", "low on the inputs present") unless even the maximum
    of the missing items could not change it. We use this ECG's deciding QTc for the admission QTc item.
    Wording kept as each source has it: the K modifier is "< 3.5" (hypokalaemia, PRACTICE)
    while Tisdale's table is "<= 3.5"; both are in rules.toml under their own keys.
    (Tisdale's abstract words the items "> 68 y", "< 3.5", "> 450"; the scoring table, which
    the secondary page cited in docs/references.md and calculators reproduce, uses ">=" / "<="
    and is what we follow.)

Unknown sex: the men's limit (450 ms), the more sensitive, with a caveat; the Tisdale female
item is then missing and the female modifier not assessed. Unknown age: the Tisdale age item
is missing and the age modifier not assessed (both named in the summary and a caveat).

Caveats: heart rate outside 50-100 bpm (correction unreliable, PRACTICE); irregular rhythm
suspected (no PR, and the machine's rate and mean RR disagree by > 10 %, a LOCAL proxy since
the lake holds no beat-to-beat RR); wide QRS (QT adjusted, derived in LBBB, step at the cut
point); paced rhythm; unknown sex; risk modifiers not assessed for lack of input. Every number
in a summary or caveat is formatted from the threshold actually applied (a site override
changes the text with the rule).

score_parts
    severity       0.7 * max((QTc - limit) / 100 ms, (rise - 60) / 60 ms) clipped to 0..1
                   + 0.3 * min(modifiers, 3) / 3
    lab_confirmed  1 when a lab modifier (low K, Mg or Ca) is present
    lab_gap_min    |offset| of the closest lab that made a modifier (null if none)
    trend          QTc rise from the prior ECG in ms (signed; null without a prior QTc)
    prior_present  1 when a prior ECG exists
    troponin_ratio null (not used here)
    qtc_ms, modifier_count, tisdale_points  extra parts

Criterion table (column, unit, source)
    ecg_id                         text     contract  the ECG (with patient_id and acquired_at, as aligned)
    patient_id                     text     contract  the patient
    acquired_at                    UTC      contract  when the ECG was taken
    qt_ms                          ms       cart      measured QT
    rr_ms                          ms       cart      mean RR (from the rate when absent)
    heart_rate_bpm                 bpm      cart      rate (from RR when absent)
    qrs_ms                         ms       cart      QRS duration
    pr_ms                          ms       cart      PR interval (null: none measured)
    sex                            F/M      contract  null when unknown
    age_years                      y        contract  whole years at the ECG
    paced                          bool     cart      paced rhythm
    qrs_wide                       bool     PRACTICE  QRS >= 120 ms: QT adjusted
    qt_used_ms                     ms       BOGOSSIAN-2014  QT, or QT - 0.485 x QRS when wide
    qtc_bazett_ms                  ms       BAZETT-1920  of qt_used_ms
    qtc_fridericia_ms              ms       FRID-1920  of qt_used_ms
    qtc_framingham_ms              ms       SAGIE-1992  of qt_used_ms
    qtc_hodges_ms                  ms       HODGES-1983  of qt_used_ms
    qtc_ms                         ms       setting   the deciding QTc (qtc_formula)
    qtc_unadjusted_ms              ms       setting   the deciding formula on the measured QT
    qtc_evaluable                  bool     LOCAL     QT and RR (or rate) present
    qtc_limit_ms                   ms       AHA-2009-IV  the sex limit applied (men's when unknown)
    qtc_prolonged                  bool     AHA-2009-IV  QTc at or above qtc_limit_ms
    qtc_prolonged_f                bool     AHA-2009-IV  prolonged by the women's limit
    qtc_prolonged_m                bool     AHA-2009-IV  prolonged by the men's limit
    qtc_high_risk                  bool     AHA-2010-TDP  QTc > 500 ms
    prior_qtc_ms                   ms       setting   the prior ECG's QTc, same formula and adjustment
    qtc_rise_ms                    ms       AHA-2010-TDP  qtc_ms - prior_qtc_ms
    qtc_rise_high                  bool     AHA-2010-TDP  rise > 60 ms
    k_mmol_l                       mmol/L   lab       potassium in the lab window
    mg_mmol_l                      mmol/L   lab       magnesium in the lab window
    ca_mmol_l                      mmol/L   lab       calcium in the lab window
    qt_drug_count_24h              count    site      QT-prolonging drugs given (null: no data)
    loop_diuretic_24h              bool     site      loop diuretic given (null: no data)
    mod_k_low                      bool     PRACTICE  K < 3.5 mmol/L
    mod_mg_low                     bool     PRACTICE  Mg < 0.70 mmol/L
    mod_ca_low                     bool     PRACTICE  Ca < 2.10 mmol/L
    mod_bradycardia                bool     PRACTICE  rate < 50 bpm
    mod_female                     bool     TISDALE-2013  female sex
    mod_age_older                  bool     TISDALE-2013  age >= 68 y
    mod_qt_drug                    bool     site      a QT-prolonging drug
    mod_loop_diuretic              bool     site      a loop diuretic
    mod_k_low_known                bool     LOCAL     the modifier's input is present (likewise below)
    mod_mg_low_known               bool     LOCAL     Mg measured
    mod_ca_low_known               bool     LOCAL     Ca measured
    mod_bradycardia_known          bool     LOCAL     rate present
    mod_female_known               bool     LOCAL     sex recorded
    mod_age_older_known            bool     LOCAL     birth date recorded
    mod_qt_drug_known              bool     LOCAL     medication data present
    mod_loop_diuretic_known        bool     LOCAL     medication data present
    modifier_count                 count    LOCAL     modifiers met
    tisdale_age_68_or_more_points  points   TISDALE-2013  item points (null: input missing)
    tisdale_female_points          points   TISDALE-2013  item points
    tisdale_loop_diuretic_points   points   TISDALE-2013  item points
    tisdale_k_3_5_or_less_points   points   TISDALE-2013  item points
    tisdale_qtc_450_or_more_points points   TISDALE-2013  item points
    tisdale_qt_drugs_points        points   TISDALE-2013  item points (3 one drug, 6 two or more)
    tisdale_points                 points   TISDALE-2013  sum over the items present
    tisdale_missing_max            points   TISDALE-2013  most the missing items could add
    rate_slow_for_correction       bool     PRACTICE  rate < 50 bpm: correction unreliable
    rate_fast_for_correction       bool     PRACTICE  rate > 100 bpm: correction unreliable
    irregular_suspected            bool     LOCAL     no PR and rate/RR disagree by > 10 %
    tier                           tier     LOCAL     1..4, 5 = no finding (tiers above)
    severity                       0..1     LOCAL     score part (below)
    lab_confirmed                  bool     LOCAL     a lab modifier is met
    lab_gap_min                    min      LOCAL     |offset| of the closest lab modifier
    trend                          ms       LOCAL     the QTc rise
    prior_present                  bool     LOCAL     a prior ECG exists
    troponin_ratio                 ratio    LOCAL     not used here (null)

Sources (citations in screens/rules.toml [sources])
    AHA-2009-IV     Rautaharju PM, Surawicz B, Gettes LS. AHA/ACCF/HRS recommendations for the
                    standardization and interpretation of the electrocardiogram, part IV.
                    Circulation 2009;119:e241-e250.
    AHA-2010-TDP    Drew BJ, Ackerman MJ, Funk M, et al. Prevention of torsade de pointes in
                    hospital settings. Circulation 2010;121:1047-1060.
    BAZETT-1920     Bazett HC. Heart 1920;7:353-370.
    FRID-1920       Fridericia LS. Acta Med Scand 1920;53:469-486.
    SAGIE-1992      Sagie A, Larson MG, Goldberg RJ, et al. Am J Cardiol 1992;70:797-801.
    HODGES-1983     Hodges M, Salerno D, Erlien D. J Am Coll Cardiol 1983;1:694 (abstract).
    BOGOSSIAN-2014  Bogossian H, Frommeyer G, Ninios I, et al. Heart Rhythm 2014;11:2273-2277
                    (coefficient 0.485 = mean of 48.3 % and 48.8 % in the abstract, checked
                    against the abstract only; derived in paced LBBB).
    TISDALE-2013    Tisdale JE, Jaynes HA, Kingery JR, et al. Circ Cardiovasc Qual Outcomes
                    2013;6:479-487 (points checked against secondary calculator pages).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from cardiosieve.screens._frame import (
    NO_FINDING,
    build_findings,
    flag,
    fmt,
    num,
    require_columns,
    score_parts,
    sex_masks,
    text,
    age_years,
)
from cardiosieve.screens._table import column_readers, criterion_table, dress_flagged, fired_rules
from cardiosieve.screens.criteria import Rules, load_rules

SCREEN = "long_qt"
REQUIRED = ["ecg_id", "patient_id", "acquired_at", "qt_ms", "rr_ms", "heart_rate_bpm", "qrs_ms", "pr_ms"]

BOGOSSIAN_QRS_FACTOR = 0.485  # [BOGOSSIAN-2014]: modified QT = QT - 0.485 * QRS
FRAMINGHAM_SLOPE_MS = 154.0  # [SAGIE-1992]
HODGES_SLOPE_MS_PER_BPM = 1.75  # [HODGES-1983]

FORMULA_NAMES = {"bazett": "Bazett", "fridericia": "Fridericia", "framingham": "Framingham", "hodges": "Hodges"}

# [TISDALE-2013] points; items the lake cannot supply are always listed as missing.
TISDALE_POINTS = {
    "age_68_or_more": 1,
    "female": 1,
    "loop_diuretic": 1,
    "k_3_5_or_less": 2,
    "qtc_450_or_more": 2,
    "acute_mi": 2,
    "qt_drugs": 6,  # 3 for one drug, 6 for two or more; 6 is the most a missing item could add
    "sepsis": 3,
    "heart_failure": 3,
}
TISDALE_NOT_IN_LAKE = ("acute_mi", "sepsis", "heart_failure")
TISDALE_LAKE_ITEMS = ("age_68_or_more", "female", "loop_diuretic", "k_3_5_or_less", "qtc_450_or_more", "qt_drugs")

# Caveat texts. Every number in them is filled in from the threshold applied (see _caveat_texts),
# so a site override never leaves the text contradicting the rule.
CAVEAT_RATE = (
    "Heart rate {hr} bpm is outside {low}-{high} bpm, where rate correction of QT is reliable; "
    "read the measured QT too."
)
CAVEAT_IRREGULAR = (
    "No PR interval and the rate and mean RR disagree by more than {pct} %: an irregular rhythm "
    "(e.g. atrial fibrillation) is suspected; a QTc from a mean RR is unreliable."
)
CAVEAT_WIDE = (
    "QRS {qrs} ms (at or above {wide} ms): QT adjusted for the wide QRS by the Bogossian modified QT "
    "(QT - {factor} x QRS), a formula derived in left bundle branch block; here it subtracts {sub} ms "
    "from QT. The adjustment starts as a step at QRS {wide} ms ({step} ms off QT). Unadjusted QTc {raw} ms."
)
CAVEAT_PACED = "Paced rhythm: the QT includes paced depolarisation."
CAVEAT_SEX_UNKNOWN = "Sex unknown: the men's limit ({limit} ms), the more sensitive, was used."
CAVEAT_NOT_EVALUABLE = "QTc not evaluable: {what} missing."
CAVEAT_MODIFIERS_UNKNOWN = "Not every risk modifier could be assessed ({what}); the tier counts only the modifiers assessed."
CAVEAT_MODIFIERS_COULD_RAISE = " An unassessed modifier, if present, would make this finding tier {tier}."

# Tiers (module docstring): named so that tests and code read the same constant.
TIER_HIGH_QTC = 1
TIER_RISE_OR_MODIFIER = 2
TIER_PROLONGED = 3
TIER_NOT_EVALUABLE = 4

# Modifier inputs, in summary order: (modifier key, the words for its input, its group).
MODIFIER_INPUTS = (
    ("k_low", "K", "lab"),
    ("mg_low", "Mg", "lab"),
    ("ca_low", "Ca", "lab"),
    ("bradycardia", "heart rate", "record"),
    ("female", "sex", "record"),
    ("age_older", "age", "record"),
    ("qt_drug", "QT-prolonging drugs", "medication"),
    ("loop_diuretic", "loop diuretics", "medication"),
)
ALL_MODIFIERS_WORDS = "no risk modifier among K, Mg, Ca, heart rate, sex, age, drugs"


def _limit(x: float) -> str:
    """A threshold for a text, as configured (450 -> "450", a site's 45.5 -> "45.5"; never rounded)."""
    return f"{float(x):g}"


def _unknown_words(unknown: list[str]) -> list[str]:
    """Plain words for the modifier inputs missing on one row: ["not measured: K, Mg", "no medication data"]."""
    by_key = {key: (word, group) for key, word, group in MODIFIER_INPUTS}
    labs = [by_key[k][0] for k in unknown if by_key[k][1] == "lab"]
    record = [by_key[k][0] for k in unknown if by_key[k][1] == "record"]
    meds = [by_key[k][0] for k in unknown if by_key[k][1] == "medication"]
    out = []
    if labs:
        out.append("not measured: " + ", ".join(labs))
    if record:
        out.append("not recorded: " + ", ".join(record))
    if len(meds) == 2:
        out.append("no medication data")
    elif meds:
        out.append(f"no data on {meds[0]}")
    return out


def qtc_all(qt_ms: np.ndarray, rr_ms: np.ndarray) -> dict[str, np.ndarray]:
    """QTc in ms by the four formulas, from QT (ms) and RR (ms); NaN where an input is missing."""
    rr_s = np.asarray(rr_ms, dtype=float) / 1000.0
    qt = np.asarray(qt_ms, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        hr = 60.0 / rr_s
        return {
            "bazett": qt / np.sqrt(rr_s),  # [BAZETT-1920]
            "fridericia": qt / np.cbrt(rr_s),  # [FRID-1920]
            "framingham": qt + FRAMINGHAM_SLOPE_MS * (1.0 - rr_s),  # [SAGIE-1992]
            "hodges": qt + HODGES_SLOPE_MS_PER_BPM * (hr - 60.0),  # [HODGES-1983]
        }


def _rr(aligned: pd.DataFrame, rr_col: str, hr_col: str) -> np.ndarray:
    rr, hr = num(aligned, rr_col), num(aligned, hr_col)
    with np.errstate(invalid="ignore", divide="ignore"):
        derived = np.where(hr > 0, 60000.0 / hr, np.nan)
    rr = np.where(np.isnan(rr), derived, rr)
    return np.where(rr > 0, rr, np.nan)


def criteria_long_qt(aligned: pd.DataFrame, leads: pd.DataFrame | None = None, rules: Rules | None = None) -> pd.DataFrame:
    """The criterion table (module docstring): one row per aligned ECG, in its order.

    aligned: the aligned table (qt_ms, rr_ms, heart_rate_bpm, qrs_ms, pr_ms, paced, sex, age_years,
    k/mg/ca_mmol_l and offsets, prior_qt_ms, prior_rr_ms, prior_heart_rate_bpm, prior_qrs_ms,
    qt_drug_count_24h, loop_diuretic_24h). leads: unused (the QT screen reads global intervals).
    """
    require_columns(aligned, REQUIRED)
    r = (rules or load_rules())[SCREEN]
    formula = r.setting("qtc_formula")

    qt, qrs, pr = num(aligned, "qt_ms"), num(aligned, "qrs_ms"), num(aligned, "pr_ms")
    rr = _rr(aligned, "rr_ms", "heart_rate_bpm")
    hr_measured = num(aligned, "heart_rate_bpm")
    with np.errstate(invalid="ignore", divide="ignore"):
        hr = np.where(np.isnan(hr_measured), 60000.0 / rr, hr_measured)
    female, male, sex_unknown = sex_masks(aligned)
    age = age_years(aligned)
    paced, _ = flag(aligned, "paced")

    # ---- QRS-adjusted QT [BOGOSSIAN-2014]
    wide = r["qrs_wide"].met(qrs)
    qt_used = np.where(wide, qt - BOGOSSIAN_QRS_FACTOR * qrs, qt)
    qtc = qtc_all(qt_used, rr)
    qtc_raw = qtc_all(qt, rr)
    decide = qtc[formula]

    prior_qrs = num(aligned, "prior_qrs_ms")
    prior_qt = num(aligned, "prior_qt_ms")
    prior_rr = _rr(aligned, "prior_rr_ms", "prior_heart_rate_bpm")
    prior_wide = r["qrs_wide"].met(prior_qrs)
    prior_qt_used = np.where(prior_wide, prior_qt - BOGOSSIAN_QRS_FACTOR * prior_qrs, prior_qt)
    prior_decide = qtc_all(prior_qt_used, prior_rr)[formula]
    rise = decide - prior_decide

    # ---- prolonged [AHA-2009-IV]; unknown sex takes the men's (more sensitive) limit
    prolonged = np.where(female, r["qtc_prolonged_f"].met(decide), r["qtc_prolonged_m"].met(decide))
    limit = np.where(female, r["qtc_prolonged_f"].value, r["qtc_prolonged_m"].value)
    # ---- high risk [AHA-2010-TDP]
    high = r["qtc_high_risk"].met(decide)
    rose = r["qtc_rise"].met(rise)

    # ---- risk modifiers
    k, mg, ca = num(aligned, "k_mmol_l"), num(aligned, "mg_mmol_l"), num(aligned, "ca_mmol_l")
    k_off, mg_off, ca_off = num(aligned, "k_offset_min"), num(aligned, "mg_offset_min"), num(aligned, "ca_offset_min")
    drugs = num(aligned, "qt_drug_count_24h")
    loop, loop_known = flag(aligned, "loop_diuretic_24h")
    mod = {
        "k_low": r["k_low"].met(k),
        "mg_low": r["mg_low"].met(mg),
        "ca_low": r["ca_low"].met(ca),
        "bradycardia": r["bradycardia"].met(hr),
        "female": female,
        "age_older": r["age_older"].met(age),
        "qt_drug": drugs >= 1,
        "loop_diuretic": loop,
    }
    mods = np.column_stack(list(mod.values()))
    n_mods = mods.sum(axis=1)
    any_mod = n_mods > 0
    # Whether each modifier's input is present: a missing input is unknown, never "absent".
    mod_known = {
        "k_low": ~np.isnan(k),
        "mg_low": ~np.isnan(mg),
        "ca_low": ~np.isnan(ca),
        "bradycardia": ~np.isnan(hr),
        "female": ~sex_unknown,
        "age_older": ~np.isnan(age),
        "qt_drug": ~np.isnan(drugs),
        "loop_diuretic": loop_known,
    }

    evaluable = ~np.isnan(decide)
    report_ne = bool(r.setting("report_not_evaluable"))
    # The most urgent tier is QTc alone [AHA-2010-TDP], so tier stays monotone in QTc.
    tier = np.select(
        [high, rose | (prolonged & any_mod), prolonged, ~evaluable & report_ne],
        [TIER_HIGH_QTC, TIER_RISE_OR_MODIFIER, TIER_PROLONGED, TIER_NOT_EVALUABLE],
        NO_FINDING,
    )

    # ---- Tisdale 2013, from the inputs present
    age_known, sex_known, k_known = ~np.isnan(age), ~sex_unknown, ~np.isnan(k)
    drugs_known = ~np.isnan(drugs)
    t_items = {
        "age_68_or_more": (np.where(r["tisdale_age"].met(age), 1, 0), age_known),
        "female": (np.where(female, 1, 0), sex_known),
        "loop_diuretic": (np.where(loop, 1, 0), loop_known),
        "k_3_5_or_less": (np.where(r["tisdale_k"].met(k), 2, 0), k_known),
        "qtc_450_or_more": (np.where(r["tisdale_qtc"].met(decide), 2, 0), evaluable),
        "qt_drugs": (np.select([drugs >= 2, drugs >= 1], [6, 3], 0), drugs_known),
    }
    t_points = sum(np.where(known, pts, 0) for pts, known in t_items.values())
    t_missing_max = sum(np.where(known, 0, TISDALE_POINTS[name]) for name, (_, known) in t_items.items()) + sum(
        TISDALE_POINTS[name] for name in TISDALE_NOT_IN_LAKE
    )

    # ---- severity
    with np.errstate(invalid="ignore"):
        qtc_part = np.clip((decide - limit) / 100.0, 0.0, 1.0)
        rise_part = np.clip((rise - r["qtc_rise"].value) / 60.0, 0.0, 1.0)
    severity = 0.7 * np.fmax(np.nan_to_num(qtc_part), np.nan_to_num(rise_part)) + 0.3 * np.minimum(n_mods, 3) / 3.0

    # ---- texts' inputs that are decisions too: rate outside the correction's range, irregular rhythm
    rate_slow = r["hr_correction_low"].met(hr)
    rate_fast = r["hr_correction_high"].met(hr)
    rr_hr = num(aligned, "rr_ms") * hr_measured / 60000.0
    with np.errstate(invalid="ignore"):
        mismatch_pct = np.abs(rr_hr - 1.0) * 100.0
    irregular = np.isnan(pr) & r["rr_hr_mismatch"].met(mismatch_pct)
    # ---- the closest lab that made a modifier (score part)
    gaps = np.column_stack([np.where(mod[m], np.abs(off), np.nan) for m, off in
                            (("k_low", k_off), ("mg_low", mg_off), ("ca_low", ca_off))])
    with np.errstate(invalid="ignore"):
        lab_gap = np.where(np.isnan(gaps).all(axis=1), np.nan, np.nanmin(np.where(np.isnan(gaps), np.inf, gaps), axis=1))

    columns = {
        "qt_ms": qt, "rr_ms": rr, "heart_rate_bpm": hr, "qrs_ms": qrs, "pr_ms": pr,
        "sex": np.where(female, "F", np.where(male, "M", None)), "age_years": age, "paced": paced,
        "qrs_wide": wide, "qt_used_ms": qt_used,
        **{f"qtc_{name}_ms": qtc[name] for name in FORMULA_NAMES},
        "qtc_ms": decide, "qtc_unadjusted_ms": qtc_raw[formula], "qtc_evaluable": evaluable,
        "qtc_limit_ms": limit, "qtc_prolonged": prolonged, "qtc_prolonged_f": female & prolonged,
        "qtc_prolonged_m": ~female & prolonged, "qtc_high_risk": high,
        "prior_qtc_ms": prior_decide, "qtc_rise_ms": rise, "qtc_rise_high": rose,
        "k_mmol_l": k, "mg_mmol_l": mg, "ca_mmol_l": ca, "qt_drug_count_24h": drugs,
        "loop_diuretic_24h": pd.array(np.where(loop_known, loop, False), dtype="boolean").copy(),
        **{f"mod_{name}": mod[name] for name in mod},
        **{f"mod_{name}_known": mod_known[name] for name in mod},
        "modifier_count": n_mods.astype("int64"),
        **{f"tisdale_{name}_points": np.where(known, pts, np.nan).astype(float) for name, (pts, known) in t_items.items()},
        "tisdale_points": np.asarray(t_points, dtype="int64"),
        "tisdale_missing_max": np.asarray(t_missing_max, dtype="int64"),
        "rate_slow_for_correction": rate_slow, "rate_fast_for_correction": rate_fast,
        "irregular_suspected": irregular,
        "tier": tier.astype("int64"),
        "severity": severity, "lab_confirmed": ~np.isnan(lab_gap), "lab_gap_min": lab_gap, "trend": rise,
        "prior_present": pd.notna(text(aligned, "prior_ecg_id")), "troponin_ratio": np.nan,
    }
    table = criterion_table(aligned, columns)
    table.loc[~loop_known, "loop_diuretic_24h"] = pd.NA
    return table


# Thresholds and the criterion column that says each one fired (evidence `rules`, in this order).
FIRED = (
    ("qtc_prolonged_f", "qtc_prolonged_f"),
    ("qtc_prolonged_m", "qtc_prolonged_m"),
    ("qtc_high_risk", "qtc_high_risk"),
    ("qtc_rise", "qtc_rise_high"),
    ("qrs_wide", "qrs_wide"),
    ("k_low", "mod_k_low"),
    ("mg_low", "mod_mg_low"),
    ("ca_low", "mod_ca_low"),
    ("bradycardia", "mod_bradycardia"),
    ("age_older", "mod_age_older"),
    ("hr_correction_low", "rate_slow_for_correction"),
    ("hr_correction_high", "rate_fast_for_correction"),
    ("rr_hr_mismatch", "irregular_suspected"),
)


def screen_long_qt(aligned: pd.DataFrame, leads: pd.DataFrame, rules: Rules | None = None, *,
                  with_criteria: bool = False):
    """Long-QT risk findings for the aligned ECGs: the flagged rows of `criteria_long_qt`, dressed.
    Returns the findings frame (FINDING_COLUMNS); with_criteria, (findings, criterion table)."""
    rules = rules or load_rules()
    return dress_flagged(aligned, lambda: (criteria_long_qt(aligned, leads, rules), None),
                         lambda table, _, hit: _dress(aligned, table, hit, rules[SCREEN]), with_criteria)


def _dress(aligned: pd.DataFrame, table: pd.DataFrame, hit: np.ndarray, r) -> pd.DataFrame:
    """Summary, caveats, evidence and score parts of the flagged rows, read off the criterion table."""
    col, _ = column_readers(table)
    formula = r.setting("qtc_formula")
    qt, qrs, pr, rr, hr = (num(table, c) for c in ("qt_ms", "qrs_ms", "pr_ms", "rr_ms", "heart_rate_bpm"))
    female, male, sex_unknown = sex_masks(table)
    age = num(table, "age_years")
    paced, wide = col("paced").astype(bool), col("qrs_wide").astype(bool)
    qt_used, decide, limit = num(table, "qt_used_ms"), num(table, "qtc_ms"), num(table, "qtc_limit_ms")
    qtc = {name: num(table, f"qtc_{name}_ms") for name in FORMULA_NAMES}
    qtc_raw = {formula: num(table, "qtc_unadjusted_ms")}
    evaluable, prolonged = col("qtc_evaluable").astype(bool), col("qtc_prolonged").astype(bool)
    high, rose = col("qtc_high_risk").astype(bool), col("qtc_rise_high").astype(bool)
    prior_decide, rise = num(table, "prior_qtc_ms"), num(table, "qtc_rise_ms")
    k, mg, ca, drugs = (num(table, c) for c in ("k_mmol_l", "mg_mmol_l", "ca_mmol_l", "qt_drug_count_24h"))
    loop, loop_known = flag(table, "loop_diuretic_24h")
    mod = {key: col(f"mod_{key}").astype(bool) for key, _, _ in MODIFIER_INPUTS}
    mod_known = {key: col(f"mod_{key}_known").astype(bool) for key, _, _ in MODIFIER_INPUTS}
    n_mods, tier = col("modifier_count"), col("tier")
    t_items = {name: (num(table, f"tisdale_{name}_points"), ~np.isnan(num(table, f"tisdale_{name}_points")))
               for name in TISDALE_LAKE_ITEMS}
    t_points, t_missing_max = col("tisdale_points"), col("tisdale_missing_max")
    severity, lab_gap = num(table, "severity"), num(table, "lab_gap_min")
    rate_odd = col("rate_slow_for_correction").astype(bool) | col("rate_fast_for_correction").astype(bool)
    irregular = col("irregular_suspected").astype(bool)
    prior_ids = text(aligned, "prior_ecg_id")
    rows = aligned.iloc[hit]
    fname = FORMULA_NAMES[formula]
    rules_of_row = fired_rules(table, [(r[key], column) for key, column in FIRED], hit)
    # Numbers for the texts, read from the rules applied (a site override changes the text too).
    high_limit, rise_limit = r["qtc_high_risk"].value, r["qtc_rise"].value
    rate_low, rate_high = r["hr_correction_low"].value, r["hr_correction_high"].value
    mismatch_limit, wide_limit = r["rr_hr_mismatch"].value, r["qrs_wide"].value
    parts, summaries, evidence, caveats = [], [], [], []
    for j, i in enumerate(hit):
        mod_words = []
        if mod["k_low"][i]:
            mod_words.append(f"K {fmt(k[i], 1)} mmol/L")
        if mod["mg_low"][i]:
            mod_words.append(f"Mg {fmt(mg[i], 2)} mmol/L")
        if mod["ca_low"][i]:
            mod_words.append(f"Ca {fmt(ca[i], 2)} mmol/L")
        if mod["bradycardia"][i]:
            mod_words.append(f"heart rate {fmt(hr[i])} bpm")
        if mod["female"][i]:
            mod_words.append("female")
        if mod["age_older"][i]:
            mod_words.append(f"age {fmt(age[i])} y")
        if mod["qt_drug"][i]:
            mod_words.append(f"{int(drugs[i])} QT-prolonging drug(s) in 24 h")
        if mod["loop_diuretic"][i]:
            mod_words.append("loop diuretic in 24 h")
        unknown_mods = [key for key, _, _ in MODIFIER_INPUTS if not mod_known[key][i]]

        missing = [name for name, (_, known) in t_items.items() if not known[i]] + list(TISDALE_NOT_IN_LAKE)
        pts = int(t_points[i])
        most = pts + int(t_missing_max[i])
        if pts >= r["tisdale_high"].value:
            band = "high"
        elif most < r["tisdale_moderate"].value:
            band = "low"
        elif pts >= r["tisdale_moderate"].value:
            band = "moderate" if most < r["tisdale_high"].value else "at least moderate"
        else:
            band = "low on the inputs present"
        tisdale = {
            "points": pts,
            "partial": bool(missing),
            "missing": missing,
            "max_possible": most,
            "band": band,
            "items": {name: (int(p[i]) if known[i] else None) for name, (p, known) in t_items.items()},
        }

        if not evaluable[i]:
            what = "QT interval" if np.isnan(qt[i]) else "RR interval and heart rate"
            summaries.append(f"QTc not evaluable: {what} missing")
            caveats.append([CAVEAT_NOT_EVALUABLE.format(what=what)])
        else:
            qt_words = f"QT {fmt(qt[i])} ms" if not wide[i] else f"Bogossian-adjusted QT {fmt(qt_used[i])} ms, QRS {fmt(qrs[i])} ms"
            words = [f"QTc {fmt(decide[i])} ms ({fname}; {qt_words}, heart rate {fmt(hr[i])} bpm)"]
            if high[i]:
                words[0] += f", above {_limit(high_limit)} ms"
            elif prolonged[i]:
                words[0] += f", at or above the {_limit(limit[i])} ms limit"
            if not np.isnan(prior_decide[i]):
                prior_words = f"prior {fmt(prior_decide[i])} ms ({'+' if rise[i] >= 0 else ''}{fmt(rise[i])} ms)"
                if rose[i]:
                    prior_words += f", a rise of more than {_limit(rise_limit)} ms"
                words.append(prior_words)
            unknown_words = _unknown_words(unknown_mods)
            if mod_words:
                words.append("modifiers: " + ", ".join(mod_words))
            elif unknown_mods:
                words.append("modifiers: none among the inputs present")
            else:
                words.append(ALL_MODIFIERS_WORDS)
            words.extend(unknown_words)
            words.append(f"Tisdale {pts} ({'partial, ' if missing else ''}{band})")
            summaries.append("; ".join(words))
            cav = []
            if rate_odd[i]:
                cav.append(CAVEAT_RATE.format(hr=fmt(hr[i]), low=_limit(rate_low), high=_limit(rate_high)))
            if irregular[i]:
                cav.append(CAVEAT_IRREGULAR.format(pct=_limit(mismatch_limit)))
            if wide[i]:
                cav.append(
                    CAVEAT_WIDE.format(
                        qrs=fmt(qrs[i]),
                        wide=_limit(wide_limit),
                        factor=f"{BOGOSSIAN_QRS_FACTOR:g}",
                        sub=fmt(BOGOSSIAN_QRS_FACTOR * qrs[i], 1),
                        step=fmt(BOGOSSIAN_QRS_FACTOR * wide_limit, 1),
                        raw=fmt(qtc_raw[formula][i]),
                    )
                )
            if paced[i]:
                cav.append(CAVEAT_PACED)
            if sex_unknown[i]:
                cav.append(CAVEAT_SEX_UNKNOWN.format(limit=_limit(r["qtc_prolonged_m"].value)))
            if unknown_mods:
                words_unknown = CAVEAT_MODIFIERS_UNKNOWN.format(what="; ".join(unknown_words))
                if tier[i] == TIER_PROLONGED:  # the only tier a modifier can still change
                    words_unknown += CAVEAT_MODIFIERS_COULD_RAISE.format(tier=TIER_RISE_OR_MODIFIER)
                cav.append(words_unknown)
            caveats.append(cav)

        rules_fired = rules_of_row[j]
        evidence.append(
            {
                "values": {
                    "qt_ms": qt[i],
                    "rr_ms": rr[i],
                    "heart_rate_bpm": hr[i],
                    "qrs_ms": qrs[i],
                    "pr_ms": pr[i],
                    "qt_adjustment": "bogossian" if wide[i] else None,
                    "qt_used_ms": qt_used[i],
                    "jt_ms": qt[i] - qrs[i],
                    "qtc_formula": formula,
                    "qtc_ms": decide[i],
                    "qtc_bazett_ms": qtc["bazett"][i],
                    "qtc_fridericia_ms": qtc["fridericia"][i],
                    "qtc_framingham_ms": qtc["framingham"][i],
                    "qtc_hodges_ms": qtc["hodges"][i],
                    "qtc_unadjusted_ms": qtc_raw[formula][i] if wide[i] else None,
                    "qtc_limit_ms": limit[i],
                    "sex": "F" if female[i] else ("M" if male[i] else None),
                    "age_years": age[i],
                    "prior_ecg_id": prior_ids[i],
                    "prior_qtc_ms": prior_decide[i],
                    "qtc_rise_ms": rise[i],
                    "k_mmol_l": k[i],
                    "mg_mmol_l": mg[i],
                    "ca_mmol_l": ca[i],
                    "qt_drug_count_24h": drugs[i],
                    "loop_diuretic_24h": bool(loop[i]) if loop_known[i] else None,
                    "modifiers": [name for name in mod if mod[name][i]],
                    "modifiers_not_assessed": unknown_mods,
                },
                "tisdale": tisdale,
                "rules": rules_fired,
            }
        )
        parts.append(
            score_parts(
                severity=severity[i],
                lab_confirmed=not np.isnan(lab_gap[i]),
                lab_gap_min=lab_gap[i],
                trend=rise[i],
                prior_present=prior_ids[i] is not None,
                qtc_ms=decide[i],
                modifier_count=int(n_mods[i]),
                tisdale_points=pts,
            )
        )

    return build_findings(
        rows,
        screen=SCREEN,
        rule_version=r.version,
        tier=tier[hit],
        parts=parts,
        summary=summaries,
        evidence=evidence,
        caveats=caveats,
    )
