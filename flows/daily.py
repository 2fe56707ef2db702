"""The ``daily`` Prefect flow: ingest → vintages → clean → nowcast → Rt → forecast → publish →
score → report, for one as_of.  Thin: every step is a ``pipeline`` function."""

from __future__ import annotations

import datetime as dt
import os
from collections.abc import Callable
from pathlib import Path
from typing import Any

from prefect import flow, get_run_logger, task
from prefect.cache_policies import NO_CACHE
from prefect.tasks import exponential_backoff

from tallywave.flows import console
from tallywave.flows.runners import make_task_runner, prefect_mapper
from tallywave.pipeline import store
from tallywave.pipeline.ingest import ingest_spec
from tallywave.pipeline.run import execute_run
from tallywave.pipeline.settings import load_settings

os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")


@task(name="ingest-feed", cache_policy=NO_CACHE, retries=3,
      retry_delay_seconds=exponential_backoff(backoff_factor=2))
def ingest_feed(con: Any, spec: str) -> str:
    """Ingest one feed spec's new files (retried with back-off: feeds can be flaky)."""
    summary = ingest_spec(con, spec, update_vintages=False)
    return f"{spec}: {summary.line()}"


def _logger_say() -> Callable[[str], None]:
    """Progress messages go to the flow's log (file, Prefect UI) and to the command's console."""
    log = get_run_logger()
    show = console.current().message

    def say(msg: str) -> None:
        log.info(msg)
        show(msg)

    return say


#: Connections a command opened before starting a flow, by resolved database path.
_HANDED: dict[Path, Any] = {}


def hand_over(db: str | None, con: Any) -> None:
    """Give the next flow on ``db`` a connection the command already holds: the write lock is
    then taken before Prefect starts, so a second command waiting for it fails (exit 3) in one
    line instead of inside a flow."""
    _HANDED[store.db_path(db).resolve()] = con


def release(db: str | None) -> None:
    """Close a handed-over connection no flow took (the flow failed to start)."""
    con = _HANDED.pop(store.db_path(db).resolve(), None)
    if con is not None:
        con.close()


def open_db(db: str | None) -> Any:
    """The handed-over connection of ``db`` if any, else a new one (the flow closes it)."""
    con = _HANDED.pop(store.db_path(db).resolve(), None)
    return con if con is not None else store.connect(db)


def run_one(con: Any, as_of: dt.date, settings_path: str | None, *, specs: list[str] | None = None,
            report: bool = True, report_dir: str = "reports") -> dict[str, Any]:
    """Body shared by the daily and backfill flows: ingest, run all stages, score, report."""
    say = _logger_say()
    for spec in specs or []:
        say(ingest_feed(con, spec))
    if specs:
        from tallywave.pipeline.vintages import update_observations

        say(f"vintages: {update_observations(con)}")
    settings = load_settings(settings_path)
    result = execute_run(con, as_of, settings, mapper=prefect_mapper, progress=say)
    if report:
        from tallywave.pipeline.report import write_report

        result["report"] = str(write_report(con, as_of=as_of, out_dir=report_dir))
        say(f"report: {result['report']}")
    if settings.get("prune_after_run"):
        from tallywave.pipeline.retention import prune_connection

        pruned = prune_connection(con, int(settings.get("retention_days")))
        say(f"retention: dropped the intermediate outputs of {len(pruned['plan'])} run(s), "
            f"{pruned['rows']:,} rows")
    return result


def _daily(as_of: str | None = None, db: str | None = None, specs: list[str] | None = None,
           settings: str | None = None, report: bool = True,
           report_dir: str = "reports") -> dict[str, Any]:
    day = dt.date.fromisoformat(as_of) if as_of else dt.date.today()
    con = open_db(db)
    try:
        result = run_one(con, day, settings, specs=specs, report=report, report_dir=report_dir)
    finally:
        con.close()
    return {"run_id": result["run_id"], "line": result["line"], "report": result.get("report"),
            "as_of": str(result["as_of"]), "seconds": result["seconds"]}


daily_flow = flow(name="tallywave-daily", log_prints=True)(_daily)


def daily(*, as_of: str | None = None, db: str | None = None, specs: list[str] | None = None,
          settings: str | None = None, runner: str = "local", address: str | None = None,
          report: bool = True, report_dir: str = "reports") -> dict[str, Any]:
    """Run the daily flow once with the chosen task runner (the CLI's ``run``)."""
    f = daily_flow.with_options(task_runner=make_task_runner(runner, address))
    return f(as_of=as_of, db=db, specs=specs or [], settings=settings, report=report,
             report_dir=report_dir)


def build_deployment(*, cron: str, timezone: str = "UTC", db: str | None = None,
                     specs: list[str] | None = None, settings: str | None = None,
                     runner: str = "local", address: str | None = None) -> Any:
    """The scheduled deployment of the daily flow (``tallywave serve``), not yet served."""
    from prefect.schedules import Cron

    f = daily_flow.with_options(task_runner=make_task_runner(runner, address))
    return f.to_deployment(
        name="tallywave-daily",
        schedules=[Cron(cron, timezone=timezone)],
        parameters={"db": str(store.db_path(db)), "specs": specs or [], "settings": settings},
        description="Tallywave daily run: ingest, nowcast, Rt, forecasts, scores, report.",
    )


def serve_daily(**kwargs: Any) -> None:
    """Serve the daily deployment on its cron schedule (blocks until interrupted)."""
    from prefect import serve

    serve(build_deployment(**kwargs))
