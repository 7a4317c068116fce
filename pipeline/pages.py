"""The review pages as HTML: the worklist and one item, for `cardiosieve serve` (pipeline/webapp.py)
and the offline snapshot `cardiosieve show --html FILE`.

What it does
    ReviewData      what the pages read: the store (items, reviews), OUT's published night
                    (aligned.parquet, criteria_<screen>.parquet) and, optionally, the lake (the
                    patient's results over 72 h, the prior ECG's leads) through the contract loader
    worklist_page   the ranked items with the filters, a count per tier, the caution banner
    item_page       one item: summary, criteria met with threshold and source, caveats, plots with
                    their numbers in a table beside them, review form and review history
    snapshot_page   the worklist and every listed item in one self-contained file

The templates are Jinja2 strings in this module (autoescaped; nothing is fetched from the
network, the plots are inline SVG images). The tier is written as its number and a word, never
shown by colour alone. An unknown value reads "unknown". Nothing here logs a row value.
"""
from __future__ import annotations

import base64
import math
from functools import lru_cache
from pathlib import Path

from cardiosieve.pipeline import CAUTION

# Tier words: docs/prioritisation.md says tier 1 is the most urgent; the words are a local choice.
TIER_WORDS = {1: "most urgent", 2: "urgent", 3: "soon", 4: "routine"}
UNKNOWN = "unknown"
APP_NAME = "cardiosieve review page"
QTC_HISTORY_DAYS = 90     # the patient's ECGs the QTc plot reads from the lake (local choice)

CSS = """
body { font-family: system-ui, sans-serif; font-size: 17px; margin: 0 1.2rem 2rem; color: #111; background: #fff; }
a { color: #0b3d91; } a:focus, button:focus, select:focus, input:focus, textarea:focus { outline: 3px solid #111; outline-offset: 2px; }
.skip { position: absolute; left: -999px; } .skip:focus { left: 1rem; top: .5rem; background: #fff; padding: .3rem; }
.caution { border: 3px solid #111; padding: .6rem .8rem; margin: .8rem 0; font-weight: 600; background: #fff7d6; }
table { border-collapse: collapse; margin: .4rem 0 1rem; } th, td { border: 1px solid #888; padding: .3rem .5rem; text-align: left; vertical-align: top; }
th { background: #eee; } .num { text-align: right; }
.tier { font-weight: 700; white-space: nowrap; } .tier1 { border-left: 6px solid #111; } .tier2 { border-left: 4px double #111; }
form.filters { display: flex; flex-wrap: wrap; gap: .6rem 1.2rem; align-items: end; margin: .6rem 0; }
form.filters label, form.review label { display: block; font-size: .9rem; font-weight: 600; }
form.review label.choice { display: inline; font-weight: 400; }
button { font-size: 1rem; padding: .35rem .9rem; }
.counts span { margin-right: 1.4rem; } .error { border: 3px solid #b00020; padding: .5rem; font-weight: 600; }
.notice { border: 2px solid #1f4e99; padding: .5rem; } .plot img { max-width: 100%; border: 1px solid #ccc; }
.missing { font-style: italic; } section.item { border-top: 3px solid #111; margin-top: 2rem; }
"""

_BASE = """<!doctype html>
<html lang="en"><head><meta charset="utf-8"><meta name="viewport" content="width=device-width, initial-scale=1">
<title>{{ title }} - {{ app_name }}</title>
{% if inline_css %}<meta http-equiv="Content-Security-Policy" content="default-src 'none'; img-src data:; style-src 'unsafe-inline'">
<style>{{ css }}</style>{% else %}<link rel="stylesheet" href="/style.css">{% endif %}
</head><body>
<a class="skip" href="#main">Skip to content</a>
<p class="caution" role="note">{{ caution }}</p>
<main id="main">{{ body }}</main>
</body></html>"""

