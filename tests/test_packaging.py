"""The built wheel installs everything under the `cardiosieve` namespace, so a package of
another project that owns a top-level `pipeline` (or `screens`) cannot break it: the wheel is
installed into a clean venv beside such a package and `cardiosieve run` screens the sample lake;
the store's migrations ship in it (`run` builds its store with them, `db upgrade --create` a new
one, `db current` reads the revision). The wheel also carries the Airflow DAG factory
(cardiosieve.dags.nightly), and the package cardiosieve.dags imports where Airflow is missing.
The venv reuses this environment's installed dependencies (a path file), not the network; an
`airflow` package that fails to import stands in for an environment without the scheduler extra."""
from __future__ import annotations

import os
import subprocess
import sys
import sysconfig
import zipfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
LAKE = ROOT / "sample_lake"


def _run(cmd, cwd, **kw):
    return subprocess.run([str(c) for c in cmd], cwd=cwd, capture_output=True, text=True, timeout=600, **kw)


def test_the_wheel_installs_under_its_namespace_beside_a_top_level_pipeline_package(tmp_path):
    # Built from a copy without build/, venvs and outputs: setuptools puts whatever a stale
    # build/lib holds (an older layout's top-level packages) into the wheel.
    import shutil
    src = tmp_path / "src"
    shutil.copytree(ROOT, src, ignore=shutil.ignore_patterns("build", ".venv*", "out", "*.egg-info", "__pycache__",
                                                             ".git", ".pytest_cache"))
    built = _run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "-w", tmp_path / "dist",
                  src], cwd=tmp_path)
    assert built.returncode == 0, built.stderr[-1500:]
    wheel = next((tmp_path / "dist").glob("cardiosieve-*.whl"))
    names = zipfile.ZipFile(wheel).namelist()
    assert {n.split("/")[0] for n in names} == {"cardiosieve", wheel.name.split("-")[0] + "-" + wheel.name.split("-")[1]
                                                + ".dist-info"}
    assert "cardiosieve/screens/rules.toml" in names and "cardiosieve/pipeline/cli.py" in names
    migrations = sorted(p.relative_to(ROOT / "pipeline").as_posix() for p in (ROOT / "pipeline" / "migrations").rglob("*.py"))
    assert "migrations/env.py" in migrations and "migrations/versions/0001_baseline.py" in migrations
    assert {f"cardiosieve/pipeline/{m}" for m in migrations} <= set(names)
    assert {"cardiosieve/dags/__init__.py", "cardiosieve/dags/nightly.py", "cardiosieve/dags/cardiosieve_nightly.py",
            "cardiosieve/pipeline/landing.py"} <= set(names)

    venv = tmp_path / "venv"
    assert _run([sys.executable, "-m", "venv", venv], cwd=tmp_path).returncode == 0
    py = venv / "bin" / "python"
    site = Path(_run([py, "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"], cwd=tmp_path).stdout.strip())
    (site / "deps-of-the-test-environment.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    installed = _run([py, "-m", "pip", "install", "--no-deps", "--no-index", wheel], cwd=tmp_path)
    assert installed.returncode == 0, installed.stderr[-1500:]
    for name in ("pipeline", "screens"):                 # another project's top-level packages
        (site / name).mkdir()
        (site / name / "__init__.py").write_text("raise ImportError('this is another project')\n")
    (site / "airflow").mkdir()                            # no scheduler extra in this venv
    (site / "airflow" / "__init__.py").write_text("raise ImportError('no airflow in this venv')\n")

    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "CARDIOSIEVE_KILL_AT")}
    done = _run([venv / "bin" / "cardiosieve", "run", "--lake", LAKE, "--config", LAKE / "site.toml",
                 "--out", tmp_path / "out", "--start", "2026-11-29", "--end", "2026-11-30"], cwd=tmp_path, env=env)
    assert done.returncode == 0, done.stderr[-1500:]
    assert "worklist items by screen" in done.stdout and (tmp_path / "out" / "worklist.parquet").exists()
    where = _run([py, "-c", "import cardiosieve.pipeline.run as r; print(r.__file__)"], cwd=tmp_path, env=env)
    assert where.stdout.strip().startswith(str(site / "cardiosieve" / "pipeline"))   # the wheel's, not the source's
    clash = _run([py, "-c", "import pipeline"], cwd=tmp_path, env=env)
    assert "this is another project" in clash.stderr                                # and the other one is intact

    from cardiosieve.pipeline.store import HEAD_REVISION
    current = _run([venv / "bin" / "cardiosieve", "db", "current", "--out", tmp_path / "out"], cwd=tmp_path, env=env)
    assert (current.returncode, current.stdout) == (0, f"{HEAD_REVISION} (current)\n"), current.stderr[-1500:]
    made = _run([venv / "bin" / "cardiosieve", "db", "upgrade", "--create", "--db", f"sqlite:///{tmp_path / 'new.sqlite'}"],
                cwd=tmp_path, env=env)
    assert (made.returncode, made.stdout) == (0, f"worklist store created at schema revision {HEAD_REVISION}\n"), \
        made.stderr[-1500:]
    # The DAG package imports without Airflow; only the factory module needs it.
    dags = _run([py, "-c", "import cardiosieve.dags as d; print(d.__file__)"], cwd=tmp_path, env=env)
    assert dags.returncode == 0, dags.stderr[-1500:]
    assert dags.stdout.strip().startswith(str(site / "cardiosieve" / "dags"))
    factory = _run([py, "-c", "import cardiosieve.dags.nightly"], cwd=tmp_path, env=env)
    assert factory.returncode != 0 and "no airflow in this venv" in factory.stderr


def test_no_module_imports_the_old_top_level_names():
    """Every import goes through the namespace: a stray `from pipeline ...` would work from a
    checkout (its root is on sys.path) and break in an installed wheel."""
    import re
    pattern = re.compile(r"^\s*(from|import)\s+(pipeline|screens)(\.|\s|$)", re.M)
    offenders = [str(p.relative_to(ROOT)) for folder in ("pipeline", "screens", "dags", "tests", "bench")
                 for p in (ROOT / folder).rglob("*.py") if pattern.search(p.read_text(encoding="utf-8"))]
    assert offenders == []
