"""The ``backfill`` flow (a range of as_of dates, sequential by date) and the ``demo`` job."""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Any

from prefect import flow, get_run_logger

from tallywave.flows.daily import run_one
from tallywave.flows.runners import make_task_runner
from tallywave.pipeline import store
from tallywave.pipeline.errors import UserError
from tallywave.pipeline.settings import load_settings


def _backfill(start: str, end: str, db: str | None = None, settings: str | None = None,
              report: bool = False, report_dir: str = "reports",
              step_days: int = 1) -> dict[str, Any]:
    d0, d1 = dt.date.fromisoformat(start), dt.date.fromisoformat(end)
    con = store.connect(db)
    log = get_run_logger()
    runs = []
    try:
        day = d0
        while day <= d1:
            last = day + dt.timedelta(days=step_days) > d1
            r = run_one(con, day, settings, report=report and last, report_dir=report_dir)
            runs.append(r["run_id"])
            log.info(f"backfill {day}: {r['line']}")
            day += dt.timedelta(days=step_days)
        from tallywave.pipeline.scoring import score

        final = score(con, None, load_settings(settings))
    finally:
        con.close()
    return {"runs": runs, "line": f"backfilled {len(runs)} as-of dates {d0}..{d1}; "
                                  f"{final['line']}"}


backfill_flow = flow(name="tallywave-backfill", log_prints=True)(_backfill)


def backfill(*, start: str, end: str, db: str | None = None, settings: str | None = None,
             runner: str = "local", address: str | None = None, report: bool = False,
             report_dir: str = "reports") -> dict[str, Any]:
    """Run the backfill flow with the chosen task runner (the CLI's ``backfill``)."""
    f = backfill_flow.with_options(task_runner=make_task_runner(runner, address))
    return f(start=start, end=end, db=db, settings=settings, report=report,
             report_dir=report_dir)


def demo(*, feeds: str = "sample_feeds", db: str | None = None, days: int = 21,
         settings: str | None = None, runner: str = "local",
         report_dir: str = "reports") -> dict[str, Any]:
    """The demo job: make the invented scenario if missing, ingest it, backfill, score, report."""
    from tallywave.pipeline.ingest import ingest_spec
    from tallywave.pipeline.simulate import DEMO_SNAPSHOTS, DEMO_WINDOW, write_scenario

    spec = Path(feeds) / "feeds.toml"
    if not spec.exists():
        write_scenario(feeds, n_snapshots=DEMO_SNAPSHOTS, window=DEMO_WINDOW)
    con = store.connect(db)
    try:
        summary = ingest_spec(con, spec)
        last = con.execute("SELECT max(as_of) FROM core.observations").fetchall()[0][0]
        if last is None:
            raise UserError(f"{spec}: the demo feeds hold no data")
    finally:
        con.close()
    s = load_settings(settings)
    horizon = int(s.get("horizon_days"))
    settle = int(s.get("settle_days"))
    # Issue dates early enough that every horizon has settled truth by the last as_of.
    start = last - dt.timedelta(days=horizon + settle + days // 2)
    end = min(start + dt.timedelta(days=days - 1), last)
    bf = backfill(start=start.isoformat(), end=end.isoformat(), db=db, settings=settings,
                  runner=runner, report=False)
    # ... and today's run, whose report is the morning's product.
    from tallywave.flows.daily import daily

    today = daily(as_of=last.isoformat(), db=db, settings=settings, runner=runner,
                  report=True, report_dir=report_dir)
    con = store.connect(db, read_only=True)
    try:
        acc = con.execute(
            "SELECT model, signal, horizon_days AS h, n, round(mean_wis, 2) AS mean_wis, "
            "round(rel_wis, 3) AS rel_wis, round(coverage_50, 2) AS cov50, "
            "round(coverage_90, 2) AS cov90, round(bias, 3) AS bias FROM out.accuracy "
            "WHERE horizon_days IN (1, 7, 14, 21, 28) ORDER BY signal, h, model").df()
    finally:
        con.close()
    text = "\n".join([
        f"ingest: {summary.line()}",
        bf["line"],
        today["line"],
        "",
        "Forecast accuracy (selected horizons; all in out.accuracy):",
        acc.to_string(index=False) if len(acc) else "(no settled forecasts yet)",
        "",
        f"database: {store.db_path(db)}",
        f"report: {today.get('report')}",
        "Model output, uncertain: read it with local epidemiological judgement and guidance.",
    ])
    return {"text": text, "report": today.get("report")}
