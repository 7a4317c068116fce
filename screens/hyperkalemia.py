"""Hyperkalemia: a high potassium near the ECG, the ECG signs of one, or both.

What it flags
    - every ECG with a potassium in the lab window at or above the mild band (5.5 mmol/L),
      with or without ECG signs: the ECG is insensitive (typical changes in only a minority
      of hyperkalemic patients, MONTAGUE-2008), so a high potassium with a normal ECG is
      still a finding and the signs only add urgency;
    - ECGs showing any sign below with NO potassium in the window: a finding that says no
      potassium was found in the window (its bounds when the aligned table carries them, optional
      columns lab_before_h / lab_after_h) and that the signs were ranked without a laboratory
      value. A potassium that was measured and is below 5.5 mmol/L gives no finding (the signs
      then have another cause).
    - a potassium that the contract or the quality gate REJECTED is not "no potassium": when the
      aligned table carries the optional column k_rejected_reason (the reason code of the latest
      rejected potassium of the patient in the lab window, null when none) and no accepted
      potassium was found, the summary says "Potassium result rejected (<reason>)" and a caveat
      says so; the tier is the one for no potassium (signs alone). The rejected value itself is
      never read or shown.

ECG signs, each recorded separately in the evidence (`signs`: true, false, or null = not
evaluable because an input is missing)
    peaked_t   T >= 1000 uV in a precordial lead (V1-V6) or >= 600 uV in a limb lead
               (I, II, III, aVL, aVF), or T grown >= 50 % against the prior ECG in the same
               lead where the prior T was an upright wave of >= 100 uV (local floor)
    qrs        QRS >= 120 ms, or widened >= 20 ms against the prior ECG
    pr         PR > 200 ms, or lengthened >= 40 ms against the prior ECG
    p_flat     |P| in II < 50 uV (flattened or absent; local cut point)
    brady      heart rate < 50 bpm

Tiers (1 most urgent)
    1  K >= 6.0 (moderate or severe) with ECG signs: UKKA-2020 treats ECG changes with
       hyperkalaemia as an emergency (from memory)
    2  severe K (>= 6.5) alone
    3  moderate K (6.0-6.4) alone, or mild K (5.5-5.9) with signs;
       no potassium in the window (or only a rejected one) and >= 2 distinct signs
       (setting no_k_signs_for_tier3)
    4  mild K alone; no potassium in the window (or only a rejected one) and one sign
    Before 1.1.0: 1 severe with signs; 2 severe alone or moderate with signs; 3 and 4 as now.
    Mild K with signs stays tier 3 (local choice): our signs are not specific (a chronic bundle
    branch block or first-degree block meets them), and the 5.5-5.9 band is common.
    Haemolysed specimen (k_hemolyzed): the value is unreliable, not reassuring. Every haemolysed
    result carries a caveat that names it and says to repeat the sample urgently. WITHOUT ECG
    signs its severity is halved, so it ranks below a non-haemolysed result of the same value;
    a mild or moderate one also drops one tier (capped at 4), but a severe one (>= 6.5) keeps
    tier 2: a haemolysed severe potassium is never ranked below tier 2. WITH ECG signs it keeps
    its tier and severity. Haemolysis unknown (null) is treated as not haemolysed.
    Tier is monotone in potassium, haemolysed or not: a higher value never gives a less
    urgent tier (the demotion stops at the severe band, which ranks 2 against 4 below it).

score_parts
    severity       0.7 * K position in [5.5, 7.5] mmol/L + 0.3 * (signs / 5); signs / 5 with no K
                   (or a rejected one); halved for a haemolysed specimen without signs
    lab_confirmed  1 when a non-haemolysed potassium >= 5.5 decided the finding
    lab_gap_min    |k_offset_min| (null with no potassium)
    trend          k_change_mmol_l (this potassium minus the one before it, null if none)
    prior_present  1 when a prior ECG exists
    troponin_ratio null (not used here)
    sign_count, hemolyzed  extra parts

Missing inputs stay visible: a sign whose inputs are missing is null in `signs`, and a
flagged finding says in its caveats which signs could not be assessed; "no ECG sign" is said
only of the signs assessed, naming the others. Every number in a summary or caveat is
formatted from the threshold or setting actually applied (a site override changes the text).

Criterion table (column, unit, source)
    ecg_id               text     contract  the ECG (with patient_id and acquired_at, as aligned)
    patient_id           text     contract  the patient
    acquired_at          UTC      contract  when the ECG was taken
    k_mmol_l             mmol/L   lab       the potassium nearest the ECG in the lab window
    k_band               text     UKKA-2020  severe, moderate, mild or "" (below the bands / none)
    k_severe             bool     UKKA-2020  K >= 6.5
    k_moderate           bool     UKKA-2020  K 6.0-6.4
    k_mild               bool     UKKA-2020  K 5.5-5.9
    k_offset_min         min      lab       collection minus ECG time
    k_hemolyzed          bool     lab       the specimen was reported haemolysed
    k_prev_mmol_l        mmol/L   lab       the potassium before it (trend window)
    k_change_mmol_l      mmol/L   lab       k_mmol_l - k_prev_mmol_l
    k_rejected_reason    text     contract  reason code of a rejected potassium when none was accepted
    heart_rate_bpm       bpm      cart      rate
    pr_ms                ms       cart      PR interval
    prior_pr_ms          ms       cart      the prior ECG's PR
    qrs_ms               ms       cart      QRS duration
    prior_qrs_ms         ms       cart      the prior ECG's QRS
    p_ii_uv              uV       cart      P amplitude in II
    t_max_uv             uV       cart      the tallest T of the T leads
    t_peak_max_uv        uV       PRACTICE  the tallest peaked T
    t_growth_max_pct     %        LOCAL     the largest T growth against the prior ECG
    t_peaked_leads       leads    PRACTICE  leads with a peaked T (comma-joined)
    t_grown_leads        leads    LOCAL     leads whose T grew >= 50 % (comma-joined)
    t_peaked_precordial  bool     PRACTICE  T >= 1000 uV in V1-V6
    t_peaked_limb        bool     PRACTICE  T >= 600 uV in a limb lead
    t_grown              bool     LOCAL     T grown >= 50 % from an upright prior T >= 100 uV
    qrs_wide             bool     PRACTICE  QRS >= 120 ms
    qrs_widened          bool     LOCAL     QRS widened >= 20 ms against the prior ECG
    pr_long              bool     PRACTICE  PR > 200 ms
    pr_lengthened        bool     LOCAL     PR lengthened >= 40 ms against the prior ECG
    sign_peaked_t        bool     PRACTICE  peaked or grown T
    sign_qrs             bool     PRACTICE  wide or widened QRS
    sign_pr              bool     PRACTICE  long or lengthened PR
    sign_p_flat          bool     LOCAL     |P| in II < 50 uV
    sign_brady           bool     PRACTICE  rate < 50 bpm
    sign_peaked_t_known  bool     LOCAL     the sign's inputs are present (likewise below)
    sign_qrs_known       bool     LOCAL     QRS measured
    sign_pr_known        bool     LOCAL     PR measured
    sign_p_flat_known    bool     LOCAL     P in II measured
    sign_brady_known     bool     LOCAL     rate measured
    sign_count           count    LOCAL     signs present
    hemolyzed_no_sign    bool     PRACTICE  haemolysed, no ECG sign: severity halved
    hemolyzed_lowered    bool     PRACTICE  haemolysed mild/moderate without signs: one tier lower
    k_lowering_24h       bool     site      potassium-lowering treatment in the 24 h before
    tier                 tier     LOCAL     1..4, 5 = no finding (tiers above)
    severity             0..1     LOCAL     score part (below)
    lab_confirmed        bool     LOCAL     a non-haemolysed K >= 5.5 decided it
    lab_gap_min          min      LOCAL     |k_offset_min|
    trend                mmol/L   LOCAL     k_change_mmol_l
    prior_present        bool     LOCAL     a prior ECG exists
    troponin_ratio       ratio    LOCAL     not used here (null)

Sources (citations in screens/rules.toml [sources])
    UKKA-2020      UK Kidney Association. Clinical practice guidelines: treatment of acute
                   hyperkalaemia in adults. 2020. Bands mild 5.5-5.9, moderate 6.0-6.4,
                   severe >= 6.5 mmol/L (checked against secondary pages citing the 2023 update).
    MONTAGUE-2008  Montague BT, Ouellette JR, Buller GK. Retrospective review of the frequency of
                   ECG changes in hyperkalemia. Clin J Am Soc Nephrol 2008;3:324-330.
    PRACTICE       Peaked T > 10 mm precordial / > 6 mm limb (textbook words ">"; worded ">="
                   here, one calibration step more sensitive), QRS >= 120 ms, PR > 200 ms,
                   bradycardia < 50 bpm.
    LOCAL          Change cut points against the prior ECG (T +50 %, QRS +20 ms, PR +40 ms), the
                   100 uV floor for T growth and the 50 uV flat-P cut point: cardiosieve's choices.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from cardiosieve.screens._frame import (
    NO_FINDING,
    age_years,
    build_findings,
    flag,
    fmt,
    fmt_leads,
    fmt_offset,
    num,
    require_columns,
    score_parts,
    sex_masks,
    text,
)
from cardiosieve.screens._leads import DISPLAY_ORDER, LIMB, PRECORDIAL, wide
from cardiosieve.screens._table import column_readers, criterion_table, dress_flagged, fired_rules, lead_lists, split_leads
from cardiosieve.screens.criteria import Rules, load_rules

SCREEN = "hyperkalemia"
REQUIRED = ["ecg_id", "patient_id", "acquired_at", "k_mmol_l", "heart_rate_bpm", "pr_ms", "qrs_ms"]

T_LIMB_LEADS = [lead for lead in LIMB if lead != "aVR"]  # aVR's T is normally inverted: not used for peaking
T_LEADS = PRECORDIAL + T_LIMB_LEADS
SIGN_NAMES = ("peaked_t", "qrs", "pr", "p_flat", "brady")

# Caveat texts; numbers are filled in from the thresholds and settings applied.
CAVEAT_HEMOLYZED = (
    "Haemolysed specimen: haemolysis can raise the measured potassium (pseudohyperkalaemia), so this "
    "value is unreliable, not reassuring. Repeat the sample urgently."
)
CAVEAT_HEMO_LOWERED = "Ranked one tier lower for haemolysis (no ECG sign, potassium below {severe} mmol/L)."
CAVEAT_HEMO_WITHIN_TIER = "Ranked lower within tier {tier} for haemolysis (no ECG sign)."
CAVEAT_HEMO_SEVERE_KEPT = (
    "Ranked lower within tier {tier} for haemolysis (no ECG sign); a potassium of {severe} mmol/L or more "
    "is never ranked below tier {floor} for haemolysis."
)
CAVEAT_HEMO_SIGNS = "ECG signs present: haemolysis does not lower the rank."
CAVEAT_NO_K = "No potassium in the lab window{window}: ECG signs ranked without a laboratory value."
CAVEAT_K_REJECTED = (
    "A potassium result in the lab window{window} was rejected by the data checks (reason {reason}) and not "
    "used: ECG signs ranked without a laboratory value. The run's rejects file lists the row."
)
CAVEAT_NO_PRIOR = "No prior ECG: growth of T, widening of QRS and lengthening of PR not assessed."
CAVEAT_K_LOWERING = "Potassium-lowering treatment was recorded in the 24 h before the ECG."
CAVEAT_NOT_EVALUABLE = "Not evaluable for lack of input: {signs}."

BAND_WORDS = {3: "severe", 2: "moderate", 1: "mild", 0: ""}
SIGN_WORDS = {"peaked_t": "peaked T", "qrs": "QRS", "pr": "PR", "p_flat": "flat P", "brady": "heart rate"}
RANKED_WITHOUT_K = "ECG signs ranked without a laboratory value"

# Tiers (module docstring), named so that code and tests read the same constants.
TIER_K_WITH_SIGNS = 1
TIER_SEVERE = 2
TIER_MODERATE = 3
TIER_MILD = 4
TIER_LEAST = 4
TIER_HEMOLYZED_SEVERE_FLOOR = TIER_SEVERE  # a haemolysed severe potassium never ranks below this


def _window_words(before_h: float, after_h: float) -> str:
    """" (24 h before to 6 h after the ECG)" from the lab window applied; "" when unknown."""
    if np.isnan(before_h) or np.isnan(after_h):
        return ""
    return f" ({before_h:g} h before to {after_h:g} h after the ECG)"


def criteria_hyperkalemia(aligned: pd.DataFrame, leads: pd.DataFrame, rules: Rules | None = None) -> pd.DataFrame:
    """The criterion table (module docstring): one row per aligned ECG, in its order.

    aligned: the aligned table (k_mmol_l, k_offset_min, k_hemolyzed, k_result_id, k_prev_mmol_l,
    k_change_mmol_l, heart_rate_bpm, pr_ms, qrs_ms, prior_ecg_id, prior_pr_ms, prior_qrs_ms,
    k_lowering_24h; K in mmol/L, intervals in ms; optional: k_rejected_reason (str), lab_before_h and
    lab_after_h (the lab window applied, h)). leads: ecg_lead rows (p_amp_uv, t_amp_uv in uV)
    for these ECGs and their priors.
    """
    require_columns(aligned, REQUIRED)
    r = (rules or load_rules())[SCREEN]

    k = num(aligned, "k_mmol_l")
    hr = num(aligned, "heart_rate_bpm")
    pr, prior_pr = num(aligned, "pr_ms"), num(aligned, "prior_pr_ms")
    qrs, prior_qrs = num(aligned, "qrs_ms"), num(aligned, "prior_qrs_ms")
    hemolyzed, _ = flag(aligned, "k_hemolyzed")
    prior_ids = text(aligned, "prior_ecg_id")
    has_prior = pd.notna(prior_ids)

    now = wide(leads, aligned["ecg_id"].to_numpy(), ["t_amp_uv", "p_amp_uv"])
    before = wide(leads, prior_ids, ["t_amp_uv"])
    t_now, t_prior = now["t_amp_uv"][T_LEADS], before["t_amp_uv"][T_LEADS]
    p_ii = now["p_amp_uv"]["II"].to_numpy()

    # ---- potassium bands [UKKA-2020]
    severe = r["k_severe"].met(k)
    moderate = r["k_moderate"].met(k) & ~severe
    mild = r["k_mild"].met(k) & ~severe & ~moderate
    k_known = ~np.isnan(k)
    band = np.select([severe, moderate, mild], [3, 2, 1], 0)

    # ---- ECG signs [PRACTICE; changes against the prior: LOCAL]
    peak_prec = r["t_peaked_precordial"].met(t_now[PRECORDIAL])
    peak_limb = r["t_peaked_limb"].met(t_now[T_LIMB_LEADS])
    peak_leads = pd.concat([peak_prec, peak_limb], axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        growth_pct = (t_now - t_prior) / t_prior * 100.0
    growth_ok = r["t_growth_min_prior"].met(t_prior)
    grown_leads = r["t_growth"].met(growth_pct.where(growth_ok))
    sign_peaked = peak_leads.any(axis=1).to_numpy() | grown_leads.any(axis=1).to_numpy()
    eval_peaked = t_now.notna().any(axis=1).to_numpy()

    qrs_wide = r["qrs_wide"].met(qrs)
    qrs_widened = r["qrs_widened"].met(qrs - prior_qrs)
    sign_qrs = qrs_wide | qrs_widened
    eval_qrs = ~np.isnan(qrs)

    pr_long = r["pr_long"].met(pr)
    pr_lengthened = r["pr_lengthened"].met(pr - prior_pr)
    sign_pr = pr_long | pr_lengthened
    eval_pr = ~np.isnan(pr)

    sign_pflat = r["p_flat_ii"].met(np.abs(p_ii))
    eval_pflat = ~np.isnan(p_ii)

    sign_brady = r["bradycardia"].met(hr)
    eval_brady = ~np.isnan(hr)

    signs = np.column_stack([sign_peaked, sign_qrs, sign_pr, sign_pflat, sign_brady])
    evaluable = np.column_stack([eval_peaked, eval_qrs, eval_pr, eval_pflat, eval_brady])
    n_signs = signs.sum(axis=1)
    any_sign = n_signs > 0
    # No P wave and no PR interval is how the cart reports atrial fibrillation or flutter, far
    # more often than a potassium-flattened P. With a potassium in the window it still counts (a
    # high K explains it); without one it alone does not raise a finding (local choice).
    p_absent_no_pr = sign_pflat & np.isnan(pr)
    any_sign_without_k = (n_signs - p_absent_no_pr) > 0

    # ---- tiers [UKKA-2020: ECG changes with hyperkalaemia are an emergency, from memory]
    tier = np.select(
        [
            (severe | moderate) & any_sign,
            severe,
            moderate | (mild & any_sign),
            mild,
            ~k_known & any_sign_without_k & (n_signs >= int(r.setting("no_k_signs_for_tier3"))),
            ~k_known & any_sign_without_k,
        ],
        [TIER_K_WITH_SIGNS, TIER_SEVERE, TIER_MODERATE, TIER_MILD, TIER_MODERATE, TIER_LEAST],
        NO_FINDING,
    )
    # A haemolysed specimen is unreliable, not reassuring. Without ECG signs it ranks below the
    # same value unhaemolysed (severity halved); mild and moderate also drop one tier (capped),
    # a severe one never drops below tier 2. With ECG signs it keeps its rank.
    hemo_no_sign = k_known & hemolyzed & ~any_sign & (tier < NO_FINDING)
    lowered = hemo_no_sign & ~severe & (tier < TIER_LEAST)
    tier = np.where(lowered, tier + 1, tier)

    k_part = np.clip((k - r["k_mild"].value) / 2.0, 0.0, 1.0)
    severity = np.where(k_known, 0.7 * np.nan_to_num(k_part) + 0.3 * n_signs / 5.0, n_signs / 5.0)
    severity = np.where(hemo_no_sign, severity * 0.5, severity)

    # ---- what the texts show, computed once over the frame
    k_off = num(aligned, "k_offset_min")
    k_lowering, _ = flag(aligned, "k_lowering_24h")
    with np.errstate(invalid="ignore"):
        t_peak_max = t_now.where(peak_leads).max(axis=1).to_numpy()
        t_growth_max = growth_pct.where(grown_leads).max(axis=1).to_numpy()
        t_max = t_now.max(axis=1).to_numpy()
    columns = {
        "k_mmol_l": k, "k_band": np.array([BAND_WORDS[b] for b in range(4)], dtype=object)[band],
        "k_severe": severe, "k_moderate": moderate, "k_mild": mild,
        "k_offset_min": k_off, "k_hemolyzed": hemolyzed,
        "k_prev_mmol_l": num(aligned, "k_prev_mmol_l"), "k_change_mmol_l": num(aligned, "k_change_mmol_l"),
        "k_rejected_reason": np.where(k_known, None, text(aligned, "k_rejected_reason")),
        "heart_rate_bpm": hr, "pr_ms": pr, "prior_pr_ms": prior_pr, "qrs_ms": qrs, "prior_qrs_ms": prior_qrs,
        "p_ii_uv": p_ii, "t_max_uv": t_max, "t_peak_max_uv": t_peak_max, "t_growth_max_pct": t_growth_max,
        "t_peaked_leads": lead_lists(peak_leads, T_LEADS), "t_grown_leads": lead_lists(grown_leads, T_LEADS),
        "t_peaked_precordial": peak_prec.any(axis=1).to_numpy(), "t_peaked_limb": peak_limb.any(axis=1).to_numpy(),
        "t_grown": grown_leads.any(axis=1).to_numpy(),
        "qrs_wide": qrs_wide, "qrs_widened": qrs_widened, "pr_long": pr_long, "pr_lengthened": pr_lengthened,
        **{f"sign_{name}": signs[:, j] for j, name in enumerate(SIGN_NAMES)},
        **{f"sign_{name}_known": evaluable[:, j] for j, name in enumerate(SIGN_NAMES)},
        "sign_count": n_signs.astype("int64"),
        "hemolyzed_no_sign": hemo_no_sign, "hemolyzed_lowered": lowered,
        "k_lowering_24h": k_lowering,
        "tier": tier.astype("int64"),
        "severity": severity, "lab_confirmed": k_known & ~hemolyzed & (band > 0),
        "lab_gap_min": np.where(k_known, np.abs(k_off), np.nan), "trend": num(aligned, "k_change_mmol_l"),
        "prior_present": has_prior, "troponin_ratio": np.nan,
    }
    return criterion_table(aligned, columns)


# Thresholds and the criterion column that says each one fired (evidence `rules`, in this order).
FIRED = (
    ("k_severe", "k_severe"),
    ("k_moderate", "k_moderate"),
    ("k_mild", "k_mild"),
    ("t_peaked_precordial", "t_peaked_precordial"),
    ("t_peaked_limb", "t_peaked_limb"),
    ("t_growth", "t_grown"),
    ("qrs_wide", "qrs_wide"),
    ("qrs_widened", "qrs_widened"),
    ("pr_long", "pr_long"),
    ("pr_lengthened", "pr_lengthened"),
    ("p_flat_ii", "sign_p_flat"),
    ("bradycardia", "sign_brady"),
)


def screen_hyperkalemia(aligned: pd.DataFrame, leads: pd.DataFrame, rules: Rules | None = None, *,
                       with_criteria: bool = False):
    """Hyperkalemia findings for the aligned ECGs: the flagged rows of `criteria_hyperkalemia`,
    dressed. Returns the findings frame (FINDING_COLUMNS); with_criteria, (findings, criterion table)."""
    rules = rules or load_rules()
    return dress_flagged(aligned, lambda: (criteria_hyperkalemia(aligned, leads, rules), None),
                         lambda table, _, hit: _dress(aligned, table, hit, rules[SCREEN]), with_criteria)


def _dress(aligned: pd.DataFrame, table: pd.DataFrame, hit: np.ndarray, r) -> pd.DataFrame:
    """Summary, caveats, evidence and score parts of the flagged rows, read off the criterion table."""
    col, _ = column_readers(table)
    k, k_off, k_prev, k_change = (num(table, c) for c in ("k_mmol_l", "k_offset_min", "k_prev_mmol_l", "k_change_mmol_l"))
    k_known = ~np.isnan(k)
    band_words = col("k_band")
    severe = col("k_severe").astype(bool)
    hemolyzed = col("k_hemolyzed").astype(bool)
    hr, pr, prior_pr, qrs, prior_qrs = (num(table, c) for c in ("heart_rate_bpm", "pr_ms", "prior_pr_ms", "qrs_ms", "prior_qrs_ms"))
    p_ii, t_max, t_peak_max, t_growth_max = (num(table, c) for c in ("p_ii_uv", "t_max_uv", "t_peak_max_uv", "t_growth_max_pct"))
    signs = np.column_stack([col(f"sign_{name}").astype(bool) for name in SIGN_NAMES])
    evaluable = np.column_stack([col(f"sign_{name}_known").astype(bool) for name in SIGN_NAMES])
    sign_peaked, sign_qrs, sign_pr, sign_pflat, sign_brady = signs.T
    any_sign = signs.any(axis=1)
    n_signs, tier, severity = col("sign_count"), col("tier"), num(table, "severity")
    lowered = col("hemolyzed_lowered").astype(bool)
    has_prior = col("prior_present").astype(bool)
    k_lowering = col("k_lowering_24h").astype(bool)
    k_rejected = col("k_rejected_reason")
    peaked_names, grown_names = col("t_peaked_leads"), col("t_grown_leads")
    prior_qrs_known = ~np.isnan(prior_qrs)
    k_ids = text(aligned, "k_result_id")
    prior_ids = text(aligned, "prior_ecg_id")
    # For the reviewer's context only (the rule reads neither): every screen's evidence has them.
    female, male, _ = sex_masks(aligned)
    age = age_years(aligned)
    # Optional input: the lab window the alignment applied (hours), for the texts.
    window_before, window_after = num(aligned, "lab_before_h"), num(aligned, "lab_after_h")
    severe_value = f"{r['k_severe'].value:g}"
    rules_of_row = fired_rules(table, [(r[key], column) for key, column in FIRED], hit)
    rows = aligned.iloc[hit]
    parts, summaries, evidence, caveats = [], [], [], []
    for j_row, i in enumerate(hit):
        sign_state = {
            name: (bool(signs[i, j]) if evaluable[i, j] or signs[i, j] else None)
            for j, name in enumerate(SIGN_NAMES)
        }
        t_peak_names = split_leads(peaked_names[i])
        t_grown_names = split_leads(grown_names[i])

        rejected = None if k_known[i] else k_rejected[i]
        window = _window_words(window_before[i], window_after[i])
        words = []
        if k_known[i]:
            kw = f"K {fmt(k[i], 1)} mmol/L ({band_words[i]}) collected {fmt_offset(k_off[i])}"
            if hemolyzed[i]:
                kw += ", haemolysed"
            if not np.isnan(k_prev[i]):
                kw += f" (previous {fmt(k_prev[i], 1)})"
            words.append(kw)
        elif rejected is not None:
            words.append(f"Potassium result rejected ({rejected})")
        else:
            words.append(f"No potassium in the lab window{window}")
        sign_words = []
        if sign_qrs[i]:
            sign_words.append(f"QRS {fmt(qrs[i])} ms" + (f" (prior {fmt(prior_qrs[i])} ms)" if prior_qrs_known[i] else ""))
        if sign_peaked[i]:
            if t_peak_names:
                tmax_mv = t_peak_max[i] / 1000.0
                sign_words.append(f"T up to {fmt(tmax_mv, 1)} mV in {fmt_leads(t_peak_names, DISPLAY_ORDER)}")
            if t_grown_names:
                g = t_growth_max[i]
                sign_words.append(f"T grown up to {fmt(g)} % since the prior ECG in {fmt_leads(t_grown_names, DISPLAY_ORDER)}")
        if sign_pr[i]:
            sign_words.append(f"PR {fmt(pr[i])} ms" + (f" (prior {fmt(prior_pr[i])} ms)" if not np.isnan(prior_pr[i]) else ""))
        if sign_pflat[i]:
            sign_words.append(f"P in II flat ({fmt(p_ii[i])} uV)")
        if sign_brady[i]:
            sign_words.append(f"heart rate {fmt(hr[i])} bpm")
        unknown = [name for name, state in sign_state.items() if state is None]
        if sign_words:
            words.extend(sign_words)
        elif k_known[i] and unknown:
            not_assessed = ", ".join(SIGN_WORDS[name] for name in unknown)
            words.append(f"no ECG sign of hyperkalaemia among those assessed (not assessable: {not_assessed}; "
                         "the ECG is insensitive)")
        elif k_known[i]:
            words.append("no ECG sign of hyperkalaemia (the ECG is insensitive)")
        if not k_known[i]:
            words.append(RANKED_WITHOUT_K)
        summaries.append("; ".join(words))

        cav = []
        if k_known[i] and hemolyzed[i]:
            cav.append(CAVEAT_HEMOLYZED)
            if any_sign[i]:
                cav.append(CAVEAT_HEMO_SIGNS)
            elif lowered[i]:
                cav.append(CAVEAT_HEMO_LOWERED.format(severe=severe_value))
            elif severe[i]:
                cav.append(CAVEAT_HEMO_SEVERE_KEPT.format(tier=tier[i], severe=severe_value,
                                                          floor=TIER_HEMOLYZED_SEVERE_FLOOR))
            else:
                cav.append(CAVEAT_HEMO_WITHIN_TIER.format(tier=tier[i]))
        if not k_known[i] and rejected is not None:
            cav.append(CAVEAT_K_REJECTED.format(window=window, reason=rejected))
        elif not k_known[i]:
            cav.append(CAVEAT_NO_K.format(window=window))
        if not has_prior[i]:
            cav.append(CAVEAT_NO_PRIOR)
        if unknown:
            cav.append(CAVEAT_NOT_EVALUABLE.format(signs=", ".join(unknown)))
        if k_lowering[i]:
            cav.append(CAVEAT_K_LOWERING)
        caveats.append(cav)

        rules_fired = rules_of_row[j_row]
        evidence.append(
            {
                "values": {
                    "k_mmol_l": k[i],
                    "k_band": band_words[i] or None,
                    "k_offset_min": k_off[i],
                    "k_hemolyzed": bool(hemolyzed[i]),
                    "k_result_id": k_ids[i],
                    "k_rejected_reason": rejected,
                    "k_prev_mmol_l": k_prev[i],
                    "k_change_mmol_l": k_change[i],
                    "heart_rate_bpm": hr[i],
                    "pr_ms": pr[i],
                    "prior_pr_ms": prior_pr[i],
                    "qrs_ms": qrs[i],
                    "prior_qrs_ms": prior_qrs[i],
                    "p_ii_uv": p_ii[i],
                    "t_max_uv": t_max[i],
                    "t_peaked_leads": t_peak_names,
                    "t_grown_leads": t_grown_names,
                    "prior_ecg_id": prior_ids[i],
                    "k_lowering_24h": bool(k_lowering[i]),
                    "sex": "F" if female[i] else ("M" if male[i] else None),
                    "age_years": age[i],
                },
                "signs": sign_state,
                "rules": rules_fired,
            }
        )
        parts.append(
            score_parts(
                severity=severity[i],
                lab_confirmed=bool(col("lab_confirmed")[i]),
                lab_gap_min=k_off[i] if k_known[i] else np.nan,
                trend=k_change[i],
                prior_present=has_prior[i],
                sign_count=int(n_signs[i]),
                hemolyzed=int(k_known[i] and hemolyzed[i]),
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
