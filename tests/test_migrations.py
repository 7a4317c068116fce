"""The store's schema migrations (pipeline/migrations, Alembic): stores of earlier releases
upgraded or stamped, new stores built by the migrations, the migrated schema equal to
store.metadata, a newer store refused, commands that only use a store never upgrading it, and
processes racing to upgrade one store.

SQLite always; PostgreSQL when CARDIOSIEVE_TEST_PG_URL is set (see tests/test_store.py)."""
import shutil
import subprocess
import sys

import pandas as pd
import pytest
from sqlalchemy import create_engine, event, func, insert, inspect, select
from sqlalchemy.engine import Engine
from sqlalchemy.exc import IntegrityError

from cardiosieve.pipeline import store
from cardiosieve.pipeline.store import (HEAD_REVISION, OUTCOMES, SCHEMA_VERSION, VERSION_TABLE, StoreSchemaError,
                                        StoreUrlError, cardiosieve_schema, metadata, open_store, read_items,
                                        record_review, review, store_revision, upgrade_store, worklist_item,
                                        yield_table)
from cardiosieve.pipeline.worklist import STATUS_CLOSED
from tests.test_store import NIGHT1, NIGHT2, PG_URL, drop_everything, finding, needs_pg, night, stored_outcomes, table

# The store as the code before schema versioning created it (no cardiosieve_schema table; the
# outcome check names confirmed / not_confirmed), written out by hand so that it stays frozen
# whatever the current metadata becomes. {ts} and {serial} are the dialect's types.
V1_DDL = [
    """CREATE TABLE worklist_item (
        item_id VARCHAR(40) NOT NULL, rank INTEGER, tier INTEGER NOT NULL, screen VARCHAR(64) NOT NULL,
        patient_id TEXT NOT NULL, ecg_id TEXT NOT NULL, ecg_at {ts} NOT NULL, score FLOAT NOT NULL,
        summary TEXT, evidence TEXT, caveats TEXT, territories TEXT, rule_version VARCHAR(64),
        run_id VARCHAR(128), first_flagged_at {ts} NOT NULL, status VARCHAR(16) NOT NULL,
        last_updated_at {ts} NOT NULL, status_reason TEXT, episode_start {ts} NOT NULL,
        episode_end {ts} NOT NULL, other_ecg_ids TEXT, score_parts TEXT,
        PRIMARY KEY (item_id),
        CONSTRAINT ck_worklist_item_status CHECK (status IN ('open', 'reopened', 'explained', 'closed')),
        CONSTRAINT ck_worklist_item_tier CHECK (tier BETWEEN 1 AND 4))""",
    "CREATE INDEX ix_worklist_item_rank ON worklist_item (rank)",
    "CREATE INDEX ix_worklist_item_patient_screen ON worklist_item (patient_id, screen)",
    """CREATE TABLE review (
        review_id {serial} NOT NULL, item_id VARCHAR(40) NOT NULL, reviewed_at {ts} NOT NULL,
        reviewer_role VARCHAR(128) NOT NULL, outcome VARCHAR(16) NOT NULL, note TEXT,
        recorded_via VARCHAR(16) NOT NULL,
        PRIMARY KEY (review_id),
        CONSTRAINT ck_review_outcome CHECK (outcome IN ({outcomes})),
        CONSTRAINT uq_review_entry UNIQUE (item_id, reviewed_at, reviewer_role),
        FOREIGN KEY(item_id) REFERENCES worklist_item (item_id))""",
    "CREATE INDEX ix_review_item ON review (item_id)",
]
V1_OUTCOMES = "'confirmed', 'not_confirmed', 'already_known', 'data_problem'"
# The release before the migrations (schema version 2) made the same tables with the new
# outcome names, and cardiosieve_schema holding its version; no Alembic revision table.
V2_OUTCOMES = "'finding_real', 'finding_not_real', 'already_known', 'data_problem'"
V2_DDL = V1_DDL + [
    """CREATE TABLE cardiosieve_schema (id INTEGER NOT NULL, version INTEGER NOT NULL, PRIMARY KEY (id),
        CONSTRAINT ck_cardiosieve_schema_one_row CHECK (id = 1))""",
    "INSERT INTO cardiosieve_schema (id, version) VALUES (1, 2)",
]
TYPES = {"sqlite": {"ts": "DATETIME", "serial": "INTEGER"},
         "postgresql": {"ts": "TIMESTAMP WITH TIME ZONE", "serial": "SERIAL"}}