_WORKLIST = """
<h1>Worklist</h1>
<p>{{ shown|length }} of {{ matching }} matching items ({{ stored }} stored); times in {{ tz }}.
{% if static %}Snapshot made {{ made_at }}: reviews recorded later are not in it.{% endif %}</p>
<p class="counts" aria-label="items per tier">{% for t, word, n in tier_counts %}<span>tier {{ t }} ({{ word }}): <strong>{{ n }}</strong></span>{% endfor %}</p>
{% if not static %}
<form class="filters" method="get" action="/" role="search">
 <div><label for="f-tier">Tier</label><select id="f-tier" name="tier"><option value="">all</option>
  {% for t, word in tiers %}<option value="{{ t }}" {% if t|string == f.tier %}selected{% endif %}>{{ t }} {{ word }}</option>{% endfor %}</select></div>
 <div><label for="f-screen">Screen</label><select id="f-screen" name="screen"><option value="">all</option>
  {% for s in screens %}<option value="{{ s }}" {% if s == f.screen %}selected{% endif %}>{{ s }}</option>{% endfor %}</select></div>
 <div><label for="f-status">Status</label><select id="f-status" name="status"><option value="">all but closed</option>
  {% for s in statuses %}<option value="{{ s }}" {% if s == f.status %}selected{% endif %}>{{ s }}</option>{% endfor %}</select></div>
 <div><label for="f-location">Ward or location contains</label><input id="f-location" name="location" value="{{ f.location }}" size="14"></div>
 <div><label for="f-date">ECG date ({{ tz }})</label><input id="f-date" name="date" type="date" value="{{ f.date }}"></div>
 <div><button type="submit">Filter</button> <a href="/">Clear</a></div>
</form>{% endif %}
{% if error %}<p class="error" role="alert">{{ error }}</p>{% endif %}
<table id="worklist"><caption>Items in rank order (rank 1 first)</caption>
<thead><tr><th scope="col">Rank</th><th scope="col">Tier</th><th scope="col">Screen</th><th scope="col">Status</th><th scope="col">Patient</th>
<th scope="col">Sex, age</th><th scope="col">Location</th><th scope="col">ECG time</th><th scope="col">Summary</th><th scope="col">Item</th></tr></thead>
<tbody>{% for r in shown %}
<tr class="tier{{ r.tier }}" data-tier="{{ r.tier }}" data-screen="{{ r.screen }}">
<td class="num">{{ r.rank }}</td><td class="tier">{{ r.tier }} {{ r.tier_word }}</td><td>{{ r.screen }}</td><td>{{ r.status }}</td>
<td>{{ r.patient_id }}</td><td>{{ r.sex_age }}</td><td>{{ r.location }}</td><td>{{ r.ecg_at }}</td>
<td>{{ r.summary }}{% for c in r.caveats %}<br><small>caveat: {{ c }}</small>{% endfor %}</td>
<td><a href="{{ r.href }}">{{ r.item_id }}</a></td></tr>{% else %}
<tr><td colspan="10">No items match.</td></tr>{% endfor %}</tbody></table>
"""

