"""Plot data for the review page (`cardiosieve serve`, `show --html`), and its SVG drawings.

Two halves, kept apart so the numbers can be tested without drawing anything:

    st_plot_data         ST at J per lead, grouped by territory, with the elevation cut point the
                         screen applied to that lead and the prior ECG's ST beside it
    lab_plot_data        potassium, magnesium and calcium over the 72 h around the ECG (the lake's
                         results when given, else only the results aligned to this ECG)
    qtc_plot_data        QTc over the patient's ECGs known to OUT, with the sex-specific limit
    interval_plot_data   heart rate, PR and QRS on this ECG and on the prior ECG
    svg_*                each of those frames drawn with matplotlib (Agg) as SVG text

Where a threshold comes from: a cut point drawn is read off the item's evidence (`values` and
`rules`, written by the screen that fired), never worked out again here from sex and age, so the
line on the plot is the rule that was applied. Where a value is not known it is NaN in the frame
and the page says "unknown"; nothing is left out silently. The plot-data functions are pure: no
files, no clock. matplotlib is imported inside the svg_ functions only (the CLI's start-up stays
light).
"""
from __future__ import annotations

import io
import math

import numpy as np
import pandas as pd

# Territory groups for the bars (screens/st_deviation.py names the same territories). aVR is
# drawn on its own: it belongs to none of them.
ST_GROUPS = (
    ("inferior", ("II", "III", "aVF")),
    ("lateral", ("I", "aVL", "V5", "V6")),
    ("septal", ("V1", "V2")),
    ("anterior", ("V3", "V4")),
    ("right ventricular", ("V3R", "V4R")),
    ("posterior", ("V7", "V8", "V9")),
    ("aVR", ("aVR",)),
)
# The elevation thresholds of screens/rules.toml [st_deviation] that can apply to each lead;
# for one patient (sex, age) only one of each list is applied, and the evidence names it when it
# fired.
ST_CUT_KEYS = {
    "V2": ("ste_v2v3_women", "ste_v2v3_men_older", "ste_v2v3_men_younger"),
    "V3": ("ste_v2v3_women", "ste_v2v3_men_older", "ste_v2v3_men_younger"),
    "V3R": ("ste_right", "ste_right_men_younger"),
    "V4R": ("ste_right", "ste_right_men_younger"),
    "V7": ("ste_posterior", "ste_posterior_men_younger"),
    "V8": ("ste_posterior", "ste_posterior_men_younger"),
    "V9": ("ste_posterior", "ste_posterior_men_younger"),
}
ST_GENERAL_KEYS = ("ste_general",)
# Depression thresholds, in the order the page prefers to draw one (the pattern's own first).
ST_DEPRESSION_KEYS = ("std_alone", "std_posterior_v1v3", "widespread_depression", "std_reciprocal")

LAB_ANALYTES = ("potassium", "magnesium", "calcium")
LAB_WINDOW_H = 36.0          # either side of the ECG: the 72 h the page shows (local choice)
LAB_ALIGNED = {              # aligned.parquet columns: (value, offset in minutes, haemolysed) per analyte
    "potassium": [("k_mmol_l", "k_offset_min", "k_hemolyzed"), ("k_prev_mmol_l", "k_prev_offset_min", None)],
    "magnesium": [("mg_mmol_l", "mg_offset_min", "mg_hemolyzed")],
    "calcium": [("ca_mmol_l", "ca_offset_min", "ca_hemolyzed")],
}
POTASSIUM_BAND_KEYS = ("k_mild", "k_moderate", "k_severe")   # screens/rules.toml [hyperkalemia]
INTERVALS = (("heart_rate_bpm", "heart rate", "/min"), ("pr_ms", "PR", "ms"), ("qrs_ms", "QRS", "ms"))


def _num(x) -> float:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return math.nan
    return v


def _fired(evidence: dict) -> dict[str, dict]:
    return {r.get("key"): r for r in evidence.get("rules", []) if isinstance(r, dict)}


# ---------------------------------------------------------------------------------------------
# ST deviation
# ---------------------------------------------------------------------------------------------
ST_COLUMNS = ["group", "lead", "st_uv", "prior_st_uv", "cut_uv", "cut_key", "cut_source", "meets"]


