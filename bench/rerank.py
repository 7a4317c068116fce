"""The store's nightly write as its history grows: one night's upsert (30 new items, which
re-ranks the review queue) and the night's read-back (read_worklist) on stores of 15,000 and
150,000 items, 3 % of them active (open) and the rest closed, as years of reviewed nights leave
a network's store. Invented items; SQLite by default, PostgreSQL with --db URL (a throwaway
database: the store's tables are dropped first).

    .venv/bin/python bench/rerank.py [--sizes 15000 150000] [--db URL]

Before schema revision 0003 every stored item held a global rank and each upsert rewrote all
of them; since, only the active items' ranks are read and written. A benchmark, not a test:
its figures go to docs/performance.md by hand.
"""
from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

ACTIVE_SHARE = 0.03
NIGHT_ITEMS = 30


def items(n: int, prefix: str, status=None, at=None):
    import numpy as np
    import pandas as pd

    rng = np.random.default_rng(len(prefix) + n)
    t = pd.Timestamp("2021-01-01", tz="UTC") + pd.to_timedelta(rng.integers(0, 5 * 365 * 24 * 60, n), unit="min")
    if at is not None:
        t = pd.DatetimeIndex([pd.Timestamp(at)] * n)
    return pd.DataFrame({
        "item_id": [f"{prefix}{k:07d}" for k in range(n)], "tier": rng.integers(1, 5, n), "screen": "long_qt",
        "patient_id": [f"{prefix}p{k}" for k in range(n)], "ecg_id": [f"{prefix}e{k}" for k in range(n)],
        "ecg_at": t, "score": rng.random(n), "summary": "invented", "evidence": "{}", "caveats": "[]",
        "territories": "", "rule_version": "bench/1", "run_id": "seed", "first_flagged_at": t,
        "status": status if status is not None else np.where(rng.random(n) < ACTIVE_SHARE, "open", "closed"),
        "last_updated_at": t, "status_reason": "", "episode_start": t, "episode_end": t,
        "other_ecg_ids": "[]", "score_parts": "{}"})


def measure(url: str, size: int, nights: int = 3) -> dict:
    from cardiosieve.pipeline import store

    engine = store.open_store(url)
    store.upsert_items(engine, items(size, "s"))
    upsert, read = [], []
    for k in range(nights):
        new = items(NIGHT_ITEMS, f"n{k}_", status="open", at="2026-11-29T20:00:00Z").assign(run_id=f"night-{k}")
        t0 = time.perf_counter()
        store.upsert_items(engine, new)
        t1 = time.perf_counter()
        store.read_worklist(engine, [f"night-{k}"])
        upsert.append(t1 - t0)
        read.append(time.perf_counter() - t1)
    engine.dispose()
    return {"upsert_s": statistics.median(upsert), "read_s": statistics.median(read)}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[15000, 150000])
    ap.add_argument("--db", help="PostgreSQL URL of a throwaway database (default: SQLite in a temporary folder)")
    args = ap.parse_args()
    for size in args.sizes:
        if args.db:
            from tests.test_store import drop_everything
            drop_everything(args.db)
            url = args.db
        else:
            url = f"sqlite:///{Path(tempfile.mkdtemp(prefix='cs-bench-rerank-')) / 'worklist.sqlite'}"
        m = measure(url, size)
        print(f"store of {size:,} items ({ACTIVE_SHARE:.0%} active), {url.split(':')[0]}: night upsert of "
              f"{NIGHT_ITEMS} items {m['upsert_s']:.3f} s, read_worklist {m['read_s']:.3f} s (medians of 3)")


if __name__ == "__main__":
    main()
