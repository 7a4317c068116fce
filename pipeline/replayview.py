"""The replay report (pipeline/replay.py) as text, JSON, CSV or one offline HTML file.

Pure: a Report in, text out; the command writes it (pipeline/commands.py). Every output carries
the screening caution. HTML: one file with no network and no external assets (pages.report_page,
autoescaped), the sweep's plot an SVG drawn by pipeline/plots.py embedded as a data URI.
"""
from __future__ import annotations

import io
import json
import math

import pandas as pd

from cardiosieve.pipeline import CAUTION

NOTE = ("current: the site's rules as a run applies them; alternative: the site's rules plus the what-if "
        "overrides. Items: would-be worklist items (findings folded over an empty store). Reviewed: live "
        "items with a review, flagged under a rule set when it flags any of the item's ECGs. "
        "PPV = (finding_real + already_known) / reviewed, 95 % Wilson score interval. Counts from "
        "replayed history: screening for human review, never a diagnosis (docs/replay.md).")


def _fmt(x) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)) or x is pd.NA:
        return "-"
    if isinstance(x, bool):
        return "yes" if x else "no"
    if isinstance(x, float):
        return f"{x:.3f}".rstrip("0").rstrip(".") if not x.is_integer() else f"{x:.0f}"
    return str(x)


def _records(df: pd.DataFrame | None) -> list[dict]:
    from cardiosieve.pipeline.jsontext import plain
    return [] if df is None else plain(df.to_dict("records"))


def as_json(report) -> str:
    obj = {"caution": CAUTION, "note": NOTE, **report.header(), "screens": _records(report.screens),
           "tiers": _records(report.tiers)}
    if report.sweep is not None:
        obj["sweep"] = _records(report.sweep)
    if report.items is not None:
        obj["items"] = _records(report.items)
    from cardiosieve.pipeline.jsontext import plain
    return json.dumps(plain(obj), ensure_ascii=False, allow_nan=False, indent=1) + "\n"


def as_csv(report) -> str:
    """Every table of the report in one CSV, its first column `table` naming which (screens, tiers,
    sweep, items), the caution in a last column of every row (a spreadsheet loses file notes)."""
    from cardiosieve.pipeline.store import spreadsheet_safe_frame

    parts = [report.screens.assign(table="screens"), report.tiers.assign(table="tiers")]
    if report.sweep is not None:
        parts.append(report.sweep.assign(table="sweep"))
    if report.items is not None:
        parts.append(report.items.assign(table="items"))
    parts = [p[["table", *[c for c in p.columns if c != "table"]]] for p in parts]
    cols = list(dict.fromkeys(c for p in parts for c in p.columns))
    frame = pd.concat([p.astype(object) for p in parts], ignore_index=True).reindex(columns=cols)
    frame["caution"] = CAUTION
    buf = io.StringIO()
    spreadsheet_safe_frame(frame.astype("str").where(frame.notna(), "")).to_csv(buf, index=False, lineterminator="\n")
    return buf.getvalue()


def _by_screen(screens: pd.DataFrame) -> pd.DataFrame:
    """The per-screen table turned so that each screen is a column and each measure a row."""
    shown = screens.set_index("screen").T
    return shown.map(_fmt)


def _header_lines(report) -> list[str]:
    h = report.header()
    lines = [f"period [{h['period'][0]}, {h['period'][1]}) UTC, {h['days']:g} days; {h['ecgs']} ECGs "
             f"({h['ecgs_from_archive']} from the aligned archive in {h['archive_folders']} folders, "
             f"{h['ecgs_realigned']} re-aligned from the lake)"]
    if h["uncovered_intervals"]:
        lines.append(f"not in the archive: {len(h['uncovered_intervals'])} interval(s), re-aligned from the lake"
                     + (f"; {h['realigned_chunks_stopped_by_row_checks']} chunk(s) left out: the row checks "
                        f"would stop them" if h["realigned_chunks_stopped_by_row_checks"] else ""))
    over = "; ".join(f"{s}: " + ", ".join(f"{k} = {v}" for k, v in kv.items()) for s, kv in h["overrides"].items())
    lines.append(f"what-if overrides: {over or 'none'}; screens re-screened: {', '.join(h['screens_rescreened']) or 'none'}")
    return lines


def as_text(report) -> str:
    out = [CAUTION, "", *_header_lines(report), "", _by_screen(report.screens).to_string(), "",
           "findings and would-be items per tier:", report.tiers.map(_fmt).to_string(index=False)]
    if report.sweep is not None:
        out += ["", "sweep:", report.sweep.map(_fmt).to_string(index=False)]
    if report.items is not None:
        out += ["", "item rows (identify patients):",
                report.items.to_string(index=False) if len(report.items) else "none"]
    out += ["", NOTE]
    return "\n".join(out) + "\n"


def as_html(report, made_at: str) -> str:
    """One offline file (pages.report_page: inline style and plots, nothing fetched)."""
    from cardiosieve.pipeline.pages import report_page
    from cardiosieve.pipeline.plots import svg_sweep

    per_screen = _by_screen(report.screens).rename_axis("measure").reset_index()
    sections = [{"heading": "Per screen", "anchor": "screens", "frame": per_screen, "empty": "no screen"},
                {"heading": "Per screen and tier", "anchor": "tiers", "frame": report.tiers.map(_fmt),
                 "empty": "no finding under either rule set"}]
    if report.sweep is not None:
        sections.append({"heading": "Sweep", "anchor": "sweep", "frame": report.sweep.map(_fmt), "empty": "none",
                         "svg": svg_sweep(report.sweep),
                         "alt": "workload (items per day) against PPV with its 95 % interval at each swept value; "
                                "the numbers are in the table below"})
    if report.items is not None:
        sections.append({"heading": "Item rows (identify patients)", "anchor": "items", "frame": report.items,
                         "empty": "none"})
    return report_page("Threshold what-if (replay)", [f"Made {made_at}.", *_header_lines(report), NOTE], sections)