def st_plot_data(evidence: dict, prior_st: dict | None = None) -> pd.DataFrame:
    """One row per lead with an ST value on this ECG (or on the prior), in territory order:
    group, lead, st_uv, prior_st_uv (NaN: unknown), cut_uv, cut_key, cut_source, meets.

    cut_uv is the elevation cut point the screen applied to the lead: the evidence's
    `values.cut_points_uv` for a lead that met it, else the fired rule of the lead's group
    (`rules`: e.g. ste_v2v3_women for V2 of a woman). A group none of whose leads met its cut
    point has no fired rule, so its cut point is not in the evidence: NaN, and the page says so."""
    values = evidence.get("values", {}) or {}
    st = values.get("st_j_uv") or {}
    cuts = values.get("cut_points_uv") or {}
    meeting = set(values.get("leads_meeting") or []) if values.get("pattern") == "st_elevation" else set()
    fired = _fired(evidence)
    prior_st = prior_st or {}
    rows = []
    for group, leads in ST_GROUPS:
        for lead in leads:
            if lead not in st and lead not in prior_st:
                continue
            keys = ST_CUT_KEYS.get(lead, ST_GENERAL_KEYS)
            rule = next((fired[k] for k in keys if k in fired), None)
            cut = _num(cuts[lead]) if lead in cuts else (_num(rule["value"]) if rule else math.nan)
            rows.append({"group": group, "lead": lead, "st_uv": _num(st.get(lead)),
                         "prior_st_uv": _num(prior_st.get(lead)), "cut_uv": cut,
                         "cut_key": rule["key"] if rule else None,
                         "cut_source": rule.get("source") if rule else None,
                         "meets": lead in meeting})
    return pd.DataFrame(rows, columns=ST_COLUMNS)


def st_depression_rule(evidence: dict) -> dict | None:
    """The depression threshold that fired (value in uV, negative), or None."""
    fired = _fired(evidence)
    return next((fired[k] for k in ST_DEPRESSION_KEYS if k in fired), None)


# ---------------------------------------------------------------------------------------------
# Laboratory values around the ECG
# ---------------------------------------------------------------------------------------------
LAB_COLUMNS = ["analyte", "offset_h", "value", "unit", "hemolyzed", "origin"]


def lab_plot_data(aligned_row: dict | None, ecg_at, lab: pd.DataFrame | None = None,
                  analyte_of_code: dict | None = None) -> pd.DataFrame:
    """Potassium, magnesium and calcium results, hours from the ECG (negative: before).

    With `lab` (the contract rows of the patient's results, read from the lake, `analyte` a local
    or LOINC code mapped by `analyte_of_code`), every result within LAB_WINDOW_H either side;
    origin "lake". Without it, only the results aligned to this ECG (aligned.parquet: the nearest
    potassium and the one before it, magnesium, calcium); origin "aligned"."""
    rows = []
    if lab is not None:
        at = pd.Timestamp(ecg_at)
        names = lab["analyte"].map(analyte_of_code or {}).fillna(lab["analyte"])
        hours = (pd.to_datetime(lab["collected_at"], utc=True) - at).dt.total_seconds() / 3600.0
        keep = names.isin(LAB_ANALYTES) & hours.abs().le(LAB_WINDOW_H)
        hemolyzed = lab["hemolyzed"] if "hemolyzed" in lab else pd.Series(pd.NA, index=lab.index)
        for name, h, v, u, hz in zip(names[keep], hours[keep], lab["value"][keep], lab["unit"][keep], hemolyzed[keep]):
            rows.append({"analyte": name, "offset_h": float(h), "value": _num(v), "unit": u,
                         "hemolyzed": None if pd.isna(hz) else bool(hz),
                         "origin": "lake"})
    elif aligned_row is not None:
        for name, pairs in LAB_ALIGNED.items():
            for value_col, offset_col, hemolyzed_col in pairs:
                v, off = _num(aligned_row.get(value_col)), _num(aligned_row.get(offset_col))
                if math.isnan(v) or math.isnan(off):
                    continue
                hz = aligned_row.get(hemolyzed_col) if hemolyzed_col else None
                rows.append({"analyte": name, "offset_h": off / 60.0, "value": v, "unit": "mmol/L",
                             "hemolyzed": bool(hz) if isinstance(hz, (bool, np.bool_)) else None,
                             "origin": "aligned"})
    df = pd.DataFrame(rows, columns=LAB_COLUMNS)
    return df.sort_values(["analyte", "offset_h"], kind="mergesort").reset_index(drop=True)


