"""Findings history and the state a review saw (schema version 4).

Creates finding_history: every finding of every run from this revision on, with the item it
folded into, appended in the transaction of the night's upsert and never rewritten (the ground
a later audit or a replay of other thresholds stands on). Runs before this revision left no
findings behind, so the table starts empty: its history begins with the first run after the
upgrade.

Creates missed_case, empty: cases a screen should have flagged and did not, recorded by
reviewers (`cardiosieve review --missed`) for sensitivity estimates later.

Adds review.rule_version_at_review and review.tier_at_review, the item's rule version and tier
when the review was recorded. Existing reviews are backfilled from their item's current
rule_version and tier: the best the store knows, but not necessarily what the reviewer saw if
a run changed the item after the review (before this revision a rerun could rewrite a closed
item's rule_version). Row counts of review must match before and after, or the whole upgrade
rolls back.
"""
import sqlalchemy as sa
from alembic import op

from cardiosieve.pipeline.store import StoreSchemaError

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None

# The columns this revision touches, as they are at this revision (not store.metadata).
worklist_item = sa.table("worklist_item", sa.column("item_id", sa.String), sa.column("tier", sa.Integer),
                         sa.column("rule_version", sa.String))
review = sa.table("review", sa.column("item_id", sa.String), sa.column("rule_version_at_review", sa.String),
                  sa.column("tier_at_review", sa.Integer))


def _count(conn) -> int:
    return conn.execute(sa.select(sa.func.count()).select_from(review)).scalar()


def upgrade() -> None:
    conn = op.get_bind()
    before = _count(conn)
    op.create_table(
        "finding_history",
        sa.Column("history_id", sa.Integer, primary_key=True, autoincrement=True),
        sa.Column("run_id", sa.String(128), nullable=False),
        sa.Column("run_end_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("item_id", sa.String(40), sa.ForeignKey("worklist_item.item_id"), nullable=False),
        sa.Column("screen", sa.String(64), nullable=False),
        sa.Column("ecg_id", sa.Text, nullable=False),
        sa.Column("patient_id", sa.Text, nullable=False),
        sa.Column("acquired_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("tier", sa.Integer, nullable=False),
        sa.Column("rule_version", sa.String(64), nullable=False),
        sa.Column("summary", sa.Text),
        sa.Column("evidence", sa.Text),
        sa.Column("caveats", sa.Text),
        sa.Column("territories", sa.Text),
        sa.Column("score_parts", sa.Text),
        sa.CheckConstraint("tier BETWEEN 1 AND 4", name="ck_finding_history_tier"),
        sa.UniqueConstraint("run_id", "screen", "ecg_id", "rule_version", name="uq_finding_history_entry"),
    )
    op.create_index("ix_finding_history_item", "finding_history", ["item_id"])
    op.create_index("ix_finding_history_ecg", "finding_history", ["ecg_id"])
    op.create_table(
        "missed_case",
        sa.Column("missed_id", sa.Integer, primary_key=True, autoincrement=True),
        sa.Column("patient_id", sa.Text, nullable=False),
        sa.Column("ecg_id", sa.Text, nullable=False),
        sa.Column("screen", sa.String(64), nullable=False),
        sa.Column("recorded_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("reviewer_role", sa.String(128), nullable=False),
        sa.Column("note", sa.Text),
        sa.UniqueConstraint("ecg_id", "screen", name="uq_missed_case_entry"),
    )
    op.create_index("ix_missed_case_screen", "missed_case", ["screen"])
    op.add_column("review", sa.Column("rule_version_at_review", sa.String(64)))
    op.add_column("review", sa.Column("tier_at_review", sa.Integer))
    t, r = worklist_item, review
    of_item = t.c.item_id == r.c.item_id
    op.execute(sa.update(r).values(
        rule_version_at_review=sa.select(t.c.rule_version).where(of_item).scalar_subquery(),
        tier_at_review=sa.select(t.c.tier).where(of_item).scalar_subquery()))
    after = _count(conn)
    if after != before:
        raise StoreSchemaError(f"schema migration 3 -> 4 changed the row count of review {before} -> {after}: "
                               "rolled back")
    op.execute(sa.update(sa.table("cardiosieve_schema", sa.column("version", sa.Integer))).values(version=4))


def downgrade() -> None:
    raise NotImplementedError("the store has no downgrade: restore the backup taken before the upgrade")
