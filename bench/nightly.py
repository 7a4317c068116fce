"""End-to-end benchmark: the nightly job (load, quality gate, align, screen, rank and write).

    .venv/bin/python bench/nightly.py [--skip-long] [--skip-network]

Generates lakes with the sample-lake generator under /tmp (cached by folder), then prints, for
each measurement, wall seconds (fresh process: start-up and imports included), seconds per stage
and peak memory (max RSS):
  1. one night on a 1-year lake (~200,000 ECGs, ~3 million lab rows);
  2. the same night on a lake with 3 years of history and the same nightly volume (flatness
     beyond the look-back windows);
  3. a 30-day backfill, and the same against the DuckDB SQL a skilled analyst would write for the
     potassium alignment and the hyperkalaemia rule, alternating, median of 3;
  4. a 1-year backfill of a hospital network (~800,000 ECGs, ~12 million lab rows), with DuckDB.
A benchmark, not a test: its figures go to docs/performance.md by hand.
"""
from __future__ import annotations

import argparse
import shutil
import statistics
from pathlib import Path

from _common import ensure_lake, even_patients, run_json

# As `cardiosieve run` does: the quality gate's worker first (pipeline/gateworker.py), then the job.
RUN_CODE = """
import json, resource, sys, time
t0 = time.perf_counter()
lake, out, start, end, config, quality = sys.argv[1:7]
from contextlib import nullcontext
from cardiosieve.pipeline.gateworker import GateWorker
with (GateWorker(config or None) if quality == "1" else nullcontext()) as gate:
    from cardiosieve.pipeline.run import run_interval
    s = run_interval(lake, out, start, end, config=config or None, quality=quality == "1", gate=gate)
print(json.dumps({"total_s": time.perf_counter() - t0, "seconds": s["seconds"], "ecgs": s["tables"]["ecg"]["screened"],
                  "findings": sum(sum(t.values()) for t in s["findings"].values()), "chunks": s["chunks"],
                  "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
                  "worker_peak_mb": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024}))
"""

