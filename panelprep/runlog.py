"""What a run did: its steps with wall time and peak memory, told as they happen.

A ``RunLog`` is called once at the start of each step
(``log("index", "indexing 1,000 rows", rows=1000)``); the previous step
then ends.  Each ended step is kept (``steps``) for the ``run`` block of
the diagnostics and handed to the sinks, which tell it on stderr:

* ``PlainLines``: one timestamped line per step (UTC time, elapsed seconds,
  step id, rows), for job logs;
* ``Bar``: a rich progress bar, for a terminal;
* ``JsonLines``: one JSON object per ended step, then one for the end of
  the run (or the error), for log collectors.

Peak memory is the resident set's high-water mark during the step: on
Linux the mark is reset at each step start (``/proc/self/clear_refs``);
where that is not possible it is the process's peak so far
(``run.memory_measure`` says which).
"""

from __future__ import annotations

import json
import platform
import resource
import sys
import time
from collections.abc import Sequence
from datetime import UTC, datetime
from typing import Any, TextIO

from panelprep._version import __version__

# the libraries whose versions a run records
LIBRARIES = ("numpy", "pandas", "pyarrow", "scipy", "pandera", "typer", "rich")
PROGRESS_MODES = ("auto", "bar", "plain", "none")

_CLEAR_REFS = "/proc/self/clear_refs"
_STATUS = "/proc/self/status"


