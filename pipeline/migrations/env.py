"""Alembic environment of the worklist store (pipeline/store.py runs it; there is no alembic.ini).

Migrations run on the connection the store passes in config.attributes["connection"], inside
the store's schema transaction and under its lock (SQLite BEGIN IMMEDIATE, a PostgreSQL advisory
lock): every step, the version row included, commits together or not at all. The revision is
kept in store.VERSION_TABLE, not Alembic's default alembic_version, which another application
using Alembic in the same database would own.
"""
from alembic import context

from cardiosieve.pipeline.store import VERSION_TABLE, metadata

connection = context.config.attributes.get("connection")
if connection is None:
    raise RuntimeError("the store's migrations run on a connection given by cardiosieve "
                       "(open_store, `cardiosieve db upgrade`), not from the alembic command")
context.configure(connection=connection, target_metadata=metadata, version_table=VERSION_TABLE,
                  render_as_batch=True)
with context.begin_transaction():   # joins the caller's transaction: commits nothing itself
    context.run_migrations()
