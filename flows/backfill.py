"""The ``backfill`` flow (a range of as_of dates, sequential by date) and the ``demo`` job."""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Any

import pandas as pd
from prefect import flow, get_run_logger

from tallywave.flows import console
from tallywave.flows.daily import open_db, run_one
from tallywave.flows.runners import make_task_runner
from tallywave.pipeline import store
from tallywave.pipeline.errors import UserError
from tallywave.pipeline.settings import load_settings


def _backfill(start: str, end: str, db: str | None = None, settings: str | None = None,
              report: bool = False, report_dir: str = "reports",
              step_days: int = 1) -> dict[str, Any]:
    d0, d1 = dt.date.fromisoformat(start), dt.date.fromisoformat(end)
    days = [d0 + dt.timedelta(days=k) for k in range(0, (d1 - d0).days + 1, step_days)]
    con = open_db(db)
    log = get_run_logger()
    show = console.current()
    runs = []
    show.begin_dates(len(days))
    try:
        for day in days:
            r = run_one(con, day, settings, report=report and day == days[-1],
                        report_dir=report_dir)
            runs.append(r["run_id"])
            log.info(f"backfill {day}: {r['line']}")
            show.date_done(day)
        from tallywave.pipeline.scoring import score

        final = score(con, None, load_settings(settings))
    finally:
        show.end_dates()
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

    show = console.current()
    spec = Path(feeds) / "feeds.toml"
    if not spec.exists():
        with show.step(f"writing the invented demo scenario to {feeds} …"):
            write_scenario(feeds, n_snapshots=DEMO_SNAPSHOTS, window=DEMO_WINDOW)
    con = store.connect(db)
    try:
        with show.step(f"ingesting {spec} …"):
            summary = ingest_spec(con, spec)
        show.line(f"ingest: {summary.line()}")
        first, last = con.execute("SELECT min(as_of), max(as_of) FROM core.observations"
                                  ).fetchall()[0]
        if last is None:
            raise UserError(f"{spec}: the demo feeds hold no data")
    finally:
        con.close()
    s = load_settings(settings)
    horizon = int(s.get("horizon_days"))
    settle = int(s.get("settle_days"))
    # Issue dates early enough that every horizon has settled truth by the last as_of.
    # (never before the feeds' first snapshot: a short feed history backfills what it has)
    start = max(first, last - dt.timedelta(days=horizon + settle + days // 2))
    end = min(start + dt.timedelta(days=days - 1), last)
    bf = backfill(start=start.isoformat(), end=end.isoformat(), db=db, settings=settings,
                  runner=runner, report=False)
    show.line(bf["line"])
    # ... and today's run, whose report is the morning's product.
    from tallywave.flows.daily import daily

    today = daily(as_of=last.isoformat(), db=db, settings=settings, runner=runner,
                  report=True, report_dir=report_dir)
    con = store.connect(db, read_only=True)
    try:
        acc = con.execute(
            "SELECT signal, horizon_days AS h, model, rel_wis FROM out.accuracy "
            "WHERE list_contains(?::INTEGER[], horizon_days) ORDER BY signal, h, model",
            [list(DEMO_HORIZONS)]).df()
    finally:
        con.close()
    lines = [f"ingest: {summary.line()}", bf["line"], today["line"]]
    text = "\n".join([
        f"published run {today['run_id']} (as of {today['as_of']}) in {today['seconds']:.1f} s",
        "",
        ("Forecast accuracy: relative WIS by model (< 1 beats the baseline; all horizons, "
         "coverage and bias in out.accuracy):"),
        accuracy_table(acc),
        "",
        f"database: {store.db_path(db)}",
        f"report: {today.get('report')}",
        "Model output, uncertain: read it with local epidemiological judgement and guidance.",
    ])
    return {"text": text, "lines": lines, "report": today.get("report")}


#: Horizons (days) of the demo's accuracy summary.
DEMO_HORIZONS = (7, 14, 28)


def accuracy_table(acc: pd.DataFrame) -> str:
    """Relative WIS as a small signal × horizon by model table (one line per signal and
    horizon, so the demo's console stays short)."""
    if acc.empty:
        return "(no settled forecasts yet)"
    wide = acc.pivot_table(index=["signal", "h"], columns="model", values="rel_wis",
                           aggfunc="first")
    wide.columns.name = None
    return wide.round(3).reset_index().to_string(index=False, na_rep="-")
