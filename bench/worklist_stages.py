"""The worklist stage alone over the 12 chunks of a 1-year backfill, as run_interval calls it.

    .venv/bin/python bench/worklist_stages.py STAGE_FOLDER [--runs 3]

STAGE_FOLDER is the _stage folder of an OUT that a 1-year backfill left (bench/worklist.py
leaves /tmp/cs-bench-worklist/seed/_stage): its chunks' findings.parquet and aligned.parquet
are copied to a fresh OUT, then stage_worklist runs chunk after chunk on a new store, in a fresh
process per run; prints the seconds of each run (summed over the chunks) and their median.
Works on a checkout before this change too (stage_worklist without `write`).
"""
from __future__ import annotations

import argparse
import shutil
import statistics
from pathlib import Path

from _common import run_json

CODE = """
import inspect, json, sys, time
from pathlib import Path
import pandas as pd
out, names = Path(sys.argv[1]), sys.argv[2:]
from cardiosieve.pipeline import run
new = "write" in inspect.signature(run.stage_worklist).parameters
seconds = []
for k, name in enumerate(names):
    start, end = (pd.Timestamp(x).isoformat() for x in name.split("_"))
    kw = {}
    if new:   # as run_interval calls it: only the last chunk writes worklist.parquet
        last = k + 1 == len(names)
        kw = {"write": last, "earlier_run_ids": names[:k] if last else []}
    t = time.perf_counter()
    run.stage_worklist(out, start, end, **kw)
    seconds.append(time.perf_counter() - t)
print(json.dumps({"seconds": seconds, "new": new}))
"""


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("stage", type=Path)
    ap.add_argument("--runs", type=int, default=3)
    ap.add_argument("--out", type=Path, default=Path("/tmp/cs-bench-worklist-stages"))
    args = ap.parse_args()
    names = sorted(p.name for p in args.stage.iterdir() if (p / "findings.parquet").exists())
    totals = []
    for _ in range(args.runs):
        shutil.rmtree(args.out, ignore_errors=True)
        for name in names:
            (args.out / "_stage" / name).mkdir(parents=True)
            for f in ("findings.parquet", "aligned.parquet"):
                shutil.copy2(args.stage / name / f, args.out / "_stage" / name / f)
        args.out.chmod(0o700)
        r = run_json(CODE, args.out, *names)
        totals.append(sum(r["seconds"]))
        print(f"  {len(names)} chunks: {sum(r['seconds']):.2f} s (last chunk {r['seconds'][-1]:.2f} s)", flush=True)
    shutil.rmtree(args.out, ignore_errors=True)
    print(f"worklist stage over {len(names)} chunks: median {statistics.median(totals):.2f} s of {args.runs}")


if __name__ == "__main__":
    main()
