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

Criterion table (column, unit, source)
    ecg_id                          text    contract        the ECG (with patient_id and acquired_at, as aligned)
    patient_id                      text    contract        the patient
    acquired_at                     UTC     contract        when the ECG was taken
    pattern                         text    LOCAL           the pattern chosen (above), "" when none
    pattern_leads                   leads   LOCAL           the leads that made the pattern (comma-joined)
    pattern_lead_count              count   LOCAL           how many
    st_max_uv                       uV      cart            the highest ST of the pattern's leads
    st_deepest_uv                   uV      cart            the largest |ST| of the pattern's leads
    ste_contiguous                  bool    UDMI-2018       elevation at the cut point in two contiguous leads
    ste_leads                       leads   UDMI-2018       the leads in such pairs
    ste_lead_count                  count   UDMI-2018       how many
    ste_max_over_cut                ratio   LOCAL           the highest ST / its cut point among them
    ste_clear_ratio                 bool    LOCAL           an elevation finding with a lead at >= 2x its cut point
    ste_clear_leads                 bool    LOCAL           an elevation finding in >= 3 leads
    cut_ste_general                 bool    UDMI-2018       a lead judged by the 100 uV cut point (likewise below)
    cut_ste_v2v3_women              bool    UDMI-2018       V2-V3 150 uV (women; unknown sex)
    cut_ste_v2v3_men_older          bool    UDMI-2018       V2-V3 200 uV (men >= 40 y; unknown age)
    cut_ste_v2v3_men_younger        bool    UDMI-2018       V2-V3 250 uV (men < 40 y)
    cut_ste_right_men_younger       bool    UDMI-2018       V3R/V4R 100 uV (men < 30 y)
    cut_ste_right                   bool    UDMI-2018       V3R/V4R 50 uV
    cut_ste_posterior_men_younger   bool    UDMI-2018       V7-V9 100 uV (men < 40 y)
    cut_ste_posterior               bool    UDMI-2018       V7-V9 50 uV
    territory_inferior              bool    UDMI-2018       the finding names this territory (likewise below)
    territory_lateral               bool    UDMI-2018       I, aVL, V5, V6
    territory_anterior              bool    PRACTICE        V3, V4
    territory_septal                bool    PRACTICE        V1, V2
    territory_posterior             bool    UDMI-2018       V7-V9, or two of V1-V3 depressed
    territory_right_ventricular     bool    UDMI-2018       V3R, V4R
    territories                     text    LOCAL           the territories, comma-joined
    reciprocal                      bool    UDMI-2018       depression >= 50 uV in two contiguous leads of the opposite wall
    reciprocal_leads                leads   UDMI-2018       those leads
    minus_avr_supporting            bool    PRACTICE        -aVR agrees with a limb-lead elevation
    std_v1_v3                       bool    UDMI-2018       ST depression >= 50 uV in two of V1-V3
    std_v1_v3_leads                 leads   UDMI-2018       those leads
    posterior_involvement           bool    UDMI-2018       posterior pattern, or elevation with V1-V3 depression
    posterior_dominant_r            bool    UDMI-2018       R/|S| > 1 in a depressed V1-V3 lead (supporting)
    posterior_upright_t             bool    PRACTICE        upright T in a depressed V1-V3 lead (supporting)
    fired_dominant_r                bool    UDMI-2018       supporting evidence of a posterior finding
    fired_upright_t                 bool    PRACTICE        supporting evidence of a posterior finding
    avr_widespread                  bool    PRACTICE        aVR >= 100 uV with >= 6 other leads depressed >= 50 uV
    fired_avr_widespread            bool    PRACTICE        the aVR pattern was chosen
    widespread_depression_leads     leads   PRACTICE        the depressed leads other than aVR
    widespread_depression_count     count   PRACTICE        how many
    std_contiguous                  bool    UDMI-2018       ST depression >= 50 uV in two contiguous leads
    std_alone                       bool    UDMI-2018       the depression pattern was chosen
    std_leads                       leads   UDMI-2018       the leads in such pairs
    walls_elevated                  count   LOCAL           walls (inferior, lateral, anterior) with elevation
    pericarditis_like               bool    PRACTICE        the pericarditis-like distribution (caveat, one tier lower)
    qrs_ms                          ms      cart            QRS duration
    qrs_wide                        bool    PRACTICE        QRS >= 120 ms (plain cut points used without an LBBB shape: caveat)
    paced                           bool    cart            paced rhythm
    lbbb_shape                      bool    LOCAL           QRS >= 120 ms, V1 S-dominant, I and V6 R-dominant
    lbbb_shape_unknown              bool    LOCAL           QRS >= 120 ms and a shape lead missing
    lbbb_or_paced                   bool    LOCAL           plain cut points replaced by Sgarbossa and Smith
    fired_lbbb_qrs                  bool    PRACTICE        the LBBB pattern was chosen on the QRS shape
    sgarbossa_points                points  SGARBOSSA-1996  5 + 3 + 2 as met
    sgarbossa_positive              bool    SGARBOSSA-1996  >= 3 points, LBBB pattern chosen
    smith_positive                  bool    SMITH-2012      the Smith-modified rule met (LBBB or paced)
    sgarbossa_concordant_ste_leads  leads   SGARBOSSA-1996  concordant STE >= 100 uV
    sgarbossa_concordant_std_leads  leads   SGARBOSSA-1996  concordant STD >= 100 uV in V1-V3
    sgarbossa_discordant_ste_leads  leads   SGARBOSSA-1996  discordant STE >= 500 uV
    smith_ratio_leads               leads   SMITH-2012      discordant STE >= 100 uV with ST/S <= -0.25
    smith_min_ratio                 ratio   SMITH-2012      the lowest ST/S among them
    fired_sg_concordant_ste         bool    SGARBOSSA-1996  criterion met in the LBBB pattern (likewise below)
    fired_sg_concordant_std         bool    SGARBOSSA-1996  concordant depression
    fired_sg_discordant_ste         bool    SGARBOSSA-1996  discordant elevation >= 500 uV
    fired_smith_ratio               bool    SMITH-2012      the ratio criterion
    sokolow_lyon_uv                 uV      SOKOLOW-1949    S V1 + max R V5/V6
    cornell_uv                      uV      CORNELL-1985    R aVL + S V3
    lvh_voltage                     bool    SOKOLOW-1949    Sokolow-Lyon or Cornell met
    lvh_explains                    bool    LOCAL           LVH explains the deviation: one tier lower
    lvh_not_explained               bool    LOCAL           LVH voltage that does not explain it
    fired_sokolow                   bool    SOKOLOW-1949    Sokolow-Lyon used to lower the rank
    fired_cornell_men               bool    CORNELL-1985    Cornell (men) used to lower the rank
    fired_cornell_women             bool    CORNELL-1985    Cornell (women; unknown sex) used to lower the rank
    fired_lvh_proportionate         bool    LOCAL           proportionate V1-V3 elevation (ST < 0.25 x |S|)
    sex                             F/M     contract        null when unknown
    age_years                       y       contract        whole years at the ECG
    leads_missing                   leads   contract        standard leads with no ST value
    posterior_leads_recorded        bool    cart            V7-V9 recorded
    prior_leads_known               bool    cart            the prior ECG has lead values
    prior_gap_h                     h       contract        hours since the prior ECG
    same_as_prior                   bool    LOCAL           every lead of the pattern met it on the prior ECG
    prior_old                       bool    LOCAL           same, and the prior is older than the episode window: one tier lower
    persistent                      bool    LOCAL           same, within the episode window: not lowered
    new_vs_prior                    bool    LOCAL           depression not on a prior with lead values: one tier higher
    trop_max_ratio                  ratio   UDMI-2018       highest troponin / its URL in the window
    trop_delta_ng_l                 ng/L    LOCAL           troponin change in the window
    trop_above_url                  bool    UDMI-2018       above the 99th-centile URL
    trop_rising                     bool    LOCAL           rise >= 5 ng/L
    trop_raise                      bool    LOCAL           either: one tier higher
    tier                            tier    LOCAL           1..4, 5 = no finding (tiers above)
    severity                        0..1    LOCAL           score part (below)
    lab_confirmed                   bool    LOCAL           troponin above its URL or rising
    lab_gap_min                     min     LOCAL           |troponin offset|
    trend                           ng/L    LOCAL           troponin change
    prior_present                   bool    LOCAL           a prior ECG exists
    troponin_ratio                  ratio   LOCAL           trop_max_ratio

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

