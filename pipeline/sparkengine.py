"""The backfill on Apache Spark (`cardiosieve backfill --engine spark`): the same job as
run.run_interval, its rows spread over the executors by patient.

1. Spark reads the lake's date partitions the interval needs (its look-back windows included),
   one read per table and file schema, and writes every row again under
   OUT/_spark/rows/<table>/g<group>/_bucket=<b>/_src=<file>/, where b is
   pmod(hash(patient_id), buckets). A lead row takes its ECG's bucket. Patients who share an
   ECG id or a lab result id across buckets all go to bucket 0, so that the contract's duplicate
   check sees every copy, as it does on one machine; a row with no patient id goes to bucket 0.
2. Each bucket's files, linked into a lake of the usual layout (OUT/_spark/lake/b<b>/), run
   the local stages unchanged, every chunk of the interval in time order, in one
   `groupBy("bucket").applyInPandas` task: stage_load, the gate's row checks, stage_align and
   stage_screen (pipeline/run.py). A bucket holds every row of its patients, so each look-back
   window sees the same rows whichever bucket or date they sit in.
3. The driver puts each chunk's bucket outputs together in the chunk's stage folder (rejects name
   the lake's own files again), then runs the rest as run_interval does: the quality gate's
   verdict over the whole chunk (Great Expectations and the lake's volume checks), the worklist
   fold and store upsert, and the publish.

No rule is implemented twice: the buckets call the local stages and the screens, and the
driver the local worklist and store. pyspark is imported here only; the nightly path never
imports this module (tests/test_cli.py). Sizing and measurements: docs/scale-out.md.
"""
from __future__ import annotations

import json
import logging
import os
import shutil
import sys
import time
from pathlib import Path
from urllib.parse import unquote, urlparse

import pandas as pd

from cardiosieve.pipeline import contract as c
from cardiosieve.pipeline.config import Settings, load_settings
from cardiosieve.pipeline.errors import BadInputError
from cardiosieve.pipeline.files import private_dir, write_parquet_atomic

log = logging.getLogger(__name__)

SPARK_DIR = "_spark"          # under OUT; removed when the run ends, and before a new one starts
DEFAULT_BUCKETS = 8
DEFAULT_MASTER = "local[2]"
CONFLICT_BUCKET = 0
# Stage files the buckets write that hold rejects: their `file` column names the lake's files.
REJECT_FILES = ("rejects.parquet", "rejects_quality.parquet", "rejects_prior_lead.parquet")
# Stage files the driver writes itself (the gate's report and the worklist), never gathered.
DRIVER_FILES = ("worklist.parquet",)


class SparkEngineError(BadInputError):
    """A bucket stopped on bad input (the lake, the contract, the config): exit 2, as locally."""


# ---------------------------------------------------------------------------------------------
# What the interval reads

def read_days(settings: Settings, lo: pd.Timestamp, hi: pd.Timestamp) -> dict[str, tuple[str, str] | None]:
    """Per table, the first and last date partition the local stages can read for [lo, hi)
    (run.stage_load's windows with each table's partition slack), one day wider each side; None
    for a table read whole (patient). Reading a partition more than needed changes nothing: the
    loader lists its own partitions in each bucket's lake."""
    w = settings.windows
    h = pd.Timedelta(hours=1)
    ecg = (lo - pd.Timedelta(days=w["prior_ecg_max_days"]), hi)
    spans = {
        c.ECG.name: ecg,
        c.ECG_LEAD.name: (ecg[0] - pd.Timedelta(days=1), ecg[1] + pd.Timedelta(days=1)),   # run._with_slack
        c.LAB.name: (lo - (w["lab_before_h"] + w["k_trend_h"]) * h, hi + w["lab_after_h"] * h),
        c.MEDICATION.name: (lo - w["medication_h"] * h, hi),
    }
    out: dict[str, tuple[str, str] | None] = {c.PATIENT.name: None}
    for name, (a, b) in spans.items():
        slack = pd.Timedelta(days=c.TABLES[name].partition_slack_days + 1)
        out[name] = ((a - slack).strftime("%Y-%m-%d"), (b + slack).strftime("%Y-%m-%d"))
    return out


