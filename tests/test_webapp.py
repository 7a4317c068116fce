"""The review page's routes (pipeline/webapp.py) through Starlette's test client: the worklist and
its filters, an item, recording a review, CSRF, bad input, a store that is not there, the
security headers, the offline snapshot, and no identifier in a log line. Invented patients."""
import json
import logging
import re

import pandas as pd
import pytest
from markupsafe import escape
from starlette.testclient import TestClient

from cardiosieve.pipeline import CAUTION
from cardiosieve.pipeline.cli import main
from cardiosieve.pipeline.pages import ReviewData
from cardiosieve.pipeline.store import open_store, read_items, read_reviews, sqlite_url, upsert_items
from cardiosieve.pipeline.webapp import CSRF_COOKIE, CsrfTokens, create_app
from cardiosieve.pipeline.worklist import build_items
from cardiosieve.screens import FINDING_COLUMNS
from cardiosieve.screens.st_deviation import screen_st_deviation
from tests.lake_builders import ecg_row, lab_row, patient_row, write_lake
from tests.screens.screen_builders import ecg_rows, lead_rows

NIGHT = pd.Timestamp("2026-11-30 02:00", tz="UTC")
CAUTION_HTML = str(escape(CAUTION))      # as the page writes it: the apostrophe escaped


def _qt_finding(ecg_id, patient_id, tier, at):
    values = {"qtc_ms": 532.0, "qtc_limit_ms": 460, "sex": "F", "age_years": 74}
    rules = [{"key": "qtc_high_risk", "op": ">", "value": 500, "unit": "ms", "source": "AHA-2010-TDP"}]
    return {"ecg_id": ecg_id, "patient_id": patient_id, "acquired_at": pd.Timestamp(at, tz="UTC"), "screen": "long_qt",
            "tier": tier, "score_parts": json.dumps({"severity": 0.5}), "summary": "QTc 532 ms, above 500 ms",
            "evidence": json.dumps({"rule_version": "long_qt/1.0.0", "values": values, "rules": rules}),
            "caveats": json.dumps(["Magnesium not measured in the window: its effect is unknown."]),
            "territories": "", "rule_version": "long_qt/1.0.0"}


@pytest.fixture
def out(tmp_path):
    """A store with an ST item of a woman of 35 (V2-V3 elevation, from the real screen) and a
    long-QT item; OUT holds the aligned and criterion tables the plots read."""
    aligned = ecg_rows(2, ecg_id=["e-st", "e-qt"], patient_id=["pat-Ada", "pat-Bo"], sex=["F", "F"],
                       age_years=[35.0, 74.0], location=["ED", "Ward 7"],
                       acquired_at=[pd.Timestamp("2026-11-29 10:00", tz="UTC"), pd.Timestamp("2026-11-29 11:00", tz="UTC")])
    st = screen_st_deviation(aligned.iloc[[0]], lead_rows("e-st", st_j_uv={"V2": 300, "V3": 300}))
    qt = pd.DataFrame([_qt_finding("e-qt", "pat-Bo", 2, "2026-11-29 11:00")], columns=FINDING_COLUMNS)
    findings = pd.concat([st[FINDING_COLUMNS], qt], ignore_index=True)
    upsert_items(open_store(sqlite_url(tmp_path)), build_items(findings, aligned, None, "run-1", NIGHT))
    aligned.to_parquet(tmp_path / "aligned.parquet")
    pd.DataFrame({"ecg_id": ["e-qt"], "patient_id": ["pat-Bo"], "acquired_at": aligned["acquired_at"].iloc[[1]].to_list(),
                  "qtc_ms": [532.0], "qtc_limit_ms": [460.0], "sex": ["F"]}).to_parquet(tmp_path / "criteria_long_qt.parquet")
    return tmp_path


def client_of(out, url=None):
    data = ReviewData(url or sqlite_url(out), out)
    return TestClient(create_app(data, tokens=CsrfTokens(b"k" * 32)), follow_redirects=False)


def item_id(out, patient):
    return read_items(open_store(sqlite_url(out))).set_index("patient_id").loc[patient, "item_id"]


def form_token(html: str) -> str:
    return re.search(r'name="csrf_token" value="([^"]+)"', html).group(1)