def potassium_bands(screen_rules) -> list[dict]:
    """The potassium bands (mild, moderate, severe: their thresholds as evidence dicts) of the
    hyperkalemia rules the night ran under (screens.criteria ScreenRules)."""
    return [screen_rules[k].as_dict() for k in POTASSIUM_BAND_KEYS]


# ---------------------------------------------------------------------------------------------
# QTc over the patient's ECGs
# ---------------------------------------------------------------------------------------------
QTC_COLUMNS = ["ecg_id", "acquired_at", "qtc_ms", "this_ecg", "origin"]


def qtc_plot_data(evidence: dict, ecg_id: str, criteria_rows: pd.DataFrame | None,
                  prior_ecg_id=None, prior_at=None) -> tuple[pd.DataFrame, dict]:
    """(points, limits). Points: the QTc the long-QT screen computed for each of the patient's
    ECGs in `criteria_rows` (its criterion table's rows: OUT's criteria_long_qt, origin
    "criteria", or the screen run on the lake's ECGs, their `origin` column "lake"), and the prior ECG's QTc from the
    item's evidence when the table lacks it (origin "evidence"). Limits: `limit_ms` the
    sex-specific limit applied to this ECG (evidence values.qtc_limit_ms, the long-QT screen's
    own evidence; else its rule from the long-QT criteria row) and `high_risk` the
    qtc_high_risk rule when the evidence has it."""
    values = evidence.get("values", {}) or {}
    rows = []
    if criteria_rows is not None and len(criteria_rows):
        for r in criteria_rows.itertuples():
            rows.append({"ecg_id": r.ecg_id, "acquired_at": pd.Timestamp(r.acquired_at), "qtc_ms": _num(r.qtc_ms),
                         "this_ecg": r.ecg_id == ecg_id, "origin": getattr(r, "origin", "criteria")})
    have = {r["ecg_id"] for r in rows}
    prior_qtc = _num(values.get("prior_qtc_ms"))
    if prior_ecg_id and prior_ecg_id not in have and not math.isnan(prior_qtc) and prior_at is not None:
        rows.append({"ecg_id": prior_ecg_id, "acquired_at": pd.Timestamp(prior_at), "qtc_ms": prior_qtc,
                     "this_ecg": False, "origin": "evidence"})
    df = pd.DataFrame(rows, columns=QTC_COLUMNS)
    df = df.sort_values("acquired_at", kind="mergesort").reset_index(drop=True)
    limit, sex = _num(values.get("qtc_limit_ms")), values.get("sex")
    if math.isnan(limit) and criteria_rows is not None and len(criteria_rows):
        mine = criteria_rows[criteria_rows["ecg_id"] == ecg_id]
        if len(mine):       # an item of another screen: the long-QT screen's row for this ECG
            limit = _num(mine["qtc_limit_ms"].iloc[0])
            sex = mine["sex"].iloc[0] if "sex" in mine and isinstance(mine["sex"].iloc[0], str) else None
    return df, {"limit_ms": limit, "sex": sex, "high_risk": _fired(evidence).get("qtc_high_risk")}


# ---------------------------------------------------------------------------------------------
# Heart rate, PR, QRS against the prior ECG
# ---------------------------------------------------------------------------------------------
def interval_plot_data(aligned_row: dict | None) -> pd.DataFrame:
    """measure, label, unit, this_ecg, prior_ecg (NaN: unknown) from the aligned row."""
    row = aligned_row or {}
    return pd.DataFrame([{"measure": m, "label": label, "unit": unit, "this_ecg": _num(row.get(m)),
                          "prior_ecg": _num(row.get(f"prior_{m}"))} for m, label, unit in INTERVALS],
                        columns=["measure", "label", "unit", "this_ecg", "prior_ecg"])


# ---------------------------------------------------------------------------------------------
# SVG
# ---------------------------------------------------------------------------------------------
def _figure(width: float, height: float):
    import matplotlib
    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure
    fig = Figure(figsize=(width, height), dpi=96)
    return fig


def _svg(fig) -> str:
    buf = io.StringIO()
    fig.savefig(buf, format="svg", bbox_inches="tight", metadata={"Date": None})
    return buf.getvalue()