def _site_column(settings: Settings, table: c.Table, contract_name: str, names: list[str]) -> str | None:
    """The file's name for a contract column (the site's [columns] mapping), None if absent."""
    for site, contract in settings.columns.get(table.name, {}).items():
        if contract == contract_name and site in names:
            return site
    return contract_name if contract_name in names else None


# ---------------------------------------------------------------------------------------------
# 1. Spark spreads the lake's rows over the buckets

def spark_session(master: str, app: str = "cardiosieve-backfill"):
    """A SparkSession for `master`; the Python workers run this interpreter, so that they import
    the same cardiosieve and pandas. Timestamps are written as microseconds with their UTC flag
    kept, as the lake's own files hold them (pyarrow reads them back to the same types)."""
    os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
    os.environ.setdefault("PYSPARK_DRIVER_PYTHON", sys.executable)
    from pyspark.sql import SparkSession

    builder = (SparkSession.builder.master(master).appName(app)
               .config("spark.sql.session.timeZone", "UTC")
               .config("spark.sql.parquet.outputTimestampType", "TIMESTAMP_MICROS")
               .config("spark.sql.parquet.inferTimestampNTZ.enabled", "true")
               .config("spark.sql.sources.partitionColumnTypeInference.enabled", "false")
               .config("spark.sql.execution.arrow.pyspark.enabled", "true")
               .config("spark.ui.enabled", "false")
               .config("spark.sql.shuffle.partitions", "8"))
    spark = builder.getOrCreate()
    spark.sparkContext.setLogLevel("ERROR")
    return spark


class _Group:
    """One Spark read: the files of one table that share a schema."""

    def __init__(self, table: c.Table, index: int, files: list[Path], names: list[str]):
        self.table, self.index, self.files, self.names = table, index, files, names


def _groups(lake, settings: Settings, days: dict) -> list[_Group]:
    from cardiosieve.pipeline.load import _schema_groups, table_files

    groups = []
    for name, table in c.TABLES.items():
        if not (Path(lake) / name).is_dir():
            if table.optional:
                continue
            table_files(lake, table)           # the loader's own error for a missing table folder
        span = days[name]
        files = table_files(lake, table, *(span or (None, None)))   # LakeError on a misnamed folder
        for k, (schema, group) in enumerate(_schema_groups(files)):
            groups.append(_Group(table, k, group, list(schema.names)))
    return groups


def _read(spark, g: _Group):
    """The group's rows with `_src`, the index of the lake file each came from."""
    from pyspark.sql import functions as F

    df = spark.read.parquet(*[str(f) for f in g.files]).withColumn("_file", F.input_file_name())
    seen = [r[0] for r in df.select("_file").distinct().collect()]
    index = {str(Path(f).resolve()): i for i, f in enumerate(g.files)}
    pairs = []
    for uri in seen:
        pairs += [F.lit(uri), F.lit(index[str(Path(unquote(urlparse(uri).path)).resolve())])]
    return df.withColumn("_src", F.create_map(*pairs)[F.col("_file")] if pairs else F.lit(0)).drop("_file")


def _patient_bucket(df, column: str | None, n: int):
    from pyspark.sql import functions as F

    if column is None:
        return df.withColumn("_b0", F.lit(CONFLICT_BUCKET))
    pid = F.col(column).cast("string")
    return df.withColumn("_pid", pid).withColumn(
        "_b0", F.when(pid.isNull(), F.lit(CONFLICT_BUCKET)).otherwise(F.pmod(F.hash(pid), F.lit(n))))