_ITEM = """
{% if not static %}<p><a href="/">Back to the worklist</a></p>{% endif %}
<h1 id="item-{{ it.item_id }}">Tier {{ it.tier }} ({{ it.tier_word }}): {{ it.screen }}, item {{ it.item_id }}</h1>
<table><tbody>
<tr><th scope="row">Rank, status</th><td>{{ it.rank }}, {{ it.status }}{% if it.status_reason %} ({{ it.status_reason }}){% endif %}</td></tr>
<tr><th scope="row">Patient</th><td>{{ it.patient_id }}, {{ it.sex_age }}</td></tr>
<tr><th scope="row">Location</th><td>{{ it.location }}</td></tr>
<tr><th scope="row">ECG</th><td>{{ it.ecg_id }} at {{ it.ecg_at }}</td></tr>
<tr><th scope="row">Prior ECG</th><td>{{ it.prior }}</td></tr>
<tr><th scope="row">Episode</th><td>{{ it.episode }}</td></tr>
<tr><th scope="row">Rule version</th><td>{{ it.rule_version }}</td></tr>
</tbody></table>
<h2>Summary</h2><p id="summary">{{ it.summary }}</p>
<h2>Caveats</h2>{% if it.caveats %}<ul>{% for c in it.caveats %}<li>{{ c }}</li>{% endfor %}</ul>{% else %}<p>None.</p>{% endif %}
<h2>Criteria met</h2>
<table id="criteria"><caption>Each threshold that fired, with its source (keys of docs/references.md); rules not met are not listed.</caption>
<thead><tr><th scope="col">Rule</th><th scope="col">Threshold</th><th scope="col">Source</th></tr></thead><tbody>
{% for r in it.rules %}<tr><td>{{ r.key }}</td><td>{{ r.op }} {{ r.value }} {{ r.unit }}</td><td>{{ r.source }}</td></tr>
{% else %}<tr><td colspan="3">None recorded.</td></tr>{% endfor %}</tbody></table>
<h2>Plots</h2>
{% for p in plots %}<figure class="plot" id="plot-{{ p.id }}"><figcaption><strong>{{ p.title }}</strong></figcaption>
{% if p.svg %}<img src="data:image/svg+xml;base64,{{ p.svg }}" alt="{{ p.alt }}">{% endif %}
{% for note in p.notes %}<p class="missing">{{ note }}</p>{% endfor %}
{% if p.rows %}<table class="plotdata"><caption>{{ p.title }}: the numbers drawn</caption><thead><tr>{% for h in p.header %}<th scope="col">{{ h }}</th>{% endfor %}</tr></thead>
<tbody>{% for row in p.rows %}<tr>{% for v in row %}<td>{{ v }}</td>{% endfor %}</tr>{% endfor %}</tbody></table>{% endif %}
</figure>{% endfor %}
<h2>Reviews</h2>
{% if recorded %}<p class="notice" role="status">Review recorded.</p>{% endif %}
<table id="reviews"><thead><tr><th scope="col">When</th><th scope="col">Outcome</th><th scope="col">Role</th><th scope="col">Note</th><th scope="col">Recorded via</th></tr></thead>
<tbody>{% for v in reviews %}<tr><td>{{ v.at }}</td><td>{{ v.outcome }}</td><td>{{ v.role }}</td><td>{{ v.note }}</td><td>{{ v.via }}</td></tr>
{% else %}<tr><td colspan="5">None recorded.</td></tr>{% endfor %}</tbody></table>
{% if static %}<p>This is an offline snapshot: record a review with <code>cardiosieve review {{ it.item_id }} --outcome ... --role ...</code>.</p>
{% else %}
<h3 id="record">Record a review</h3>
{% if error %}<p class="error" role="alert" id="form-error">{{ error }}</p>{% endif %}
<form class="review" method="post" action="/item/{{ it.item_id }}/review">
<input type="hidden" name="csrf_token" value="{{ csrf_token }}">
<fieldset><legend>Outcome</legend>
{% for o, text in outcomes %}<div><input type="radio" id="o-{{ o }}" name="outcome" value="{{ o }}" {% if o == form.outcome %}checked{% endif %}>
<label for="o-{{ o }}" class="choice">{{ o }}: {{ text }}</label></div>{% endfor %}
</fieldset>
<p><label for="role">Reviewer role (not a name)</label><input id="role" name="role" value="{{ form.role }}" size="32" maxlength="{{ role_max }}" required></p>
<p><label for="note">Note</label><textarea id="note" name="note" rows="3" cols="60" maxlength="{{ note_max }}">{{ form.note }}</textarea></p>
<p><button type="submit">Record review</button></p>
</form>{% endif %}
"""

# An analyst's report (`cardiosieve audit --format html`): headed sections, each with a note,
# an optional plot and its numbers as a table (a plot never stands without them).
_REPORT = """
<h1>{{ heading }}</h1>
{% for line in intro %}<p>{{ line }}</p>{% endfor %}
{% for s in sections %}<section>
<h2 id="{{ s.anchor }}">{{ s.heading }}</h2>
{% if s.note %}<p>{{ s.note }}</p>{% endif %}
{% if s.plot %}<figure class="plot"><img src="data:image/svg+xml;base64,{{ s.plot }}" alt="{{ s.alt }}">
<figcaption>{{ s.alt }}</figcaption></figure>{% endif %}
{% if s.rows %}<table><thead><tr>{% for c in s.columns %}<th scope="col">{{ c }}</th>{% endfor %}</tr></thead>
<tbody>{% for r in s.rows %}<tr>{% for v in r %}<td>{{ v }}</td>{% endfor %}</tr>{% endfor %}</tbody></table>
{% else %}<p class="missing">{{ s.empty }}</p>{% endif %}
</section>{% endfor %}
"""

_MESSAGE = """<h1>{{ heading }}</h1><p>{{ message }}</p><p><a href="/">Back to the worklist</a></p>"""

OUTCOME_WORDS = {   # pipeline/commands.py `review --help` words them the same way
    "finding_real": "the flagged abnormality is there and was news",
    "finding_not_real": "it is not there",
    "already_known": "there, already known",
    "data_problem": "flagged because of wrong or mismatched data",
}