# Line styles carry meaning, not colour alone: solid bars now, hatched bars the prior ECG,
# dashed lines cut points; every line is labelled in the legend and in the table beside it.
def svg_st(data: pd.DataFrame, depression: dict | None = None) -> str:
    fig = _figure(8.5, 3.4)
    ax = fig.add_subplot()
    x = np.arange(len(data))
    ax.bar(x - 0.2, data["st_uv"].fillna(0), width=0.4, color="#3b3b3b", label="this ECG")
    if data["prior_st_uv"].notna().any():
        ax.bar(x + 0.2, data["prior_st_uv"].fillna(0), width=0.4, color="white", edgecolor="#3b3b3b",
               hatch="///", label="prior ECG")
    first = True
    for i, cut in enumerate(data["cut_uv"]):
        if cut == cut:
            ax.hlines(cut, i - 0.45, i + 0.45, colors="#b00020", linestyles="dashed", linewidth=1.6,
                      label="elevation cut point applied" if first else None)
            first = False
    if depression is not None:
        ax.axhline(float(depression["value"]), color="#1f4e99", linestyle="dotted", linewidth=1.4,
                   label=f"depression {depression['op']} {depression['value']} uV ({depression['key']})")
    ax.axhline(0, color="black", linewidth=0.6)
    ax.set_xticks(x, [f"{lead}\n{group if lead == first_lead else ''}" for lead, group, first_lead in
                      zip(data["lead"], data["group"], _first_of_group(data))], fontsize=8)
    for i in _group_breaks(data):
        ax.axvline(i - 0.5, color="#999999", linewidth=0.6)
    ax.set_ylabel("ST at J (uV)")
    _legend(ax, fontsize=7, loc="best")
    return _svg(fig)


def _legend(ax, **kw) -> None:
    if ax.get_legend_handles_labels()[0]:      # matplotlib warns about an empty legend
        ax.legend(**kw)


def _first_of_group(data: pd.DataFrame) -> list[str]:
    first = data.groupby("group", sort=False)["lead"].transform("first")
    return list(first)


def _group_breaks(data: pd.DataFrame) -> list[int]:
    g = data["group"].tolist()
    return [i for i in range(1, len(g)) if g[i] != g[i - 1]]


def svg_labs(data: pd.DataFrame, bands: list[dict]) -> str:
    fig = _figure(8.5, 3.0)
    axes = fig.subplots(1, len(LAB_ANALYTES), sharex=True)
    markers = {"potassium": "o", "magnesium": "s", "calcium": "^"}
    for ax, name in zip(axes, LAB_ANALYTES):
        d = data[data["analyte"] == name]
        if len(d):
            ax.plot(d["offset_h"], d["value"], marker=markers[name], color="#3b3b3b", linewidth=1)
        else:
            ax.text(0.5, 0.5, "no result: unknown", transform=ax.transAxes, ha="center", fontsize=8)
        if name == "potassium":
            for band, style in zip(bands, ("dotted", "dashed", "solid")):
                ax.axhline(float(band["value"]), color="#b00020", linestyle=style, linewidth=1,
                           label=f"{band['key']} {band['op']} {band['value']}")
            _legend(ax, fontsize=6, loc="best")
        ax.margins(y=0.15)                 # a result on a band or at the edge stays visible
        ax.axvline(0, color="#1f4e99", linewidth=0.8)
        ax.set_xlim(-LAB_WINDOW_H, LAB_WINDOW_H)
        ax.set_title(f"{name} (mmol/L)", fontsize=8)
        ax.set_xlabel("hours from ECG", fontsize=7)
        ax.tick_params(labelsize=7)
    return _svg(fig)


def svg_qtc(data: pd.DataFrame, limits: dict) -> str:
    fig = _figure(8.5, 2.8)
    ax = fig.add_subplot()
    if len(data):
        times = data["acquired_at"].dt.tz_convert("UTC").dt.tz_localize(None)
        pad = max((times.max() - times.min()) * 0.1, pd.Timedelta(hours=12))
        ax.set_xlim(times.min() - pad, times.max() + pad)
        ax.plot(times, data["qtc_ms"], color="#3b3b3b", marker="o", linewidth=1, label="QTc")
        this = data["this_ecg"].to_numpy(dtype=bool)
        ax.plot(times[this], data["qtc_ms"][this], linestyle="none",
                marker="D", markersize=9, markerfacecolor="none", color="black", label="this ECG")
    if limits.get("limit_ms") == limits.get("limit_ms") and limits.get("limit_ms") is not None:
        sex = {"F": "female", "M": "male"}.get(limits.get("sex"), "sex unknown")
        ax.axhline(limits["limit_ms"], color="#b00020", linestyle="dashed", label=f"limit applied ({sex}) {limits['limit_ms']:g} ms")
    if limits.get("high_risk"):
        hr = limits["high_risk"]
        ax.axhline(float(hr["value"]), color="#b00020", linestyle="solid", label=f"{hr['key']} {hr['op']} {hr['value']} ms")
    if not len(data):
        ax.text(0.5, 0.5, "no QTc known for this patient's ECGs: unknown", transform=ax.transAxes, ha="center", fontsize=8)
    ax.set_ylabel("QTc (ms)")
    ax.tick_params(labelsize=7)
    _legend(ax, fontsize=7, loc="best")
    fig.autofmt_xdate()
    return _svg(fig)


