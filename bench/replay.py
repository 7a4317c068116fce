"""Benchmark of `cardiosieve replay` (pipeline/replay.py): a year re-screened under one changed threshold.

    .venv/bin/python bench/replay.py [--skip-fallback]

On the 1-year benchmark lake (bench/_common.ensure_lake, 60,000 invented patients, 365 days):
  1. builds the aligned archive once with a backfill `cardiosieve run` over the year into
     /tmp/cs-bench-out/replay (skipped when that folder already holds an archive);
  2. times `cardiosieve replay` of the whole year with one changed threshold (hyperkalemia
     k_mild 5.5 -> 5.8 mmol/L), in a fresh process (start-up and imports included), median of 3;
  3. unless --skip-fallback: 30 days replayed with no archive (OUT holding only a link to the
     store), so every chunk is re-loaded and re-aligned from the lake.
Prints wall seconds and peak memory (max RSS). A benchmark, not a test: its figures go to
docs/performance.md by hand. Target: under 30 s for the year.
"""
from __future__ import annotations

import argparse
import json
import shutil
import statistics
import subprocess
import sys
import time
from pathlib import Path

from _common import PY, ROOT, ensure_lake, run_json

LAKE = Path("/tmp/cs-bench-1y")
OUT = Path("/tmp/cs-bench-out/replay")
YEAR = ("2025-11-30", "2026-11-30")
MONTH = ("2026-10-31", "2026-11-30")
WHATIF = "[rules.hyperkalemia]\nk_mild = 5.8\n"

REPLAY_CODE = """
import json, resource, sys, time
t0 = time.perf_counter()
from cardiosieve.pipeline.cli import main
rc = main(sys.argv[1:])
report = json.loads(open(sys.argv[sys.argv.index("--output") + 1]).read())
print(json.dumps({"rc": rc, "total_s": time.perf_counter() - t0, "ecgs": report["ecgs"],
                  "from_archive": report["ecgs_from_archive"], "realigned": report["ecgs_realigned"],
                  "findings_current": sum(r["findings_current"] for r in report["screens"]),
                  "findings_alternative": sum(r["findings_alternative"] for r in report["screens"]),
                  "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""


def build_archive(config: str) -> None:
    if (OUT / "aligned_history").is_dir():
        print(f"  archive present in {OUT}: not rebuilt")
        return
    shutil.rmtree(OUT, ignore_errors=True)
    t = time.perf_counter()
    subprocess.run([str(Path(PY).parent / "cardiosieve"), "--quiet", "run", "--lake", str(LAKE), "--config", config,
                    "--out", str(OUT), "--start", YEAR[0], "--end", YEAR[1]], check=True, cwd=ROOT,
                   stdout=subprocess.DEVNULL)
    size = sum(p.stat().st_size for p in (OUT / "aligned_history").rglob("*") if p.is_file())
    print(f"  backfill of the year with the archive: {time.perf_counter() - t:.0f} s; archive "
          f"{len(list((OUT / 'aligned_history').iterdir()))} folders, {size / 1e6:.0f} MB")


def replay(out: Path, config: str, whatif: Path, period) -> dict:
    report = out.parent / f"{out.name}-replay.json"
    r = run_json(REPLAY_CODE, "--quiet", "replay", "--out", out, "--lake", LAKE, "--config", config,
                 "--since", period[0], "--until", period[1], "--rules", whatif, "--format", "json",
                 "--output", report)
    if r["rc"] != 0:
        sys.exit(f"replay exited {r['rc']}")
    return r


def show(label: str, runs: list[dict]) -> None:
    wall = statistics.median(r["wall_s"] for r in runs)
    r = runs[-1]
    each = ", ".join(f"{x['wall_s']:.2f}" for x in runs)
    print(f"{label}: wall {wall:.2f} s (median of {len(runs)}: {each}), "
          f"peak {max(x['peak_mb'] for x in runs):.0f} MB; ECGs {r['ecgs']} ({r['from_archive']} archived, "
          f"{r['realigned']} re-aligned), findings {r['findings_current']} current / "
          f"{r['findings_alternative']} alternative")


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--skip-fallback", action="store_true")
    args = ap.parse_args()
    config = ensure_lake(LAKE, 60000, 365)
    build_archive(config)
    whatif = OUT.parent / "whatif.toml"
    whatif.write_text(WHATIF)
    show("replay of the year, from the archive", [replay(OUT, config, whatif, YEAR) for _ in range(3)])
    if not args.skip_fallback:
        bare = OUT.parent / "replay-no-archive"
        shutil.rmtree(bare, ignore_errors=True)
        bare.mkdir(mode=0o700)
        (bare / "worklist.sqlite").symlink_to(OUT / "worklist.sqlite")
        show("replay of 30 days, no archive (re-aligned from the lake)", [replay(bare, config, whatif, MONTH)])
        shutil.rmtree(bare, ignore_errors=True)
    print(json.dumps({"machine_note": "fresh process each; start-up included"}))


if __name__ == "__main__":
    main()
