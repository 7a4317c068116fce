"""Shared by the benchmarks: cached generated lakes and timed fresh-process runs."""
from __future__ import annotations

import json
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PY = sys.executable


LEAD_OUT_DAYS = 7   # generated past the lake's end, then cut: see ensure_lake


def ensure_lake(path: Path, patients: int, days: int, end: str = "2026-11-30") -> str:
    """Generate an invented lake once (kept under /tmp between runs); returns its site config.

    The generator makes labs around ECGs (before them, and repeats over the following days), so
    the labs of its last days taper off: on a 1-year lake the last night holds 25 % fewer lab
    rows than a month earlier, and the quality gate's lab-volume check rightly stops that night
    as a missing feed. A real lake's last night is complete, so the lake is generated
    LEAD_OUT_DAYS past `end` and the partitions from `end` on are removed."""
    import shutil

    import pandas as pd

    path = Path(path)
    if not (path / "ecg").is_dir():
        t = time.perf_counter()
        gen_end = (pd.Timestamp(end) + pd.Timedelta(days=LEAD_OUT_DAYS)).strftime("%Y-%m-%d")
        subprocess.run([PY, "-m", "cardiosieve.pipeline.samplegen", "--out", str(path), "--patients", str(patients),
                        "--days", str(days + LEAD_OUT_DAYS), "--end", gen_end], check=True, cwd=ROOT,
                       stdout=subprocess.DEVNULL)
        for folder in path.glob("*/date=*"):
            if folder.name[len("date="):] >= end:
                shutil.rmtree(folder)
        print(f"  generated {path} ({patients} patients, {days} days) in {time.perf_counter() - t:.0f} s")
    return str(path / "site.toml")


def even_patients(patients: int, days: int, long_days: int) -> int:
    """Patients for a lake of `long_days` whose nights hold as many ECGs as a lake of `patients`
    over `days`: only the history grows (the generator gives a longer lake more ECGs per patient)."""
    sys.path.insert(0, str(ROOT))
    from cardiosieve.pipeline.samplegen import ecgs_per_patient

    return round(patients * long_days / days * ecgs_per_patient(days) / ecgs_per_patient(long_days))


def run_json(code: str, *args) -> dict:
    """Run `code` in a fresh interpreter (start-up counts); its last stdout line is JSON."""
    t = time.perf_counter()
    done = subprocess.run([PY, "-c", code, *map(str, args)], check=True, capture_output=True, text=True, cwd=ROOT)
    result = json.loads(done.stdout.strip().splitlines()[-1])
    result["wall_s"] = time.perf_counter() - t
    return result
