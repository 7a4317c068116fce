"""The review page in a real browser: headless Chromium (the distribution's /usr/bin/chromium,
driven by Playwright; no browser is downloaded) against uvicorn serving the sample lake's night
2026-11-29, as `make demo` runs it. Screenshots of the worklist and of one item of each screen
are written under the test's temporary folder (docs/img/ holds copies for the README)."""
import io
import json
import socket
import threading
import time
from pathlib import Path

import pandas as pd
import pytest

from cardiosieve.pipeline.cli import main
from cardiosieve.pipeline.pages import ReviewData
from cardiosieve.pipeline.store import open_store, read_items, read_reviews, sqlite_url

CHROMIUM = Path("/usr/bin/chromium")
REPO = Path(__file__).resolve().parents[1]
LAKE = REPO / "sample_lake"

pytestmark = pytest.mark.skipif(not CHROMIUM.exists(), reason="needs Debian's chromium at /usr/bin/chromium "
                                                               "(apt-get install -y chromium; .ci/run installs it)")


@pytest.fixture(scope="module")
def night(tmp_path_factory):
    out = tmp_path_factory.mktemp("browser") / "out"
    code = main(["run", "--lake", str(LAKE), "--config", str(LAKE / "site.toml"), "--out", str(out),
                 "--start", "2026-11-29T00:00:00Z", "--end", "2026-11-30T00:00:00Z", "--quiet"])
    assert code == 0
    return out


@pytest.fixture
def server(night):
    """uvicorn in a thread on a free port (the OS picks it), the access log off as `serve` has it."""
    import uvicorn
    from cardiosieve.pipeline.webapp import create_app
    data = ReviewData(sqlite_url(night), night, lake=str(LAKE), config=str(LAKE / "site.toml"))
    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.bind(("127.0.0.1", 0))
    port = sock.getsockname()[1]
    srv = uvicorn.Server(uvicorn.Config(create_app(data), access_log=False, log_level="warning"))
    thread = threading.Thread(target=srv.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    deadline = time.monotonic() + 15
    while not srv.started and time.monotonic() < deadline:
        time.sleep(0.05)
    assert srv.started
    yield f"http://127.0.0.1:{port}"
    srv.should_exit = True
    thread.join(10)
    sock.close()


@pytest.fixture
def page():
    from playwright.sync_api import sync_playwright
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=str(CHROMIUM), args=["--no-sandbox"])
        context = browser.new_context(viewport={"width": 1280, "height": 900})
        pg = context.new_page()
        errors = []     # a Content-Security-Policy violation or a failed load shows here
        pg.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
        pg.on("pageerror", lambda e: errors.append(str(e)))
        yield pg
        assert errors == []
        context.close()
        browser.close()


def test_filter_to_tier_1_open_an_st_item_and_record_a_review(night, server, page, tmp_path, capsys):
    page.goto(server + "/")
    assert page.locator(".caution").is_visible()
    page.select_option("#f-tier", "1")
    page.click("button:has-text('Filter')")
    page.wait_for_url("**/?tier=1*")
    tiers = page.locator("#worklist tbody tr").evaluate_all("rows => rows.map(r => r.dataset.tier)")
    assert tiers and set(tiers) == {"1"}
    page.screenshot(path=str(tmp_path / "worklist.png"))

    # An ST-elevation item: its plot draws the elevation cut points the screen applied.
    st_row = page.locator("#worklist tbody tr[data-screen='st_deviation']").filter(has_text="ST elevation up to").first
    item_id = st_row.locator("a").inner_text()
    st_row.locator("a").click()
    page.wait_for_url(f"**/item/{item_id}")
    assert page.locator(".caution").is_visible()
    plot = page.locator("#plot-st img")
    assert plot.is_visible() and plot.evaluate("img => img.naturalWidth > 0")       # the SVG was drawn
    # The cut points in the plot's table are the evidence's rules, shown in the criteria table.
    stored = read_items(open_store(sqlite_url(night)), item_ids=[item_id]).iloc[0]
    rules = {r["key"]: r for r in json.loads(stored["evidence"])["rules"]}
    criteria = page.locator("#criteria").inner_text()
    for key, rule in rules.items():
        assert key in criteria and rule["source"] in criteria
    cut_keys = [k for k in rules if k.startswith("ste_") and k not in ("ste_clear_ratio", "ste_clear_leads")]
    assert cut_keys
    cells = page.locator("#plot-st table tbody tr").evaluate_all(
        "rows => rows.map(r => Array.from(r.cells).map(c => c.innerText))")
    drawn = {lead: (cut, key) for _, lead, _, _, cut, key, _, _ in cells}
    cut_points = json.loads(stored["evidence"])["values"]["cut_points_uv"]
    assert cut_points and all(drawn[lead] == (f"{value:.0f}", drawn[lead][1]) for lead, value in cut_points.items())
    assert {drawn[lead][1] for lead in cut_points} <= set(cut_keys)
    page.screenshot(path=str(tmp_path / "item_st_deviation.png"), full_page=True)

    page.check("#o-finding_real")
    page.fill("#role", "cardiology registrar")
    page.fill("#note", "checked on the ward computer")
    page.click("button:has-text('Record review')")
    page.wait_for_url(f"**/item/{item_id}?recorded=1*")
    assert page.locator("[role=status]").inner_text() == "Review recorded."
    assert "cardiology registrar" in page.locator("#reviews").inner_text()

    reviews = read_reviews(open_store(sqlite_url(night)), [item_id])
    assert list(reviews["outcome"]) == ["finding_real"] and list(reviews["recorded_via"]) == ["web"]
    capsys.readouterr()
    assert main(["yield", "--out", str(night), "--format", "csv"]) == 0
    yields = pd.read_csv(io.StringIO(capsys.readouterr().out))
    row = yields[(yields["screen"] == "st_deviation") & (yields["tier"] == 1)].iloc[0]
    assert row["reviewed"] >= 1 and row["finding_real"] >= 1


def test_screenshots_of_the_worklist_and_an_item_of_each_screen(night, server, page, tmp_path):
    page.goto(server + "/")
    page.screenshot(path=str(tmp_path / "worklist_all.png"))
    items = read_items(open_store(sqlite_url(night)))
    for screen in ("hyperkalemia", "long_qt", "st_deviation"):
        of_screen = items[items["screen"] == screen]
        if screen == "st_deviation":     # one with elevation cut points to draw
            of_screen = of_screen[of_screen["summary"].str.startswith("ST elevation")]
        item_id = of_screen["item_id"].iloc[0]
        page.goto(f"{server}/item/{item_id}")
        assert page.locator("#plot-labs img").is_visible() and page.locator("#plot-qtc img").is_visible()
        assert "Traceback" not in page.content()
        page.screenshot(path=str(tmp_path / f"item_{screen}.png"), full_page=True)
    assert len(list(tmp_path.glob("item_*.png"))) == 3
