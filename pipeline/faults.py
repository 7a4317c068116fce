"""Named points where a test may kill the run, to prove that a crash anywhere loses nothing.

`fault_point(name)` does nothing unless the environment variable CARDIOSIEVE_KILL_AT names that
point, in which case the process sends itself SIGKILL there: no clean-up, no `finally`, as a
power cut or an out-of-memory kill would leave it. tests/test_faults.py runs `cardiosieve run`
in a subprocess with each point in turn. The points, in the order a run passes them:

    after_load, after_align, after_screen   a stage's files are written
    after_quality      the quality gate's verdict has come back (its worker runs beside the
                       stages above: pipeline/gateworker.py)
    after_commit       the worklist store has committed tonight's items
    after_archive      the chunk's aligned table and leads are in OUT/aligned_history/ (archive.py)
    before_switch      the run's folder is complete, not yet the published one
    after_switch       the new state is published, the old runs not yet pruned
"""
from __future__ import annotations

import os
import signal

POINTS = ("after_load", "after_align", "after_screen", "after_quality", "after_commit", "after_archive",
          "before_switch", "after_switch")
ENV = "CARDIOSIEVE_KILL_AT"


def fault_point(name: str) -> None:
    """Kill this process here when CARDIOSIEVE_KILL_AT names `name` (module docstring)."""
    if os.environ.get(ENV) == name:
        os.kill(os.getpid(), signal.SIGKILL)
