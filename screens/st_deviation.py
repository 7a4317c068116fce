"""Acute ST deviation: J-point elevation meeting the universal-definition cut points, and its look-alikes.

What it flags (one finding per ECG; its `evidence.values.pattern` says which)
    st_elevation      J-point elevation meeting the cut point in two contiguous leads [UDMI-2018]:
                      >= 100 uV in all leads other than V2-V3; V2-V3 >= 200 uV men >= 40 y,
                      >= 250 uV men < 40 y, >= 150 uV women; V3R/V4R >= 50 uV (>= 100 uV men
                      < 30 y); V7-V9 >= 50 uV (>= 100 uV men < 40 y). A single lead never suffices.
                      Age is whole years at the ECG (aligned age_years, from birth_date).
    posterior_depression
                      ST depression >= 50 uV in two contiguous of V1-V3 with a dominant R
                      (R/|S| > 1) in a depressed lead: posterior involvement [UDMI-2018]. With
                      elevation elsewhere it adds "posterior" to that finding's territories.
    avr_widespread_depression
                      ST elevation >= 100 uV in aVR with ST depression >= 50 uV in >= 6 other
                      leads, reported as its own pattern (no territory) [PRACTICE]; it takes
                      precedence over posterior_depression (see the pattern choice below).
    diffuse_elevation elevation over >= 3 walls (inferior, lateral, anterior/septal) without
                      reciprocal depression: pericarditis-like, reported as such and NOT as a
                      territory [PRACTICE; wall count LOCAL].
    lbbb_or_paced     QRS >= 120 ms with a left-bundle-branch-block shape from the lead amplitudes
                      (V1 dominant S, I and V6 dominant R; LOCAL reading of the shape), or a paced
                      rhythm: the plain cut points are NOT applied; instead Sgarbossa (concordant
                      STE >= 100 uV: 5; concordant STD >= 100 uV in V1-V3: 3; discordant STE
                      >= 500 uV: 2; positive at >= 3 points) [SGARBOSSA-1996] and the
                      Smith-modified rule (unweighted: either of Sgarbossa's first two, or
                      discordant STE >= 100 uV with ST/S <= -0.25) [SMITH-2012].
    not_evaluable     (setting report_not_evaluable) any of the 12 standard leads has no ST value
                      and nothing else was found: tier 4, never a silent pass.

Contiguity: limb-lead circle aVL, I, -aVR, II, aVF, III and the precordial chain
V4R, V3R, V1 ... V6, V7, V8, V9 (screens/_leads.py), as the project issue defines it. So II
with III is not a pair (aVF lies between); UDMI's anatomic grouping would count it, but
aVF = (II + III) / 2 (Einthoven/Goldberger), so II and III both elevated puts aVF there too,
up to measurement noise. V3R-V1 and V6-V7 join the chain as anatomic neighbours (LOCAL). Territories, from the leads that meet the
cut points in a contiguous pair: inferior II, III, aVF; lateral I, aVL, V5, V6; septal V1, V2;
anterior V3, V4 (UDMI groups V1-V4 as "anterior and septal"; the split is PRACTICE);
posterior V7-V9 (or V1-V3 depression as above); right_ventricular V3R, V4R. -aVR joins limb
contiguity but names no territory of its own.

Reciprocal depression (>= 50 uV in two contiguous leads of the opposite wall) is recorded and
raises confidence: inferior <-> I, aVL; lateral, anterior, septal <-> II, III, aVF;
posterior (from V7-V9) <-> V1-V3; right_ventricular <-> I, aVL.

Tiers (1 most urgent) and what moves them
    base  1 elevation with reciprocal depression; Sgarbossa positive
          2 elevation without reciprocal depression; Smith-modified positive only;
            posterior depression; aVR elevation with widespread depression
          3 diffuse (pericarditis-like) elevation
          4 not evaluable
    +1 (less urgent) the same deviation already on the prior ECG (every lead that fires now
       fired on the prior); left ventricular hypertrophy by voltage (Sokolow-Lyon S V1 +
       max R V5/V6 >= 3500 uV [SOKOLOW-1949]; Cornell R aVL + S V3 > 2800 uV men, > 2000 uV
       women [CORNELL-1985]) on the plain path
    -1 (more urgent) troponin in the window above its assay's upper reference limit
       (trop_max_ratio > 1 [UDMI-2018]) or rising (trop_delta_ng_l >= 5 ng/L, LOCAL; assay
       dependent, sites should set their own)
    clipped to 1..4.

Unknown sex: the most sensitive cut points (V2-V3 150 uV; V3R/V4R and V7-V9 50 uV) and the
women's (lower) Cornell limit, with a caveat. A man of unknown age gets the older men's (lower)
cut points, with a caveat. The prior ECG is judged with this ECG's sex and age.

score_parts
    severity       elevation and diffuse: 0.4 * clip(max ST / cut point - 1, 0..1)
                   + 0.3 * min(leads, 6) / 6 + 0.3 * reciprocal; lbbb_or_paced: Sgarbossa
                   points / 10 (at least 0.3); posterior: 0.5 * clip(deepest / 50 uV - 1)
                   + 0.5 * leads / 3; aVR: 0.5 * clip(aVR ST / 100 uV - 1) + 0.5 * share of
                   the 11 other leads depressed; 0 when not evaluable
    lab_confirmed  1 when troponin is above its URL or rising
    lab_gap_min    |trop_offset_min| (null without troponin)
    trend          trop_delta_ng_l (signed; null with < 2 results)
    prior_present  1 when a prior ECG exists
    troponin_ratio trop_max_ratio (null without troponin)
    max_st_uv, leads_meeting, reciprocal  extra parts

Sources (citations in screens/rules.toml [sources])
    UDMI-2018       Thygesen K, Alpert JS, Jaffe AS, et al. Fourth universal definition of
                    myocardial infarction (2018). Circulation 2018;138:e618-e651.
    SGARBOSSA-1996  Sgarbossa EB, Pinski SL, Barbagelata A, et al. N Engl J Med 1996;334:481-487.
    SMITH-2012      Smith SW, Dodd KW, Henry TD, Dvorak DM, Pearce LA. Ann Emerg Med
                    2012;60:766-776 (ST/S <= -0.25, unweighted rule; checked against the
                    abstract and the validation summary).
    SOKOLOW-1949    Sokolow M, Lyon TP. Am Heart J 1949;37:161-186.
    CORNELL-1985    Casale PN, Devereux RB, Kligfield P, et al. J Am Coll Cardiol 1985;6:572-580.
    PRACTICE        aVR pattern (aVR >= 100 uV, >= 6 leads with depression: from memory),
                    pericarditis pattern, -aVR in the Cabrera circle.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from screens._frame import (
    NO_FINDING,
    age_years,
    build_findings,
    empty_findings,
    fired,
    flag,
    fmt,
    fmt_leads,
    num,
    require_columns,
    score_parts,
    sex_masks,
    text,
)
from screens._leads import ALL_LEADS, CONTIGUOUS_PAIRS, DISPLAY_ORDER, STANDARD, pairs, wide
from screens.criteria import Rules, ScreenRules, load_rules

SCREEN = "st_deviation"
REQUIRED = ["ecg_id", "patient_id", "acquired_at", "qrs_ms"]

TERRITORY_ORDER = ["inferior", "lateral", "anterior", "septal", "posterior", "right_ventricular"]
TERRITORY_LEADS = {
    "inferior": ["II", "III", "aVF"],
    "lateral": ["I", "aVL", "V5", "V6"],
    "anterior": ["V3", "V4"],
    "septal": ["V1", "V2"],
    "posterior": ["V7", "V8", "V9"],
    "right_ventricular": ["V3R", "V4R"],
}
WALLS = {"inferior": ["inferior"], "lateral": ["lateral"], "anterior": ["anterior", "septal"]}
OPPOSITE_PAIRS = {
    "inferior": pairs(["aVL", "I"]),
    "lateral": pairs(["II", "aVF", "III"]),
    "anterior": pairs(["II", "aVF", "III"]),
    "septal": pairs(["II", "aVF", "III"]),
    "posterior": pairs(["V1", "V2", "V3"]),
    "right_ventricular": pairs(["aVL", "I"]),
}
V1_V3 = ["V1", "V2", "V3"]
WIDESPREAD_LEADS = [l for l in STANDARD if l != "aVR"]
LEADS_AND_MINUS_AVR = [*ALL_LEADS, "-aVR"]

# Sgarbossa points [SGARBOSSA-1996]
SGARBOSSA_CONCORDANT_STE_POINTS = 5
SGARBOSSA_CONCORDANT_STD_POINTS = 3
SGARBOSSA_DISCORDANT_STE_POINTS = 2

P_ELEVATION = "st_elevation"
P_POSTERIOR = "posterior_depression"
P_AVR = "avr_widespread_depression"
P_DIFFUSE = "diffuse_elevation"
P_LBBB = "lbbb_or_paced"
P_NOT_EVALUABLE = "not_evaluable"

CAVEAT_LBBB = (
    "QRS >= 120 ms with a left-bundle-branch-block shape: judged by Sgarbossa (1996) and the "
    "Smith-modified ST/S ratio (2012) instead of the plain cut points."
)
CAVEAT_PACED = "Paced rhythm: judged by Sgarbossa (1996) and the Smith-modified ST/S ratio (2012) instead of the plain cut points."
CAVEAT_WIDE_OTHER = "QRS >= 120 ms without a left-bundle-branch-block shape: ST deviation in V1-V3 may be secondary."
CAVEAT_WIDE_SHAPE_UNKNOWN = "QRS >= 120 ms and the leads that show a bundle-branch-block shape are missing: plain cut points used."
CAVEAT_LVH = (
    "Left ventricular hypertrophy by voltage (Sokolow-Lyon or Cornell): ST deviation may be secondary "
    "repolarisation; ranked one tier lower."
)
CAVEAT_DIFFUSE = (
    "Diffuse ST elevation across several territories without reciprocal depression: pericarditis-like; "
    "reported as a pattern, not as a territory."
)
CAVEAT_SAME_AS_PRIOR = "The same ST deviation was on the prior ECG ({gap} earlier): possibly old; ranked one tier lower."
CAVEAT_NO_PRIOR = "No prior ECG: whether the ST deviation is new cannot be judged."
CAVEAT_PRIOR_NO_LEADS = "The prior ECG has no lead measurements: whether the ST deviation is new cannot be judged."
CAVEAT_TROPONIN = "Troponin above the assay's upper reference limit or rising in the window: ranked one tier higher."
CAVEAT_SEX_UNKNOWN = "Sex unknown: the most sensitive cut points were used (V2-V3 150 uV; V3R/V4R and V7-V9 50 uV)."
CAVEAT_AGE_UNKNOWN = "Age unknown: the older men's cut points, the more sensitive, were used."
CAVEAT_MISSING_LEADS = "No ST value for {leads}: not evaluable there."


def _pair_hits(mask: pd.DataFrame, pair_list: list[tuple[str, str]]) -> tuple[np.ndarray, pd.DataFrame]:
    """(any pair met per row, bool lead frame of the leads in a met pair)."""
    m = mask.to_numpy(dtype=bool)
    col = {c: j for j, c in enumerate(mask.columns)}
    in_pair = np.zeros_like(m)
    any_pair = np.zeros(len(mask), dtype=bool)
    for a, b in pair_list:
        both = m[:, col[a]] & m[:, col[b]]
        any_pair |= both
        in_pair[:, col[a]] |= both
        in_pair[:, col[b]] |= both
    return any_pair, pd.DataFrame(in_pair, index=mask.index, columns=mask.columns)


def _cut_points(r: ScreenRules, female, male, sex_unknown, age) -> dict[str, tuple[list, list]]:
    """Per lead, the (conditions, thresholds) choosing the elevation cut point for each row."""
    age_known = ~np.isnan(age)
    v23_older = r["age_v2v3_older"].met(age) | ~age_known  # unknown age: the older (lower) cut point
    right_young = male & age_known & ~r["age_right_older"].met(age)
    post_young = male & age_known & ~r["age_posterior_older"].met(age)
    women_like = female | sex_unknown  # unknown sex: the women's, the most sensitive
    spec = {}
    for lead in LEADS_AND_MINUS_AVR:
        if lead in ("V2", "V3"):
            spec[lead] = (
                [women_like, male & v23_older, male],
                [r["ste_v2v3_women"], r["ste_v2v3_men_older"], r["ste_v2v3_men_younger"]],
            )
        elif lead in ("V3R", "V4R"):
            spec[lead] = ([right_young, np.ones_like(female)], [r["ste_right_men_younger"], r["ste_right"]])
        elif lead in ("V7", "V8", "V9"):
            spec[lead] = ([post_young, np.ones_like(female)], [r["ste_posterior_men_younger"], r["ste_posterior"]])
        else:
            spec[lead] = ([np.ones_like(female)], [r["ste_general"]])
    return spec


def _evaluate(st, ra, sa, qrs, paced, female, sex_unknown, spec, r: ScreenRules) -> dict[str, Any]:
    """All criteria for one set of lead frames (this ECG or its prior), as masks over the rows."""
    n = len(st)
    # ---- elevation against each lead's cut point [UDMI-2018]
    meets = pd.DataFrame(False, index=st.index, columns=LEADS_AND_MINUS_AVR)
    cut = pd.DataFrame(np.nan, index=st.index, columns=LEADS_AND_MINUS_AVR)
    for lead, (conds, ths) in spec.items():
        x = st[lead].to_numpy()
        meets[lead] = np.select(conds, [th.met(x) for th in ths], False)
        cut[lead] = np.select(conds, [th.value for th in ths], np.nan)
    elevated, qualifying = _pair_hits(meets, CONTIGUOUS_PAIRS)

    depressed = r["std_reciprocal"].met(st)
    territory = {t: qualifying[leads].any(axis=1).to_numpy() for t, leads in TERRITORY_LEADS.items()}
    recip_leads = pd.DataFrame(False, index=st.index, columns=LEADS_AND_MINUS_AVR)
    recip = np.zeros(n, dtype=bool)
    for t, prs in OPPOSITE_PAIRS.items():
        hit, leads_hit = _pair_hits(depressed, prs)
        hit = hit & territory[t]
        recip |= hit
        recip_leads = recip_leads | leads_hit.mul(hit, axis=0).astype(bool)

    # ---- posterior involvement: V1-V3 depression with dominant R [UDMI-2018]
    with np.errstate(invalid="ignore", divide="ignore"):
        r_over_s = ra[V1_V3] / sa[V1_V3].abs()
    dominant_r = r["dominant_r"].met(r_over_s)
    post_dep_mask = r["std_posterior_v1v3"].met(st[V1_V3])
    post_any, post_leads = _pair_hits(post_dep_mask, pairs(V1_V3))
    post_dep = post_any & (post_leads[V1_V3] & dominant_r).any(axis=1).to_numpy()
    post_leads = post_leads.mul(post_dep, axis=0).astype(bool)
    territory["posterior"] = territory["posterior"] | post_dep

    # ---- aVR elevation with widespread depression [PRACTICE]
    wide_dep = r["widespread_depression"].met(st[WIDESPREAD_LEADS])
    avr = r["avr_elevation"].met(st["aVR"].to_numpy()) & r["widespread_depression_leads"].met(wide_dep.sum(axis=1).to_numpy())

    # ---- diffuse, pericarditis-like
    walls = sum(np.logical_or.reduce([territory[t] for t in ts]) for ts in WALLS.values())
    diffuse = elevated & ~recip & r["diffuse_territories"].met(walls)

    # ---- LBBB shape or paced: Sgarbossa / Smith-modified [SGARBOSSA-1996, SMITH-2012]
    dom_s = sa.abs() > ra
    dom_r = ra > sa.abs()
    lbbb = r["lbbb_qrs"].met(qrs) & dom_s["V1"].to_numpy() & dom_r["I"].to_numpy() & dom_r["V6"].to_numpy()
    shape_unknown = r["lbbb_qrs"].met(qrs) & ra[["V1", "I", "V6"]].isna().any(axis=1).to_numpy()
    confounded = lbbb | paced
    s12, r12, st12 = sa[STANDARD], ra[STANDARD], st[STANDARD]
    pos, neg = dom_r[STANDARD], dom_s[STANDARD]
    c1 = pos & r["sgarbossa_concordant_ste"].met(st12)
    c2 = (neg & r["sgarbossa_concordant_std_v1v3"].met(st12))[V1_V3].reindex(columns=STANDARD, fill_value=False)
    c3 = neg & r["sgarbossa_discordant_ste"].met(st12)
    with np.errstate(invalid="ignore", divide="ignore"):
        st_s = st12 / s12.where(s12 < 0)
    smith3 = neg & r["smith_discordant_ste"].met(st12) & r["smith_st_s_ratio"].met(st_s)
    sg_points = (
        SGARBOSSA_CONCORDANT_STE_POINTS * c1.any(axis=1).to_numpy()
        + SGARBOSSA_CONCORDANT_STD_POINTS * c2.any(axis=1).to_numpy()
        + SGARBOSSA_DISCORDANT_STE_POINTS * c3.any(axis=1).to_numpy()
    )
    sgarbossa = r["sgarbossa_score"].met(sg_points)
    smith = c1.any(axis=1).to_numpy() | c2.any(axis=1).to_numpy() | smith3.any(axis=1).to_numpy()

    # ---- LVH voltage [SOKOLOW-1949, CORNELL-1985]
    sokolow_uv = sa["V1"].abs() + ra[["V5", "V6"]].max(axis=1)
    cornell_uv = ra["aVL"] + sa["V3"].abs()
    sokolow = r["sokolow_lyon"].met(sokolow_uv.to_numpy())
    cornell = np.where(female | sex_unknown, r["cornell_women"].met(cornell_uv.to_numpy()), r["cornell_men"].met(cornell_uv.to_numpy()))
    lvh = sokolow | cornell

    return {
        "meets": meets, "cut": cut, "elevated": elevated, "qualifying": qualifying, "territory": territory,
        "recip": recip, "recip_leads": recip_leads, "post_dep": post_dep, "post_leads": post_leads,
        "avr": avr, "wide_dep": wide_dep, "diffuse": diffuse, "lbbb": lbbb, "shape_unknown": shape_unknown,
        "confounded": confounded, "c1": c1, "c2": c2, "c3": c3, "smith3": smith3, "st_s": st_s,
        "sg_points": sg_points, "sgarbossa": sgarbossa, "smith": smith, "sokolow": sokolow,
        "cornell": cornell, "lvh": lvh, "sokolow_uv": sokolow_uv.to_numpy(), "cornell_uv": cornell_uv.to_numpy(),
    }


def _fired_leads(ev: dict[str, Any], pattern: np.ndarray) -> pd.DataFrame:
    """Per row, the leads that made the finding of its pattern (for the prior comparison and the text)."""
    sg = (ev["c1"] | ev["c2"] | ev["c3"] | ev["smith3"]).reindex(columns=LEADS_AND_MINUS_AVR, fill_value=False)
    post = ev["post_leads"].reindex(columns=LEADS_AND_MINUS_AVR, fill_value=False)
    avr = pd.DataFrame(False, index=sg.index, columns=LEADS_AND_MINUS_AVR)
    avr["aVR"] = True
    pat = pd.Series(pattern, index=sg.index)
    out = pd.DataFrame(False, index=sg.index, columns=LEADS_AND_MINUS_AVR)
    for name, frame in (
        (P_ELEVATION, ev["qualifying"]), (P_DIFFUSE, ev["qualifying"]), (P_LBBB, sg), (P_POSTERIOR, post), (P_AVR, avr)
    ):
        out = out | frame.astype(bool).mul(pat.eq(name).to_numpy(), axis=0).astype(bool)
    return out


def _prior_has(ev_prior: dict[str, Any], pattern: np.ndarray) -> pd.DataFrame:
    """Per row, the leads whose criterion of the row's pattern was met on the prior ECG (lead by lead)."""
    sg = (ev_prior["c1"] | ev_prior["c2"] | ev_prior["c3"] | ev_prior["smith3"]).reindex(
        columns=LEADS_AND_MINUS_AVR, fill_value=False
    )
    post = ev_prior["post_leads"].reindex(columns=LEADS_AND_MINUS_AVR, fill_value=False)
    avr = pd.DataFrame(False, index=sg.index, columns=LEADS_AND_MINUS_AVR)
    avr["aVR"] = ev_prior["avr"]
    pat = pd.Series(pattern, index=sg.index)
    out = pd.DataFrame(False, index=sg.index, columns=LEADS_AND_MINUS_AVR)
    for name, frame in (
        (P_ELEVATION, ev_prior["meets"]), (P_DIFFUSE, ev_prior["meets"]), (P_LBBB, sg), (P_POSTERIOR, post), (P_AVR, avr)
    ):
        out = out | frame.astype(bool).mul(pat.eq(name).to_numpy(), axis=0).astype(bool)
    return out


