"""Acute ST deviation: J-point elevation meeting the universal-definition cut points, its
equivalents (posterior, LBBB/paced by Sgarbossa and Smith, aVR with widespread depression) and
ST depression on its own.

What it flags (one finding per ECG; `evidence.values.pattern` says which, most specific first)
    lbbb_or_paced     QRS >= 120 ms with a left-bundle-branch-block shape from the lead amplitudes
                      (V1 dominant S, I and V6 dominant R; a local reading of the shape), or a
                      paced rhythm: the plain cut points are NOT applied. Sgarbossa (concordant
                      STE >= 100 uV: 5; concordant STD >= 100 uV in V1-V3: 3; discordant STE
                      >= 500 uV: 2; positive at >= 3 points) [SGARBOSSA-1996] or the
                      Smith-modified rule (either of Sgarbossa's first two, or discordant STE
                      >= 100 uV with ST/S <= -0.25) [SMITH-2012]; either positive is tier 1.
    st_elevation      J-point elevation meeting the cut point in two contiguous leads [UDMI-2018]:
                      >= 100 uV in all leads other than V2-V3; V2-V3 >= 200 uV men >= 40 y,
                      >= 250 uV men < 40 y, >= 150 uV women; V3R/V4R >= 50 uV (>= 100 uV men
                      < 30 y); V7-V9 >= 50 uV (>= 100 uV men < 40 y). A single lead never
                      suffices. Whatever else is present (several walls, a pericarditis-like
                      distribution, LVH voltage, the same elevation on an old prior ECG), an
                      elevation that meets these cut points stays an ST-elevation finding with
                      its territories, at tier 1 or 2.
    avr_widespread_depression
                      ST elevation >= 100 uV in aVR with ST depression >= 50 uV in >= 6 other
                      leads [PRACTICE]; it takes precedence over the two patterns below, whose
                      depression is then part of the widespread one.
    posterior_depression
                      ST depression >= 50 uV in two of V1-V3 [UDMI-2018]: a posterior-equivalent
                      finding whether or not R is dominant. A dominant R (R/|S| > 1) and an
                      upright T in a depressed lead are supporting evidence (score), not a
                      requirement. V7-V9 keep their own elevation cut points (above).
    st_depression     ST depression >= 50 uV in two contiguous leads [UDMI-2018], with none of
                      the above. The lake holds the J-point value only, so horizontal or
                      downsloping cannot be told from upsloping; a caveat says so.
    not_evaluable     (setting report_not_evaluable) any of the 12 standard leads has no ST value
                      and nothing else was found: tier 4, never a silent pass.

Contiguity (screens/_leads.py) [UDMI-2018]: the lead groups inferior II, III, aVF (any two),
lateral/apical I, aVL, posterior V7-V9 (any two), right-sided V3R, V4R; the precordial chain
V4R, V3R, V1 ... V6, V7 by neighbours. -aVR (Cabrera order, PRACTICE) never makes a pair; when it
agrees with a limb-lead finding it is listed as supporting evidence. Territories, from the leads
that meet the cut points in a contiguous pair: inferior II, III, aVF; lateral I, aVL, V5, V6;
septal V1, V2; anterior V3, V4 (UDMI groups V1-V6 as anterior; the split is PRACTICE);
posterior V7-V9, or two of V1-V3 depressed; right_ventricular V3R, V4R.

Reciprocal depression (>= 50 uV in two contiguous leads of the opposite wall) is recorded and
raises the rank: inferior <-> I, aVL or two of V1-V3; lateral <-> II, III, aVF or two of
V1-V3; anterior, septal <-> II, III, aVF; posterior (V7-V9) <-> V1-V3; right_ventricular <-> I, aVL.

Tiers (1 most urgent; docs/prioritisation.md gives the reasons)
    pattern              base                                      range
    lbbb_or_paced        1                                         1..2
    st_elevation         1 with reciprocal depression, or a lead   1..2
                         at >= 2x its cut point, or >= 3 leads;
                         else 2
    avr / posterior      2                                         1..2
    st_depression        3                                         2..4
    not_evaluable        4                                         3..4
    +1 (less urgent), never past the range:
       - the same deviation on a prior ECG older than the episode window (prior_old_h, > 72 h):
         every lead that fires now fired then. A prior within the window that shows it makes
         the finding persistent, not old: no change.
       - st_elevation: a pericarditis-like distribution (elevation over >= 3 walls, no ST
         depression in any lead but aVR, V1 included, aVR not elevated, no lead at clear
         amplitude; PR-segment depression is not in the measurements).
       - left ventricular hypertrophy by voltage (Sokolow-Lyon S V1 + max R V5/V6 >= 3500 uV
         [SOKOLOW-1949]; Cornell R aVL + S V3 > 2800 uV men, > 2000 uV women [CORNELL-1985])
         when it explains the deviation: st_elevation only in V1-V3 and proportionate
         (ST < 0.25 x |S| in every elevated lead, LOCAL), or st_depression only in
         I, aVL, V5, V6. LVH never explains inferior or lateral elevation.
    -1 (more urgent), never past the range:
       - troponin in the window above its assay's upper reference limit (trop_max_ratio > 1
         [UDMI-2018]) or rising (trop_delta_ng_l >= 5 ng/L, LOCAL; assay dependent);
       - st_depression: new against a prior ECG with lead measurements.
    So no demotion, alone or stacked, takes a UDMI-positive elevation below tier 2.

Unknown sex: the most sensitive cut points (the women's V2-V3, the lower V3R/V4R and V7-V9)
and the women's (lower) Cornell limit, with a caveat. A man of unknown age gets the older men's
(lower) cut points, with a caveat. The prior ECG is judged with this ECG's sex and age.

score_parts
    severity       st_elevation: 0.4 * clip(max ST / cut point - 1, 0..1) + 0.3 * min(leads, 6)
                   / 6 + 0.3 * reciprocal; lbbb_or_paced: max(0.3, Sgarbossa points / 10);
                   posterior: 0.4 * clip(deepest / 50 uV - 1) + 0.3 * leads / 3 + 0.3 *
                   supporting (dominant R or upright T); st_depression: 0.5 * clip(deepest /
                   50 uV - 1) + 0.5 * min(leads, 6) / 6; aVR: 0.5 * clip(aVR ST / 100 uV - 1)
                   + 0.5 * share of the 11 other leads depressed; 0 when not evaluable
    lab_confirmed  1 when troponin is above its URL or rising
    lab_gap_min    |trop_offset_min| (null without troponin)
    trend          trop_delta_ng_l (signed; null with < 2 results)
    prior_present  1 when a prior ECG exists
    troponin_ratio trop_max_ratio (null without troponin)
    max_st_uv, leads_meeting, reciprocal  extra parts

Sources (citations in screens/rules.toml [sources]; check values in docs/references.md)
    UDMI-2018       Thygesen K, Alpert JS, Jaffe AS, et al. Fourth universal definition of
                    myocardial infarction (2018). Circulation 2018;138:e618-e651.
    SGARBOSSA-1996  Sgarbossa EB, Pinski SL, Barbagelata A, et al. N Engl J Med 1996;334:481-487.
    SMITH-2012      Smith SW, Dodd KW, Henry TD, Dvorak DM, Pearce LA. Ann Emerg Med
                    2012;60:766-776 (ST/S <= -0.25, unweighted rule).
    SOKOLOW-1949    Sokolow M, Lyon TP. Am Heart J 1949;37:161-186.
    CORNELL-1985    Casale PN, Devereux RB, Kligfield P, et al. J Am Coll Cardiol 1985;6:572-580.
    PRACTICE        aVR pattern (aVR >= 100 uV, >= 6 leads with depression: from memory),
                    pericarditis distribution, -aVR in the Cabrera circle, upright T.
    LOCAL           clear amplitude (2x cut point, 3 leads), LVH proportionality (ST/|S| <
                    0.25), the prior's age limit (the episode window), V3R-V1 and V6-V7 as
                    neighbours, the LBBB shape reading.
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
from screens._leads import (
    ALL_LEADS,
    CONTIGUOUS_PAIRS,
    DISPLAY_ORDER,
    HIGH_LATERAL,
    INFERIOR,
    STANDARD,
    group_pairs,
    wide,
)
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
V1_V3 = ["V1", "V2", "V3"]
OPPOSITE_PAIRS = {
    "inferior": group_pairs(HIGH_LATERAL) + group_pairs(V1_V3),
    "lateral": group_pairs(INFERIOR) + group_pairs(V1_V3),
    "anterior": group_pairs(INFERIOR),
    "septal": group_pairs(INFERIOR),
    "posterior": group_pairs(V1_V3),
    "right_ventricular": group_pairs(HIGH_LATERAL),
}
LATERAL_LEADS = ["I", "aVL", "V5", "V6"]
WIDESPREAD_LEADS = [l for l in STANDARD if l != "aVR"]
DEPRESSION_PAIRS = [(a, b) for a, b in CONTIGUOUS_PAIRS if a in WIDESPREAD_LEADS and b in WIDESPREAD_LEADS]
LEADS_AND_MINUS_AVR = [*ALL_LEADS, "-aVR"]

# Sgarbossa points [SGARBOSSA-1996]
SGARBOSSA_CONCORDANT_STE_POINTS = 5
SGARBOSSA_CONCORDANT_STD_POINTS = 3
SGARBOSSA_DISCORDANT_STE_POINTS = 2

P_LBBB = "lbbb_or_paced"
P_ELEVATION = "st_elevation"
P_AVR = "avr_widespread_depression"
P_POSTERIOR = "posterior_depression"
P_DEPRESSION = "st_depression"
P_NOT_EVALUABLE = "not_evaluable"
PATTERNS = (P_LBBB, P_ELEVATION, P_AVR, P_POSTERIOR, P_DEPRESSION, P_NOT_EVALUABLE)

# (most urgent, least urgent) tier a pattern can reach after every adjustment: no demotion
# takes an ST-elevation finding or one of its equivalents below tier 2.
TIER_RANGE = {
    P_LBBB: (1, 2),
    P_ELEVATION: (1, 2),
    P_AVR: (1, 2),
    P_POSTERIOR: (1, 2),
    P_DEPRESSION: (2, 4),
    P_NOT_EVALUABLE: (3, 4),
}
BASE_TIER = {P_LBBB: 1, P_AVR: 2, P_POSTERIOR: 2, P_DEPRESSION: 3, P_NOT_EVALUABLE: 4}  # elevation: 1 or 2

CAVEAT_LBBB = (
    "QRS {qrs} ms with a left-bundle-branch-block shape: judged by Sgarbossa (1996) and the "
    "Smith-modified ST/S ratio (2012) instead of the plain cut points."
)
CAVEAT_PACED = "Paced rhythm: judged by Sgarbossa (1996) and the Smith-modified ST/S ratio (2012) instead of the plain cut points."
CAVEAT_WIDE_OTHER = (
    "QRS {qrs} ms without a left-bundle-branch-block shape: ST deviation in V1-V3 may be secondary "
    "to the conduction delay; plain cut points used and the rank is not lowered."
)
CAVEAT_WIDE_SHAPE_UNKNOWN = "QRS {qrs} ms and the leads that show a bundle-branch-block shape are missing: plain cut points used."
CAVEAT_LVH_EXPLAINS = (
    "Left ventricular hypertrophy by voltage (Sokolow-Lyon or Cornell) with {what}: it can be "
    "secondary repolarisation; ranked one tier lower{floor}."
)
CAVEAT_LVH_NOT_EXPLAINED = (
    "Left ventricular hypertrophy by voltage (Sokolow-Lyon or Cornell): it does not account for this "
    "{what}; not ranked lower."
)
CAVEAT_PERICARDITIS = (
    "Elevation over {walls} walls with no ST depression in any lead but aVR (V1 included), aVR not "
    "elevated and no lead at {ratio}x its cut point: a pericarditis-like distribution. PR-segment "
    "depression is not in the measurements. Ranked one tier lower; it meets the elevation cut "
    "points, so it stays at tier 2 or above."
)
CAVEAT_OLD_PRIOR = (
    "The same ST deviation was on the prior ECG {gap} earlier, before the {window} h episode window: "
    "ranked one tier lower{floor}."
)
CAVEAT_PERSISTENT = (
    "The same ST deviation was on the prior ECG {gap} earlier, within the {window} h episode window: "
    "persistent, not old; the rank is not lowered."
)
CAVEAT_PRIOR_GAP_UNKNOWN = "The same ST deviation was on the prior ECG, whose time is unknown: the rank is not lowered."
CAVEAT_NEW_DEPRESSION = "The ST depression is not on the prior ECG: new, ranked one tier higher."
CAVEAT_NO_PRIOR = "No prior ECG: whether the ST deviation is new cannot be judged."
CAVEAT_PRIOR_NO_LEADS = "The prior ECG has no lead measurements: whether the ST deviation is new cannot be judged."
CAVEAT_TROPONIN = "Troponin above the assay's upper reference limit or rising in the window: ranked one tier higher."
CAVEAT_SEX_UNKNOWN = (
    "Sex unknown: the most sensitive cut points were used (V2-V3 {v23} uV; V3R/V4R {right} uV; V7-V9 {post} uV)."
)
CAVEAT_AGE_UNKNOWN = "Age unknown: the older men's cut points, the more sensitive, were used."
CAVEAT_MISSING_LEADS = "No ST value for {leads}: not evaluable there."
CAVEAT_SLOPE = (
    "The measurements hold the ST level at the J point only: horizontal or downsloping depression "
    "cannot be told from upsloping."
)
CAVEAT_POSTERIOR_LEADS = "Posterior leads V7-V9 were not recorded: the posterior reading rests on V1-V3."


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


def _within(leads: pd.DataFrame, allowed: list[str]) -> np.ndarray:
    """Rows whose true leads all lie in `allowed` (and at least one is true)."""
    outside = leads.drop(columns=[c for c in allowed if c in leads.columns]).any(axis=1).to_numpy()
    return leads.any(axis=1).to_numpy() & ~outside


def _evaluate(st, ra, sa, ta, qrs, paced, female, sex_unknown, spec, r: ScreenRules) -> dict[str, Any]:
    """All criteria for one set of lead frames (this ECG or its prior), as masks over the rows."""
    n = len(st)
    # ---- elevation against each lead's cut point, two contiguous leads [UDMI-2018]
    meets = pd.DataFrame(False, index=st.index, columns=LEADS_AND_MINUS_AVR)
    cut = pd.DataFrame(np.nan, index=st.index, columns=LEADS_AND_MINUS_AVR)
    for lead, (conds, ths) in spec.items():
        x = st[lead].to_numpy()
        meets[lead] = np.select(conds, [th.met(x) for th in ths], False)
        cut[lead] = np.select(conds, [th.value for th in ths], np.nan)
    elevated, qualifying = _pair_hits(meets, CONTIGUOUS_PAIRS)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = (st / cut).where(qualifying)
    max_ratio = ratio.max(axis=1).to_numpy()
    n_leads = qualifying.sum(axis=1).to_numpy()
    clear = elevated & (r["ste_clear_ratio"].met(max_ratio) | r["ste_clear_leads"].met(n_leads))
    # -aVR agreeing with a limb-lead finding: supporting evidence only (Cabrera order, PRACTICE).
    minus_avr_support = meets["-aVR"].to_numpy() & (qualifying["I"] | qualifying["II"]).to_numpy()

    depressed = r["std_reciprocal"].met(st)
    territory = {t: qualifying[leads].any(axis=1).to_numpy() for t, leads in TERRITORY_LEADS.items()}
    recip_leads = pd.DataFrame(False, index=st.index, columns=LEADS_AND_MINUS_AVR)
    recip = np.zeros(n, dtype=bool)
    for t, prs in OPPOSITE_PAIRS.items():
        hit, leads_hit = _pair_hits(depressed, prs)
        hit = hit & territory[t]
        recip |= hit
        recip_leads = recip_leads | leads_hit.mul(hit, axis=0).astype(bool)

    # ---- posterior: two of V1-V3 depressed; dominant R and upright T support it [UDMI-2018]
    post_any, post_leads = _pair_hits(r["std_posterior_v1v3"].met(st[V1_V3]), group_pairs(V1_V3))
    with np.errstate(invalid="ignore", divide="ignore"):
        r_over_s = ra[V1_V3] / sa[V1_V3].abs()
    dominant_r = (post_leads & r["dominant_r"].met(r_over_s)).any(axis=1).to_numpy()
    upright_t = (post_leads & r["upright_t"].met(ta[V1_V3])).any(axis=1).to_numpy()
    territory["posterior"] = territory["posterior"] | post_any

    # ---- aVR elevation with widespread depression [PRACTICE]
    wide_dep = r["widespread_depression"].met(st[WIDESPREAD_LEADS])
    avr = r["avr_elevation"].met(st["aVR"].to_numpy()) & r["widespread_depression_leads"].met(wide_dep.sum(axis=1).to_numpy())

    # ---- ST depression in two contiguous leads [UDMI-2018]
    dep_any, dep_leads = _pair_hits(r["std_alone"].met(st[WIDESPREAD_LEADS]), DEPRESSION_PAIRS)

    # ---- pericarditis-like distribution: a caveat on an elevation finding [PRACTICE; walls LOCAL]
    walls = sum(np.logical_or.reduce([territory[t] for t in ts]) for ts in WALLS.values())
    any_depression = depressed[WIDESPREAD_LEADS].any(axis=1).to_numpy()
    pericarditis_like = (
        elevated & r["diffuse_territories"].met(walls) & ~any_depression
        & r["pericarditis_avr_st"].met(st["aVR"].to_numpy()) & ~r["ste_clear_ratio"].met(max_ratio)
    )

    # ---- LBBB shape or paced: Sgarbossa / Smith-modified [SGARBOSSA-1996, SMITH-2012]
    dom_s = sa.abs() > ra
    dom_r = ra > sa.abs()
    lbbb = r["lbbb_qrs"].met(qrs) & dom_s["V1"].to_numpy() & dom_r["I"].to_numpy() & dom_r["V6"].to_numpy()
    shape_unknown = r["lbbb_qrs"].met(qrs) & ra[["V1", "I", "V6"]].isna().any(axis=1).to_numpy()
    confounded = lbbb | paced
    s12, st12 = sa[STANDARD], st[STANDARD]
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

    # ---- LVH voltage [SOKOLOW-1949, CORNELL-1985] and what it can explain (LOCAL)
    sokolow_uv = sa["V1"].abs() + ra[["V5", "V6"]].max(axis=1)
    cornell_uv = ra["aVL"] + sa["V3"].abs()
    sokolow = r["sokolow_lyon"].met(sokolow_uv.to_numpy())
    cornell = np.where(female | sex_unknown, r["cornell_women"].met(cornell_uv.to_numpy()), r["cornell_men"].met(cornell_uv.to_numpy()))
    lvh = sokolow | cornell
    with np.errstate(invalid="ignore", divide="ignore"):
        st_over_s = st[V1_V3] / sa[V1_V3].abs()
    disproportionate = (qualifying[V1_V3] & ~r["lvh_proportionate"].met(st_over_s)).any(axis=1).to_numpy()
    lvh_explains_ste = lvh & _within(qualifying, V1_V3) & ~disproportionate
    lvh_explains_std = lvh & _within(dep_leads, LATERAL_LEADS)

    return {
        "meets": meets, "cut": cut, "elevated": elevated, "qualifying": qualifying, "territory": territory,
        "max_ratio": max_ratio, "n_leads": n_leads, "clear": clear, "minus_avr_support": minus_avr_support,
        "recip": recip, "recip_leads": recip_leads, "post_any": post_any, "post_leads": post_leads,
        "dominant_r": dominant_r, "upright_t": upright_t, "avr": avr, "wide_dep": wide_dep,
        "dep_any": dep_any, "dep_leads": dep_leads, "walls": walls, "pericarditis_like": pericarditis_like,
        "lbbb": lbbb, "shape_unknown": shape_unknown, "confounded": confounded, "c1": c1, "c2": c2,
        "c3": c3, "smith3": smith3, "st_s": st_s, "sg_points": sg_points, "sgarbossa": sgarbossa,
        "smith": smith, "sokolow": sokolow, "cornell": cornell, "lvh": lvh,
        "lvh_explains_ste": lvh_explains_ste, "lvh_explains_std": lvh_explains_std,
        "sokolow_uv": sokolow_uv.to_numpy(), "cornell_uv": cornell_uv.to_numpy(),
    }


def _pattern_leads(ev: dict[str, Any], pattern: np.ndarray, *, prior: bool) -> pd.DataFrame:
    """Per row, the leads of the row's pattern: those that made it now (prior=False), or those
    whose criterion of that pattern was met on the prior ECG lead by lead (prior=True)."""
    sg = (ev["c1"] | ev["c2"] | ev["c3"] | ev["smith3"]).reindex(columns=LEADS_AND_MINUS_AVR, fill_value=False)
    post = ev["post_leads"].reindex(columns=LEADS_AND_MINUS_AVR, fill_value=False)
    dep = ev["dep_leads"].reindex(columns=LEADS_AND_MINUS_AVR, fill_value=False)
    avr = pd.DataFrame(False, index=sg.index, columns=LEADS_AND_MINUS_AVR)
    avr["aVR"] = ev["avr"] if prior else True
    elev = ev["meets"] if prior else ev["qualifying"]
    pat = pd.Series(pattern, index=sg.index)
    out = pd.DataFrame(False, index=sg.index, columns=LEADS_AND_MINUS_AVR)
    for name, frame in ((P_ELEVATION, elev), (P_LBBB, sg), (P_POSTERIOR, post), (P_AVR, avr), (P_DEPRESSION, dep)):
        out = out | frame.astype(bool).mul(pat.eq(name).to_numpy(), axis=0).astype(bool)
    return out


def _gap_words(hours: float) -> str:
    if np.isnan(hours):
        return "some time"
    return f"{hours:.0f} h" if hours < 72 else f"{hours / 24:.0f} days"


def _tiers(pattern: np.ndarray, ev: dict[str, Any], adjust: np.ndarray) -> np.ndarray:
    """Base tier of each row's pattern plus `adjust`, kept inside the pattern's range."""
    base = np.full(len(pattern), NO_FINDING)
    lo = np.full(len(pattern), NO_FINDING)
    hi = np.full(len(pattern), NO_FINDING)
    for name in PATTERNS:
        here = pattern == name
        if name == P_ELEVATION:
            base[here] = np.where(ev["recip"] | ev["clear"], 1, 2)[here]
        else:
            base[here] = BASE_TIER[name]
        lo[here], hi[here] = TIER_RANGE[name]
    return np.where(base < NO_FINDING, np.clip(base + adjust, lo, hi), NO_FINDING)


def screen_st_deviation(aligned: pd.DataFrame, leads: pd.DataFrame, rules: Rules | None = None) -> pd.DataFrame:
    """Acute ST deviation findings for the aligned ECGs.

    aligned: the aligned table (qrs_ms, paced, sex, age_years, prior_ecg_id, prior_gap_h, prior_qrs_ms,
    trop_ng_l, trop_offset_min, trop_max_ratio, trop_delta_ng_l, trop_n). leads: ecg_lead rows
    (st_j_uv, r_amp_uv, s_amp_uv, t_amp_uv in uV) for these ECGs and their prior ECGs.
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
    cols = ["st_j_uv", "r_amp_uv", "s_amp_uv", "t_amp_uv"]
    if leads is not None and len(leads) and "t_amp_uv" not in leads.columns:
        leads = leads.assign(t_amp_uv=np.nan)
    now = wide(leads, aligned["ecg_id"].to_numpy(), cols)
    before = wide(leads, prior_ids, cols)
    spec = _cut_points(r, female, male, sex_unknown, age)

    ev = _evaluate(now["st_j_uv"], now["r_amp_uv"], now["s_amp_uv"], now["t_amp_uv"], qrs, paced,
                   female, sex_unknown, spec, r)
    evp = _evaluate(before["st_j_uv"], before["r_amp_uv"], before["s_amp_uv"], before["t_amp_uv"], prior_qrs,
                    np.zeros(n, dtype=bool), female, sex_unknown, spec, r)

    # ---- one pattern per ECG, the most specific first. aVR elevation with widespread depression
    # comes before posterior and plain depression: when >= 6 other leads are depressed, the V1-V3
    # depression is part of that diffuse pattern (UDMI-2018 reads depression in >= 8 leads with
    # aVR elevation as left main or three-vessel ischaemia; from memory).
    plain = ~ev["confounded"]
    missing_std = now["st_j_uv"][STANDARD].isna()
    any_missing = missing_std.any(axis=1).to_numpy()
    lb = ev["confounded"] & (ev["sgarbossa"] | ev["smith"])
    pattern = np.select(
        [
            lb,
            plain & ev["elevated"],
            plain & ev["avr"],
            plain & ev["post_any"],
            plain & ev["dep_any"],
            any_missing & bool(r.setting("report_not_evaluable")),
        ],
        [P_LBBB, P_ELEVATION, P_AVR, P_POSTERIOR, P_DEPRESSION, P_NOT_EVALUABLE],
        "",
    )
    is_elev, is_dep = pattern == P_ELEVATION, pattern == P_DEPRESSION

    # ---- against the prior ECG: old (before the episode window), persistent (within it), new
    fired_now = _pattern_leads(ev, pattern, prior=False)
    prior_has = _pattern_leads(evp, pattern, prior=True)
    prior_leads_known = before["st_j_uv"][STANDARD].notna().any(axis=1).to_numpy()
    same_as_prior = (
        prior_leads_known
        & fired_now.any(axis=1).to_numpy()
        & ~(fired_now & ~prior_has).any(axis=1).to_numpy()
    )
    prior_gap = num(aligned, "prior_gap_h")
    prior_old = same_as_prior & r["prior_old_h"].met(prior_gap)
    persistent = same_as_prior & ~np.isnan(prior_gap) & ~prior_old
    new_depression = is_dep & prior_leads_known & ~same_as_prior

    # ---- troponin [UDMI-2018; rise LOCAL]
    trop_ratio = num(aligned, "trop_max_ratio")
    trop_delta = num(aligned, "trop_delta_ng_l")
    trop_above = r["trop_above_url"].met(trop_ratio)
    trop_rising = r["trop_rise"].met(trop_delta)
    trop_raise = trop_above | trop_rising

    # ---- demotions and promotions, each one step; _tiers keeps every pattern in its range
    pericarditis = is_elev & ev["pericarditis_like"]
    lvh_applies = (is_elev & ev["lvh_explains_ste"]) | (is_dep & ev["lvh_explains_std"])
    lvh_not_explained = ev["lvh"] & (is_elev | is_dep) & ~lvh_applies
    adjust = (
        prior_old.astype(int) + pericarditis.astype(int) + lvh_applies.astype(int)
        - trop_raise.astype(int) - new_depression.astype(int)
    )
    tier = _tiers(pattern, ev, adjust)

    hit = np.flatnonzero(tier < NO_FINDING)
    if len(hit) == 0:
        return empty_findings()
    return _dress(
        aligned, hit, r, now, ev, pattern, tier, fired_now, missing_std,
        female=female, male=male, sex_unknown=sex_unknown, age=age, qrs=qrs, paced=paced,
        prior_ids=prior_ids, has_prior=has_prior, prior_leads_known=prior_leads_known, prior_gap=prior_gap,
        same_as_prior=same_as_prior, prior_old=prior_old, persistent=persistent, new_depression=new_depression,
        trop_ratio=trop_ratio, trop_delta=trop_delta, trop_above=trop_above, trop_rising=trop_rising,
        trop_raise=trop_raise, pericarditis=pericarditis, lvh_applies=lvh_applies,
        lvh_not_explained=lvh_not_explained, spec=spec,
    )