from cardiosieve.screens._frame import (
    NO_FINDING,
    age_years,
    build_findings,
    flag,
    fmt,
    fmt_leads,
    num,
    require_columns,
    score_parts,
    sex_masks,
    text,
)
from cardiosieve.screens._leads import (
    ALL_LEADS,
    CONTIGUOUS_PAIRS,
    DISPLAY_ORDER,
    HIGH_LATERAL,
    INFERIOR,
    STANDARD,
    group_pairs,
    wide,
)
from cardiosieve.screens._table import column_readers, criterion_table, dress_flagged, fired_rules, lead_lists, split_leads
from cardiosieve.screens.criteria import Rules, ScreenRules, load_rules

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


def criteria_st_deviation(aligned: pd.DataFrame, leads: pd.DataFrame, rules: Rules | None = None) -> pd.DataFrame:
    """The criterion table (module docstring): one row per aligned ECG, in its order.

    aligned: the aligned table (qrs_ms, paced, sex, age_years, prior_ecg_id, prior_gap_h, prior_qrs_ms,
    trop_ng_l, trop_offset_min, trop_max_ratio, trop_delta_ng_l, trop_n). leads: ecg_lead rows
    (st_j_uv, r_amp_uv, s_amp_uv, t_amp_uv in uV) for these ECGs and their prior ECGs.
    """
    return _criteria(aligned, leads, rules)[0]