@lru_cache(maxsize=1)
def _env():
    import jinja2
    return jinja2.Environment(loader=jinja2.DictLoader({"base": _BASE, "worklist": _WORKLIST, "item": _ITEM,
                                                        "message": _MESSAGE, "report": _REPORT}),
                              autoescape=True, undefined=jinja2.StrictUndefined)


def render(name: str, title: str, *, inline_css: bool = False, **context) -> str:
    from markupsafe import Markup
    env = _env()
    body = env.get_template(name).render(**context)
    return env.get_template("base").render(title=title, app_name=APP_NAME, caution=CAUTION, css=CSS,
                                           inline_css=inline_css, body=Markup(body))


def report_page(title: str, intro: list[str], sections: list[dict]) -> str:
    """A self-contained report (inline style, plots as inline SVG images): `sections` are dicts
    of heading, anchor, note, frame (a DataFrame shown as a table; NaN and None read "unknown"),
    empty (what to say when the frame has no rows), and optionally svg and alt (the plot)."""
    shown = []
    for s in sections:
        frame = s.get("frame")
        rows = [] if frame is None else [[_cell(v) for v in r] for r in frame.itertuples(index=False)]
        shown.append({"heading": s["heading"], "anchor": s.get("anchor", ""), "note": s.get("note", ""),
                      "columns": [] if frame is None else list(frame.columns), "rows": rows,
                      "empty": s.get("empty", "none"), "plot": _b64(s["svg"]) if s.get("svg") else "",
                      "alt": s.get("alt", "")})
    return render("report", title, inline_css=True, heading=title, intro=intro, sections=shown)


def _cell(v) -> str:
    """A table cell of a report: a float to 2 decimals, an instant in ISO 8601, missing (None,
    NaN, NaT, NA) as unknown."""
    try:
        missing = v is None or bool(v != v)
    except TypeError:                     # pandas' NA has no truth value: it is missing
        missing = True
    if missing:
        return UNKNOWN
    if isinstance(v, float):
        return f"{v:.2f}"
    return v.isoformat() if hasattr(v, "isoformat") else str(v)


def message_page(heading: str, message: str) -> str:
    return render("message", heading, heading=heading, message=message)


def tier_word(tier) -> str:
    try:
        return TIER_WORDS.get(int(tier), UNKNOWN)
    except (TypeError, ValueError):
        return UNKNOWN


def _text(x) -> str:
    if x is None:
        return UNKNOWN
    if isinstance(x, float):
        return UNKNOWN if math.isnan(x) else f"{x:g}"
    return str(x)


def _str(x) -> str:
    return x if isinstance(x, str) and x else UNKNOWN


def _fmt(x, digits: int = 0) -> str:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return UNKNOWN
    return UNKNOWN if math.isnan(v) else f"{v:.{digits}f}"