def split_lake(spark, lake, work: Path, settings: Settings, lo, hi, n: int) -> dict[str, str]:
    """Write the interval's lake rows by bucket (module docstring, step 1) and link each bucket's
    files into a lake of the usual layout under work/lake/b<b>/. Returns each linked file's
    path mapped to the lake file it came from."""
    from pyspark.sql import functions as F

    groups = _groups(lake, settings, read_days(settings, lo, hi))
    frames = {}
    for g in groups:
        df = _read(spark, g)
        pid = _site_column(settings, g.table, "patient_id", g.names)
        frames[id(g)] = _patient_bucket(df, pid, n) if g.table is not c.ECG_LEAD else df

    # Patients who share an ECG id or a lab result id across buckets: all of them to bucket 0.
    shared = None
    for table, key in ((c.ECG, "ecg_id"), (c.LAB, "result_id")):
        keys = None
        for g in groups:
            col = _site_column(settings, g.table, key, g.names)
            if g.table is table and col is not None and "_pid" in frames[id(g)].columns:
                k = frames[id(g)].select(F.col(col).cast("string").alias("_id"), "_pid", "_b0")
                keys = k if keys is None else keys.unionByName(k)
        if keys is None:
            continue
        conflict = keys.dropna(subset=["_id"]).groupBy("_id").agg(F.countDistinct("_b0").alias("_nb")) \
                       .where("_nb > 1").select("_id")
        pids = keys.join(conflict, "_id").select("_pid").dropna().distinct()
        shared = pids if shared is None else shared.unionByName(pids).distinct()
    shared = shared.withColumn("_shared", F.lit(True)) if shared is not None else None

    def final(df):
        if shared is None or "_pid" not in df.columns:
            return df.withColumn("_bucket", F.col("_b0"))
        df = df.join(F.broadcast(shared), "_pid", "left")
        return df.withColumn("_bucket", F.when(F.col("_shared"), F.lit(CONFLICT_BUCKET)).otherwise(F.col("_b0")))

    for g in groups:
        if g.table is not c.ECG_LEAD:
            frames[id(g)] = final(frames[id(g)])
    ecg_bucket = None                                        # ECG id -> its (one) bucket
    for g in groups:
        col = _site_column(settings, g.table, "ecg_id", g.names)
        if g.table is c.ECG and col is not None:
            k = frames[id(g)].select(F.col(col).cast("string").alias("_eid"), F.col("_bucket").alias("_eb"))
            ecg_bucket = k if ecg_bucket is None else ecg_bucket.unionByName(k)
    if ecg_bucket is not None:
        ecg_bucket = ecg_bucket.dropna(subset=["_eid"]).dropDuplicates(["_eid"])
    for g in groups:
        if g.table is c.ECG_LEAD:
            df = frames[id(g)]
            col = _site_column(settings, g.table, "ecg_id", g.names)
            if ecg_bucket is None or col is None:
                frames[id(g)] = df.withColumn("_bucket", F.lit(CONFLICT_BUCKET))
            else:
                df = df.withColumn("_eid", F.col(col).cast("string")).join(ecg_bucket, "_eid", "left")
                frames[id(g)] = df.withColumn("_bucket", F.coalesce(F.col("_eb"), F.lit(CONFLICT_BUCKET)))

    rows = work / "rows"
    for g in groups:
        target = rows / g.table.name / f"g{g.index}"
        frames[id(g)].select(*[F.col(f"`{x}`") for x in g.names], "_bucket", "_src") \
            .write.mode("overwrite").partitionBy("_bucket", "_src").parquet(str(target))
    return _link_buckets(lake, work, groups, n)


def _link_buckets(lake, work: Path, groups: list[_Group], n: int) -> dict[str, str]:
    from cardiosieve.pipeline.load import file_day

    sources: dict[str, str] = {}
    for b in range(n):
        for name in c.TABLES:
            if (Path(lake) / name).is_dir():
                (work / "lake" / f"b{b}" / name).mkdir(parents=True, exist_ok=True)
    for g in groups:
        base = work / "rows" / g.table.name / f"g{g.index}"
        for part in sorted(base.glob("_bucket=*/_src=*/*.parquet")):
            b = int(part.parent.parent.name.split("=", 1)[1])
            src = g.files[int(part.parent.name.split("=", 1)[1])]
            day = file_day(lake, g.table, src)
            folder = work / "lake" / f"b{b}" / g.table.name
            if day is not None:
                folder = folder / f"date={day}"
            folder.mkdir(parents=True, exist_ok=True)
            link = folder / f"g{g.index}-s{part.parent.name.split('=', 1)[1]}-{part.name}"
            link.symlink_to(part.resolve())
            sources[str(link)] = str(src)
    return sources