def _criteria(aligned: pd.DataFrame, leads: pd.DataFrame, rules: Rules | None) -> tuple[pd.DataFrame, dict]:
    """The criterion table, and the per-lead frames (ST, cut points, ST/S) the evidence lists."""
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

    # ---- the criterion table: decisions as columns, lead sets as comma-joined lead names
    st = now["st_j_uv"]
    is_lbbb, is_post, is_avr = pattern == P_LBBB, pattern == P_POSTERIOR, pattern == P_AVR
    with np.errstate(invalid="ignore"):
        pat_st = st.where(fired_now[ALL_LEADS])
        max_st = pat_st.max(axis=1).to_numpy()
        deepest = pat_st.abs().max(axis=1).to_numpy()
        smith_min = ev["st_s"].where(ev["smith3"]).min(axis=1).to_numpy()
    n_pattern = fired_now.sum(axis=1).to_numpy()
    n_wide_dep = ev["wide_dep"].sum(axis=1).to_numpy()
    # Which elevation cut point each qualifying lead was judged by (evidence rules).
    cut_used = {}
    for lead, (conds, ths) in spec.items():
        taken = np.zeros(n, dtype=bool)
        for cond, th in zip(conds, ths):
            now_by = np.asarray(cond, dtype=bool) & ~taken
            taken |= now_by
            use = now_by & ev["qualifying"][lead].to_numpy() & is_elev
            cut_used[th.key] = cut_used.get(th.key, np.zeros(n, dtype=bool)) | use
    severity = _severity(pattern, ev, r, deepest, n_pattern, n_wide_dep, st["aVR"].to_numpy())
    territory = {t: ev["territory"][t] & is_elev for t in TERRITORY_ORDER}
    territory["posterior"] = territory["posterior"] | is_post
    # LBBB/paced: the leads of concordant or excessive discordant elevation name their groups;
    # concordant depression in V1-V3 reads as posterior, as with the plain criteria.
    lb_up = (ev["c1"] | ev["c3"] | ev["smith3"]).reindex(columns=LEADS_AND_MINUS_AVR, fill_value=False)
    for t in TERRITORY_ORDER:
        lb_t = lb_up[TERRITORY_LEADS[t]].any(axis=1).to_numpy()
        if t == "posterior":
            lb_t = lb_t | ev["c2"].any(axis=1).to_numpy()
        territory[t] = territory[t] | (is_lbbb & lb_t)
    terr_mask = pd.DataFrame({t: territory[t] for t in TERRITORY_ORDER})
    columns = {
        "pattern": pattern.astype(object),
        "pattern_leads": lead_lists(fired_now, DISPLAY_ORDER), "pattern_lead_count": n_pattern.astype("int64"),
        "st_max_uv": max_st, "st_deepest_uv": deepest,
        "ste_contiguous": ev["elevated"], "ste_leads": lead_lists(ev["qualifying"], DISPLAY_ORDER),
        "ste_lead_count": ev["n_leads"].astype("int64"), "ste_max_over_cut": ev["max_ratio"],
        "ste_clear_ratio": r["ste_clear_ratio"].met(ev["max_ratio"]) & is_elev,
        "ste_clear_leads": r["ste_clear_leads"].met(ev["n_leads"]) & is_elev,
        **{f"cut_{key}": used for key, used in cut_used.items()},
        **{f"territory_{t}": territory[t] for t in TERRITORY_ORDER},
        "territories": lead_lists(terr_mask, TERRITORY_ORDER),
        "reciprocal": ev["recip"] & is_elev, "reciprocal_leads": lead_lists(ev["recip_leads"] & is_elev[:, None], DISPLAY_ORDER),
        "minus_avr_supporting": ev["minus_avr_support"] & is_elev,
        "std_v1_v3": ev["post_any"], "std_v1_v3_leads": lead_lists(ev["post_leads"], DISPLAY_ORDER),
        "posterior_involvement": is_post | (is_elev & ev["post_any"]),
        "posterior_dominant_r": ev["dominant_r"], "posterior_upright_t": ev["upright_t"],
        "fired_dominant_r": is_post & ev["dominant_r"], "fired_upright_t": is_post & ev["upright_t"],
        "avr_widespread": ev["avr"], "fired_avr_widespread": is_avr,
        "widespread_depression_leads": lead_lists(ev["wide_dep"], DISPLAY_ORDER),
        "widespread_depression_count": n_wide_dep.astype("int64"),
        "std_contiguous": ev["dep_any"], "std_alone": is_dep, "std_leads": lead_lists(ev["dep_leads"], DISPLAY_ORDER),
        "walls_elevated": np.asarray(ev["walls"], dtype="int64"), "pericarditis_like": pericarditis,
        "qrs_ms": qrs, "qrs_wide": r["lbbb_qrs"].met(qrs), "paced": paced, "lbbb_shape": ev["lbbb"], "lbbb_shape_unknown": ev["shape_unknown"],
        "lbbb_or_paced": ev["confounded"], "fired_lbbb_qrs": is_lbbb & ev["lbbb"],
        "sgarbossa_points": np.asarray(ev["sg_points"], dtype="int64"), "sgarbossa_positive": ev["sgarbossa"] & is_lbbb,
        "smith_positive": ev["smith"] & ev["confounded"],
        "sgarbossa_concordant_ste_leads": lead_lists(ev["c1"], DISPLAY_ORDER),
        "sgarbossa_concordant_std_leads": lead_lists(ev["c2"], DISPLAY_ORDER),
        "sgarbossa_discordant_ste_leads": lead_lists(ev["c3"], DISPLAY_ORDER),
        "smith_ratio_leads": lead_lists(ev["smith3"], DISPLAY_ORDER), "smith_min_ratio": smith_min,
        "fired_sg_concordant_ste": is_lbbb & ev["c1"].any(axis=1).to_numpy(),
        "fired_sg_concordant_std": is_lbbb & ev["c2"].any(axis=1).to_numpy(),
        "fired_sg_discordant_ste": is_lbbb & ev["c3"].any(axis=1).to_numpy(),
        "fired_smith_ratio": is_lbbb & ev["smith3"].any(axis=1).to_numpy(),
        "sokolow_lyon_uv": ev["sokolow_uv"], "cornell_uv": ev["cornell_uv"], "lvh_voltage": ev["lvh"],
        "lvh_explains": lvh_applies, "lvh_not_explained": lvh_not_explained,
        "fired_sokolow": lvh_applies & ev["sokolow"], "fired_cornell_men": lvh_applies & ev["cornell"] & male,
        "fired_cornell_women": lvh_applies & ev["cornell"] & ~male, "fired_lvh_proportionate": lvh_applies & is_elev,
        "sex": np.where(female, "F", np.where(male, "M", None)), "age_years": age,
        "leads_missing": lead_lists(missing_std, DISPLAY_ORDER), "posterior_leads_recorded": st[["V7", "V8", "V9"]].notna().any(axis=1).to_numpy(),
        "prior_leads_known": prior_leads_known, "prior_gap_h": prior_gap, "same_as_prior": same_as_prior,
        "prior_old": prior_old, "persistent": persistent, "new_vs_prior": new_depression,
        "trop_max_ratio": trop_ratio, "trop_delta_ng_l": trop_delta, "trop_above_url": trop_above,
        "trop_rising": trop_rising, "trop_raise": trop_raise,
        "tier": tier.astype("int64"),
        "severity": severity, "lab_confirmed": trop_raise, "lab_gap_min": np.abs(num(aligned, "trop_offset_min")),
        "trend": trop_delta, "prior_present": has_prior, "troponin_ratio": trop_ratio,
    }
    return criterion_table(aligned, columns), {"st": st, "cut": ev["cut"], "st_s": ev["st_s"]}


