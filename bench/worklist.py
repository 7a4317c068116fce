"""The worklist stage alone: its seconds in runs of the nightly job (fresh processes, gate off).

    .venv/bin/python bench/worklist.py [--runs 3] [--network-runs 2] [--skip-network]

  1. one night on a fresh 1-year lake output (the store holds that night only), median of --runs;
  2. the same night on a store that already holds the lake's year before it (seeded once by a
     backfill, copied before each run), median of --runs; then the same store with every item
     first flagged more than 30 days before the night closed, as reviews would leave it (no
     generated lake has reviews): what a nightly run sees;
  3. the 1-year network backfill (12 chunks, the store growing chunk by chunk): the worklist
     stage's seconds summed over the chunks, --network-runs runs.
The quality gate is off: it does not touch the worklist stage and would only load the 2 cores.
A benchmark, not a test: its figures go to docs/performance.md by hand.
"""
from __future__ import annotations

import argparse
import shutil
import statistics
from pathlib import Path

from _common import ensure_lake, run_json

RUN_CODE = """
import json, sys, time
t0 = time.perf_counter()
lake, out, start, end, config = sys.argv[1:6]
from cardiosieve.pipeline.run import run_interval
s = run_interval(lake, out, start, end, config=config or None, quality=False)
print(json.dumps({"total_s": time.perf_counter() - t0, "worklist_s": s["seconds"]["worklist"],
                  "chunks": s["chunks"], "items_tonight": s["worklist"]["items_tonight"]}))
"""

# Closes items as a review would (status closed, reason, last_updated_at), then re-ranks.
CLOSE_CODE = """
import json, sys
import pandas as pd
from sqlalchemy import update
from cardiosieve.pipeline import store
engine = store.open_store(f"sqlite:///{sys.argv[1]}")
t, before = store.worklist_item, pd.Timestamp(sys.argv[2]).to_pydatetime()
with store._write_transaction(engine) as conn:
    n = conn.execute(update(t).where(t.c.first_flagged_at < before).values(
        status="closed", status_reason="reviewed: finding_real", last_updated_at=t.c.first_flagged_at)).rowcount
    store._rerank(conn)
print(json.dumps({"closed": n}))
"""
REVIEWED_BEFORE = "2026-10-30T00:00:00Z"
END = "2026-11-30"
NIGHT = ("2026-11-29T00:00:00Z", "2026-11-30T00:00:00Z")
YEAR = ("2025-11-30T00:00:00Z", "2026-11-30T00:00:00Z")
SCRATCH = Path("/tmp/cs-bench-worklist")


def run(lake, config, out: Path, start, end, seed: Path | None = None) -> dict:
    shutil.rmtree(out, ignore_errors=True)
    if seed is not None:   # the store only: the night's run makes the rest
        out.mkdir(parents=True)
        shutil.copy2(seed / "worklist.sqlite", out / "worklist.sqlite")
    return run_json(RUN_CODE, lake, out, start, end, config)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--runs", type=int, default=3)
    ap.add_argument("--network-runs", type=int, default=2)
    ap.add_argument("--skip-network", action="store_true")
    args = ap.parse_args()

    lake = "/tmp/cs-bench-1y"
    config = ensure_lake(Path(lake), 60000, 365, END)
    runs = [run(lake, config, SCRATCH / "night", *NIGHT) for _ in range(args.runs)]
    print(f"one night, fresh store: worklist {[round(r['worklist_s'], 2) for r in runs]} s, median "
          f"{statistics.median(r['worklist_s'] for r in runs):.2f} s; items tonight {runs[-1]['items_tonight']}")

    seed = SCRATCH / "seed"   # the year before the night, once (the store's content is what matters)
    if not (seed / "worklist.sqlite").exists():
        r = run(lake, config, seed, YEAR[0], NIGHT[0])
        print(f"  seeded {seed} with [{YEAR[0]}, {NIGHT[0]}) in {r['wall_s']:.0f} s")
    runs = [run(lake, config, SCRATCH / "history", *NIGHT, seed=seed) for _ in range(args.runs)]
    print(f"one night, store holding the year before: worklist {[round(r['worklist_s'], 2) for r in runs]} s, "
          f"median {statistics.median(r['worklist_s'] for r in runs):.2f} s")

    reviewed = SCRATCH / "seed-reviewed"   # as reviews would leave it: all but the last 30 days closed
    if not (reviewed / "worklist.sqlite").exists():
        reviewed.mkdir(parents=True, exist_ok=True)
        shutil.copy2(seed / "worklist.sqlite", reviewed / "worklist.sqlite")
        print("  closed", run_json(CLOSE_CODE, reviewed / "worklist.sqlite", REVIEWED_BEFORE)["closed"],
              f"items first flagged before {REVIEWED_BEFORE} in {reviewed}")
    runs = [run(lake, config, SCRATCH / "history", *NIGHT, seed=reviewed) for _ in range(args.runs)]
    print(f"one night, store holding the year before, reviewed up to 30 days ago: worklist "
          f"{[round(r['worklist_s'], 2) for r in runs]} s, median {statistics.median(r['worklist_s'] for r in runs):.2f} s")

    if not args.skip_network:
        net = "/tmp/cs-bench-network"
        net_config = ensure_lake(Path(net), 240000, 365, END)
        runs = [run(net, net_config, SCRATCH / "network", *YEAR) for _ in range(args.network_runs)]
        for r in runs:
            print(f"1-year network backfill ({r['chunks']} chunks): worklist {r['worklist_s']:.2f} s summed, "
                  f"wall {r['wall_s']:.0f} s")
    shutil.rmtree(SCRATCH / "night", ignore_errors=True)
    shutil.rmtree(SCRATCH / "history", ignore_errors=True)
    shutil.rmtree(SCRATCH / "network", ignore_errors=True)


if __name__ == "__main__":
    main()