# ---------------------------------------------------------------------------------------------
class ReviewData:
    """What the pages read. `url` is the store; `out` the output folder whose published night
    (OUT/aligned.parquet, OUT/criteria_<screen>.parquet) gives the plots their data; `lake` and
    `config` (optional) let the item page read the patient's results over 72 h and the prior
    ECG's leads. The store is opened on first use and kept; a store that cannot be opened
    raises (the web app turns that into a clear page)."""

    def __init__(self, url: str, out, lake=None, config=None, timezone: str = "UTC"):
        self.url, self.out, self.lake, self.config, self.tz = url, Path(out), lake, config, timezone
        self._engine = None

    def engine(self):
        if self._engine is None:
            from cardiosieve.pipeline.store import open_store
            self._engine = open_store(self.url, create=False)
        return self._engine

    def items(self):
        from cardiosieve.pipeline.store import read_items
        return read_items(self.engine())

    def item(self, item_id: str):
        from cardiosieve.pipeline.store import read_items
        found = read_items(self.engine(), item_ids=[item_id])
        return None if found.empty else found

    def reviews(self, item_id: str):
        from cardiosieve.pipeline.store import read_reviews
        return read_reviews(self.engine(), [item_id])

    def _published(self, name: str):
        path = self.out / name
        if not path.exists():
            return None
        return _read_parquet(str(path.resolve()), path.resolve().stat().st_mtime_ns)

    def aligned_row(self, ecg_id: str) -> dict | None:
        a = self._published("aligned.parquet")
        if a is None:
            return None
        rows = a[a["ecg_id"] == ecg_id]
        return None if rows.empty else rows.iloc[0].to_dict()

    def criteria_rows(self, screen: str, patient_id: str):
        c = self._published(f"criteria_{screen}.parquet")
        return None if c is None else c[c["patient_id"] == patient_id]

    def settings(self):
        from cardiosieve.pipeline.config import load_settings
        return load_settings(self.config)

    def rules(self):
        from cardiosieve.pipeline.run import site_rules
        return site_rules(self.settings())     # the rules the nightly run screens under

    def lake_labs(self, patient_id: str, ecg_at):
        """The patient's results within 36 h either side of the ECG (contract rows), or None
        without a lake."""
        if not self.lake:
            return None
        import pandas as pd
        from cardiosieve.pipeline import contract
        from cardiosieve.pipeline.load import read_table
        from cardiosieve.pipeline.plots import LAB_WINDOW_H
        at = pd.Timestamp(ecg_at)
        half = pd.Timedelta(hours=LAB_WINDOW_H)
        return read_table(self.lake, contract.LAB, self.settings(), scope="review_page",
                          window=(at - half, at + half + pd.Timedelta(seconds=1)),
                          keep={"patient_id": [patient_id]}).clean

    def lake_qtc_rows(self, patient_id: str, ecg_at, sex, age_years):
        """The long-QT screen's criterion rows (QTc, limit) for the patient's ECGs in the lake
        from QTC_HISTORY_DAYS before this ECG to a day after it, computed by the screen itself
        (screens.long_qt.criteria_long_qt under the site's rules) with this item's sex and age;
        None without a lake. Column `origin` is "lake"."""
        if not self.lake:
            return None
        import pandas as pd
        from cardiosieve.pipeline import contract
        from cardiosieve.pipeline.load import read_table
        from cardiosieve.screens.long_qt import criteria_long_qt
        at = pd.Timestamp(ecg_at)
        ecgs = read_table(self.lake, contract.ECG, self.settings(), scope="review_page",
                          window=(at - pd.Timedelta(days=QTC_HISTORY_DAYS), at + pd.Timedelta(days=1)),
                          keep={"patient_id": [patient_id]}).clean
        ecgs = ecgs[ecgs["patient_id"] == patient_id].assign(sex=sex if sex in ("F", "M") else None,
                                                             age_years=float(age_years))
        table = criteria_long_qt(ecgs.reset_index(drop=True), None, self.rules())
        return table.assign(origin="lake")

    def lake_prior_st(self, prior_ecg_id, prior_at) -> dict | None:
        """The prior ECG's ST at J per lead from the lake's ecg_lead, or None without a lake."""
        if not self.lake or not prior_ecg_id or prior_at is None:
            return None
        import pandas as pd
        from cardiosieve.pipeline import contract
        from cardiosieve.pipeline.load import read_table
        day = pd.Timestamp(prior_at).tz_convert("UTC")
        days = {(day + pd.Timedelta(days=d)).strftime("%Y-%m-%d") for d in (-1, 0, 1)}
        leads = read_table(self.lake, contract.ECG_LEAD, self.settings(), scope="review_page", days=days,
                           keep={"ecg_id": [prior_ecg_id]}).clean
        leads = leads[leads["ecg_id"] == prior_ecg_id]
        return {str(l): float(v) for l, v in zip(leads["lead"], leads["st_j_uv"]) if v == v}


@lru_cache(maxsize=8)
def _read_parquet(path: str, mtime_ns: int):
    import pandas as pd
    return pd.read_parquet(path)


# ---------------------------------------------------------------------------------------------
def _row_view(r, tz: str, href: str) -> dict:
    from cardiosieve.pipeline import itemview
    from cardiosieve.pipeline.jsontext import loads_list
    import pandas as pd
    # An explained or closed item has left the review queue and has no rank (store._rerank).
    return {"rank": "-" if pd.isna(r.rank) else int(r.rank), "tier": int(r.tier), "tier_word": tier_word(r.tier),
            "screen": r.screen, "status": r.status, "patient_id": r.patient_id,
            "sex_age": itemview._sex_age(r.sex, r.age_years),
            "location": r.location if isinstance(r.location, str) else UNKNOWN,
            "ecg_at": itemview._local(r.ecg_at, tz), "summary": r.summary if isinstance(r.summary, str) else UNKNOWN,
            "caveats": [str(c) for c in loads_list(r.caveats)], "item_id": r.item_id, "href": href}