# Four tier-2 hyperkalemia items; i1 to i3 reviewed (i2 twice, latest counts), i4 still open.
V1_FINDINGS = [finding(f"e{i}", f"p{i}", "2026-03-01 20:00", tier=2) for i in range(1, 5)]
V1_REVIEWS = [   # (item, hours after NIGHT1, role, outcome, note)
    ("e1", 6, "registrar", "confirmed", None),
    ("e2", 6, "registrar", "data_problem", None),
    ("e2", 7, "consultant", "not_confirmed", "not confirmed on the repeat ECG"),   # note text stays
    ("e3", 6, "registrar", "already_known", None),
]
RENAMED = {"confirmed": "finding_real", "not_confirmed": "finding_not_real"}


def queue_ranked(items: pd.DataFrame) -> pd.DataFrame:
    """What revision 0003 makes of stored items (as `table` reads them): the active items
    ranked 1 to n by tier, score (high first), ECG time (recent first) and item_id, every other
    item without a rank. Written out here, not taken from the code under test."""
    active = items[items["status"].isin(["open", "reopened"])]
    order = active.sort_values(["tier", "score", "ecg_at", "item_id"], ascending=[True, False, False, True]).index
    rank = pd.Series(float("nan"), index=items.index)
    rank[order] = range(1, len(order) + 1)
    return items.assign(rank=rank)


def build_old_store(url, ddl=V1_DDL, outcomes=V1_OUTCOMES, renamed=None):
    """A store of an earlier release at `url` (by default version 1) holding items, closed items
    and reviews (the version-1 outcomes, or renamed by `renamed`)."""
    engine = create_engine(url)
    with engine.begin() as conn:
        for statement in ddl:
            conn.exec_driver_sql(statement.format(**TYPES[engine.dialect.name], outcomes=outcomes))
    items, _ = night(engine, V1_FINDINGS)   # worklist_item's columns are unchanged since version 1
    ids = items.set_index("ecg_id")["item_id"]
    rows = [{"item_id": ids[e], "reviewed_at": NIGHT1 + pd.Timedelta(hours=h), "reviewer_role": role,
             "outcome": (renamed or {}).get(outcome, outcome), "note": note, "recorded_via": "cli"}
            for e, h, role, outcome, note in V1_REVIEWS]
    latest = {r["item_id"]: r for r in rows}
    with engine.begin() as conn:
        conn.execute(insert(review), rows)   # the Table object checks nothing: the old CHECK does
        for iid, r in latest.items():
            conn.execute(worklist_item.update().where(worklist_item.c.item_id == iid).values(
                status=STATUS_CLOSED, status_reason=f"reviewed: {r['outcome']}", last_updated_at=r["reviewed_at"]))
    return engine


def build_v1_store(url):
    return build_old_store(url)


def build_v2_store(url):
    """A store made by the release before the migrations (schema version 2, no revision table)."""
    return build_old_store(url, V2_DDL, V2_OUTCOMES, RENAMED)


def build_store_at(url, revision):
    """A store at `url` built by the migrations up to `revision` (an older schema to upgrade from,
    for the test of a new migration), in one transaction as the store runs them."""
    from alembic import command
    from alembic.config import Config

    engine = create_engine(url)
    config = Config()
    config.set_main_option("script_location", str(store.MIGRATIONS_DIR))
    with engine.begin() as conn:
        config.attributes["connection"] = conn
        command.upgrade(config, revision)
    return engine


