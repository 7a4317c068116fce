"""The quality gate's verdict in a second process, off the run's critical path.

Great Expectations costs about 2.5 s to import and some tenths of a second per validation, and
the run does not need it to go on: the row decisions (which rows the gate rejects) come from the
gate's own evaluator (`pipeline.quality.own_counts`), in the run's process. What Great
Expectations adds is the verdict: the same expectations evaluated a second time by the
reference library, compared row for row, with the feed and volume checks and the report. So
`run_interval` starts this worker before it reads anything; the worker imports Great
Expectations on the second core while the run loads, then evaluates each chunk's gate while the
run aligns and screens it, and the run waits for the verdict before anything reaches the
worklist store or the published outputs. A failed verdict stops the run as the in-process gate
would (QualityGateError, exit 2, the report in OUT/gate_stopped/).

Protocol: one JSON line per request on the worker's stdin ({"lake", "out", "start", "end",
"config"}), one JSON line per reply on its stdout: {"ok": summary}, {"gate": [failures]},
{"bad_input": message} or {"internal": exception type}. Replies hold counts and paths only.
The worker dies with the run (PR_SET_PDEATHSIG on Linux; EOF on stdin elsewhere) and leaves by
os._exit, skipping Great Expectations' slow interpreter teardown.
"""
from __future__ import annotations

import json
import os
import subprocess
import sys


class GateWorkerError(RuntimeError):
    """The worker died or answered something unreadable: an internal error, not bad data."""


class GateWorker:
    """A running worker (module docstring); use as a context manager."""

    def __init__(self, config=None):
        self.config = None if config is None else str(config)
        self.proc = subprocess.Popen([sys.executable, "-m", "cardiosieve.pipeline.gateworker"], stdin=subprocess.PIPE,
                                     stdout=subprocess.PIPE, text=True, encoding="utf-8")

    def __enter__(self) -> "GateWorker":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def submit(self, lake, out, start, end) -> None:
        """Ask for the verdict on the loaded chunk [start, end) of OUT's stage folder."""
        request = {"lake": str(lake), "out": str(out), "start": str(start), "end": str(end), "config": self.config}
        try:
            self.proc.stdin.write(json.dumps(request) + "\n")
            self.proc.stdin.flush()
        except BrokenPipeError:
            raise GateWorkerError("the quality gate's worker process has stopped") from None

    def result(self) -> dict:
        """The verdict of the oldest submitted chunk: its summary, or the error it raises."""
        from cardiosieve.pipeline.errors import BadInputError
        from cardiosieve.pipeline.quality import QualityGateError

        line = self.proc.stdout.readline()
        try:
            reply = json.loads(line)
        except ValueError:
            raise GateWorkerError("the quality gate's worker process stopped without a verdict") from None
        if "ok" in reply:
            return reply["ok"]
        if "gate" in reply:
            raise QualityGateError(reply["gate"])
        if "bad_input" in reply:
            raise BadInputError(reply["bad_input"])
        raise GateWorkerError(f"the quality gate's worker process failed ({reply.get('internal', 'unknown')})")

    def close(self) -> None:
        """Stop the worker at once. Every verdict the run used has been read by then; a run that
        stops early (bad config, a held lock, an error) does not wait for the import to end. A
        report the worker was writing leaves a temporary file the next run removes."""
        if self.proc.poll() is None:
            self.proc.kill()
        self.proc.wait()
        for pipe in (self.proc.stdin, self.proc.stdout):
            try:
                pipe.close()
            except BrokenPipeError:
                pass


def _die_with_parent() -> None:
    try:
        import ctypes
        import signal
        ctypes.CDLL("libc.so.6", use_errno=True).prctl(1, signal.SIGKILL)     # PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        pass                                   # not Linux: EOF on stdin ends the worker instead


def _serve() -> None:
    replies = os.fdopen(os.dup(sys.stdout.fileno()), "w", encoding="utf-8")
    os.dup2(sys.stderr.fileno(), sys.stdout.fileno())      # a stray print must not garble a reply
    _die_with_parent()
    import great_expectations  # noqa: F401  (warm: the import is most of the gate's cost)

    from cardiosieve.pipeline.errors import BadInputError
    from cardiosieve.pipeline.quality import QualityGateError
    from cardiosieve.pipeline.run import stage_gate_verdict

    for line in sys.stdin:
        req = json.loads(line)
        try:
            reply = {"ok": stage_gate_verdict(req["lake"], req["out"], req["start"], req["end"], config=req["config"])}
        except QualityGateError as exc:
            reply = {"gate": exc.failures}
        except BadInputError as exc:
            reply = {"bad_input": str(exc)}
        except Exception as exc:               # noqa: BLE001 (classified in the run's process)
            reply = {"internal": type(exc).__name__}
        replies.write(json.dumps(reply) + "\n")
        replies.flush()


if __name__ == "__main__":
    code = 0
    try:
        _serve()
    except (BrokenPipeError, KeyboardInterrupt):       # the run has gone: nothing to answer
        pass
    except BaseException as exc:                       # noqa: BLE001 (the type only: no row values)
        print(f"cardiosieve gate worker: {type(exc).__name__}", file=sys.stderr)
        code = 1
    sys.stderr.flush()
    os._exit(code)
