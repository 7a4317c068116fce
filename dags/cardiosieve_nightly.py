"""cardiosieve nightly screening: the Airflow DAG file to copy into a DAGs folder.

The DAG itself comes from the installed package (cardiosieve.dags.nightly.make_dag); its
settings from the CARDIOSIEVE_* environment variables. See docs/deploying-airflow.md.
"""
from cardiosieve.dags.nightly import make_dag

dag = make_dag()
