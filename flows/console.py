"""What the terminal shows while a flow runs, and where everything else goes.

By default the terminal gets one line per finished stage of a run and one progress bar for a
backfill (on a terminal the bar redraws in place; in a file or pipe — cron, CI — it becomes at
most :data:`PIPE_STEPS` lines), then the command's summary.  Prefect's orchestration log (a line
per task run, server messages, warnings) goes to a log file beside the database,
``<db folder>/logs/tallywave-YYYY-MM-DD.log``, whose path the command prints at the end.
``--verbose`` keeps Prefect's console log as well.  The bar is drawn with ``rich``, which Prefect
already installs.
"""

from __future__ import annotations

import datetime as dt
import logging
import re
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any, TextIO

from tallywave.pipeline import store

LOG_DIR = "logs"
#: Lines a backfill prints at most when the output is not a terminal.
PIPE_STEPS = 5
#: A temporary-server start-up slower than this is mentioned on the console.
SLOW_START_S = 30.0

_STAGE = re.compile(r"^\[(?P<day>[0-9-]+)\] (?P<stage>[a-z_]+)(?P<rest> \.\.\.|: .*)$")
_LOG_FORMAT = "%(asctime)s | %(levelname)-7s | %(name)s - %(message)s"
_DATE_FORMAT = "%Y-%m-%d %H:%M:%S"


def log_path(db: str | None, day: dt.date | None = None) -> Path:
    """Today's log file of the database ``db``: ``<db folder>/logs/tallywave-<date>.log``."""
    folder = store.db_path(db).resolve().parent / LOG_DIR
    return folder / f"tallywave-{(day or dt.date.today()).isoformat()}.log"


def route_logs(path: Path, *, verbose: bool = False) -> Path:
    """Send every log record (Prefect's, Dask's, warnings) to ``path``; unless ``verbose``,
    take Prefect's console handlers off the terminal.  Returns ``path``."""
    from prefect.logging import configuration
    from prefect.logging.formatters import PrefectFormatter

    if not configuration.PROCESS_LOGGING_CONFIG:  # Prefect's set-up first, then adjusted here
        configuration.setup_logging()

    path.parent.mkdir(parents=True, exist_ok=True)
    handler = logging.FileHandler(path, encoding="utf-8")
    handler.setLevel(logging.INFO)
    handler.setFormatter(PrefectFormatter(
        _LOG_FORMAT, _DATE_FORMAT,
        flow_run_fmt="%(asctime)s | %(levelname)-7s | flow run %(flow_run_name)r - %(message)s",
        task_run_fmt="%(asctime)s | %(levelname)-7s | task run %(task_run_name)r - %(message)s"))
    handler.set_name("tallywave-log-file")
    root = logging.getLogger()
    for old in [h for h in root.handlers if h.get_name() == handler.get_name()]:
        root.removeHandler(old)  # a second command in the same process: one file at a time
        old.close()
    root.addHandler(handler)
    logging.getLogger("tallywave").setLevel(logging.INFO)
    if verbose:
        return path
    logging.captureWarnings(True)
    for logger in [root, *(lg for lg in logging.root.manager.loggerDict.values()
                           if isinstance(lg, logging.Logger))]:
        for h in list(logger.handlers):
            if _is_console(h):
                logger.removeHandler(h)
                if logger is not root and not logger.propagate:
                    logger.addHandler(handler)
    return path


def _is_console(h: logging.Handler) -> bool:
    stream = getattr(h, "stream", None)
    return (isinstance(h, logging.StreamHandler) and not isinstance(h, logging.FileHandler)
            and stream in (sys.stdout, sys.stderr, sys.__stdout__, sys.__stderr__))