def test_the_worklist_lists_items_in_rank_order_with_tier_number_and_word_and_the_caution(out):
    r = client_of(out).get("/")
    assert r.status_code == 200
    assert CAUTION_HTML in r.text
    st, qt = item_id(out, "pat-Ada"), item_id(out, "pat-Bo")
    assert r.text.index(st) < r.text.index(qt)                       # tier 1 before tier 2
    assert "1 most urgent" in r.text and "2 urgent" in r.text
    assert re.search(r"tier 1 \(most urgent\): <strong>1</strong>", r.text)
    assert re.search(r"tier 2 \(urgent\): <strong>1</strong>", r.text)


@pytest.mark.parametrize("query, shown, hidden", [
    ("tier=1", "pat-Ada", "pat-Bo"),
    ("screen=long_qt", "pat-Bo", "pat-Ada"),
    ("location=ward", "pat-Bo", "pat-Ada"),
    ("date=2026-11-29", "pat-Ada", "nobody"),
    ("status=closed", "nobody", "pat-Ada"),
])
def test_the_worklist_filters(out, query, shown, hidden):
    text = client_of(out).get(f"/?{query}").text
    body = text.split("<tbody>", 1)[1]
    assert (shown in body) or shown == "nobody"
    assert hidden not in body


def test_a_filter_value_not_understood_is_400_and_says_so(out):
    r = client_of(out).get("/?tier=9&screen=x")
    assert r.status_code == 400 and "Filter not understood and ignored: tier, screen." in r.text


def test_the_item_page_gives_criteria_thresholds_sources_caveats_and_plots(out):
    st = item_id(out, "pat-Ada")
    r = client_of(out).get(f"/item/{st}")
    assert r.status_code == 200 and CAUTION_HTML in r.text
    assert "ste_v2v3_women" in r.text and "&gt;= 150 uV" in r.text and "UDMI-2018" in r.text
    assert r.text.count('<img src="data:image/svg+xml;base64,') == 4     # ST, labs, QTc, intervals
    # The ST plot's table: V2 against the women's cut point that the evidence names.
    assert re.search(r"<td>septal</td><td>V2</td><td>300</td><td>unknown</td><td>150</td><td>ste_v2v3_women</td>", r.text)
    assert "start the page with --lake" in r.text                      # what could not be drawn, said plainly
    assert "Prior ECG's ST per lead: none: no prior ECG within the window" in r.text.replace("&#39;", "'")
    assert CSRF_COOKIE in r.headers["set-cookie"] and "samesite=strict" in r.headers["set-cookie"].lower()


def test_with_a_lake_the_item_page_draws_the_72_hours_of_results_and_earlier_ecgs_qtc(out, tmp_path):
    lake = write_lake(tmp_path / "lake",
                      ecg=[ecg_row("e-old", "pat-Bo", "2026-11-20T08:00:00Z", qt_ms=450.0),
                           ecg_row("e-qt", "pat-Bo", "2026-11-29T11:00:00Z", qt_ms=532.0)],
                      labs=[lab_row("r-near", "pat-Bo", "2026-11-29T10:00:00Z", value=3.1),
                            lab_row("r-far", "pat-Bo", "2026-11-27T10:00:00Z", value=5.8),
                            lab_row("r-other", "pat-Cy", "2026-11-29T10:00:00Z", value=6.9)],
                      patients=[patient_row("pat-Bo")])
    data = ReviewData(sqlite_url(out), out, lake=str(lake))
    text = TestClient(create_app(data)).get(f"/item/{item_id(out, 'pat-Bo')}").text
    labs = text.split('id="plot-labs"', 1)[1].split("</figure>", 1)[0]
    assert "<td>potassium</td><td>-1.0</td><td>3.10</td><td>mmol/L</td><td>no</td><td>lake</td>" in labs
    assert "5.80" not in labs and "6.90" not in labs          # outside the 72 h; another patient
    qtc = text.split('id="plot-qtc"', 1)[1].split("</figure>", 1)[0]
    # e-old's QTc as the long-QT screen computes it (Fridericia at RR 1000 ms leaves QT unchanged).
    assert "<td>e-old</td><td>2026-11-20 08:00 +00:00</td><td>450</td><td>no</td><td>lake</td>" in qtc
    assert "<td>e-qt</td>" in qtc and "over the 90 days before this ECG" in qtc