def utc_stamp(moment: datetime) -> str:
    """``2026-12-03T09:14:05.123Z``: UTC, ISO 8601, milliseconds."""
    return moment.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%S.") + \
        f"{moment.microsecond // 1000:03d}Z"


def _reset_peak() -> bool:
    """Reset the resident high-water mark (Linux); False when not possible."""
    try:
        with open(_CLEAR_REFS, "w") as handle:
            handle.write("5")
        return True
    except OSError:
        return False


def _peak_bytes(per_step: bool) -> int:
    if per_step:
        try:
            with open(_STATUS) as handle:
                for line in handle:
                    if line.startswith("VmHWM:"):
                        return int(line.split()[1]) * 1024
        except (OSError, ValueError, IndexError):
            pass
    # ru_maxrss is KiB on Linux, bytes on macOS
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return int(peak if sys.platform == "darwin" else peak * 1024)


def library_versions() -> dict[str, str | None]:
    """panelprep, Python and the main libraries, read from the installed metadata."""
    from importlib import metadata  # here: about 30 ms at import, and only a run block needs it

    out: dict[str, str | None] = {"panelprep": __version__, "python": platform.python_version()}
    for name in LIBRARIES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = None
    return out


class RunLog:
    """The steps of one run, measured and told to ``sinks`` as they start and end.

    Parameters
    ----------
    sinks : objects with ``started(step)``, ``ended(step)`` and
        ``finished(summary)`` methods (``PlainLines``, ``Bar``, ``JsonLines``).
    argv : the command line, recorded in the run block (None from Python).
    """

    def __init__(self, sinks: Sequence[Any] = (), argv: Sequence[str] | None = None) -> None:
        self.started = datetime.now(UTC)
        self._t0 = time.perf_counter()
        self.argv = None if argv is None else list(argv)
        self.steps: list[dict[str, Any]] = []
        self.sinks = list(sinks)
        self._open: dict[str, Any] | None = None
        self._t_open = 0.0
        self.per_step_memory = _reset_peak()

    def elapsed(self) -> float:
        return time.perf_counter() - self._t0

    def __call__(self, step: str, what: str, rows: int | None = None) -> None:
        """Start ``step`` (a stable id such as ``read`` or ``check.key-conflict``)."""
        self._end()
        self.per_step_memory = _reset_peak() and self.per_step_memory
        self._t_open = time.perf_counter()
        self._open = {"id": step, "what": what, "rows": None if rows is None else int(rows),
                      "started_at": utc_stamp(datetime.now(UTC)),
                      "elapsed_seconds": round(self._t_open - self._t0, 6)}
        for sink in self.sinks:
            sink.started(self._open)

    def _end(self) -> None:
        if self._open is None:
            return
        step = {**self._open, "wall_seconds": round(time.perf_counter() - self._t_open, 6),
                "peak_rss_bytes": _peak_bytes(self.per_step_memory)}
        self._open = None
        self.steps.append(step)
        for sink in self.sinks:
            sink.ended(step)

    def concurrent(self, step: str, what: str, rows: int | None, started_at: str,
                   began: float, seconds: float) -> None:
        """Record a step that ran in a thread of its own, beside the steps since it began.

        ``began`` is its start on ``time.perf_counter``.  Its peak is the
        process's over that time (the largest peak of the steps that ran
        beside it, and of the open step so far): the memory of two threads
        is not told apart.
        """
        elapsed = began - self._t0
        beside = [s["peak_rss_bytes"] for s in self.steps
                  if s["elapsed_seconds"] + s["wall_seconds"] >= elapsed]
        record = {"id": step, "what": what, "rows": None if rows is None else int(rows),
                  "started_at": started_at, "elapsed_seconds": round(elapsed, 6),
                  "wall_seconds": round(seconds, 6),
                  "peak_rss_bytes": max([*beside, _peak_bytes(self.per_step_memory)])}
        self.steps.append(record)
        for sink in self.sinks:
            sink.ended(record)

    def settle(self) -> None:
        """End the open step and take any live display (the bar) off the screen, before
        other lines are printed."""
        self._end()
        for sink in self.sinks:
            sink.stop()

    def finish(self, **summary: Any) -> None:
        """End the last step and tell the sinks how the run ended (``verdict``, ``exit_code``...)."""
        self._end()
        done = {"duration_seconds": round(self.elapsed(), 6), **summary}
        for sink in self.sinks:
            sink.finished(done)
        self.sinks = []

    def block(self, options: dict[str, Any], inferred: dict[str, Any],
              input_sha256: str | None, fixed: dict[str, Any] | None = None) -> dict[str, Any]:
        """The ``run`` block of a report, as of now: the steps ended so far."""
        return {
            "started_at": utc_stamp(self.started),
            "duration_seconds": round(self.elapsed(), 6),
            "argv": self.argv,
            "options": options,
            "inferred": inferred,
            "fixed_settings": fixed or {},
            "versions": library_versions(),
            "input_sha256": input_sha256,
            "memory_measure": "per-step" if self.per_step_memory else "process-peak",
            "steps": [dict(s) for s in self.steps],
        }


class PlainLines:
    """``2026-12-03T09:14:05.123Z panelprep +1.2s index: indexing 1,000 rows (1,000 rows)``."""

    def __init__(self, stream: TextIO) -> None:
        self.stream = stream

    def started(self, step: dict[str, Any]) -> None:
        rows = "" if step["rows"] is None else f" ({step['rows']:,} rows)"
        print(f"{step['started_at']} panelprep +{step['elapsed_seconds']:.1f}s "
              f"{step['id']}: {step['what']}{rows}", file=self.stream, flush=True)

    def ended(self, step: dict[str, Any]) -> None:
        return None

    def finished(self, summary: dict[str, Any]) -> None:
        return None

    def stop(self) -> None:
        return None


class JsonLines:
    """One JSON object per line: ``{"event": "step", ...}`` per ended step, then ``end`` or ``error``."""

    def __init__(self, stream: TextIO) -> None:
        self.stream = stream

    def _write(self, record: dict[str, Any]) -> None:
        print(json.dumps(record, ensure_ascii=False, allow_nan=False), file=self.stream,
              flush=True)

    def started(self, step: dict[str, Any]) -> None:
        return None

    def ended(self, step: dict[str, Any]) -> None:
        self._write({"event": "step", **step})

    def finished(self, summary: dict[str, Any]) -> None:
        self._write({"event": "error" if "message" in summary else "end",
                     "at": utc_stamp(datetime.now(UTC)), **summary})

    def stop(self) -> None:
        return None


class Bar:
    """A rich progress bar on stderr (a terminal): the current step, steps done, elapsed time."""

    def __init__(self, stream: TextIO) -> None:
        from rich.console import Console
        from rich.progress import BarColumn, Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

        self.progress = Progress(SpinnerColumn(), TextColumn("{task.description}"), BarColumn(),
                                 TextColumn("{task.completed} steps"), TimeElapsedColumn(),
                                 console=Console(file=stream), transient=True)
        self.task = self.progress.add_task("panelprep", total=None)
        self.progress.start()

    def started(self, step: dict[str, Any]) -> None:
        rows = "" if step["rows"] is None else f" ({step['rows']:,} rows)"
        self.progress.update(self.task, description=f"{step['id']}: {step['what']}{rows}")

    def ended(self, step: dict[str, Any]) -> None:
        self.progress.advance(self.task)

    def finished(self, summary: dict[str, Any]) -> None:
        self.stop()

    def stop(self) -> None:
        self.progress.stop()


def stderr_log(mode: str, quiet: bool, log_json: bool, argv: Sequence[str] | None) -> RunLog:
    """The run log a command tells on stderr.

    ``mode`` is ``auto`` (a bar on a terminal, plain lines otherwise),
    ``bar``, ``plain`` or ``none``; ``quiet`` means none.  ``log_json``
    writes JSON lines and nothing else on stderr, so it replaces the
    progress display.
    """
    if mode not in PROGRESS_MODES:
        raise ValueError(mode)
    stream = sys.stderr
    if log_json:
        return RunLog([JsonLines(stream)], argv)
    if quiet or mode == "none":
        return RunLog([], argv)
    if mode == "auto":
        mode = "bar" if stream.isatty() else "plain"
    return RunLog([Bar(stream) if mode == "bar" else PlainLines(stream)], argv)