def _severity(pattern, ev, r, deepest, n_pattern, n_wide_dep, avr_st) -> np.ndarray:
    """The severity score part of each pattern (module docstring), over the whole frame."""
    with np.errstate(invalid="ignore"):
        depth_post = np.clip(deepest / abs(r["std_posterior_v1v3"].value) - 1.0, 0.0, 1.0)
        depth_std = np.clip(deepest / abs(r["std_alone"].value) - 1.0, 0.0, 1.0)
        support = (ev["dominant_r"] | ev["upright_t"]).astype(float)
        elevation = (0.4 * np.clip(ev["max_ratio"] - 1.0, 0.0, 1.0) + 0.3 * np.minimum(n_pattern, 6) / 6.0
                     + 0.3 * ev["recip"].astype(float))
        avr = (0.5 * np.clip(avr_st / r["avr_elevation"].value - 1.0, 0.0, 1.0)
               + 0.5 * n_wide_dep / len(WIDESPREAD_LEADS))
    out = np.select(
        [pattern == P_LBBB, pattern == P_POSTERIOR, pattern == P_DEPRESSION, pattern == P_AVR, pattern == P_ELEVATION],
        [np.maximum(0.3, ev["sg_points"] / 10.0),
         0.4 * depth_post + 0.3 * np.minimum(n_pattern, 3) / 3.0 + 0.3 * support,
         0.5 * depth_std + 0.5 * np.minimum(n_pattern, 6) / 6.0,
         avr, elevation],
        0.0,
    )
    return np.nan_to_num(out)