def filter_items(items, *, tier=None, screen=None, status=None, location=None, date=None, tz="UTC"):
    """The worklist's filters over stored items in rank order (itemview.select_items and
    at_location, as `show`; `date` is the ECG's local date, YYYY-MM-DD). Returns (dressed
    matching items, per-tier counts of the items matching every filter but the tier)."""
    import pandas as pd
    from cardiosieve.pipeline import itemview
    base = itemview.select_items(items, screens=[screen] if screen else None,
                                 statuses=[status] if status else None)
    base = itemview.at_location(itemview.dress(base), location)
    if date:
        local = pd.to_datetime(base["ecg_at"], utc=True).dt.tz_convert(tz).dt.strftime("%Y-%m-%d")
        base = base[local.eq(date).to_numpy()]
    counts = [(t, TIER_WORDS[t], int((base["tier"] == t).sum())) for t in TIER_WORDS]
    matching = itemview.select_items(base, tiers=[int(tier)], statuses=base["status"].unique()) if tier else base
    return matching, counts


def worklist_page(data: ReviewData, filters: dict, *, limit: int = 500, error: str | None = None,
                  static: bool = False, made_at: str = "", items=None) -> str:
    from cardiosieve.pipeline.worklist import STATUSES
    from cardiosieve.screens import SCREENS
    stored = data.items() if items is None else items
    matching, counts = filter_items(stored, tz=data.tz, **filters)
    head = matching.head(limit)
    shown = [_row_view(r, data.tz, f"#item-{r.item_id}" if static else f"/item/{r.item_id}")
             for r in head.itertuples()]
    f = {k: (filters.get(k) or "") for k in ("tier", "screen", "status", "location", "date")}
    f["tier"] = str(f["tier"])
    return render("worklist", "Worklist", inline_css=static, shown=shown, matching=len(matching), stored=len(stored),
                  tz=data.tz, tier_counts=counts, tiers=list(TIER_WORDS.items()), screens=list(SCREENS),
                  statuses=list(STATUSES), f=f, error=error, static=static, made_at=made_at)


def _b64(svg: str) -> str:
    return base64.b64encode(svg.encode("utf-8")).decode("ascii")