def _dress(aligned, hit, r, now, ev, pattern, tier, fired_now, missing_std, **m) -> pd.DataFrame:
    """Summary, caveats, evidence and score parts for the flagged rows `hit` (decisions are made)."""
    st = now["st_j_uv"]
    trop, trop_off, trop_url = num(aligned, "trop_ng_l"), num(aligned, "trop_offset_min"), num(aligned, "trop_url_ng_l")
    female, male, qrs, paced, age = m["female"], m["male"], m["qrs"], m["paced"], m["age"]
    trop_ratio, trop_delta = m["trop_ratio"], m["trop_delta"]
    window = fmt(r["prior_old_h"].value)
    posterior_recorded = st[["V7", "V8", "V9"]].notna().any(axis=1).to_numpy()
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
        post_names = _names(m_post[j])
        terr: list[str] = []
        if pat == P_ELEVATION:
            terr = [t for t in TERRITORY_ORDER if ev["territory"][t][i]]
        elif pat == P_POSTERIOR:
            terr = ["posterior"]
        elif pat == P_LBBB:
            # Leads of concordant or excessive discordant elevation name their group; concordant
            # depression in V1-V3 reads as posterior, as with the plain criteria.
            up = set(c1) | set(c3) | set(s3)
            terr = [t for t in TERRITORY_ORDER if up & set(TERRITORY_LEADS[t]) or (t == "posterior" and c2)]
        territories_out.append(",".join(terr))

        recip_names = _names(m_recip[j])
        elev_vals = np.array([st_row[l] for l in fl], dtype=float)
        max_st = float(np.nanmax(elev_vals)) if len(elev_vals) and not np.isnan(elev_vals).all() else np.nan
        leads_txt = fmt_leads(fl, DISPLAY_ORDER)
        support = bool(ev["dominant_r"][i] or ev["upright_t"][i])

        if pat == P_ELEVATION:
            words = [f"ST elevation up to {fmt(max_st)} uV ({fmt(max_st / 100, 1)} mm) in {leads_txt} ({', '.join(terr)})"]
            words.append(
                f"reciprocal depression in {fmt_leads(recip_names, DISPLAY_ORDER)}" if recip_names
                else "no reciprocal depression"
            )
            if post_names:
                words.append(f"ST depression in {fmt_leads(post_names, DISPLAY_ORDER)} (posterior involvement)")
            if ev["minus_avr_support"][i]:
                words.append("-aVR agrees (supporting)")
        elif pat == P_POSTERIOR:
            dep = float(np.nanmin([st_row[l] for l in fl]))
            with_what = [w for w, on in (("dominant R", ev["dominant_r"][i]), ("upright T", ev["upright_t"][i])) if on]
            words = [
                f"ST depression down to {fmt(dep)} uV in {leads_txt}: posterior-equivalent"
                + (f", with {' and '.join(with_what)}" if with_what else ", without dominant R or upright T")
            ]
        elif pat == P_DEPRESSION:
            dep = float(np.nanmin([st_row[l] for l in fl]))
            words = [f"ST depression down to {fmt(dep)} uV ({fmt(dep / 100, 1)} mm) in {leads_txt}, no ST elevation"]
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
                crit.append(f"discordant ST elevation >= {fmt(r['sgarbossa_discordant_ste'].value)} uV in {fmt_leads(c3, DISPLAY_ORDER)}")
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
        if m["prior_old"][i]:
            words.append(f"same deviation on the prior ECG {_gap_words(m['prior_gap'][i])} earlier")
        elif m["persistent"][i]:
            words.append(f"persistent: also on the prior ECG {_gap_words(m['prior_gap'][i])} earlier")
        elif m["new_depression"][i]:
            words.append("new against the prior ECG")
        summaries.append("; ".join(words))

        lo_tier = TIER_RANGE.get(pat, (1, 4))[1]
        floor = f", not below tier {lo_tier}" if pat in (P_ELEVATION, P_LBBB, P_AVR, P_POSTERIOR) else ""
        cav = []
        if pat == P_LBBB:
            cav.append(CAVEAT_PACED if paced[i] else CAVEAT_LBBB.format(qrs=fmt(qrs[i])))
        elif r["lbbb_qrs"].met(qrs[i]) and pat != P_NOT_EVALUABLE:
            cav.append((CAVEAT_WIDE_SHAPE_UNKNOWN if ev["shape_unknown"][i] else CAVEAT_WIDE_OTHER).format(qrs=fmt(qrs[i])))
        if m["lvh_applies"][i]:
            what = ("ST elevation confined to V1-V3 and proportionate to the S wave" if pat == P_ELEVATION
                    else "ST depression confined to I, aVL, V5, V6")
            cav.append(CAVEAT_LVH_EXPLAINS.format(what=what, floor=floor))
        elif m["lvh_not_explained"][i]:
            cav.append(CAVEAT_LVH_NOT_EXPLAINED.format(what="elevation" if pat == P_ELEVATION else "depression"))
        if m["pericarditis"][i]:
            cav.append(CAVEAT_PERICARDITIS.format(walls=int(ev["walls"][i]), ratio=f"{r['ste_clear_ratio'].value:g}"))
        if pat in (P_DEPRESSION, P_POSTERIOR):
            cav.append(CAVEAT_SLOPE)
        if pat == P_POSTERIOR and not posterior_recorded[i]:
            cav.append(CAVEAT_POSTERIOR_LEADS)
        if pat != P_NOT_EVALUABLE:
            if m["prior_old"][i]:
                cav.append(CAVEAT_OLD_PRIOR.format(gap=_gap_words(m["prior_gap"][i]), window=window, floor=floor))
            elif m["persistent"][i]:
                cav.append(CAVEAT_PERSISTENT.format(gap=_gap_words(m["prior_gap"][i]), window=window))
            elif m["same_as_prior"][i]:
                cav.append(CAVEAT_PRIOR_GAP_UNKNOWN)
            elif m["new_depression"][i]:
                cav.append(CAVEAT_NEW_DEPRESSION)
            elif not m["has_prior"][i]:
                cav.append(CAVEAT_NO_PRIOR)
            elif not m["prior_leads_known"][i]:
                cav.append(CAVEAT_PRIOR_NO_LEADS)
        if m["trop_raise"][i]:
            cav.append(CAVEAT_TROPONIN)
        if m["sex_unknown"][i]:
            cav.append(CAVEAT_SEX_UNKNOWN.format(
                v23=fmt(r["ste_v2v3_women"].value), right=fmt(r["ste_right"].value), post=fmt(r["ste_posterior"].value)))
        elif male[i] and np.isnan(age[i]):
            cav.append(CAVEAT_AGE_UNKNOWN)
        if miss:
            cav.append(CAVEAT_MISSING_LEADS.format(leads=fmt_leads(miss, DISPLAY_ORDER)))
        caveats.append(cav)

        # thresholds that fired for this row
        used = []
        if pat == P_ELEVATION:
            for l in fl:
                conds, ths = m["spec"][l]
                for c, th in zip(conds, ths):
                    if c[i]:
                        used.append((th, True))
                        break
            used.append((r["std_reciprocal"], bool(recip_names)))
            used.append((r["ste_clear_ratio"], bool(r["ste_clear_ratio"].met(ev["max_ratio"][i]))))
            used.append((r["ste_clear_leads"], bool(r["ste_clear_leads"].met(ev["n_leads"][i]))))
            used.append((r["diffuse_territories"], bool(m["pericarditis"][i])))
            used.append((r["pericarditis_avr_st"], bool(m["pericarditis"][i])))
        used += [
            (r["std_posterior_v1v3"], pat == P_POSTERIOR or bool(post_names and pat == P_ELEVATION)),
            (r["dominant_r"], pat == P_POSTERIOR and bool(ev["dominant_r"][i])),
            (r["upright_t"], pat == P_POSTERIOR and bool(ev["upright_t"][i])),
            (r["std_alone"], pat == P_DEPRESSION),
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
            (r["sokolow_lyon"], bool(m["lvh_applies"][i]) and bool(ev["sokolow"][i])),
            (r["cornell_men"], bool(m["lvh_applies"][i]) and bool(ev["cornell"][i]) and male[i]),
            (r["cornell_women"], bool(m["lvh_applies"][i]) and bool(ev["cornell"][i]) and not male[i]),
            (r["lvh_proportionate"], bool(m["lvh_applies"][i]) and pat == P_ELEVATION),
            (r["prior_old_h"], bool(m["prior_old"][i])),
            (r["trop_above_url"], bool(m["trop_above"][i])),
            (r["trop_rise"], bool(m["trop_rising"][i])),
        ]
        st_by_lead = {l: st_row[l] for l in ALL_LEADS if not np.isnan(st_row[l])}
        evidence.append(
            {
                "values": {
                    "pattern": pat,
                    "st_j_uv": st_by_lead,
                    "leads_meeting": fl,
                    "cut_points_uv": {l: cut_row[l] for l in fl} if pat == P_ELEVATION else {},
                    "max_st_over_cut": ev["max_ratio"][i] if pat == P_ELEVATION else None,
                    "reciprocal_leads": recip_names,
                    "territories": terr,
                    "posterior_by_v1_v3_depression": bool(ev["post_any"][i]),
                    "posterior_dominant_r": bool(ev["dominant_r"][i]),
                    "posterior_upright_t": bool(ev["upright_t"][i]),
                    "minus_avr_supporting": bool(ev["minus_avr_support"][i]),
                    "pericarditis_like": bool(m["pericarditis"][i]),
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
                    "lvh_explains": bool(m["lvh_applies"][i]),
                    "prior_ecg_id": m["prior_ids"][i],
                    "prior_gap_h": m["prior_gap"][i],
                    "same_as_prior": bool(m["same_as_prior"][i]),
                    "prior_old": bool(m["prior_old"][i]),
                    "persistent": bool(m["persistent"][i]),
                    "new_vs_prior": bool(m["new_depression"][i]),
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
        elif pat in (P_POSTERIOR, P_DEPRESSION):
            deepest = max(abs(st_row[l]) for l in fl)
            th = r["std_posterior_v1v3"] if pat == P_POSTERIOR else r["std_alone"]
            depth = min(max(deepest / abs(th.value) - 1.0, 0.0), 1.0)
            if pat == P_POSTERIOR:
                sev = 0.4 * depth + 0.3 * min(len(fl), 3) / 3.0 + 0.3 * float(support)
            else:
                sev = 0.5 * depth + 0.5 * min(len(fl), 6) / 6.0
        elif pat == P_AVR:
            n_dep = len(_names(m_wdep[j]))
            sev = 0.5 * min(max(st_row["aVR"] / r["avr_elevation"].value - 1.0, 0.0), 1.0) + 0.5 * n_dep / len(WIDESPREAD_LEADS)
        else:
            excess = float(ev["max_ratio"][i]) - 1.0
            sev = 0.4 * min(max(excess, 0.0), 1.0) + 0.3 * min(len(fl), 6) / 6.0 + 0.3 * float(ev["recip"][i])
        parts.append(
            score_parts(
                severity=sev,
                lab_confirmed=bool(m["trop_raise"][i]),
                lab_gap_min=trop_off[i],
                trend=trop_delta[i],
                prior_present=m["has_prior"][i],
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
