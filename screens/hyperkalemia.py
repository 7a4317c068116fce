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

from screens._frame import (
    NO_FINDING,
    build_findings,
    empty_findings,
    fired,
    flag,
    fmt,
    fmt_leads,
    fmt_offset,
    num,
    require_columns,
    score_parts,
    text,
)
from screens._leads import DISPLAY_ORDER, PRECORDIAL, lead_names, wide
from screens.criteria import Rules, load_rules

SCREEN = "hyperkalemia"
REQUIRED = ["ecg_id", "patient_id", "acquired_at", "k_mmol_l", "heart_rate_bpm", "pr_ms", "qrs_ms"]

T_LIMB_LEADS = ["I", "II", "III", "aVL", "aVF"]  # aVR's T is normally inverted: not used for peaking
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


def screen_hyperkalemia(aligned: pd.DataFrame, leads: pd.DataFrame, rules: Rules | None = None) -> pd.DataFrame:
    """Hyperkalemia findings for the aligned ECGs.

    aligned: the aligned table (k_mmol_l, k_offset_min, k_hemolyzed, k_result_id, k_prev_mmol_l,
    k_change_mmol_l, heart_rate_bpm, pr_ms, qrs_ms, prior_ecg_id, prior_pr_ms, prior_qrs_ms,
    k_lowering_24h; K in mmol/L, intervals in ms; optional: k_rejected_reason (str), lab_before_h and
    lab_after_h (the lab window applied, h)). leads: ecg_lead rows (p_amp_uv, t_amp_uv in uV)
    for these ECGs and their priors. Returns the findings frame (FINDING_COLUMNS).
    """
    if len(aligned) == 0:
        return empty_findings()
    require_columns(aligned, REQUIRED)
    r = (rules or load_rules())[SCREEN]
    n = len(aligned)

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

    hit = np.flatnonzero(tier < NO_FINDING)
    if len(hit) == 0:
        return empty_findings()

    # ---- evidence, only for the flagged rows
    k_off = num(aligned, "k_offset_min")
    k_prev, k_change = num(aligned, "k_prev_mmol_l"), num(aligned, "k_change_mmol_l")
    k_ids = text(aligned, "k_result_id")
    k_lowering, _ = flag(aligned, "k_lowering_24h")
    prior_qrs_known = ~np.isnan(prior_qrs)
    # Optional inputs: the reason code of a rejected potassium (only read when none was accepted)
    # and the lab window the alignment applied (hours), for the texts.
    k_rejected = text(aligned, "k_rejected_reason")
    window_before, window_after = num(aligned, "lab_before_h"), num(aligned, "lab_after_h")
    severe_value = f"{r['k_severe'].value:g}"
    rows = aligned.iloc[hit]
    parts, summaries, evidence, caveats = [], [], [], []
    for i in hit:
        sign_state = {
            name: (bool(signs[i, j]) if evaluable[i, j] or signs[i, j] else None)
            for j, name in enumerate(SIGN_NAMES)
        }
        t_peak_names = lead_names(peak_leads, i)
        t_grown_names = lead_names(grown_leads, i)
        t_max = np.nanmax(t_now.iloc[i].to_numpy()) if eval_peaked[i] else np.nan

        rejected = None if k_known[i] else k_rejected[i]
        window = _window_words(window_before[i], window_after[i])
        words = []
        if k_known[i]:
            kw = f"K {fmt(k[i], 1)} mmol/L ({BAND_WORDS[band[i]]}) collected {fmt_offset(k_off[i])}"
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
                tmax_mv = np.nanmax(t_now.iloc[i][t_peak_names].to_numpy()) / 1000.0
                sign_words.append(f"T up to {fmt(tmax_mv, 1)} mV in {fmt_leads(t_peak_names, DISPLAY_ORDER)}")
            if t_grown_names:
                g = np.nanmax(growth_pct.iloc[i][t_grown_names].to_numpy())
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

        rules_fired = fired(
            (r["k_severe"], severe[i]),
            (r["k_moderate"], moderate[i]),
            (r["k_mild"], mild[i]),
            (r["t_peaked_precordial"], bool(peak_prec.iloc[i].any())),
            (r["t_peaked_limb"], bool(peak_limb.iloc[i].any())),
            (r["t_growth"], bool(t_grown_names)),
            (r["qrs_wide"], qrs_wide[i]),
            (r["qrs_widened"], qrs_widened[i]),
            (r["pr_long"], pr_long[i]),
            (r["pr_lengthened"], pr_lengthened[i]),
            (r["p_flat_ii"], sign_pflat[i]),
            (r["bradycardia"], sign_brady[i]),
        )
        evidence.append(
            {
                "values": {
                    "k_mmol_l": k[i],
                    "k_band": BAND_WORDS[band[i]] or None,
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
                    "t_max_uv": t_max,
                    "t_peaked_leads": t_peak_names,
                    "t_grown_leads": t_grown_names,
                    "prior_ecg_id": prior_ids[i],
                    "k_lowering_24h": bool(k_lowering[i]),
                },
                "signs": sign_state,
                "rules": rules_fired,
            }
        )
        parts.append(
            score_parts(
                severity=severity[i],
                lab_confirmed=k_known[i] and not hemolyzed[i] and band[i] > 0,
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