def item_plots(data: ReviewData, item, evidence: dict) -> list[dict]:
    """The item page's figures: each a dict with id, title, svg (base64), alt, notes (what could
    not be drawn, in words) and the table of the numbers drawn."""
    import pandas as pd
    from cardiosieve.pipeline import plots
    from cardiosieve.pipeline.itemview import _local
    tz = data.tz
    aligned = data.aligned_row(item["ecg_id"])
    values = evidence.get("values", {}) or {}
    prior_id = _str((aligned or {}).get("prior_ecg_id"))
    prior_id = prior_id if prior_id != UNKNOWN else (values.get("prior_ecg_id") or None)
    prior_at = (aligned or {}).get("prior_acquired_at")
    prior_at = None if prior_at is None or pd.isna(prior_at) else pd.Timestamp(prior_at)
    no_night = "unknown: this ECG is not in OUT's published aligned.parquet (a later night replaced it)"
    out = []

    if item["screen"] == "st_deviation":
        notes = []
        prior_st = data.lake_prior_st(prior_id, prior_at)
        if prior_st is None:
            notes.append("Prior ECG's ST per lead: " + ("none: no prior ECG within the window" if not prior_id else
                         "unknown (start the page with --lake to read the prior ECG's leads)"))
        elif not prior_st:
            notes.append("Prior ECG's ST per lead: unknown (the lake has no lead values for it)")
        d = plots.st_plot_data(evidence, prior_st)
        dep = plots.st_depression_rule(evidence)
        uncut = sorted(set(d.loc[d["cut_uv"].isna(), "group"]))
        if uncut:
            notes.append("Elevation cut point not drawn for " + ", ".join(uncut) +
                         ": no lead there met one, so the evidence names none (unknown).")
        out.append({"id": "st", "title": "ST at J per lead by territory, against the cut point applied",
                    "svg": _b64(plots.svg_st(d, dep)) if len(d) else None,
                    "alt": "Bar chart of ST deviation per lead with the cut points applied; the numbers are in the table below.",
                    "notes": notes + ([] if len(d) else ["No ST values: unknown."])
                    + ([f"Depression threshold drawn: {dep['key']} {dep['op']} {dep['value']} {dep['unit']} [{dep['source']}]"] if dep else []),
                    "header": ["territory", "lead", "ST now (uV)", "ST prior (uV)", "cut point applied (uV)", "rule", "source", "meets"],
                    "rows": [[r.group, r.lead, _fmt(r.st_uv), _fmt(r.prior_st_uv), _fmt(r.cut_uv),
                              _str(r.cut_key), _str(r.cut_source), "yes" if r.meets else "no"]
                             for r in d.itertuples()]})

    labs = None
    notes = []
    try:
        labs = data.lake_labs(item["patient_id"], item["ecg_at"])
    except Exception as exc:   # a lake that cannot be read: say so, keep the page
        notes.append(f"The lake could not be read ({type(exc).__name__}): only the aligned results are drawn.")
    settings_map = data.settings().analyte_of_code() if labs is not None else None
    d = plots.lab_plot_data(aligned, item["ecg_at"], labs, settings_map)
    if labs is None:
        notes.append("Only the results aligned to this ECG are drawn; the other results of the 72 h are unknown "
                     "here (start the page with --lake for them)." if aligned is not None else no_night)
    missing = [a for a in plots.LAB_ANALYTES if a not in set(d["analyte"])]
    if missing:
        notes.append("No result drawn for " + ", ".join(missing) + ": unknown.")
    bands = plots.potassium_bands(data.rules()["hyperkalemia"])
    notes.append("Potassium bands: " + "; ".join(f"{b['key']} {b['op']} {b['value']} {b['unit']} [{b['source']}]"
                                                  for b in bands))
    out.append({"id": "labs", "title": "Potassium, magnesium, calcium over the 72 h around the ECG",
                "svg": _b64(plots.svg_labs(d, bands)),
                "alt": "Laboratory values against hours from the ECG; the numbers are in the table below.",
                "notes": notes, "header": ["analyte", "hours from ECG", "value", "unit", "haemolysed", "from"],
                "rows": [[r.analyte, f"{r.offset_h:+.1f}", _fmt(r.value, 2), r.unit,
                          UNKNOWN if r.hemolyzed is None else ("yes" if r.hemolyzed else "no"), r.origin]
                         for r in d.itertuples()]})

    q_ev = evidence if item["screen"] == "long_qt" else {}
    crit = data.criteria_rows("long_qt", item["patient_id"])
    lake_qtc = None
    try:
        lake_qtc = data.lake_qtc_rows(item["patient_id"], item["ecg_at"], item["sex"], item["age_years"])
    except Exception as exc:   # a lake that cannot be read: say so, keep the page
        notes_qtc_error = f"The lake's ECGs could not be read ({type(exc).__name__})."
    else:
        notes_qtc_error = None
    if lake_qtc is not None and len(lake_qtc):
        have = set(crit["ecg_id"]) if crit is not None else set()
        extra = lake_qtc[~lake_qtc["ecg_id"].isin(have)]
        crit = extra if crit is None else pd.concat([crit.assign(origin="criteria"), extra], ignore_index=True)
    qd, limits = plots.qtc_plot_data(q_ev, item["ecg_id"], crit, prior_id, prior_at)
    if lake_qtc is not None:
        notes = [f"QTc of this patient's ECGs over the {QTC_HISTORY_DAYS} days before this ECG, as the long-QT "
                 f"screen computes it (the night's from criteria_long_qt.parquet, earlier ones from the lake)."]
    else:
        notes = ["QTc of this patient's ECGs in OUT's published night (criteria_long_qt.parquet)"
                 + (" and the prior ECG's from the evidence" if (qd["origin"] == "evidence").any() else "")
                 + "; earlier ECGs' QTc: unknown here (start the page with --lake for them)."]
    if notes_qtc_error:
        notes.append(notes_qtc_error)
    if limits["limit_ms"] != limits["limit_ms"]:
        notes.append("Sex-specific limit applied: unknown (not in the published tables for this ECG).")
    out.append({"id": "qtc", "title": "QTc over the patient's ECGs, with the sex-specific limit applied",
                "svg": _b64(plots.svg_qtc(qd, limits)), "alt": "QTc per ECG over time; the numbers are in the table below.",
                "notes": notes, "header": ["ECG", "time", "QTc (ms)", "this ECG", "from"],
                "rows": [[r.ecg_id, _local(r.acquired_at, tz), _fmt(r.qtc_ms), "yes" if r.this_ecg else "no", r.origin]
                         for r in qd.itertuples()]
                + ([["limit applied", "", _fmt(limits["limit_ms"]), "", ""]])})

    idata = plots.interval_plot_data(aligned)
    out.append({"id": "intervals", "title": "Heart rate, PR and QRS against the prior ECG",
                "svg": _b64(plots.svg_intervals(idata)), "alt": "Bars of heart rate, PR and QRS, this ECG and prior.",
                "notes": [] if aligned is not None else [no_night],
                "header": ["measure", "this ECG", "prior ECG", "unit"],
                "rows": [[r.label, _fmt(r.this_ecg), _fmt(r.prior_ecg), r.unit] for r in idata.itertuples()]})
    return out