# Thresholds and the criterion column that says each one fired (evidence `rules`, in this order).
FIRED = (
    ("ste_general", "cut_ste_general"), ("ste_v2v3_women", "cut_ste_v2v3_women"),
    ("ste_v2v3_men_older", "cut_ste_v2v3_men_older"), ("ste_v2v3_men_younger", "cut_ste_v2v3_men_younger"),
    ("ste_right_men_younger", "cut_ste_right_men_younger"), ("ste_right", "cut_ste_right"),
    ("ste_posterior_men_younger", "cut_ste_posterior_men_younger"), ("ste_posterior", "cut_ste_posterior"),
    ("std_reciprocal", "reciprocal"),
    ("ste_clear_ratio", "ste_clear_ratio"), ("ste_clear_leads", "ste_clear_leads"),
    ("diffuse_territories", "pericarditis_like"), ("pericarditis_avr_st", "pericarditis_like"),
    ("std_posterior_v1v3", "posterior_involvement"), ("dominant_r", "fired_dominant_r"),
    ("upright_t", "fired_upright_t"), ("std_alone", "std_alone"),
    ("avr_elevation", "fired_avr_widespread"), ("widespread_depression", "fired_avr_widespread"),
    ("widespread_depression_leads", "fired_avr_widespread"),
    ("lbbb_qrs", "fired_lbbb_qrs"), ("sgarbossa_concordant_ste", "fired_sg_concordant_ste"),
    ("sgarbossa_concordant_std_v1v3", "fired_sg_concordant_std"),
    ("sgarbossa_discordant_ste", "fired_sg_discordant_ste"), ("sgarbossa_score", "sgarbossa_positive"),
    ("smith_discordant_ste", "fired_smith_ratio"), ("smith_st_s_ratio", "fired_smith_ratio"),
    ("sokolow_lyon", "fired_sokolow"), ("cornell_men", "fired_cornell_men"),
    ("cornell_women", "fired_cornell_women"), ("lvh_proportionate", "fired_lvh_proportionate"),
    ("prior_old_h", "prior_old"), ("trop_above_url", "trop_above_url"), ("trop_rise", "trop_rising"),
)