def test_every_response_carries_the_security_headers(out):
    r = client_of(out).get("/")
    csp = r.headers["content-security-policy"]
    assert "default-src 'none'" in csp and "frame-ancestors 'none'" in csp and "http" not in csp
    assert r.headers["x-frame-options"] == "DENY" and r.headers["x-content-type-options"] == "nosniff"


def test_an_unknown_item_is_a_404_page(out):
    r = client_of(out).get("/item/wl-0000000000000000")
    assert r.status_code == 404 and "No such item" in r.text and CAUTION_HTML in r.text


def test_a_review_is_recorded_through_the_store_and_shown_in_the_history(out):
    c = client_of(out)
    qt = item_id(out, "pat-Bo")
    token = form_token(c.get(f"/item/{qt}").text)
    r = c.post(f"/item/{qt}/review", data={"csrf_token": token, "outcome": "finding_real",
                                          "role": "cardiology registrar", "note": "seen, team told"})
    assert r.status_code == 303 and r.headers["location"].startswith(f"/item/{qt}?recorded=1")
    stored = read_reviews(open_store(sqlite_url(out)), [qt])
    assert list(stored["outcome"]) == ["finding_real"] and list(stored["recorded_via"]) == ["web"]
    assert read_items(open_store(sqlite_url(out)), item_ids=[qt])["status"].iloc[0] == "closed"
    page = c.get(r.headers["location"]).text
    assert "Review recorded." in page and "cardiology registrar" in page and "seen, team told" in page
    assert "<td>-, closed (reviewed: finding_real)</td>" in page     # out of the queue: no rank
    closed = c.get("/?status=closed").text.split("<tbody>", 1)[1]
    assert "pat-Bo" in closed and '<td class="num">-</td>' in closed


def test_a_bad_outcome_is_400_with_the_form_kept_and_nothing_recorded(out):
    c = client_of(out)
    qt = item_id(out, "pat-Bo")
    token = form_token(c.get(f"/item/{qt}").text)
    r = c.post(f"/item/{qt}/review", data={"csrf_token": token, "outcome": "maybe", "role": "registrar", "note": "kept"})
    assert r.status_code == 400 and "Choose one of the outcomes listed." in r.text
    assert 'value="registrar"' in r.text and ">kept</textarea>" in r.text and 'name="csrf_token"' in r.text
    assert read_reviews(open_store(sqlite_url(out)), [qt]).empty


def test_a_missing_role_is_400(out):
    c = client_of(out)
    qt = item_id(out, "pat-Bo")
    token = form_token(c.get(f"/item/{qt}").text)
    r = c.post(f"/item/{qt}/review", data={"csrf_token": token, "outcome": "finding_real", "role": "  "})
    assert r.status_code == 400 and "reviewer&#39;s role" in r.text


@pytest.mark.parametrize("case", ["no token", "wrong token", "token of another item", "no cookie"])
def test_a_post_without_a_matching_csrf_token_is_403_and_records_nothing(out, case):
    c = client_of(out)
    qt, st = item_id(out, "pat-Bo"), item_id(out, "pat-Ada")
    token = form_token(c.get(f"/item/{qt}").text)
    other = form_token(c.get(f"/item/{st}").text)
    data = {"outcome": "finding_real", "role": "registrar"}
    if case == "wrong token":
        data["csrf_token"] = "0" * 64
    elif case == "token of another item":
        data["csrf_token"] = other
    elif case == "no cookie":
        data["csrf_token"] = token
        c.cookies.clear()
    r = c.post(f"/item/{qt}/review", data=data)
    assert r.status_code == 403 and "not recorded" in r.text
    assert read_reviews(open_store(sqlite_url(out)), [qt]).empty


def test_a_review_cannot_be_sent_by_get(out):
    qt = item_id(out, "pat-Bo")
    assert client_of(out).get(f"/item/{qt}/review").status_code in (404, 405)


