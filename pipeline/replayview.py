"""The replay report (pipeline/replay.py) as text, JSON, CSV or one offline HTML file.

Pure: a Report in, text out; the command writes it (pipeline/commands.py). Every output carries
the screening caution. HTML: one file with no network and no external assets, every text escaped
with html.escape, the sweep's plot an SVG drawn by pipeline/plots.py embedded as a data URI.
"""
from __future__ import annotations

import base64
import html
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


def _table(df: pd.DataFrame, index: bool = False) -> str:
    cols = ([df.index.name or ""] if index else []) + [str(c) for c in df.columns]
    head = "".join(f"<th>{html.escape(c)}</th>" for c in cols)
    body = []
    # Report tables: a few dozen rows (the item rows: the items that changed, not the period's ECGs).
    for key, row in zip(df.index, df.itertuples(index=False)):
        cells = ([f"<th>{html.escape(str(key))}</th>"] if index else []) + \
                [f"<td>{html.escape(_fmt(v))}</td>" for v in row]
        body.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


PAGE_STYLE = ("body{font-family:sans-serif;margin:1.5em;max-width:78em}table{border-collapse:collapse;"
              "margin:.5em 0 1.5em}th,td{border:1px solid #999;padding:.2em .5em;text-align:right;font-size:.9em}"
              "th{background:#eee}.caution{border:2px solid #b00020;padding:.5em;font-weight:bold}")


def as_html(report, made_at: str) -> str:
    from cardiosieve.pipeline.plots import svg_sweep

    parts = [f'<p class="caution">{html.escape(CAUTION)}</p>',
             "".join(f"<p>{html.escape(line)}</p>" for line in _header_lines(report)),
             "<h2>Per screen</h2>", _table(_by_screen(report.screens), index=True),
             "<h2>Per screen and tier</h2>", _table(report.tiers)]
    if report.sweep is not None:
        svg = svg_sweep(report.sweep)
        b64 = base64.b64encode(svg.encode("utf-8")).decode("ascii")
        parts += ["<h2>Sweep</h2>",
                  f'<img src="data:image/svg+xml;base64,{b64}" alt="workload (items per day) against PPV '
                  f'with its 95 % interval at each swept value; the numbers are in the table below">',
                  _table(report.sweep)]
    if report.items is not None:
        parts += ["<h2>Item rows (identify patients)</h2>", _table(report.items) if len(report.items) else "<p>none</p>"]
    parts += [f"<p>{html.escape(NOTE)}</p>", f'<p class="caution">{html.escape(CAUTION)}</p>']
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; img-src data:; "
            "style-src 'unsafe-inline'\">"
            f"<title>cardiosieve replay</title><style>{PAGE_STYLE}</style></head><body>"
            f"<h1>cardiosieve replay: threshold what-if</h1><p>made {html.escape(made_at)}</p>"
            + "".join(parts) + "</body></html>\n")
