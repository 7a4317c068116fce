"""open_store on a SQLite store that is already current: what every command and every night
pays before its work. The store is made by another process first, so this process has not
imported Alembic; prints the median and 90th percentile of 500 opens (create=True, the run's
open, and create=False, the other commands'), the statements of one open and whether Alembic was
imported. Figures in docs/performance.md."""
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from sqlalchemy import event
from sqlalchemy.engine import Engine

OPENS = 500


def main() -> None:
    folder = Path(tempfile.mkdtemp())
    url = f"sqlite:///{folder / 'worklist.sqlite'}"
    subprocess.run([sys.executable, "-c", "import sys; from cardiosieve.pipeline.store import open_store; "
                    "open_store(sys.argv[1]).dispose()", url], check=True)
    from cardiosieve.pipeline.store import open_store

    def once(create: bool) -> float:
        started = time.perf_counter()
        engine = open_store(url, create=create)
        took = time.perf_counter() - started
        engine.dispose()
        return took

    for create in (True, False):
        once(create)
        times = sorted(once(create) for _ in range(OPENS))
        print(f"create={create}: median {statistics.median(times) * 1e3:.2f} ms, "
              f"p90 {times[int(OPENS * 0.9)] * 1e3:.2f} ms")
    seen = []
    event.listen(Engine, "before_cursor_execute", lambda conn, cursor, statement, *rest: seen.append(statement))
    open_store(url, create=False).dispose()
    print(f"statements per open: {len(seen)}; alembic imported: {'alembic' in sys.modules}")


if __name__ == "__main__":
    main()