def test_a_store_that_cannot_be_opened_gives_a_clear_503_page_not_a_traceback(out, tmp_path):
    gone = tmp_path / "elsewhere"
    gone.mkdir()
    c = client_of(out, url=sqlite_url(gone))                # no worklist.sqlite there
    for path in ("/", f"/item/{item_id(out, 'pat-Bo')}"):
        r = c.get(path)
        assert r.status_code == 503 and "The worklist store cannot be reached" in r.text
        assert "Traceback" not in r.text and str(gone) not in r.text


def test_a_database_server_that_is_down_gives_the_503_page(out):
    # Port 9 on this machine: nothing listens (discard), so the connection is refused at once.
    c = client_of(out, url="postgresql+psycopg://nobody@127.0.0.1:9/none?connect_timeout=2")
    r = c.get("/")
    assert r.status_code == 503 and "nobody" not in r.text


def test_no_item_or_patient_id_reaches_a_log_line(out, caplog):
    caplog.set_level(logging.DEBUG)
    c = client_of(out)
    qt = item_id(out, "pat-Bo")
    token = form_token(c.get(f"/item/{qt}").text)
    c.post(f"/item/{qt}/review", data={"csrf_token": token, "outcome": "finding_real", "role": "registrar"})
    c.get("/item/wl-ffffffffffffffff")
    # The server's records (the test client's own httpx lines are the browser's side).
    text = "\n".join(r.getMessage() for r in caplog.records if not r.name.startswith("httpx"))
    assert "one review recorded" in text
    for secret in (qt, "wl-ffffffffffffffff", "pat-Bo", "e-qt", "registrar"):
        assert secret not in text


def test_an_internal_error_is_a_plain_500_page_and_logs_only_its_type(out, monkeypatch, caplog):
    def broken(self, ecg_id):
        raise KeyError(f"column of {ecg_id}")           # a message quoting a value
    monkeypatch.setattr(ReviewData, "aligned_row", broken)
    qt = item_id(out, "pat-Bo")
    with caplog.at_level(logging.DEBUG):
        r = TestClient(create_app(ReviewData(sqlite_url(out), out)), raise_server_exceptions=True).get(f"/item/{qt}")
    assert r.status_code == 500 and "Something went wrong" in r.text and "e-qt" not in r.text
    text = "\n".join(rec.getMessage() for rec in caplog.records if not rec.name.startswith("httpx"))
    assert "internal error (KeyError)" in text and "e-qt" not in text and all(rec.exc_info is None for rec in caplog.records)


def test_serve_without_a_store_is_exit_2(tmp_path, capsys):
    assert main(["serve", "--out", str(tmp_path)]) == 2
    assert "no worklist database" in capsys.readouterr().err


def test_serve_runs_uvicorn_without_an_access_log_on_127_0_0_1_by_default(out, monkeypatch, capsys):
    import uvicorn
    seen = {}

    class FakeServer:
        def __init__(self, config):
            seen["config"] = config

        def run(self):
            seen["ran"] = True
    monkeypatch.setattr(uvicorn, "Server", FakeServer)
    assert main(["serve", "--out", str(out)]) == 0
    config = seen["config"]
    assert seen["ran"] and config.host == "127.0.0.1" and config.port == 8750 and config.access_log is False


def test_serve_on_all_interfaces_warns_that_there_is_no_login(out, monkeypatch, caplog):
    import uvicorn
    monkeypatch.setattr(uvicorn, "Server", lambda config: type("S", (), {"run": lambda self: None})())
    with caplog.at_level(logging.WARNING, logger="cardiosieve"):
        assert main(["serve", "--out", str(out), "--host", "0.0.0.0", "--port", "8751"]) == 0
    assert any("no login" in r.getMessage() for r in caplog.records)


def test_show_html_writes_one_offline_file_with_the_worklist_and_each_item(out, tmp_path, capsys):
    target = tmp_path / "snapshot.html"
    assert main(["show", "--out", str(out), "--html", str(target)]) == 0
    text = target.read_text()
    st, qt = item_id(out, "pat-Ada"), item_id(out, "pat-Bo")
    assert CAUTION_HTML in text and f'href="#item-{st}"' in text and f'id="item-{qt}"' in text
    assert "<style>" in text and 'rel="stylesheet"' not in text          # self-contained
    assert 'href="http' not in text and 'src="http' not in text
    assert "<form class=\"review\"" not in text and "cardiosieve review" in text
    assert (target.stat().st_mode & 0o777) == 0o600
