"""`rank` is the place in the review queue (schema version 3).

Before, every stored item held a global rank, explained and closed ones after the active ones,
and each night's upsert and each review rewrote the rank of every row in the store: a cost that
grew with the store's history. From this revision the active items (open, reopened) hold ranks
1 to n and an explained or closed item, which has left the queue, holds none (NULL); listings
put those after the queue in the same order as before (worklist.queue_order). Indexes on status
and run_id let ranking and the night's read-back touch the queue and the run's items only.

Sets the rank of the explained and closed items to NULL, re-ranks the active items 1 to n in
queue order, and adds the two indexes. Row counts must match before and after, or the whole
upgrade rolls back.
"""
import sqlalchemy as sa
from alembic import op

from cardiosieve.pipeline.store import StoreSchemaError

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None

ACTIVE = ("open", "reopened")

# The columns this revision touches, as they are at this revision (not store.metadata).
worklist_item = sa.table("worklist_item", sa.column("item_id", sa.String), sa.column("rank", sa.Integer),
                         sa.column("status", sa.String), sa.column("tier", sa.Integer),
                         sa.column("score", sa.Float), sa.column("ecg_at", sa.DateTime))


def _count(conn) -> int:
    return conn.execute(sa.select(sa.func.count()).select_from(worklist_item)).scalar()


def upgrade() -> None:
    conn = op.get_bind()
    before = _count(conn)
    t = worklist_item
    active = t.c.status.in_(ACTIVE)
    op.execute(sa.update(t).where(~active).values(rank=None))
    rn = sa.func.row_number().over(order_by=[t.c.tier, t.c.score.desc(), t.c.ecg_at.desc(), t.c.item_id])
    ordered = sa.select(t.c.item_id.label("ordered_id"), rn.label("rn")).where(active).subquery("ordered")
    op.execute(sa.update(t).where(t.c.item_id == ordered.c.ordered_id).values(rank=ordered.c.rn))
    op.create_index("ix_worklist_item_status", "worklist_item", ["status"])
    op.create_index("ix_worklist_item_run_id", "worklist_item", ["run_id"])
    after = _count(conn)
    if after != before:
        raise StoreSchemaError(f"schema migration 2 -> 3 changed the row count of worklist_item {before} -> {after}: "
                               "rolled back")
    op.execute(sa.update(sa.table("cardiosieve_schema", sa.column("version", sa.Integer))).values(version=3))


def downgrade() -> None:
    raise NotImplementedError("the store has no downgrade: restore the backup taken before the upgrade")
