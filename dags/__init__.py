"""cardiosieve's scheduler wiring: cardiosieve.dags.nightly holds make_dag(), the nightly DAG.

This package itself imports nothing, so that `import cardiosieve.dags` works where the scheduler
extra is not installed; only cardiosieve.dags.nightly needs it.
"""