def _gap_words(hours: float) -> str:
    if np.isnan(hours):
        return "some time"
    return f"{hours:.0f} h" if hours < 72 else f"{hours / 24:.0f} days"


def screen_st_deviation(aligned: pd.DataFrame, leads: pd.DataFrame, rules: Rules | None = None) -> pd.DataFrame:
    """Acute ST deviation findings for the aligned ECGs.

    aligned: the aligned table (qrs_ms, paced, sex, age_years, prior_ecg_id, prior_gap_h, prior_qrs_ms,
    trop_ng_l, trop_offset_min, trop_max_ratio, trop_delta_ng_l, trop_n). leads: ecg_lead rows
    (st_j_uv, r_amp_uv, s_amp_uv in uV) for these ECGs and their prior ECGs.
    Returns the findings frame (FINDING_COLUMNS), with territories for elevation findings.
    """
    if len(aligned) == 0:
        return empty_findings()
    require_columns(aligned, REQUIRED)
    r = (rules or load_rules())[SCREEN]
    n = len(aligned)

    female, male, sex_unknown = sex_masks(aligned)
    age = age_years(aligned)
    qrs, prior_qrs = num(aligned, "qrs_ms"), num(aligned, "prior_qrs_ms")
    paced, _ = flag(aligned, "paced")
    prior_ids = text(aligned, "prior_ecg_id")
    has_prior = pd.notna(prior_ids)
    cols = ["st_j_uv", "r_amp_uv", "s_amp_uv"]
    now = wide(leads, aligned["ecg_id"].to_numpy(), cols)
    before = wide(leads, prior_ids, cols)
    spec = _cut_points(r, female, male, sex_unknown, age)

    ev = _evaluate(now["st_j_uv"], now["r_amp_uv"], now["s_amp_uv"], qrs, paced, female, sex_unknown, spec, r)
    evp = _evaluate(
        before["st_j_uv"], before["r_amp_uv"], before["s_amp_uv"], prior_qrs, np.zeros(n, dtype=bool),
        female, sex_unknown, spec, r,
    )

    # ---- one pattern per ECG, the most specific first
    # aVR elevation with widespread depression comes before posterior depression: when >= 6
    # other leads are depressed, depression in V1-V3 is part of that diffuse pattern and not
    # the isolated V1-V3 depression that points to the posterior wall (UDMI-2018 reads
    # depression in >= 8 leads with aVR elevation as left main or three-vessel ischaemia; from
    # memory, not in REFERENCES.md). A normal V3 often has a dominant R, so the posterior
    # reading used to win: 4 of the 7 planted aVR cases of sample_lake were called posterior.
    plain = ~ev["confounded"]
    missing_std = now["st_j_uv"][STANDARD].isna()
    any_missing = missing_std.any(axis=1).to_numpy()
    lb = ev["confounded"] & (ev["sgarbossa"] | ev["smith"])
    pattern = np.select(
        [
            lb,
            plain & ev["diffuse"],
            plain & ev["elevated"],
            plain & ev["avr"],
            plain & ev["post_dep"],
            any_missing & bool(r.setting("report_not_evaluable")),
        ],
        [P_LBBB, P_DIFFUSE, P_ELEVATION, P_AVR, P_POSTERIOR, P_NOT_EVALUABLE],
        "",
    )
    base = np.select(
        [
            pattern == P_LBBB,
            pattern == P_ELEVATION,
            np.isin(pattern, [P_POSTERIOR, P_AVR]),
            pattern == P_DIFFUSE,
            pattern == P_NOT_EVALUABLE,
        ],
        [
            np.where(ev["sgarbossa"], 1, 2),
            np.where(ev["recip"], 1, 2),
            2,
            3,
            4,
        ],
        NO_FINDING,
    )

    # ---- already on the prior ECG?
    fired_now = _fired_leads(ev, pattern)
    prior_has = _prior_has(evp, pattern)
    prior_leads_known = before["st_j_uv"][STANDARD].notna().any(axis=1).to_numpy()
    same_as_prior = (
        prior_leads_known
        & fired_now.any(axis=1).to_numpy()
        & ~(fired_now & ~prior_has).any(axis=1).to_numpy()
    )

    # ---- troponin [UDMI-2018; rise LOCAL]
    trop_ratio = num(aligned, "trop_max_ratio")
    trop_delta = num(aligned, "trop_delta_ng_l")
    trop_above = r["trop_above_url"].met(trop_ratio)
    trop_rising = r["trop_rise"].met(trop_delta)
    trop_raise = trop_above | trop_rising

    lvh_applies = ev["lvh"] & plain & (pattern != P_NOT_EVALUABLE)
    tier = base + same_as_prior.astype(int) + lvh_applies.astype(int) - trop_raise.astype(int)
    tier = np.where(base < NO_FINDING, np.clip(tier, 1, 4), NO_FINDING)

    hit = np.flatnonzero(tier < NO_FINDING)
    if len(hit) == 0:
        return empty_findings()

    # ---- evidence, only for the flagged rows
    st = now["st_j_uv"]
    trop, trop_off, trop_url = num(aligned, "trop_ng_l"), num(aligned, "trop_offset_min"), num(aligned, "trop_url_ng_l")
    prior_gap = num(aligned, "prior_gap_h")
    # Per flagged row, {lead: value} maps (one conversion per frame, not per row).
    m_fired, m_recip, m_wdep, m_miss = (_row_maps(f, hit) for f in (fired_now, ev["recip_leads"], ev["wide_dep"], missing_std))
    m_c1, m_c2, m_c3, m_s3, m_sts = (_row_maps(ev[k], hit) for k in ("c1", "c2", "c3", "smith3", "st_s"))
    m_st, m_cut, m_post = _row_maps(st, hit), _row_maps(ev["cut"], hit), _row_maps(ev["post_leads"], hit)
    territories_out, parts, summaries, evidence, caveats = [], [], [], [], []
    for j, i in enumerate(hit):
        c1, c2, c3, s3 = _names(m_c1[j]), _names(m_c2[j]), _names(m_c3[j]), _names(m_s3[j])
        miss = _names(m_miss[j])
        st_row, cut_row = m_st[j], m_cut[j]
        pat = pattern[i]
        fl = _names(m_fired[j])
        terr: list[str] = []
        if pat in (P_ELEVATION,):
            terr = [t for t in TERRITORY_ORDER if ev["territory"][t][i]]
        elif pat == P_POSTERIOR:
            terr = ["posterior"]
        elif pat == P_LBBB:
            # Leads of concordant or excessive discordant elevation name their group; concordant
            # depression in V1-V3 reads as posterior, as with the plain criteria.
            up = set(c1) | set(c3) | set(s3)
            terr = [t for t in TERRITORY_ORDER if up & set(TERRITORY_LEADS[t])]
            if c2 and "posterior" not in terr:
                terr.append("posterior")
            terr = [t for t in TERRITORY_ORDER if t in terr]
        territories_out.append(",".join(terr))

        recip_names = _names(m_recip[j])
        elev_vals = np.array([st_row[l] for l in fl], dtype=float)
        max_st = float(np.nanmax(elev_vals)) if len(elev_vals) and not np.isnan(elev_vals).all() else np.nan
        leads_txt = fmt_leads(fl, DISPLAY_ORDER)

        if pat == P_ELEVATION:
            words = [f"ST elevation up to {fmt(max_st)} uV ({fmt(max_st / 100, 1)} mm) in {leads_txt} ({', '.join(terr)})"]
            if recip_names:
                words.append(f"reciprocal depression in {fmt_leads(recip_names, DISPLAY_ORDER)}")
            else:
                words.append("no reciprocal depression")
            post_names = _names(m_post[j])
            if post_names:
                words.append(f"ST depression in {fmt_leads(post_names, DISPLAY_ORDER)} with dominant R (posterior involvement)")
        elif pat == P_DIFFUSE:
            words = [f"Diffuse ST elevation in {leads_txt} without reciprocal depression: pericarditis-like pattern"]
        elif pat == P_POSTERIOR:
            dep = float(np.nanmin([st_row[l] for l in fl]))
            words = [f"ST depression down to {fmt(dep)} uV in {leads_txt} with dominant R: posterior involvement"]
        elif pat == P_AVR:
            dep_names = _names(m_wdep[j])
            words = [
                f"ST elevation {fmt(st_row['aVR'])} uV in aVR with ST depression in {len(dep_names)} leads "
                f"({fmt_leads(dep_names, DISPLAY_ORDER)}): aVR elevation with widespread depression"
            ]
        elif pat == P_LBBB:
            shape = "Paced rhythm" if paced[i] else f"Left-bundle-branch-block shape (QRS {fmt(qrs[i])} ms)"
            crit = []
            if c1:
                crit.append(f"concordant ST elevation in {fmt_leads(c1, DISPLAY_ORDER)}")
            if c2:
                crit.append(f"concordant ST depression in {fmt_leads(c2, DISPLAY_ORDER)}")
            if c3:
                crit.append(f"discordant ST elevation >= 500 uV in {fmt_leads(c3, DISPLAY_ORDER)}")
            if s3:
                worst = float(np.nanmin([m_sts[j][l] for l in s3]))
                crit.append(f"ST/S ratio down to {fmt(worst, 2)} in {fmt_leads(s3, DISPLAY_ORDER)}")
            words = [
                f"{shape}: Sgarbossa {int(ev['sg_points'][i])} points"
                f"{' (positive)' if ev['sgarbossa'][i] else ''}, Smith-modified "
                f"{'positive' if ev['smith'][i] else 'negative'}; " + "; ".join(crit)
            ]
        else:
            words = [
                "ST deviation not evaluable: no lead measurements"
                if len(miss) == len(STANDARD)
                else f"ST deviation not evaluable in {fmt_leads(miss, DISPLAY_ORDER)}: no ST values"
            ]
        if np.isnan(trop_ratio[i]) and np.isnan(trop[i]):
            words.append("no troponin in the window")
        else:
            tw = f"troponin max {fmt(trop_ratio[i], 1)} x URL"
            if not np.isnan(trop_delta[i]):
                tw += f", change {'+' if trop_delta[i] >= 0 else ''}{fmt(trop_delta[i])} ng/L"
            words.append(tw)
        if same_as_prior[i]:
            words.append("same deviation on the prior ECG")
        summaries.append("; ".join(words))

        cav = []
        if pat == P_LBBB:
            cav.append(CAVEAT_PACED if paced[i] else CAVEAT_LBBB)
        elif r["lbbb_qrs"].met(qrs[i]) and pat != P_NOT_EVALUABLE:
            cav.append(CAVEAT_WIDE_SHAPE_UNKNOWN if ev["shape_unknown"][i] else CAVEAT_WIDE_OTHER)
        if lvh_applies[i]:
            cav.append(CAVEAT_LVH)
        if pat == P_DIFFUSE:
            cav.append(CAVEAT_DIFFUSE)
        if pat != P_NOT_EVALUABLE:
            if same_as_prior[i]:
                cav.append(CAVEAT_SAME_AS_PRIOR.format(gap=_gap_words(prior_gap[i])))
            elif not has_prior[i]:
                cav.append(CAVEAT_NO_PRIOR)
            elif not prior_leads_known[i]:
                cav.append(CAVEAT_PRIOR_NO_LEADS)
        if trop_raise[i]:
            cav.append(CAVEAT_TROPONIN)
        if sex_unknown[i]:
            cav.append(CAVEAT_SEX_UNKNOWN)
        elif male[i] and np.isnan(age[i]):
            cav.append(CAVEAT_AGE_UNKNOWN)
        if miss:
            cav.append(CAVEAT_MISSING_LEADS.format(leads=fmt_leads(miss, DISPLAY_ORDER)))
        caveats.append(cav)

        # thresholds that fired for this row
        used = []
        if pat in (P_ELEVATION, P_DIFFUSE):
            for l in fl:
                conds, ths = spec[l]
                for c, th in zip(conds, ths):
                    if c[i]:
                        used.append((th, True))
                        break
            used.append((r["std_reciprocal"], bool(recip_names)))
            used.append((r["diffuse_territories"], pat == P_DIFFUSE))
        used += [
            (r["std_posterior_v1v3"], pat == P_POSTERIOR or bool(ev["post_dep"][i] and pat == P_ELEVATION)),
            (r["dominant_r"], pat == P_POSTERIOR or bool(ev["post_dep"][i] and pat == P_ELEVATION)),
            (r["avr_elevation"], pat == P_AVR),
            (r["widespread_depression"], pat == P_AVR),
            (r["widespread_depression_leads"], pat == P_AVR),
            (r["lbbb_qrs"], pat == P_LBBB and ev["lbbb"][i]),
            (r["sgarbossa_concordant_ste"], pat == P_LBBB and bool(c1)),
            (r["sgarbossa_concordant_std_v1v3"], pat == P_LBBB and bool(c2)),
            (r["sgarbossa_discordant_ste"], pat == P_LBBB and bool(c3)),
            (r["sgarbossa_score"], pat == P_LBBB and bool(ev["sgarbossa"][i])),
            (r["smith_discordant_ste"], pat == P_LBBB and bool(s3)),
            (r["smith_st_s_ratio"], pat == P_LBBB and bool(s3)),
            (r["sokolow_lyon"], lvh_applies[i] and bool(ev["sokolow"][i])),
            (r["cornell_men"], lvh_applies[i] and bool(ev["cornell"][i]) and male[i]),
            (r["cornell_women"], lvh_applies[i] and bool(ev["cornell"][i]) and not male[i]),
            (r["trop_above_url"], bool(trop_above[i])),
            (r["trop_rise"], bool(trop_rising[i])),
        ]
        st_by_lead = {l: st_row[l] for l in ALL_LEADS if not np.isnan(st_row[l])}
        evidence.append(
            {
                "values": {
                    "pattern": pat,
                    "st_j_uv": st_by_lead,
                    "leads_meeting": fl,
                    "cut_points_uv": {l: cut_row[l] for l in fl},
                    "reciprocal_leads": recip_names,
                    "territories": terr,
                    "posterior_by_v1_v3_depression": bool(ev["post_dep"][i]),
                    "sex": "F" if female[i] else ("M" if male[i] else None),
                    "age_years": age[i],
                    "qrs_ms": qrs[i],
                    "paced": bool(paced[i]),
                    "lbbb_shape": bool(ev["lbbb"][i]),
                    "sgarbossa_points": int(ev["sg_points"][i]) if ev["confounded"][i] else None,
                    "smith_modified_positive": bool(ev["smith"][i]) if ev["confounded"][i] else None,
                    "sokolow_lyon_uv": ev["sokolow_uv"][i],
                    "cornell_uv": ev["cornell_uv"][i],
                    "lvh_voltage": bool(ev["lvh"][i]),
                    "prior_ecg_id": prior_ids[i],
                    "prior_gap_h": prior_gap[i],
                    "same_as_prior": bool(same_as_prior[i]),
                    "trop_ng_l": trop[i],
                    "trop_url_ng_l": trop_url[i],
                    "trop_max_ratio": trop_ratio[i],
                    "trop_delta_ng_l": trop_delta[i],
                    "trop_offset_min": trop_off[i],
                    "leads_missing": miss,
                },
                "rules": fired(*used),
            }
        )
        if pat == P_LBBB:
            sev = max(0.3, ev["sg_points"][i] / 10.0)
        elif pat == P_NOT_EVALUABLE:
            sev = 0.0
        elif pat == P_POSTERIOR:
            deepest = max(abs(st_row[l]) for l in fl)
            sev = 0.5 * min(max(deepest / abs(r["std_posterior_v1v3"].value) - 1.0, 0.0), 1.0) + 0.5 * min(len(fl), 3) / 3.0
        elif pat == P_AVR:
            n_dep = len(_names(m_wdep[j]))
            sev = 0.5 * min(max(st_row["aVR"] / r["avr_elevation"].value - 1.0, 0.0), 1.0) + 0.5 * n_dep / len(WIDESPREAD_LEADS)
        else:
            ratios = [abs(st_row[l]) / abs(cut_row[l]) for l in fl if pat in (P_ELEVATION, P_DIFFUSE)]
            excess = (max(ratios) - 1.0) if ratios else 0.0
            sev = 0.4 * min(max(excess, 0.0), 1.0) + 0.3 * min(len(fl), 6) / 6.0 + 0.3 * float(ev["recip"][i])
        parts.append(
            score_parts(
                severity=sev,
                lab_confirmed=bool(trop_raise[i]),
                lab_gap_min=trop_off[i],
                trend=trop_delta[i],
                prior_present=has_prior[i],
                troponin_ratio=trop_ratio[i],
                max_st_uv=max_st,
                leads_meeting=len(fl),
                reciprocal=int(bool(ev["recip"][i])),
            )
        )

    return build_findings(
        aligned.iloc[hit],
        screen=SCREEN,
        rule_version=r.version,
        tier=tier[hit],
        parts=parts,
        summary=summaries,
        evidence=evidence,
        caveats=caveats,
        territories=territories_out,
    )


def _row_maps(frame: pd.DataFrame, rows: np.ndarray) -> list[dict[str, Any]]:
    """The given positional rows of a lead frame as {lead: value} dicts."""
    cols = [str(c) for c in frame.columns]
    return [dict(zip(cols, vals)) for vals in frame.to_numpy()[rows].tolist()]


def _names(row: dict[str, Any]) -> list[str]:
    """Leads whose entry is true (values of a bool frame's row map)."""
    return [lead for lead, v in row.items() if v is True]
