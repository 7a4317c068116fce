"""Baseline: the store as cardiosieve made it before schema versioning (schema version 1).

Tables worklist_item and review, outcomes confirmed / not_confirmed. Written out here, frozen,
not read from store.metadata: this revision must keep creating what the first release created.
A store made by that release is recognised (it has these tables and no version table) and
stamped at this revision without running it.
"""
import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "worklist_item",
        sa.Column("item_id", sa.String(40), primary_key=True),
        sa.Column("rank", sa.Integer),
        sa.Column("tier", sa.Integer, nullable=False),
        sa.Column("screen", sa.String(64), nullable=False),
        sa.Column("patient_id", sa.Text, nullable=False),
        sa.Column("ecg_id", sa.Text, nullable=False),
        sa.Column("ecg_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("score", sa.Float, nullable=False),
        sa.Column("summary", sa.Text),
        sa.Column("evidence", sa.Text),
        sa.Column("caveats", sa.Text),
        sa.Column("territories", sa.Text),
        sa.Column("rule_version", sa.String(64)),
        sa.Column("run_id", sa.String(128)),
        sa.Column("first_flagged_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("status", sa.String(16), nullable=False),
        sa.Column("last_updated_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("status_reason", sa.Text),
        sa.Column("episode_start", sa.DateTime(timezone=True), nullable=False),
        sa.Column("episode_end", sa.DateTime(timezone=True), nullable=False),
        sa.Column("other_ecg_ids", sa.Text),
        sa.Column("score_parts", sa.Text),
        sa.CheckConstraint("status IN ('open', 'reopened', 'explained', 'closed')", name="ck_worklist_item_status"),
        sa.CheckConstraint("tier BETWEEN 1 AND 4", name="ck_worklist_item_tier"),
    )
    op.create_index("ix_worklist_item_patient_screen", "worklist_item", ["patient_id", "screen"])
    op.create_index("ix_worklist_item_rank", "worklist_item", ["rank"])
    op.create_table(
        "review",
        sa.Column("review_id", sa.Integer, primary_key=True, autoincrement=True),
        sa.Column("item_id", sa.String(40), sa.ForeignKey("worklist_item.item_id"), nullable=False),
        sa.Column("reviewed_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("reviewer_role", sa.String(128), nullable=False),
        sa.Column("outcome", sa.String(16), nullable=False),
        sa.Column("note", sa.Text),
        sa.Column("recorded_via", sa.String(16), nullable=False),
        sa.CheckConstraint("outcome IN ('confirmed', 'not_confirmed', 'already_known', 'data_problem')",
                           name="ck_review_outcome"),
        sa.UniqueConstraint("item_id", "reviewed_at", "reviewer_role", name="uq_review_entry"),
    )
    op.create_index("ix_review_item", "review", ["item_id"])


def downgrade() -> None:
    raise NotImplementedError("the store has no downgrade: restore the backup taken before the upgrade")
