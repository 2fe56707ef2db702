"""One run = every stage for one as_of, published atomically, then scored.

All outputs of a run (cleaned series, nowcast, Rt, growth, fits, forecasts) are written inside one
DuckDB transaction and the ``out.runs`` row with status ``published`` is written last, inside the
same transaction: a failed or killed run leaves nothing visible.  Re-running an as_of creates a
new run and marks the earlier published run of that date ``superseded`` (history is kept, the
views and scoring use the newest published run per as_of).
"""

from __future__ import annotations

import datetime as dt
import json
import subprocess
import time
import uuid
from collections.abc import Callable
from pathlib import Path
from typing import Any

import duckdb

from tallywave.pipeline.errors import RunFailed, UserError
from tallywave.pipeline.frames import Mapper, serial_map
from tallywave.pipeline.settings import Settings
from tallywave.pipeline.store import transaction

Progress = Callable[[str], None]


def code_version() -> str:
    """Package version plus the git commit when running from a checkout."""
    from importlib.metadata import PackageNotFoundError, version

    try:
        v = version("tallywave")
    except PackageNotFoundError:  # pragma: no cover
        v = "unknown"
    try:
        sha = subprocess.run(
            ["git", "rev-parse", "--short", "HEAD"], cwd=Path(__file__).parent,
            capture_output=True, text=True, timeout=5, check=False,
        ).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        sha = ""
    return f"{v}+{sha}" if sha else v


def new_run_id(as_of: dt.date) -> str:
    """Readable, unique run id: the as_of date plus a random suffix."""
    return f"{as_of.isoformat()}-{uuid.uuid4().hex[:8]}"


def stages() -> list[tuple[str, Callable[..., dict]]]:
    """The stages of a run, in order (imported lazily so the CLI starts fast)."""
    from tallywave.pipeline.clean import clean
    from tallywave.pipeline.forecast import forecast
    from tallywave.pipeline.nowcast import nowcast
    from tallywave.pipeline.transmission import transmission

    return [("clean", clean), ("nowcast", nowcast), ("transmission", transmission),
            ("forecast", forecast)]


def _as_date(value: dt.date | str) -> dt.date:
    if isinstance(value, dt.date):
        return value
    try:
        return dt.date.fromisoformat(str(value))
    except ValueError:
        raise UserError(f"--as-of '{value}' is not a date (expected YYYY-MM-DD)") from None


def execute_run(
    con: duckdb.DuckDBPyConnection,
    as_of: dt.date | str,
    settings: Settings,
    *,
    mapper: Mapper = serial_map,
    progress: Progress | None = None,
    score_after: bool = True,
    _fail_in: str | None = None,
) -> dict[str, Any]:
    """Run every stage for ``as_of`` in one transaction and publish it; then score.

    ``_fail_in`` (tests only) raises inside the named stage to prove atomicity.
    """
    requested: dt.date = _as_date(as_of)
    say = progress or (lambda _msg: None)
    latest = con.execute("SELECT max(as_of) FROM core.observations WHERE as_of <= ?",
                         [requested]).fetchall()[0][0]
    if latest is None:
        raise UserError(f"no data known on {requested}: ingest feeds first "
                        "(or pick a later --as-of)")
    # A run describes the newest data it has: when no feed published on the requested date, the
    # run is made as of the latest snapshot (and says so) rather than inventing empty days.
    day: dt.date = min(requested, latest)
    if day < requested:
        say(f"no data published after {day}: running as of {day} "
            f"({(requested - day).days} day(s) before {requested})")
    run_id = new_run_id(day)
    started = dt.datetime.now()
    summaries: dict[str, Any] = {}
    t0 = time.perf_counter()
    try:
        with transaction(con):
            for name, fn in stages():
                t = time.perf_counter()
                say(f"[{day}] {name} ...")
                if _fail_in == name:
                    raise RuntimeError(f"injected failure in stage {name}")
                summaries[name] = fn(con, day, settings, run_id=run_id, mapper=mapper)
                summaries[name]["seconds"] = round(time.perf_counter() - t, 3)
                say(f"[{day}] {name}: {summaries[name].get('line', 'done')} "
                    f"({summaries[name]['seconds']:.1f} s)")
            _check_outputs(con, run_id, settings)
            skipped = {k: v.get("skipped") for k, v in summaries.items() if v.get("skipped")}
            con.execute("UPDATE out.runs SET status = 'superseded' "
                        "WHERE as_of = ? AND status = 'published'", [day])
            con.execute(
                "INSERT INTO out.runs VALUES (?, ?, ?, now(), 'published', ?, ?, ?, ?)",
                [run_id, day, started, settings.to_json(), code_version(),
                 json.dumps(skipped, default=str) if skipped else None,
                 "; ".join(f"{k}: {v.get('line', '')}" for k, v in summaries.items())],
            )
    except (UserError, RunFailed) as exc:
        _record_failure(con, run_id, day, started, settings, str(exc))
        raise
    except Exception as exc:
        msg = f"{type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''}"
        _record_failure(con, run_id, day, started, settings, msg)
        raise RunFailed(f"run {run_id} failed, nothing published ({msg[:300]})") from exc
    result: dict[str, Any] = {"run_id": run_id, "as_of": day, "stages": summaries,
              "seconds": round(time.perf_counter() - t0, 2)}
    if score_after:
        from tallywave.pipeline.scoring import score

        result["scoring"] = score(con, day, settings)
        say(f"[{day}] scoring: {result['scoring']['line']}")
    result["line"] = (f"published run {run_id} (as of {day}) in {result['seconds']:.1f} s: "
                      + "; ".join(f"{k} {v.get('line', '')}" for k, v in summaries.items()))
    return result


def _check_outputs(con: duckdb.DuckDBPyConnection, run_id: str, settings: Settings) -> None:
    """Refuse to publish a run in which a stage produced nothing at all for a signal it was asked
    to cover (every batch failed, or a setting made the stage skip it): a silent gap in the
    morning's tables is worse than a failed run that says why."""
    signals = [r[0] for r in con.execute(
        "SELECT DISTINCT signal FROM core.cleaned WHERE run_id = ? ORDER BY 1", [run_id]
    ).fetchall()]
    if not signals:
        return
    have_nowcast = {r[0] for r in con.execute(
        "SELECT DISTINCT signal FROM out.nowcast WHERE run_id = ?", [run_id]).fetchall()}
    have_fc = {(r[0], r[1]) for r in con.execute(
        "SELECT DISTINCT model, signal FROM out.forecasts WHERE run_id = ?", [run_id]).fetchall()}
    for signal in signals:
        if signal not in have_nowcast:
            raise RunFailed(f"run {run_id}: the nowcast stage produced nothing for signal "
                            f"'{signal}' (see out.runs.message); nothing published")
        for model in settings.get("models", signal):
            if model in ("baseline", "ensemble") and (model, signal) not in have_fc:
                raise RunFailed(f"run {run_id}: model '{model}' produced no forecasts for signal "
                                f"'{signal}'; nothing published")


def _record_failure(con: duckdb.DuckDBPyConnection, run_id: str, as_of: dt.date,
                    started: dt.datetime, settings: Settings, message: str) -> None:
    """Leave a trace of a failed run (no outputs) so the team sees it in ``out.runs``."""
    try:
        con.execute(
            "INSERT INTO out.runs VALUES (?, ?, ?, now(), 'failed', ?, ?, NULL, ?)",
            [run_id, as_of, started, settings.to_json(), code_version(), message[:1000]],
        )
    except duckdb.Error:  # pragma: no cover - the database itself is unusable
        pass
