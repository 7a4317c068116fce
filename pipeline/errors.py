"""The one base class of bad-input errors (standard library only: the CLI imports it at start-up).

A BadInputError means the input or the configuration is wrong, so running again unchanged
cannot help: the CLI exits 2 with its one-line message, the Airflow DAG fails the task without
retrying it. Each stage raises its own subclass (ConfigError, ContractError, LakeError, RunError,
QualityGateError, StoreSchemaError, StoreUrlError, StoreLockedError), whose message names files,
tables, columns, checks and counts only, never a row value. An I/O error of the system (OSError
with errno) is not one.
"""
from __future__ import annotations


class BadInputError(ValueError):
    """The input or configuration is unusable; the message says what and where, never a row value."""