def item_context(data: ReviewData, found, static: bool = False) -> dict:
    from cardiosieve.pipeline import itemview
    from cardiosieve.pipeline.jsontext import loads_list, loads_object
    dressed = itemview.dress(found)
    item = dressed.iloc[0]
    r = next(dressed.itertuples())
    tz = data.tz
    evidence = loads_object(item["evidence"])
    values = evidence.get("values", {}) or {}
    view = _row_view(r, tz, "")
    prior, gap = values.get("prior_ecg_id"), values.get("prior_gap_h")
    view.update({
        "status_reason": item["status_reason"] if isinstance(item["status_reason"], str) else "",
        "ecg_id": item["ecg_id"], "rule_version": item["rule_version"],
        "prior": UNKNOWN if prior is None else f"{prior}" + (f", {gap:.1f} h before" if isinstance(gap, (int, float)) else ""),
        "episode": f"{itemview._local(item['episode_start'], tz)} to {itemview._local(item['episode_end'], tz)}; "
                   f"other ECGs folded in: {', '.join(map(str, loads_list(item['other_ecg_ids']))) or 'none'}",
        "rules": [{k: _text(rule.get(k)) for k in ("key", "op", "value", "unit", "source")}
                  for rule in evidence.get("rules", [])],
    })
    reviews = data.reviews(item["item_id"])
    review_rows = [{"at": itemview._local(v.reviewed_at, tz), "outcome": v.outcome, "role": v.reviewer_role,
                    "note": v.note if isinstance(v.note, str) else "", "via": v.recorded_via}
                   for v in reviews.itertuples()]
    return {"it": view, "plots": item_plots(data, item, evidence), "reviews": review_rows, "static": static}


def item_page(data: ReviewData, found, *, csrf_token: str = "", form: dict | None = None,
              error: str | None = None, recorded: bool = False) -> str:
    from cardiosieve.pipeline.store import NOTE_MAX_CHARS, OUTCOMES, ROLE_MAX_CHARS
    ctx = item_context(data, found)
    return render("item", f"Item {ctx['it']['item_id']}", **ctx, csrf_token=csrf_token,
                  form=form or {"outcome": "", "role": "", "note": ""}, error=error, recorded=recorded,
                  outcomes=[(o, OUTCOME_WORDS.get(o, o)) for o in OUTCOMES],
                  role_max=ROLE_MAX_CHARS, note_max=NOTE_MAX_CHARS)


def snapshot_page(data: ReviewData, filters: dict, made_at: str, limit: int = 500) -> tuple[str, int]:
    """The worklist and each listed item in one self-contained HTML file; (html, items)."""
    from markupsafe import Markup
    stored = data.items()
    matching, _ = filter_items(stored, tz=data.tz, **filters)
    head = matching.head(limit)
    parts = [worklist_page(data, filters, limit=limit, static=True, made_at=made_at, items=stored)]
    env = _env()
    sections = []
    for item_id in head["item_id"]:
        one = stored[stored["item_id"] == item_id]
        body = env.get_template("item").render(**item_context(data, one, static=True), csrf_token="", form={},
                                               error=None, recorded=False, outcomes=[], role_max=0, note_max=0)
        sections.append(f'<section class="item">{body}</section>')
    html = parts[0].replace("</main>", str(Markup("".join(sections))) + "</main>", 1)
    return html, len(head)