# What an analyst would write: nearest potassium in [-24 h, +6 h] by two ASOF joins, the
# patient's leads pivoted to the largest precordial and limb T, and the hyperkalaemia bands and
# signs of screens/hyperkalemia.py (without haemolysis, priors, trend or evidence text).
DUCKDB_CODE = r"""
import json, resource, sys, time
t0 = time.perf_counter()
import duckdb
lake, start, end = sys.argv[1:4]
con = duckdb.connect()
con.execute("SET TimeZone='UTC'")
con.execute("SET enable_progress_bar=false")
sql = f'''
WITH e AS (SELECT ecg_id, patient_id, acquired_at, qrs_ms, pr_ms, heart_rate_bpm
           FROM read_parquet('{lake}/ecg/*/*.parquet', hive_partitioning=false)
           WHERE acquired_at >= TIMESTAMPTZ '{start}' AND acquired_at < TIMESTAMPTZ '{end}'),
k AS (SELECT patient_id, collected_at, TRY_CAST(value AS DOUBLE) AS value FROM read_parquet('{lake}/lab/*/*.parquet', hive_partitioning=false, union_by_name=true)
      WHERE analyte = '2823-3' AND collected_at >= TIMESTAMPTZ '{start}' - INTERVAL 24 HOUR
        AND collected_at < TIMESTAMPTZ '{end}' + INTERVAL 6 HOUR),
kb AS (SELECT e.ecg_id, k.value AS kb, k.collected_at AS kb_at FROM e ASOF LEFT JOIN k
       ON e.patient_id = k.patient_id AND e.acquired_at >= k.collected_at),
kf AS (SELECT e.ecg_id, k.value AS kf, k.collected_at AS kf_at FROM e ASOF LEFT JOIN k
       ON e.patient_id = k.patient_id AND e.acquired_at <= k.collected_at),
t AS (SELECT l.ecg_id,
             max(CASE WHEN lead IN ('V1','V2','V3','V4','V5','V6') THEN t_amp_uv END) AS t_prec,
             max(CASE WHEN lead IN ('I','II','III','aVL','aVF') THEN t_amp_uv END) AS t_limb,
             max(CASE WHEN lead = 'II' THEN p_amp_uv END) AS p_ii
      FROM read_parquet('{lake}/ecg_lead/*/*.parquet', hive_partitioning=false) l SEMI JOIN e ON l.ecg_id = e.ecg_id
      GROUP BY l.ecg_id),
a AS (SELECT e.*, t.t_prec, t.t_limb, t.p_ii,
        CASE WHEN kb_at >= e.acquired_at - INTERVAL 24 HOUR AND (kf_at IS NULL OR kf_at > e.acquired_at + INTERVAL 6 HOUR
                  OR e.acquired_at - kb_at <= kf_at - e.acquired_at) THEN kb
             WHEN kf_at <= e.acquired_at + INTERVAL 6 HOUR THEN kf END AS k
      FROM e JOIN kb USING (ecg_id) JOIN kf USING (ecg_id) LEFT JOIN t USING (ecg_id)),
s AS (SELECT *, (coalesce(t_prec >= 1000 OR t_limb >= 600, false))::INT + (qrs_ms >= 120)::INT
                + coalesce(pr_ms > 200, false)::INT + coalesce(p_ii <= 50, false)::INT + (heart_rate_bpm < 50)::INT AS signs
      FROM a)
SELECT ecg_id, patient_id, k, signs,
  CASE WHEN k >= 6.5 AND signs > 0 THEN 1 WHEN k >= 6.5 OR (k >= 6.0 AND signs > 0) THEN 2
       WHEN k >= 5.5 THEN 3 WHEN k IS NULL AND signs > 0 THEN 4 END AS tier
FROM s WHERE k >= 5.5 OR (k IS NULL AND signs > 0)
'''
df = con.execute(sql).df()
print(json.dumps({"total_s": time.perf_counter() - t0, "findings": len(df),
                  "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""


def ours(lake, config, start, end, quality=True, fresh=True) -> dict:
    out = Path("/tmp/cs-bench-out") / Path(lake).name
    if fresh:
        shutil.rmtree(out, ignore_errors=True)
    return run_json(RUN_CODE, lake, out, start, end, config, "1" if quality else "0")


def show(label: str, r: dict) -> None:
    stages = ", ".join(f"{k} {v:.2f}" for k, v in r.get("seconds", {}).items())
    extra = f"; stages: {stages}" if stages else ""
    ecgs = f"ECGs {r['ecgs']}, " if "ecgs" in r else ""
    worker = f" (gate worker {r['worker_peak_mb']:.0f} MB)" if r.get("worker_peak_mb") else ""
    print(f"{label}: wall {r['wall_s']:.2f} s, peak {r['peak_mb']:.0f} MB{worker}, {ecgs}findings {r['findings']}{extra}")


TARGETS = []     # (what, measured s, SQL s or None, limit, kind): printed together at the end


def target(what: str, measured: float, sql: float | None, limit: float, kind: str) -> None:
    """kind "s": under `limit` seconds; "mb": under `limit` MB; "x": measured / sql at most `limit`."""
    TARGETS.append((what, measured, sql, limit, kind))


def print_targets() -> None:
    print("\ntargets (this run):")
    for what, measured, sql, limit, kind in TARGETS:
        ratio = measured / sql if sql else None
        met = ratio <= limit if kind == "x" else measured < limit
        beside = f", SQL {sql:.2f} s, ratio {ratio:.2f}" if sql else ""
        unit = "MB" if kind == "mb" else "s"
        goal = f"at most {limit:g}x the SQL" if kind == "x" else f"under {limit:g} {unit}"
        print(f"  {what}: {measured:.2f} {unit}{beside}; target {goal}: {'met' if met else 'NOT met'}")


def race(lake, config, start, end, label) -> None:
    """Ours with the quality gate, ours without it (the SQL validates nothing) and the DuckDB SQL,
    alternating, median of 3 each."""
    gated, bare, theirs = [], [], []
    for _ in range(3):
        gated.append(ours(lake, config, start, end))
        bare.append(ours(lake, config, start, end, quality=False))
        theirs.append(run_json(DUCKDB_CODE, lake, start, end))
    g, b, d = (statistics.median(r["wall_s"] for r in runs) for runs in (gated, bare, theirs))
    show(f"{label}, cardiosieve (median of 3)", {**gated[-1], "wall_s": g})
    show(f"{label}, cardiosieve without quality gate (median of 3)", {**bare[-1], "wall_s": b})
    show(f"{label}, DuckDB SQL (median of 3)", {**theirs[-1], "wall_s": d})
    print(f"{label}: ratio cardiosieve / DuckDB = {g / d:.2f}; without the gate {b / d:.2f}")
    return g, b, d


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--skip-network", action="store_true", help="skip the 800,000-ECG network backfill")
    ap.add_argument("--skip-long", action="store_true", help="skip the 3-year flatness lake")
    args = ap.parse_args()
    end = "2026-11-30"
    night = ("2026-11-29T00:00:00Z", "2026-11-30T00:00:00Z")
    month = ("2026-10-31T00:00:00Z", "2026-11-30T00:00:00Z")
    year = ("2025-11-30T00:00:00Z", "2026-11-30T00:00:00Z")

    lake = "/tmp/cs-bench-1y"
    config = ensure_lake(Path(lake), 60000, 365, end)
    runs = [ours(lake, config, *night) for _ in range(3)]
    gated = statistics.median(r["wall_s"] for r in runs)
    show("one night, 1-year lake, with quality gate (median of 3)", {**runs[-1], "wall_s": gated})
    runs = [ours(lake, config, *night, quality=False) for _ in range(3)]
    bare = statistics.median(r["wall_s"] for r in runs)
    show("one night, 1-year lake, without quality gate (median of 3)", {**runs[-1], "wall_s": bare})
    sql = statistics.median(run_json(DUCKDB_CODE, lake, *night)["wall_s"] for _ in range(3))
    print(f"one night, 1-year lake, DuckDB SQL (median of 3): wall {sql:.2f} s")
    target("one night with the gate", gated, sql, 3.0, "s")
    target("one night without the gate", bare, sql, 1.2, "s")
    if not args.skip_long:
        long_lake = "/tmp/cs-bench-3y-even"
        long_config = ensure_lake(Path(long_lake), even_patients(60000, 365, 365 * 3), 365 * 3, end)
        runs = [ours(long_lake, long_config, *night) for _ in range(3)]
        show("one night, 3-year lake, with quality gate (median of 3)",
             {**runs[-1], "wall_s": statistics.median(r["wall_s"] for r in runs)})
    g, _, d = race(lake, config, *month, "30-day backfill, 1-year lake")
    target("30-day backfill with the gate", g, d, 2.0, "x")
    if not args.skip_network:
        net = "/tmp/cs-bench-network"
        net_config = ensure_lake(Path(net), 240000, 365, end)
        mine = ours(net, net_config, *year)
        show("1-year backfill, network lake, cardiosieve", mine)
        theirs = run_json(DUCKDB_CODE, net, *year)
        show("1-year backfill, network lake, DuckDB SQL", theirs)
        print(f"1-year network backfill: ratio cardiosieve / DuckDB = {mine['wall_s'] / theirs['wall_s']:.2f}")
        target("1-year network backfill with the gate", mine["wall_s"], theirs["wall_s"], 3.0, "x")
        target("1-year network backfill, peak memory of the main process", mine["peak_mb"], None, 4096, "mb")
    print_targets()


if __name__ == "__main__":
    main()