class Console:
    """The terminal side of a command: stage lines, a backfill bar, notes."""

    def __init__(self, stream: TextIO | None = None, *, verbose: bool = False,
                 live: bool | None = None) -> None:
        self.stream = stream or sys.stdout
        self.verbose = verbose  # Prefect prints everything itself: stay silent
        self.live = (not verbose and bool(getattr(self.stream, "isatty", lambda: False)())
                     if live is None else live)
        self._rich: Any = None
        self._status: Any = None
        self._bar: Any = None
        self._task: Any = None
        self._dates = 0
        self._done = 0
        self._t0 = 0.0
        self._last_bucket = 0
        self._label = "backfill"

    # -- output primitives ------------------------------------------------------------------

    def _console(self) -> Any:
        if self._rich is None:
            from rich.console import Console as RichConsole

            self._rich = RichConsole(file=self.stream, highlight=False, soft_wrap=True)
        return self._rich

    def line(self, text: str) -> None:
        """Print one line (above the bar or status line when they are shown)."""
        if self.verbose:
            return
        if self.live:
            self._console().print(text, markup=False)
        else:  # not print(): flows with log_prints=True would turn it into a log record
            self.stream.write(text + "\n")
            self.stream.flush()

    def _show_status(self, text: str) -> None:
        if not self.live or self._bar is not None:
            return
        if self._status is None:
            self._status = self._console().status(text, spinner="line")
            self._status.start()
        else:
            self._status.update(text)

    def _clear_status(self) -> None:
        if self._status is not None:
            self._status.stop()
            self._status = None

    @contextmanager
    def step(self, text: str) -> Iterator[None]:
        """A transient status line on a terminal while something slow happens."""
        self._show_status(text)
        try:
            yield
        finally:
            self._clear_status()

    # -- what flows report ------------------------------------------------------------------

    def message(self, msg: str) -> None:
        """A flow's progress message: a finished stage becomes a line (a run) or moves the
        bar's label (a backfill); a stage starting shows on the status line."""
        if self.verbose:
            return
        m = _STAGE.match(msg)
        if m is None:
            if msg.startswith("no data published after"):
                self.line(msg)
            return
        label = f"{m['day']} {m['stage']}"
        if self._dates:
            if self._bar is not None:
                self._bar.update(self._task, description=label)
            return
        if m["rest"] == " ...":
            self._show_status(f"{label} …")
        else:
            self._clear_status()
            self.line(msg)

    def begin_dates(self, n: int, label: str = "backfill") -> None:
        """A backfill of ``n`` as-of dates starts: one bar instead of a line per stage."""
        if self.verbose or n <= 0:
            return
        self._dates, self._done, self._t0, self._last_bucket = n, 0, time.monotonic(), 0
        self._label = label
        if self.live:
            from rich.progress import (
                BarColumn,
                MofNCompleteColumn,
                Progress,
                TextColumn,
                TimeElapsedColumn,
            )

            self._bar = Progress(TextColumn(f"{label} "), BarColumn(), MofNCompleteColumn(),
                                 TextColumn("as-of dates"), TimeElapsedColumn(),
                                 TextColumn("{task.description}"), console=self._console())
            self._task = self._bar.add_task("", total=n)
            self._bar.start()

    def date_done(self, day: dt.date) -> None:
        """One as-of date of the backfill is published."""
        if not self._dates:
            return
        self._done += 1
        if self._bar is not None:
            self._bar.update(self._task, completed=self._done, description=str(day))
            return
        bucket = self._done * PIPE_STEPS // self._dates  # at most PIPE_STEPS lines
        if bucket > self._last_bucket:
            self._last_bucket = bucket
            self.line(f"{self._label}: {self._done}/{self._dates} as-of dates done "
                      f"(up to {day}, {time.monotonic() - self._t0:.0f} s)")

    def end_dates(self) -> None:
        """The backfill is over (finished or failed): remove the bar."""
        if self._bar is not None:
            self._bar.stop()
            self._bar = None
        self._dates = 0

    def close(self) -> None:
        """Stop anything still drawn."""
        self.end_dates()
        self._clear_status()


class _Silent(Console):
    """The console when no command set one up (tests, ``serve``'s flow runs): prints nothing."""

    def line(self, text: str) -> None:
        return

    def _show_status(self, text: str) -> None:
        return

    def begin_dates(self, n: int, label: str = "backfill") -> None:
        return


_ACTIVE: Console = _Silent()


def current() -> Console:
    """The console flows report to (silent unless a command activated one)."""
    return _ACTIVE


@contextmanager
def active(console: Console) -> Iterator[Console]:
    """Make ``console`` the one flows report to for the duration of a command."""
    global _ACTIVE
    previous, _ACTIVE = _ACTIVE, console
    try:
        yield console
    finally:
        console.close()
        _ACTIVE = previous