def svg_intervals(data: pd.DataFrame) -> str:
    fig = _figure(8.5, 2.4)
    axes = fig.subplots(1, len(data))
    for ax, r in zip(axes, data.itertuples()):
        ax.bar([0], [0 if r.this_ecg != r.this_ecg else r.this_ecg], color="#3b3b3b", label="this ECG")
        ax.bar([1], [0 if r.prior_ecg != r.prior_ecg else r.prior_ecg], color="white", edgecolor="#3b3b3b",
               hatch="///", label="prior ECG")
        ax.set_xticks([0, 1], ["this", "prior" if r.prior_ecg == r.prior_ecg else "prior\n(unknown)"], fontsize=7)
        ax.set_title(f"{r.label} ({r.unit})", fontsize=8)
        ax.tick_params(labelsize=7)
    return _svg(fig)


# ---------------------------------------------------------------------------------------------
# The analysts' audit (`cardiosieve audit --format html`, docs/audit.md)
# ---------------------------------------------------------------------------------------------
HATCHES = ("", "///", "...", "xxx", "\\\\\\", "++")   # bars told apart by pattern, not colour alone


def svg_review_hours(per_item: pd.DataFrame, targets_h: dict[int, float]) -> str:
    """Hours from first flagged to first review per tier (audit.timeliness_items), a box per
    tier with every item's point, and the tier's target as a dashed line."""
    fig = _figure(8.5, 3.0)
    ax = fig.add_subplot()
    tiers = sorted(targets_h)
    reviewed = per_item.dropna(subset=["hours_to_review"])
    for i, tier in enumerate(tiers):
        h = reviewed.loc[reviewed["tier"] == tier, "hours_to_review"].to_numpy(dtype=float)
        if len(h):
            ax.boxplot([h], positions=[i], widths=0.5, showfliers=False)
            ax.plot(np.full(len(h), i) + np.linspace(-0.15, 0.15, len(h)), h, linestyle="none", marker="o",
                    markersize=3, color="#3b3b3b")
        else:
            ax.text(i, 0.5, "none reviewed", ha="center", fontsize=7, transform=ax.get_xaxis_transform())
        ax.hlines(targets_h[tier], i - 0.35, i + 0.35, color="#b00020", linestyle="dashed",
                  label="target for the tier" if i == 0 else None)
    ax.set_xticks(range(len(tiers)), [f"tier {t}" for t in tiers], fontsize=8)
    ax.set_xlim(-0.6, len(tiers) - 0.4)
    if len(reviewed) and (reviewed["hours_to_review"] > 0).all():
        ax.set_yscale("log")
    ax.set_ylabel("hours to first review", fontsize=8)
    ax.tick_params(labelsize=7)
    _legend(ax, fontsize=7, loc="best")
    return _svg(fig)


def svg_follow_up_by_month(summary: pd.DataFrame, outcome: str = "to_review") -> str:
    """Findings of each follow-up rule ending in `outcome`, by month (followup.follow_up_summary),
    as grouped bars: one hatch per rule."""
    fig = _figure(8.5, 3.0)
    ax = fig.add_subplot()
    if summary.empty:
        ax.text(0.5, 0.5, "no finding a follow-up rule applies to in the period", transform=ax.transAxes,
                ha="center", fontsize=8)
        return _svg(fig)
    table = summary.pivot_table(index="month", columns="rule", values=outcome, aggfunc="sum", fill_value=0)
    months, rules = list(table.index), list(table.columns)
    width = 0.8 / max(len(rules), 1)
    x = np.arange(len(months))
    for j, rule in enumerate(rules):
        ax.bar(x + (j - (len(rules) - 1) / 2) * width, table[rule].to_numpy(), width, color="white",
               edgecolor="#3b3b3b", hatch=HATCHES[j % len(HATCHES)], label=rule)
    ax.set_xticks(x, months, fontsize=7)
    ax.set_ylabel(f"findings {outcome.replace('_', ' ')}", fontsize=8)
    ax.yaxis.get_major_locator().set_params(integer=True)
    ax.tick_params(labelsize=7)
    _legend(ax, fontsize=7, loc="best")
    return _svg(fig)