def describe(url):
    """Each store table as the database reports it: columns (name, type, nullable), primary key,
    foreign keys, indexes, unique and check constraint names."""
    engine = create_engine(url)
    with engine.connect() as conn:
        have = inspect(conn)
        tables = {name: {"columns": [(c["name"], str(c["type"]), c["nullable"]) for c in have.get_columns(name)],
                         "pk": have.get_pk_constraint(name)["constrained_columns"],
                         "fks": [(f["constrained_columns"], f["referred_table"], f["referred_columns"])
                                 for f in have.get_foreign_keys(name)],
                         "indexes": sorted((i["name"], tuple(i["column_names"])) for i in have.get_indexes(name)),
                         "uniques": sorted(u["name"] for u in have.get_unique_constraints(name)),
                         "checks": sorted(c["name"] for c in have.get_check_constraints(name))}
                  for name in ("worklist_item", "review")}
    engine.dispose()
    return tables


# review's columns since version 1 (schema 4 added two, checked by the test of revision 0004).
V1_REVIEW_COLUMNS = ["review_id", "item_id", "reviewed_at", "reviewer_role", "outcome", "note", "recorded_via"]


def snapshot(engine):
    """Everything a migration may touch: both tables' rows, the version row, the revision row,
    the outcome check and review's indexes and unique constraints; on SQLite every table's and
    index's CREATE statement but the revision table's."""
    with engine.connect() as conn:
        reviews = pd.DataFrame(conn.execute(select(*[review.c[c] for c in V1_REVIEW_COLUMNS])
                                            .order_by(review.c.review_id)).mappings().all())
        have = inspect(conn)
        version = (conn.execute(cardiosieve_schema.select()).all()
                   if have.has_table("cardiosieve_schema") else None)
        revision = (conn.exec_driver_sql(f"SELECT version_num FROM {VERSION_TABLE}").all()
                    if have.has_table(VERSION_TABLE) else None)
        checks = {c["name"]: " ".join(str(c["sqltext"]).split()) for c in have.get_check_constraints("review")}
        indexes = sorted(i["name"] for i in have.get_indexes("review"))
        uniques = sorted(u["name"] for u in have.get_unique_constraints("review"))
        ddl = (conn.exec_driver_sql("SELECT type, name, sql FROM sqlite_master WHERE name NOT LIKE ? "
                                    "ORDER BY name", (f"%{VERSION_TABLE}%",)).all()
               if engine.dialect.name == "sqlite" else None)
    return {"items": table(engine), "reviews": reviews, "version": version, "revision": revision,
            "checks": checks, "indexes": indexes, "uniques": uniques, "ddl": ddl}


def look(url):
    """snapshot() of the database at `url`, through an engine of its own (open_store would act)."""
    engine = create_engine(url)
    try:
        return snapshot(engine)
    finally:
        engine.dispose()