# ---------------------------------------------------------------------------------------------
# 2. Each bucket runs the local stages

def _bucket_task(work: str, config, chunks: list[tuple[str, str]], quality: bool):
    """The applyInPandas function: every chunk of one bucket through the local stages. Returns
    the bucket's chunk summaries, or the bad-input error that stopped it (its message names
    files and columns, never rows: pipeline/errors.py)."""
    def task(key, pdf: pd.DataFrame) -> pd.DataFrame:
        from cardiosieve.pipeline import run

        b = int(key[0])
        logging.getLogger("cardiosieve").setLevel(logging.WARNING)
        lake, out = Path(work) / "lake" / f"b{b}", Path(work) / "out" / f"b{b}"
        try:
            settings = load_settings(config)
            parts = []
            for a, z in chunks:
                part = {"tables": run.stage_load(lake, out, a, z, settings=settings)["tables"]}
                if quality:
                    run.stage_row_checks(lake, out, a, z, settings=settings, always=True)
                part["aligned"] = run.stage_align(out, a, z, settings=settings, lake=lake)
                part["findings"] = run.stage_screen(out, a, z, settings=settings)["by_screen_tier"]
                parts.append(part)
            result = {"parts": parts}
        except BadInputError as exc:
            result = {"error": str(exc)}
        return pd.DataFrame({"bucket": [b], "result": [json.dumps(result)]})
    return task


def run_buckets(spark, work: Path, config, chunks, n: int, quality: bool) -> list[list[dict]]:
    """Every bucket through the local stages (one task each); per bucket, its chunk summaries."""
    keys = spark.createDataFrame([(b,) for b in range(n)], "bucket int").repartition(n, "bucket")
    rows = keys.groupBy("bucket").applyInPandas(_bucket_task(str(work), config, chunks, quality),
                                                schema="bucket int, result string").collect()
    results = {int(r["bucket"]): json.loads(r["result"]) for r in rows}
    errors = sorted({r["error"] for r in results.values() if "error" in r})
    if errors:
        raise SparkEngineError(_unlink_paths(errors[0], work))
    return [results[b]["parts"] for b in range(n)]


def _unlink_paths(message: str, work: Path) -> str:
    """A bucket's message with its own lake's folder named as the lake (so the operator is sent
    to the lake, not to the work folder)."""
    return message.replace(str(work / "lake") + os.sep, "lake bucket ")


# ---------------------------------------------------------------------------------------------
# 3. The driver gathers each chunk

def gather_chunk(out, work: Path, lo, hi, n: int, sources: dict[str, str]) -> None:
    """The chunk's stage folder as the local engine would have written it: each stage file the
    concatenation of the buckets' (a checked table from each bucket's checked or loaded file), the
    rejects naming the lake's own files, aligned ECGs and the criterion tables in align()'s order."""
    from cardiosieve.pipeline.run import CHECKED_TABLES, read_stage, stage_dir

    d = stage_dir(out, lo, hi)
    for stale in d.glob("*"):
        if stale.is_file():
            stale.unlink()
    dirs = [stage_dir(work / "out" / f"b{b}", lo, hi) for b in range(n)]
    names = sorted({p.name for x in dirs for p in x.glob("*.parquet")} - set(DRIVER_FILES))
    checked = {nm.split(".")[0] for nm in names if nm.endswith(".checked.parquet")}
    order = pd.Series(dtype="int64")
    for name in names:
        table = name.split(".")[0]
        if name.endswith(".checked.parquet"):
            parts = [read_stage(x, table) for x in dirs]
        else:
            parts = [pd.read_parquet(x / name) for x in dirs if (x / name).exists()]
        df = _concat([p for p in parts if p is not None])
        if name in REJECT_FILES and len(df):
            df["file"] = df["file"].map(lambda f: sources.get(f, f)).astype(df["file"].dtype)
        if name == "aligned.parquet":
            df = df.sort_values("ecg_id", kind="stable", ignore_index=True)     # as align() orders it
            order = pd.Series(range(len(df)), index=df["ecg_id"])
        elif name.startswith("criteria_") and len(df):     # one row per aligned ECG, in its order
            df = df.iloc[order.reindex(df["ecg_id"]).argsort(kind="stable")].reset_index(drop=True)
        write_parquet_atomic(df, d / name)
    assert checked <= set(CHECKED_TABLES)