def svg_ppv_by_version(yield_rows: pd.DataFrame) -> str:
    """PPV with its 95 % Wilson interval per screen and rule version (store.yield_table with
    by="rule_version"); a row with no reviewed item is marked "none reviewed", not drawn as 0."""
    fig = _figure(8.5, 3.2)
    ax = fig.add_subplot()
    rows = yield_rows.reset_index(drop=True)
    labels = [f"{s}\n{v}" for s, v in zip(rows["screen"], rows["rule_version"])]
    for i, r in rows.iterrows():         # one point per rule version: a handful of rows
        if r["reviewed"] and r["ppv"] == r["ppv"]:
            ax.errorbar([i], [r["ppv"]], yerr=[[r["ppv"] - r["ppv_low"]], [r["ppv_high"] - r["ppv"]]],
                        fmt="o", color="#3b3b3b", capsize=4)
            ax.annotate(f"n={int(r['reviewed'])}", (i, r["ppv_high"]), textcoords="offset points", xytext=(0, 4),
                        ha="center", fontsize=6)
        else:
            ax.text(i, 0.5, "none\nreviewed", ha="center", fontsize=6)
    ax.set_xticks(range(len(rows)), labels, fontsize=6)
    ax.set_xlim(-0.6, max(len(rows), 1) - 0.4)
    ax.set_ylim(0, 1.05)
    ax.set_ylabel("PPV (95 % Wilson interval)", fontsize=8)
    ax.tick_params(labelsize=7)
    return _svg(fig)


# ---------------------------------------------------------------------------------------------
# Replay sweep (`cardiosieve replay --sweep`, pipeline/replay.py)
# ---------------------------------------------------------------------------------------------
def svg_sweep(sweep: pd.DataFrame) -> str:
    """Workload (would-be items per day) against PPV over reviewed items, one point per swept
    value with its 95 % Wilson interval as a vertical bar and the value written beside it. A value
    with no reviewed item has no PPV: it is drawn at the bottom as a hollow mark, labelled unknown."""
    fig = _figure(8.5, 3.6)
    ax = fig.add_subplot()
    if len(sweep):
        x = sweep["items_per_day"].to_numpy(dtype=float)
        ppv = sweep["ppv"].to_numpy(dtype=float)
        low, high = sweep["ppv_low"].to_numpy(dtype=float), sweep["ppv_high"].to_numpy(dtype=float)
        known = ~np.isnan(ppv)
        ax.plot(x[known], ppv[known], color="#3b3b3b", marker="o", linewidth=1, label="PPV")
        ax.vlines(x[known], low[known], high[known], color="#3b3b3b", linewidth=2, alpha=0.5,
                  label="95 % Wilson interval")
        if (~known).any():
            ax.plot(x[~known], np.zeros(int((~known).sum())), linestyle="none", marker="o",
                    markerfacecolor="none", color="#b00020", label="PPV unknown (none reviewed)")
        unit = str(sweep["unit"].iloc[0])
        for xi, yi, v in zip(x, np.where(known, ppv, 0.0), sweep["value"]):
            ax.annotate(f"{v:g}", (xi, yi), textcoords="offset points", xytext=(4, 4), fontsize=6)
        ax.set_title(f"{sweep['screen'].iloc[0]}.{sweep['key'].iloc[0]} ({unit}) swept", fontsize=8)
    else:
        ax.text(0.5, 0.5, "no values swept", transform=ax.transAxes, ha="center", fontsize=8)
    ax.set_xlabel("would-be items per day (workload)")
    ax.set_ylabel("PPV over reviewed items")
    ax.set_ylim(-0.05, 1.05)
    ax.tick_params(labelsize=7)
    _legend(ax, fontsize=7, loc="best")
    return _svg(fig)
