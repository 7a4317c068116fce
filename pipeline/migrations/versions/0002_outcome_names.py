"""Review outcomes renamed (schema version 2): confirmed -> finding_real, not_confirmed ->
finding_not_real. Staff read "confirmed" as a signed report.

Renames the stored reviews, the ck_review_outcome check (old set -> new set) and the
"reviewed: <outcome>" reason of closed items; row counts must match before and after, and no
old outcome may be left, or the whole upgrade rolls back. Creates cardiosieve_schema holding
version 2: the release before these migrations read its version there, and each later revision
sets it to its own number, so that release refuses a newer store instead of using it.
"""
import sqlalchemy as sa
from alembic import op

from cardiosieve.pipeline.store import StoreSchemaError

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None

RENAMED = {"confirmed": "finding_real", "not_confirmed": "finding_not_real"}
NEW_CHECK = "outcome IN ('finding_real', 'finding_not_real', 'already_known', 'data_problem')"
REASON = "reviewed: {}"   # status_reason of an item closed by a review

# The columns this revision touches, as they are at this revision (not store.metadata).
worklist_item = sa.table("worklist_item", sa.column("status_reason", sa.Text))
review = sa.table("review", sa.column("outcome", sa.String))


def _row_counts(conn) -> dict:
    return {t.name: conn.execute(sa.select(sa.func.count()).select_from(t)).scalar() for t in (worklist_item, review)}


def upgrade() -> None:
    conn = op.get_bind()
    before = _row_counts(conn)
    # SQLite cannot alter a CHECK constraint: batch mode rebuilds the table (new table, every row
    # copied with its review_id, old one dropped, renamed, indexes recreated); PostgreSQL alters
    # it in place. The old check refuses the new names and the new one the old names, so the
    # check is dropped, the rows renamed, then the new check added.
    with op.batch_alter_table("review") as batch:
        batch.drop_constraint("ck_review_outcome", type_="check")
    op.execute(sa.update(review).where(review.c.outcome.in_(list(RENAMED)))
               .values(outcome=sa.case(RENAMED, value=review.c.outcome)))
    with op.batch_alter_table("review") as batch:
        batch.create_check_constraint("ck_review_outcome", sa.text(NEW_CHECK))
    reasons = {REASON.format(old): REASON.format(new) for old, new in RENAMED.items()}
    op.execute(sa.update(worklist_item).where(worklist_item.c.status_reason.in_(list(reasons)))
               .values(status_reason=sa.case(reasons, value=worklist_item.c.status_reason)))

    after = _row_counts(conn)
    if after != before:
        raise StoreSchemaError(f"schema migration 1 -> 2 changed row counts {before} -> {after}: rolled back")
    left = conn.execute(sa.select(sa.func.count()).select_from(review)
                        .where(review.c.outcome.in_(list(RENAMED)))).scalar()
    if left:
        raise StoreSchemaError(f"schema migration 1 -> 2 left {left} review row(s) with old outcomes: rolled back")

    schema = op.create_table(
        "cardiosieve_schema",
        sa.Column("id", sa.Integer, primary_key=True, autoincrement=False),
        sa.Column("version", sa.Integer, nullable=False),
        sa.CheckConstraint("id = 1", name="ck_cardiosieve_schema_one_row"),
    )
    op.execute(sa.insert(schema).values(id=1, version=2))


def downgrade() -> None:
    raise NotImplementedError("the store has no downgrade: restore the backup taken before the upgrade")