def _concat(parts: list[pd.DataFrame]) -> pd.DataFrame:
    full = [p for p in parts if len(p)]
    if not full:
        return parts[0]
    return pd.concat(full, ignore_index=True) if len(full) > 1 else full[0].reset_index(drop=True)


def _chunk_summary(parts: list[dict]) -> dict:
    """The buckets' summaries of one chunk added up (run._add_up); `files` counts the files the
    buckets read, Spark's, not the lake's, and is left out."""
    from cardiosieve.pipeline.run import _add_up

    total = _add_up(parts)
    for t in total.get("tables", {}).values():
        t.pop("files", None)
    return total


def run_spark_interval(lake, out, start, end, config=None, db=None, master: str = DEFAULT_MASTER,
                       buckets: int = DEFAULT_BUCKETS, quality: bool = True, spark=None) -> dict:
    """run.run_interval's job on Spark (module docstring); returns and publishes the same
    summary, with `engine`. `spark`: a session to use; else the process's active session, else
    one for `master`, stopped at the end."""
    from cardiosieve.pipeline import run
    from cardiosieve.pipeline.publish import clean_leftovers
    from cardiosieve.pipeline.runlock import run_lock
    from cardiosieve.pipeline.store import check_store_url, sqlite_url

    if buckets < 1:
        raise run.RunError("--buckets must be at least 1")
    settings = load_settings(config)
    lo, hi = run.interval(start, end)
    out = run.usable_out(out)
    check_store_url(db or sqlite_url(out))
    bounds = run.chunk_bounds(lake, lo, hi)
    chunks = list(zip(bounds[:-1], bounds[1:]))
    backfill = len(bounds) > 2 or hi - lo > run.BACKFILL_AFTER
    work = out / SPARK_DIR
    t0 = time.perf_counter()
    with run_lock(out, db or sqlite_url(out)):
        clean_leftovers(out)
        shutil.rmtree(work, ignore_errors=True)
        private_dir(work)
        if spark is None:                  # the process's session if it has one (tests), else our own
            from pyspark.sql import SparkSession
            active = SparkSession.getActiveSession()
            own, spark = active is None, active or spark_session(master)
        else:
            own = False
        try:
            sources = split_lake(spark, lake, work, settings, lo, hi, buckets)
            t_split = time.perf_counter()
            per_bucket = run_buckets(spark, work, config, [(a.isoformat(), z.isoformat()) for a, z in chunks],
                                     buckets, quality)
            t_buckets = time.perf_counter()
            parts = []
            for k, (a, z) in enumerate(chunks):
                gather_chunk(out, work, a, z, buckets, sources)
                part = _chunk_summary([p[k] for p in per_bucket])
                part["tables"]["ecg"]["screened"] = part["aligned"]["aligned"]
                if quality:
                    part["quality"] = run.stage_gate_verdict(lake, out, a, z, settings=settings)
                last = k + 1 == len(chunks)
                earlier = [run.chunk_run_id(x, y) for x, y in chunks[:k]] if last else []
                part["worklist"] = run.stage_worklist(out, a, z, db=db, settings=settings, earlier_run_ids=earlier,
                                                      write=last, backfill=backfill)
                parts.append(part)
            seconds = {"spread": round(t_split - t0, 3), "buckets": round(t_buckets - t_split, 3),
                       "driver": round(time.perf_counter() - t_buckets, 3)}
            summary = run._add_up(parts) | {"chunks": len(parts), "seconds": seconds,
                                           "engine": {"name": "spark", "master": spark.sparkContext.master,
                                                      "buckets": buckets}}
            summary = run.stage_finish(out, lo, hi, summary, settings, bounds)
        finally:
            if own:
                spark.stop()
            shutil.rmtree(work, ignore_errors=True)
    log.info("spark backfill [%s, %s) published in %.1f s", lo.isoformat(), hi.isoformat(), time.perf_counter() - t0)
    return summary