def assert_same(left, right, skip=()):
    for key, value in right.items():
        if key in skip:
            continue
        if isinstance(value, pd.DataFrame):
            pd.testing.assert_frame_equal(left[key], value)
        else:
            assert left[key] == value, key


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=needs_pg)])
def empty_url(request, tmp_path):
    """A database URL with none of the store's tables."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'worklist.sqlite'}"
    else:
        drop_everything(PG_URL)
        yield PG_URL
        drop_everything(PG_URL)


# --- version 1 (before versioning): upgraded through 0002 ----------------------------------------
def test_opening_a_version_1_store_renames_outcomes_and_keeps_every_row(empty_url):
    old = build_v1_store(empty_url)
    before = snapshot(old)
    old.dispose()
    assert before["version"] is None and before["revision"] is None
    assert len(before["reviews"]) == 4 and len(before["items"]) == 4
    assert "'confirmed'" in before["checks"]["ck_review_outcome"]

    engine = open_store(empty_url)
    after = snapshot(engine)
    expected_reviews = before["reviews"].assign(outcome=before["reviews"]["outcome"].replace(RENAMED))
    pd.testing.assert_frame_equal(after["reviews"], expected_reviews)   # same ids, times, notes
    expected_items = queue_ranked(before["items"].assign(status_reason=before["items"]["status_reason"].replace(
        {f"reviewed: {o}": f"reviewed: {n}" for o, n in RENAMED.items()})))     # 0002, then 0003
    pd.testing.assert_frame_equal(after["items"], expected_items, check_dtype=False)
    assert sorted(after["items"]["status_reason"].dropna()) == [
        "reviewed: already_known", "reviewed: finding_not_real", "reviewed: finding_real"]
    assert after["version"] == [(1, SCHEMA_VERSION)] and after["revision"] == [(HEAD_REVISION,)]
    check = after["checks"]["ck_review_outcome"]
    assert all(f"'{o}'" in check for o in OUTCOMES) and "'confirmed'" not in check and "'not_confirmed'" not in check
    assert (after["indexes"], after["uniques"]) == (before["indexes"], before["uniques"])

    # The new check refuses the old words written straight into the table, and takes the new
    # ones (finding_not_real is 16 characters, the width of the column).
    sneak = {"item_id": after["items"]["item_id"][0], "reviewed_at": NIGHT2, "reviewer_role": "direct",
             "recorded_via": "cli"}
    for word in ("confirmed", "not_confirmed"):
        with pytest.raises(IntegrityError), engine.begin() as conn:
            conn.execute(insert(review).values(**sneak, outcome=word))
    with engine.connect() as conn:
        conn.execute(insert(review).values(**sneak, outcome="finding_not_real"))
        conn.rollback()

    # PPV as before the rename: (finding_real 1 + already_known 1) / reviewed 3, by each item's latest review.
    hk = yield_table(engine).set_index(["screen", "tier"]).loc[("hyperkalemia", 2)]
    assert (hk["items"], hk["reviewed"], hk["finding_real"], hk["already_known"], hk["finding_not_real"],
            hk["data_problem"]) == (4, 3, 1, 1, 1, 0)
    assert hk["ppv"] == pytest.approx(2 / 3)

    # A second open finds the store at head and changes nothing.
    engine.dispose()
    again = open_store(empty_url)
    assert_same(snapshot(again), after)

    # The migrated store keeps working: a new review gets a new id (PostgreSQL's sequence has
    # also spent numbers on the refused inserts above, so only "above the old ones" is checked).
    i4 = after["items"].set_index("ecg_id").loc["e4", "item_id"]
    assert record_review(again, i4, "finding_real", "registrar", None, NIGHT2)
    with again.connect() as conn:
        assert conn.execute(review.select().where(review.c.item_id == i4)).one().review_id > 4
    again.dispose()


def test_the_baseline_revision_builds_the_first_release_schema(empty_url, tmp_path):
    # 0001 must make what the first release made (V1_DDL, written out from its code), so that
    # a store stamped 0001 and one built through 0001 are upgraded by the same 0002.
    build_store_at(empty_url, "0001").dispose()
    built, check = describe(empty_url), look(empty_url)["checks"]["ck_review_outcome"]
    drop_everything(empty_url)
    build_v1_store(empty_url).dispose()
    assert built == describe(empty_url)
    assert "'confirmed'" in check and "'not_confirmed'" in check


def test_a_failing_migration_leaves_the_version_1_store_as_it_was(empty_url, tmp_path, monkeypatch):
    # A copy of the migrations whose 0002 loses a review row after the table rebuild (SQLite)
    # and the renames: its own row-count check fails, and the one transaction must roll all of
    # it back, DDL and the revision stamp included.
    old = build_v1_store(empty_url)
    before = snapshot(old)
    old.dispose()
    broken = tmp_path / "migrations"
    shutil.copytree(store.MIGRATIONS_DIR, broken, ignore=shutil.ignore_patterns("__pycache__"))
    step = broken / "versions" / "0002_outcome_names.py"
    code, check = step.read_text(), "    after = _row_counts(conn)\n"
    assert code.count(check) == 1
    step.write_text(code.replace(check, "    op.execute('DELETE FROM review WHERE review_id = 1')\n" + check))
    monkeypatch.setattr(store, "MIGRATIONS_DIR", broken)

    with pytest.raises(StoreSchemaError, match="row counts") as caught:
        open_store(empty_url)
    assert "registrar" not in str(caught.value)          # counts and table names only
    untouched = create_engine(empty_url)
    left = snapshot(untouched)
    with untouched.connect() as conn:
        assert not inspect(conn).has_table("_alembic_tmp_review")
    untouched.dispose()
    assert_same(left, before)

    monkeypatch.undo()                                    # the real migrations
    migrated = open_store(empty_url)
    assert snapshot(migrated)["revision"] == [(HEAD_REVISION,)]
    migrated.dispose()


def test_threads_opening_a_version_1_store_at_once_migrate_it_once(empty_url):
    import threading

    build_v1_store(empty_url).dispose()
    start, errors, engines = threading.Barrier(4), [], []

    def opener():
        start.wait()
        try:
            engines.append(open_store(empty_url))
        except Exception as exc:   # collected: an exception in a thread would not fail the test
            errors.append(exc)

    threads = [threading.Thread(target=opener) for _ in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == []
    assert [o for _, o in stored_outcomes(engines[0])] == [
        "finding_real", "data_problem", "finding_not_real", "already_known"]
    for e in engines:
        e.dispose()


# Each process imports the store, says it is ready, waits for "go", upgrades, prints the
# revision it found under the lock.
RACER = """import sys
from cardiosieve.pipeline.store import upgrade_store
print("ready", flush=True)
sys.stdin.readline()
print(upgrade_store(sys.argv[1])[0])
"""


def test_processes_upgrading_a_version_1_store_at_once_migrate_it_once(empty_url):
    build_v1_store(empty_url).dispose()
    racers = [subprocess.Popen([sys.executable, "-c", RACER, empty_url], stdin=subprocess.PIPE,
                               stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) for _ in range(3)]
    try:
        assert [r.stdout.readline().strip() for r in racers] == ["ready"] * 3
        for r in racers:
            r.stdin.write("go\n")
            r.stdin.flush()
        done = [r.communicate(timeout=120) for r in racers]
    finally:
        for r in racers:
            r.kill()
    assert [r.returncode for r in racers] == [0, 0, 0], [err[-800:] for _, err in done]
    assert sorted(out.strip() for out, _ in done) == ["0001", HEAD_REVISION, HEAD_REVISION]   # one migrated
    engine = open_store(empty_url, create=False)
    assert [o for _, o in stored_outcomes(engine)] == [
        "finding_real", "data_problem", "finding_not_real", "already_known"]
    engine.dispose()


# --- version 2 of the release before the migrations: stamped at 0002, then upgraded ------------
def test_a_store_of_the_release_before_the_migrations_is_stamped_then_upgraded(empty_url):
    build_v2_store(empty_url).dispose()
    before = look(empty_url)
    assert before["version"] == [(1, 2)] and before["revision"] is None

    # Commands that only use a store refuse one behind this code, and change nothing.
    assert store_revision(empty_url) == ("0002", False)
    with pytest.raises(StoreSchemaError, match="cardiosieve db upgrade"):
        open_store(empty_url, create=False)
    assert_same(look(empty_url), before)

    engine = open_store(empty_url)   # the nightly run's open: stamps 0002, then runs 0003
    after = snapshot(engine)
    engine.dispose()
    assert after["revision"] == [(HEAD_REVISION,)] and after["version"] == [(1, SCHEMA_VERSION)]
    pd.testing.assert_frame_equal(after["items"], queue_ranked(before["items"]), check_dtype=False)
    assert_same(after, before, skip=("revision", "version", "items", "ddl"))   # reviews, checks, review's indexes
    assert store_revision(empty_url) == (HEAD_REVISION, True)


def test_revision_3_ranks_the_queue_only_and_indexes_status_and_run_id(empty_url):
    """From 0002, where every item held a global rank (closed ones after the active ones), to
    0003: the closed and explained items lose their rank, the active ones keep 1 to n in queue
    order, no row is lost, and the two indexes exist."""
    old = build_store_at(empty_url, "0002")
    items, _ = night(old, V1_FINDINGS + [finding("e5", "p5", "2026-03-01 21:00", tier=1, severity=0.8),
                                         finding("e6", "p6", "2026-03-01 22:00", tier=3)])
    ids = items.set_index("ecg_id")["item_id"]
    ranks = {ids[e]: r for r, e in enumerate(["e5", "e1", "e2", "e3", "e4", "e6"], start=1)}   # a 0002 global rank
    with old.begin() as conn:
        for iid, r in ranks.items():
            conn.execute(worklist_item.update().where(worklist_item.c.item_id == iid).values(rank=r))
        for e, status in (("e1", STATUS_CLOSED), ("e3", "explained")):
            conn.execute(worklist_item.update().where(worklist_item.c.item_id == ids[e]).values(status=status))
        conn.execute(worklist_item.update().where(worklist_item.c.item_id == ids["e4"]).values(rank=None))
    before = table(old)
    old.dispose()

    engine = open_store(empty_url)
    after = table(engine)
    with engine.connect() as conn:
        indexes = {i["name"] for i in inspect(conn).get_indexes("worklist_item")}
        version = conn.execute(cardiosieve_schema.select()).all()
    engine.dispose()
    pd.testing.assert_frame_equal(after, queue_ranked(before), check_dtype=False)
    by_ecg = after.set_index("ecg_id")["rank"]
    assert (by_ecg["e5"], by_ecg["e6"], sorted(by_ecg[["e2", "e4"]])) == (1, 4, [2, 3])   # by tier
    assert by_ecg[["e1", "e3"]].isna().all()
    assert {"ix_worklist_item_status", "ix_worklist_item_run_id"} <= indexes and version == [(1, SCHEMA_VERSION)]


def test_revision_4_backfills_reviews_from_their_items_and_starts_an_empty_findings_history(empty_url):
    """From 0003 to 0004: every review is kept as it was and gets its item's current rule
    version and tier (the migration's documented backfill), finding_history and missed_case
    are made empty,
    and the version row says 4."""
    old = build_store_at(empty_url, "0003")
    rows = [finding("e1", "p1", "2026-03-01 20:00", tier=2),
            finding("e2", "p2", "2026-03-01 21:00", screen="long_qt", tier=1, severity=0.8),
            finding("e3", "p3", "2026-03-01 22:00", tier=3)]
    items, _ = night(old, rows)
    ids = items.set_index("ecg_id")["item_id"]
    with old.begin() as conn:   # a 0003 review row: the columns of that schema only
        conn.execute(worklist_item.update().where(worklist_item.c.item_id == ids["e2"])
                     .values(rule_version="long_qt/0.9.0+site.abc123"))
        conn.execute(insert(review), [
            {"item_id": ids[e], "reviewed_at": NIGHT1 + pd.Timedelta(hours=h), "reviewer_role": role,
             "outcome": outcome, "note": None, "recorded_via": "cli"}
            for e, h, role, outcome in [("e1", 5, "registrar", "finding_real"),
                                        ("e2", 6, "registrar", "data_problem"),
                                        ("e2", 7, "consultant", "finding_not_real")]])
    before = snapshot(old)
    old.dispose()

    engine = open_store(empty_url)
    after = snapshot(engine)
    with engine.connect() as conn:
        backfilled = conn.execute(select(review.c.review_id, review.c.rule_version_at_review, review.c.tier_at_review)
                                  .order_by(review.c.review_id)).all()
        history = conn.execute(select(func.count()).select_from(store.finding_history)).scalar()
        history += conn.execute(select(func.count()).select_from(store.missed_case)).scalar()
    engine.dispose()
    assert_same(after, before, skip=("revision", "version", "ddl"))   # items and reviews kept
    first = int(before["reviews"]["review_id"].min())
    # By hand from the rows above: e1's item is hyperkalemia/1.0.0 at tier 2; e2's was set to
    # the override version above, at tier 1 (both of its reviews).
    assert [tuple(r) for r in backfilled] == [(first, "hyperkalemia/1.0.0", 2),
                                               (first + 1, "long_qt/0.9.0+site.abc123", 1),
                                               (first + 2, "long_qt/0.9.0+site.abc123", 1)]
    assert history == 0
    assert after["version"] == [(1, 4)] and after["revision"] == [("0004",)]


# --- new stores, and the migrated schema against store.metadata ----------------------------------
@pytest.mark.parametrize("start", ["empty", "version 1", "version 2"])
def test_the_migrated_schema_is_the_schema_of_store_metadata(empty_url, start):
    # Alembic's autogenerate comparison (tables, columns, types, nullability, indexes, unique
    # and foreign keys) finds nothing to change. It does not compare CHECK constraints, so
    # those are compared by name, and on SQLite by text with a store made by create_all.
    from alembic.autogenerate import compare_metadata
    from alembic.migration import MigrationContext

    if start == "version 1":
        build_v1_store(empty_url).dispose()
    elif start == "version 2":
        build_v2_store(empty_url).dispose()
    engine = open_store(empty_url)
    with engine.connect() as conn:
        context = MigrationContext.configure(conn, opts={"compare_type": True, "version_table": VERSION_TABLE})
        assert compare_metadata(context, metadata) == []
        have = inspect(conn)
        found = {t.name: sorted(c["name"] for c in have.get_check_constraints(t.name)) for t in metadata.sorted_tables}
        texts = {t.name: sorted(" ".join(str(c["sqltext"]).split()) for c in have.get_check_constraints(t.name))
                 for t in metadata.sorted_tables}
    engine.dispose()
    declared = {t.name: sorted(c.name for c in t.constraints if c.__class__.__name__ == "CheckConstraint")
                for t in metadata.sorted_tables}
    assert found == declared
    if engine.dialect.name == "sqlite":
        reference = create_engine("sqlite://")
        metadata.create_all(reference)
        with reference.connect() as conn:
            have = inspect(conn)
            assert texts == {t.name: sorted(" ".join(str(c["sqltext"]).split())
                                            for c in have.get_check_constraints(t.name))
                             for t in metadata.sorted_tables}
        reference.dispose()


def test_a_new_store_is_built_by_the_migrations_at_head(tmp_path):
    path = tmp_path / "worklist.sqlite"
    assert upgrade_store(f"sqlite:///{path}", create=True) == (None, HEAD_REVISION)
    assert path.stat().st_mode & 0o777 == 0o600
    assert store_revision(f"sqlite:///{path}") == (HEAD_REVISION, True)
    assert upgrade_store(f"sqlite:///{path}") == (HEAD_REVISION, HEAD_REVISION)   # already there


def test_the_revisions_are_the_schema_versions_in_one_line():
    # Revision ids are the versions in four digits, each file named by its id, each revision
    # the child of the one before, the last one HEAD_REVISION (SCHEMA_VERSION): a new migration
    # that forgets to bump SCHEMA_VERSION fails here.
    from alembic.script import ScriptDirectory

    scripts = ScriptDirectory(str(store.MIGRATIONS_DIR))
    chain = list(reversed(list(scripts.walk_revisions())))
    assert [s.revision for s in chain] == [f"{v:04d}" for v in range(1, SCHEMA_VERSION + 1)]
    assert [s.down_revision for s in chain] == [None] + [s.revision for s in chain[:-1]]
    assert all(s.path.rsplit("/", 1)[-1].startswith(s.revision + "_") for s in chain)
    assert scripts.get_heads() == [HEAD_REVISION]


def test_opening_a_current_store_takes_one_look(tmp_path):
    url = f"sqlite:///{tmp_path / 'worklist.sqlite'}"
    open_store(url).dispose()
    seen = []

    def record(conn, cursor, statement, *args):
        seen.append(" ".join(statement.split()))

    event.listen(Engine, "before_cursor_execute", record)
    try:
        for create in (True, False):
            open_store(url, create=create).dispose()
    finally:
        event.remove(Engine, "before_cursor_execute", record)
    # Per open: is there a revision table (SQLite: a PRAGMA), and its one row.
    assert seen == [f'PRAGMA main.table_info("{VERSION_TABLE}")',
                    f"SELECT {VERSION_TABLE}.version_num FROM {VERSION_TABLE}"] * 2


# --- refused: newer stores; upgrades by the commands that only use a store -----------------------
def test_a_store_from_newer_code_is_refused(empty_url):
    newer = f"{SCHEMA_VERSION + 1:04d}"
    engine = open_store(empty_url)
    with engine.begin() as conn:
        conn.exec_driver_sql(f"UPDATE {VERSION_TABLE} SET version_num = '{newer}'")
    engine.dispose()
    for attempt in (lambda: open_store(empty_url), lambda: open_store(empty_url, create=False),
                    lambda: upgrade_store(empty_url)):
        with pytest.raises(StoreSchemaError, match=f"revision {newer} is newer .*: upgrade cardiosieve"):
            attempt()
    assert store_revision(empty_url) == (newer, True)

    # A later release made before the revision table existed would be the same: its version
    # in cardiosieve_schema (how the release before the migrations refused newer stores).
    engine = create_engine(empty_url)
    with engine.begin() as conn:
        conn.exec_driver_sql(f"DROP TABLE {VERSION_TABLE}")
        conn.execute(cardiosieve_schema.update().values(version=SCHEMA_VERSION + 1))
    engine.dispose()
    with pytest.raises(StoreSchemaError, match="newer"):
        open_store(empty_url)


def test_commands_that_only_use_a_store_never_upgrade_it(empty_url, tmp_path):
    build_v1_store(empty_url).dispose()
    before = look(empty_url)
    with pytest.raises(StoreSchemaError, match="cardiosieve db upgrade") as caught:
        open_store(empty_url, create=False)
    message = str(caught.value)
    assert "revision 0001" in message and f"needs {HEAD_REVISION}" in message and "back it up" in message
    if empty_url.startswith("sqlite"):
        assert f"--out {tmp_path}" in message
    else:
        assert "--db URL" in message and "@" not in message   # never the server URL
    assert_same(look(empty_url), before)
    assert store_revision(empty_url) == ("0001", False)


def test_commands_that_only_use_a_store_never_make_one(empty_url, tmp_path):
    with pytest.raises(StoreUrlError, match="no worklist"):
        open_store(empty_url, create=False)
    with pytest.raises(StoreUrlError, match="no worklist"):
        upgrade_store(empty_url)
    assert not (tmp_path / "worklist.sqlite").exists()
    check = create_engine(empty_url)
    with check.connect() as conn:
        assert not inspect(conn).has_table("worklist_item") and not inspect(conn).has_table(VERSION_TABLE)
    check.dispose()


def test_a_database_with_only_one_of_the_store_tables_is_refused(tmp_path):
    url = f"sqlite:///{tmp_path / 'worklist.sqlite'}"
    engine = create_engine(url)
    with engine.begin() as conn:
        conn.exec_driver_sql(V1_DDL[0].format(**TYPES["sqlite"]))
    engine.dispose()
    with pytest.raises(StoreSchemaError, match="one of the store's tables"):
        open_store(url)
