"""Benchmark: loading and alignment, pandas (the chosen path) against DuckDB SQL over Parquet.

    .venv/bin/python bench/align.py [--patients 60000] [--days 365] [--lake /tmp/cs-bench-1y]

Generates (once, cached by folder) a lake with the sample-lake generator, then prints seconds
and peak memory for:
  1. one night, load + align, in a fresh process (start-up and imports included);
  2. the same night on a lake with three times the history and the same nightly volume
     (flatness beyond the look-backs);
  3. a 30-day backfill: pandas path vs an equivalent DuckDB SQL (ASOF JOINs), alternating, median of 3.
A benchmark, not a test: figures go to docs/performance.md by hand.
"""
from __future__ import annotations

import argparse
import statistics
from pathlib import Path

from _common import ensure_lake, even_patients, run_json

NIGHT_CODE = """
import json, resource, sys, time
t0 = time.perf_counter()
from cardiosieve.pipeline.run import stage_load, stage_align
lake, out, start, end, config = sys.argv[1:6]
t1 = time.perf_counter()
loaded = stage_load(lake, out, start, end, config=config or None)
t2 = time.perf_counter()
aligned = stage_align(out, start, end, config=config or None, lake=lake)
t3 = time.perf_counter()
print(json.dumps({"import_s": t1 - t0, "load_s": t2 - t1, "align_s": t3 - t2, "ecgs": aligned["aligned"],
                  "lab_rows": loaded["tables"]["lab"]["rows_in"], "history_rows": loaded["tables"]["ecg_history"]["rows_in"],
                  "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""

DUCKDB_CODE = r"""
import json, resource, sys, time
t0 = time.perf_counter()
import duckdb
lake, start, end = sys.argv[1:4]
con = duckdb.connect()
con.execute("SET TimeZone='UTC'")
con.execute("SET enable_progress_bar=false")
sql = f'''
WITH e AS (SELECT ecg_id, patient_id, acquired_at FROM read_parquet('{lake}/ecg/*/*.parquet', hive_partitioning=false)
           WHERE acquired_at >= TIMESTAMPTZ '{start}' AND acquired_at < TIMESTAMPTZ '{end}'),
hist AS (SELECT ecg_id, patient_id, acquired_at, qrs_ms, qt_ms FROM read_parquet('{lake}/ecg/*/*.parquet', hive_partitioning=false)
         WHERE acquired_at >= TIMESTAMPTZ '{start}' - INTERVAL 366 DAY AND acquired_at < TIMESTAMPTZ '{end}'),
l AS (SELECT patient_id, collected_at, analyte, value, result_id FROM read_parquet('{lake}/lab/*/*.parquet', hive_partitioning=false)
      WHERE collected_at >= TIMESTAMPTZ '{start}' - INTERVAL 96 HOUR AND collected_at < TIMESTAMPTZ '{end}' + INTERVAL 6 HOUR
        AND analyte IN ('2823-3', '6298-4', '19123-9', '2601-3', '17861-6', '2000-8')),
k AS (SELECT * FROM l WHERE analyte IN ('2823-3', '6298-4')),
kb AS (SELECT e.ecg_id, k.value AS kb, k.collected_at AS kb_at FROM e ASOF LEFT JOIN k
       ON e.patient_id = k.patient_id AND e.acquired_at >= k.collected_at),
kf AS (SELECT e.ecg_id, k.value AS kf, k.collected_at AS kf_at FROM e ASOF LEFT JOIN k
       ON e.patient_id = k.patient_id AND e.acquired_at <= k.collected_at),
p AS (SELECT e.ecg_id, h.ecg_id AS prior_ecg_id, h.qrs_ms AS prior_qrs_ms FROM e ASOF LEFT JOIN hist h
      ON e.patient_id = h.patient_id AND e.acquired_at - INTERVAL 1 HOUR >= h.acquired_at)
SELECT e.ecg_id,
  CASE WHEN kb_at >= e.acquired_at - INTERVAL 24 HOUR AND (kf_at IS NULL OR kf_at > e.acquired_at + INTERVAL 6 HOUR
            OR e.acquired_at - kb_at <= kf_at - e.acquired_at) THEN kb
       WHEN kf_at <= e.acquired_at + INTERVAL 6 HOUR THEN kf END AS k_mmol_l,
  prior_ecg_id, prior_qrs_ms
FROM e JOIN kb USING (ecg_id) JOIN kf USING (ecg_id) JOIN p USING (ecg_id)
'''
df = con.execute(sql).df()
t1 = time.perf_counter()
print(json.dumps({"total_s": t1 - t0, "ecgs": len(df), "with_k": int(df["k_mmol_l"].notna().sum()),
                  "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--patients", type=int, default=60000)
    ap.add_argument("--days", type=int, default=365)
    ap.add_argument("--end", default="2026-11-30")
    ap.add_argument("--lake", default="/tmp/cs-bench-1y")
    ap.add_argument("--long-lake", default="/tmp/cs-bench-3y-even")
    ap.add_argument("--skip-long", action="store_true")
    args = ap.parse_args()
    lake = Path(args.lake)
    config = ensure_lake(lake, args.patients, args.days, args.end)
    night = ("2026-11-29T00:00:00Z", "2026-11-30T00:00:00Z")
    print(f"lake {lake} ({args.patients} patients, {args.days} days)")

    nights = [run_json(NIGHT_CODE, lake, "/tmp/cs-bench-out", *night, config) for _ in range(3)]
    med = statistics.median(n["wall_s"] for n in nights)
    n0 = nights[-1]
    print(f"one night, load+align, fresh process: median wall {med:.2f} s "
          f"(imports {n0['import_s']:.2f}, load {n0['load_s']:.2f}, align {n0['align_s']:.2f}); "
          f"{n0['ecgs']} ECGs, {n0['lab_rows']} lab rows, {n0['history_rows']} prior ECGs; peak {n0['peak_mb']:.0f} MB")

    duck = [run_json(DUCKDB_CODE, lake, *night) for _ in range(3)]
    print(f"one night, DuckDB SQL over the Parquet files: median wall "
          f"{statistics.median(n['wall_s'] for n in duck):.2f} s; {duck[-1]['ecgs']} ECGs")

    if not args.skip_long:
        long_lake = Path(args.long_lake)
        ensure_lake(long_lake, even_patients(args.patients, args.days, args.days * 3), args.days * 3, args.end)
        longs = [run_json(NIGHT_CODE, long_lake, "/tmp/cs-bench-out-long", *night, config) for _ in range(3)]
        print(f"same night on a lake with {args.days * 3} days of history: median wall "
              f"{statistics.median(n['wall_s'] for n in longs):.2f} s (load {longs[-1]['load_s']:.2f}, "
              f"align {longs[-1]['align_s']:.2f}); {longs[-1]['ecgs']} ECGs")
        duck = [run_json(DUCKDB_CODE, long_lake, *night) for _ in range(3)]
        print(f"same night, DuckDB SQL (globs every partition): median wall "
              f"{statistics.median(n['wall_s'] for n in duck):.2f} s; {duck[-1]['ecgs']} ECGs")

    backfill = ("2026-10-31T00:00:00Z", "2026-11-30T00:00:00Z")
    ours, theirs = [], []
    for _ in range(3):                      # alternate, median of 3
        ours.append(run_json(NIGHT_CODE, lake, "/tmp/cs-bench-out-30d", *backfill, config))
        theirs.append(run_json(DUCKDB_CODE, lake, *backfill))
    o, d = statistics.median(r["wall_s"] for r in ours), statistics.median(r["wall_s"] for r in theirs)
    print(f"30-day backfill, load+align: cardiosieve {o:.2f} s (peak {ours[-1]['peak_mb']:.0f} MB, "
          f"{ours[-1]['ecgs']} ECGs) vs DuckDB SQL {d:.2f} s (peak {theirs[-1]['peak_mb']:.0f} MB, "
          f"{theirs[-1]['ecgs']} ECGs); ratio {o / d:.2f}")


if __name__ == "__main__":
    main()