def screen_st_deviation(aligned: pd.DataFrame, leads: pd.DataFrame, rules: Rules | None = None, *,
                       with_criteria: bool = False):
    """Acute ST deviation findings for the aligned ECGs: the flagged rows of the criterion table,
    dressed. Returns the findings frame (FINDING_COLUMNS, with territories); with_criteria, (findings,
    criterion table)."""
    rules = rules or load_rules()
    return dress_flagged(aligned, lambda: _criteria(aligned, leads, rules),
                         lambda table, lead_frames, hit: _dress(aligned, table, lead_frames, hit, rules[SCREEN]),
                         with_criteria)


def _dress(aligned, table, lead_frames, hit, r) -> pd.DataFrame:
    """Summary, caveats, evidence and score parts of the flagged rows, read off the criterion
    table (the per-lead frames give the values the evidence lists)."""
    col, b = column_readers(table)
    trop, trop_off, trop_url = num(aligned, "trop_ng_l"), num(aligned, "trop_offset_min"), num(aligned, "trop_url_ng_l")
    female, male, sex_unknown = sex_masks(table)
    qrs, age, paced = num(table, "qrs_ms"), num(table, "age_years"), b("paced")
    trop_ratio, trop_delta, prior_gap = num(table, "trop_max_ratio"), num(table, "trop_delta_ng_l"), num(table, "prior_gap_h")
    pattern, tier, sg_points = col("pattern"), col("tier"), col("sgarbossa_points")
    prior_ids = text(aligned, "prior_ecg_id")
    window = fmt(r["prior_old_h"].value)
    rules_of_row = fired_rules(table, [(r[key], column) for key, column in FIRED], hit)
    m_st, m_cut = _row_maps(lead_frames["st"], hit), _row_maps(lead_frames["cut"], hit)
    leads_of = {name: col(name) for name in (
        "pattern_leads", "reciprocal_leads", "widespread_depression_leads", "leads_missing", "std_v1_v3_leads",
        "sgarbossa_concordant_ste_leads", "sgarbossa_concordant_std_leads", "sgarbossa_discordant_ste_leads",
        "smith_ratio_leads", "territories")}
    territories_out, parts, summaries, evidence, caveats = [], [], [], [], []
    for j, i in enumerate(hit):
        lists = {name: split_leads(v[i]) for name, v in leads_of.items()}
        fl, terr, miss = lists["pattern_leads"], lists["territories"], lists["leads_missing"]
        c1, c2 = lists["sgarbossa_concordant_ste_leads"], lists["sgarbossa_concordant_std_leads"]
        c3, s3 = lists["sgarbossa_discordant_ste_leads"], lists["smith_ratio_leads"]
        recip_names, post_names = lists["reciprocal_leads"], lists["std_v1_v3_leads"]
        st_row, cut_row = m_st[j], m_cut[j]
        pat = pattern[i]
        territories_out.append(",".join(terr))
        max_st = table["st_max_uv"].iat[i]
        leads_txt = fmt_leads(fl, DISPLAY_ORDER)

        if pat == P_ELEVATION:
            words = [f"ST elevation up to {fmt(max_st)} uV ({fmt(max_st / 100, 1)} mm) in {leads_txt} ({', '.join(terr)})"]
            words.append(
                f"reciprocal depression in {fmt_leads(recip_names, DISPLAY_ORDER)}" if recip_names
                else "no reciprocal depression"
            )
            if post_names:
                words.append(f"ST depression in {fmt_leads(post_names, DISPLAY_ORDER)} (posterior involvement)")
            if b("minus_avr_supporting")[i]:
                words.append("-aVR agrees (supporting)")
        elif pat == P_POSTERIOR:
            with_what = [w for w, on in (("dominant R", b("posterior_dominant_r")[i]),
                                         ("upright T", b("posterior_upright_t")[i])) if on]
            words = [
                f"ST depression down to {fmt(-table['st_deepest_uv'].iat[i])} uV in {leads_txt}: posterior-equivalent"
                + (f", with {' and '.join(with_what)}" if with_what else ", without dominant R or upright T")
            ]
        elif pat == P_DEPRESSION:
            dep = -table["st_deepest_uv"].iat[i]
            words = [f"ST depression down to {fmt(dep)} uV ({fmt(dep / 100, 1)} mm) in {leads_txt}, no ST elevation"]
        elif pat == P_AVR:
            dep_names = lists["widespread_depression_leads"]
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
                crit.append(f"ST/S ratio down to {fmt(table['smith_min_ratio'].iat[i], 2)} in {fmt_leads(s3, DISPLAY_ORDER)}")
            words = [
                f"{shape}: Sgarbossa {int(sg_points[i])} points"
                f"{' (positive)' if b('sgarbossa_positive')[i] else ''}, Smith-modified "
                f"{'positive' if b('smith_positive')[i] else 'negative'}; " + "; ".join(crit)
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
        if b("prior_old")[i]:
            words.append(f"same deviation on the prior ECG {_gap_words(prior_gap[i])} earlier")
        elif b("persistent")[i]:
            words.append(f"persistent: also on the prior ECG {_gap_words(prior_gap[i])} earlier")
        elif b("new_vs_prior")[i]:
            words.append("new against the prior ECG")
        summaries.append("; ".join(words))

        lo_tier = TIER_RANGE.get(pat, (1, 4))[1]
        floor = f", not below tier {lo_tier}" if pat in (P_ELEVATION, P_LBBB, P_AVR, P_POSTERIOR) else ""
        cav = []
        if pat == P_LBBB:
            cav.append(CAVEAT_PACED if paced[i] else CAVEAT_LBBB.format(qrs=fmt(qrs[i])))
        elif b("qrs_wide")[i] and pat != P_NOT_EVALUABLE:
            cav.append((CAVEAT_WIDE_SHAPE_UNKNOWN if b("lbbb_shape_unknown")[i] else CAVEAT_WIDE_OTHER).format(qrs=fmt(qrs[i])))
        if b("lvh_explains")[i]:
            what = ("ST elevation confined to V1-V3 and proportionate to the S wave" if pat == P_ELEVATION
                    else "ST depression confined to I, aVL, V5, V6")
            cav.append(CAVEAT_LVH_EXPLAINS.format(what=what, floor=floor))
        elif b("lvh_not_explained")[i]:
            cav.append(CAVEAT_LVH_NOT_EXPLAINED.format(what="elevation" if pat == P_ELEVATION else "depression"))
        if b("pericarditis_like")[i]:
            cav.append(CAVEAT_PERICARDITIS.format(walls=int(col("walls_elevated")[i]), ratio=f"{r['ste_clear_ratio'].value:g}"))
        if pat in (P_DEPRESSION, P_POSTERIOR):
            cav.append(CAVEAT_SLOPE)
        if pat == P_POSTERIOR and not b("posterior_leads_recorded")[i]:
            cav.append(CAVEAT_POSTERIOR_LEADS)
        if pat != P_NOT_EVALUABLE:
            if b("prior_old")[i]:
                cav.append(CAVEAT_OLD_PRIOR.format(gap=_gap_words(prior_gap[i]), window=window, floor=floor))
            elif b("persistent")[i]:
                cav.append(CAVEAT_PERSISTENT.format(gap=_gap_words(prior_gap[i]), window=window))
            elif b("same_as_prior")[i]:
                cav.append(CAVEAT_PRIOR_GAP_UNKNOWN)
            elif b("new_vs_prior")[i]:
                cav.append(CAVEAT_NEW_DEPRESSION)
            elif not b("prior_present")[i]:
                cav.append(CAVEAT_NO_PRIOR)
            elif not b("prior_leads_known")[i]:
                cav.append(CAVEAT_PRIOR_NO_LEADS)
        if b("trop_raise")[i]:
            cav.append(CAVEAT_TROPONIN)
        if sex_unknown[i]:
            cav.append(CAVEAT_SEX_UNKNOWN.format(
                v23=fmt(r["ste_v2v3_women"].value), right=fmt(r["ste_right"].value), post=fmt(r["ste_posterior"].value)))
        elif male[i] and np.isnan(age[i]):
            cav.append(CAVEAT_AGE_UNKNOWN)
        if miss:
            cav.append(CAVEAT_MISSING_LEADS.format(leads=fmt_leads(miss, DISPLAY_ORDER)))
        caveats.append(cav)

        confounded = b("lbbb_or_paced")[i]
        st_by_lead = {l: st_row[l] for l in ALL_LEADS if not np.isnan(st_row[l])}
        evidence.append(
            {
                "values": {
                    "pattern": pat,
                    "st_j_uv": st_by_lead,
                    "leads_meeting": fl,
                    "cut_points_uv": {l: cut_row[l] for l in fl} if pat == P_ELEVATION else {},
                    "max_st_over_cut": table["ste_max_over_cut"].iat[i] if pat == P_ELEVATION else None,
                    "reciprocal_leads": recip_names,
                    "territories": terr,
                    "posterior_by_v1_v3_depression": bool(b("std_v1_v3")[i]),
                    "posterior_dominant_r": bool(b("posterior_dominant_r")[i]),
                    "posterior_upright_t": bool(b("posterior_upright_t")[i]),
                    "minus_avr_supporting": bool(b("minus_avr_supporting")[i]),
                    "pericarditis_like": bool(b("pericarditis_like")[i]),
                    "sex": "F" if female[i] else ("M" if male[i] else None),
                    "age_years": age[i],
                    "qrs_ms": qrs[i],
                    "paced": bool(paced[i]),
                    "lbbb_shape": bool(b("lbbb_shape")[i]),
                    "sgarbossa_points": int(sg_points[i]) if confounded else None,
                    "smith_modified_positive": bool(b("smith_positive")[i]) if confounded else None,
                    "sokolow_lyon_uv": table["sokolow_lyon_uv"].iat[i],
                    "cornell_uv": table["cornell_uv"].iat[i],
                    "lvh_voltage": bool(b("lvh_voltage")[i]),
                    "lvh_explains": bool(b("lvh_explains")[i]),
                    "prior_ecg_id": prior_ids[i],
                    "prior_gap_h": prior_gap[i],
                    "same_as_prior": bool(b("same_as_prior")[i]),
                    "prior_old": bool(b("prior_old")[i]),
                    "persistent": bool(b("persistent")[i]),
                    "new_vs_prior": bool(b("new_vs_prior")[i]),
                    "trop_ng_l": trop[i],
                    "trop_url_ng_l": trop_url[i],
                    "trop_max_ratio": trop_ratio[i],
                    "trop_delta_ng_l": trop_delta[i],
                    "trop_offset_min": trop_off[i],
                    "leads_missing": miss,
                },
                "rules": rules_of_row[j],
            }
        )
        parts.append(
            score_parts(
                severity=table["severity"].iat[i],
                lab_confirmed=bool(b("lab_confirmed")[i]),
                lab_gap_min=trop_off[i],
                trend=trop_delta[i],
                prior_present=bool(b("prior_present")[i]),
                troponin_ratio=trop_ratio[i],
                max_st_uv=max_st,
                leads_meeting=len(fl),
                reciprocal=int(bool(b("reciprocal")[i])),
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
