"""The ``tallywave`` command: the analyst's entry point to every stage.

User mistakes (bad file, option, SQL) print one line ``tallywave: error: ...`` and exit non-zero
without a traceback.  Exit codes: 0 ok · 1 unexpected internal error · 2 user error (input,
option, file) · 3 database in use by another process · 4 a run failed and nothing was published.
Set ``TALLYWAVE_DEBUG=1`` to see tracebacks.
"""

from __future__ import annotations

import argparse
import datetime as dt
import logging
import os
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any, NoReturn

from tallywave.pipeline.errors import RunFailed, UserError

DEMO_DIR = "sample_feeds"
DEMO_SPEC = "feeds.toml"


def _date(text: str) -> dt.date:
    try:
        return dt.date.fromisoformat(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"'{text}' is not a date (expected YYYY-MM-DD)") from None


def _seconds(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        value = float("nan")
    if not value >= 0 or value == float("inf"):
        raise argparse.ArgumentTypeError(f"'{text}' is not a number of seconds >= 0")
    return value


def _check_database(db: str | None) -> None:
    """Open and close the database before Prefect starts: a busy or unusable file then fails
    in one line (exit 3 / 2) instead of a flow traceback after the server start-up."""
    from tallywave.pipeline import store

    store.connect(db).close()


#: The log file of this command once :func:`_orchestrated` routed the logs there.
_LOG: dict[str, Path] = {}


@contextmanager
def _orchestrated(args: argparse.Namespace) -> Iterator[Any]:
    """Around a command that runs flows: logs to the database's log file, the quiet console,
    and a Prefect API that answers before any work starts (exit 5 in one line if none)."""
    from tallywave.flows import console as tc
    from tallywave.flows.server import ensure_api

    verbose = bool(getattr(args, "verbose", False))
    path = tc.route_logs(tc.log_path(args.db), verbose=verbose)
    _LOG["path"] = path
    shown = tc.Console(verbose=verbose)
    with tc.active(shown):
        t0 = time.monotonic()
        with shown.step("starting Prefect …"):
            url = ensure_api(None if verbose else path)
        took = time.monotonic() - t0
        logging.getLogger("tallywave").info(f"Prefect API {url} ready after {took:.1f} s")
        if took > tc.SLOW_START_S:
            shown.line(f"note: the temporary Prefect server took {took:.0f} s to start; a "
                       "long-lived one avoids that (README: Operations)")
        yield shown


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> NoReturn:  # one line, exit 2, like every other user error
        raise UserError(f"{self.prog}: {message}")


def _verbose(p: argparse.ArgumentParser) -> None:
    p.add_argument("-v", "--verbose", action="store_true",
                   help="also print Prefect's orchestration log (always in the log file)")


def build_parser() -> argparse.ArgumentParser:
    """The command-line grammar (verbs and options are a contract: see design.md)."""
    p = _Parser(prog="tallywave", description=__doc__.splitlines()[0])
    p.add_argument("--db", help="DuckDB file (default ./tallywave.duckdb or $TALLYWAVE_DB)")
    p.add_argument("--wait", type=_seconds, default=None, metavar="SECONDS",
                   help="how long to wait for a database another process is using, then exit 3 "
                        "(default 30 or $TALLYWAVE_LOCK_WAIT)")
    sub = p.add_subparsers(dest="verb", required=True, parser_class=_Parser)

    d = sub.add_parser("demo", help="build the demo feeds if missing, ingest, backfill, report")
    d.add_argument("--feeds", default=DEMO_DIR, help="demo feed folder (default sample_feeds)")
    d.add_argument("--days", type=int, default=21, help="as-of dates to backfill (default 21)")
    d.add_argument("--settings", help="settings TOML")
    d.add_argument("--runner", default="local", choices=["local", "threads", "processes", "dask"])
    _verbose(d)

    s = sub.add_parser("simulate", help="write a synthetic scenario's feeds and truth")
    s.add_argument("--out", default=DEMO_DIR, help="output folder (default sample_feeds)")
    s.add_argument("--regions", type=int, default=10)
    s.add_argument("--days", type=int, default=200)
    s.add_argument("--snapshots", type=int, default=90, help="daily snapshots (default 90)")
    s.add_argument("--window", type=int, default=35, help="ref dates per snapshot (default 35)")
    s.add_argument("--seed", type=int, default=20260302)
    s.add_argument("--start", type=_date, default=dt.date(2026, 3, 2))

    i = sub.add_parser("ingest", help="ingest the files of a feed spec")
    i.add_argument("spec", help="feed spec TOML")

    for name, helptext in (("run", "all stages for one as-of date"),):
        r = sub.add_parser(name, help=helptext)
        r.add_argument("--as-of", type=_date, default=None, help="default: today")
        r.add_argument("--settings")
        r.add_argument("--spec", action="append", default=[], help="feed spec(s) to ingest first")
        r.add_argument("--runner", default="local", choices=["local", "threads", "processes", "dask"])
        r.add_argument("--address", help="existing Dask scheduler, tcp://host:port")
        r.add_argument("--no-report", action="store_true", help="skip the HTML report")
        _verbose(r)

    b = sub.add_parser("backfill", help="run every as-of date in a range, then score")
    b.add_argument("--start", type=_date, required=True)
    b.add_argument("--end", type=_date, required=True)
    b.add_argument("--settings")
    b.add_argument("--runner", default="local", choices=["local", "threads", "processes", "dask"])
    b.add_argument("--address", help="existing Dask scheduler, tcp://host:port")
    _verbose(b)

    sc = sub.add_parser("score", help="score every published forecast against the data now known")
    sc.add_argument("--as-of", type=_date, default=None, help="truth known on (default latest)")
    sc.add_argument("--settings")
    sc.add_argument("--full", action="store_true",
                    help="recompute every score (the default keeps the unchanged ones: same table)")

    q = sub.add_parser("sql", help="run a read-only SQL query and print the result")
    q.add_argument("query")
    q.add_argument("--max-rows", type=int, default=200)

    e = sub.add_parser("export", help="export a table or view to Parquet or CSV")
    e.add_argument("table", help="e.g. out.forecasts")
    e.add_argument("--to", required=True, help="file ending in .parquet or .csv")

    rp = sub.add_parser("report", help="write the HTML report of a published run")
    rp.add_argument("--as-of", type=_date, default=None, help="default: newest published run")
    rp.add_argument("--out", default="reports", help="report folder (default ./reports)")

    sv = sub.add_parser("serve", help="serve the daily flow on a cron schedule (Prefect)")
    sv.add_argument("--cron", required=True, help='e.g. "0 7 * * *"')
    sv.add_argument("--timezone", default="UTC")
    sv.add_argument("--spec", action="append", default=[], help="feed spec(s) to ingest")
    sv.add_argument("--settings")
    sv.add_argument("--runner", default="local", choices=["local", "threads", "processes", "dask"])
    sv.add_argument("--address")

    pr = sub.add_parser("prune", help="drop superseded and old runs' intermediate outputs "
                                      "(retention); forecasts and fits stay")
    pr.add_argument("--keep-days", type=int, default=None, metavar="DAYS",
                    help="keep every output of runs this many days before the newest published "
                         "run (default: setting retention_days)")
    pr.add_argument("--settings")
    pr.add_argument("--dry-run", action="store_true", help="say what would go, change nothing")
    pr.add_argument("--compact", action="store_true",
                    help="also rewrite the file so it shrinks on disk (needs room for a copy)")

    cl = sub.add_parser("clean", help="run only the cleaning stage for one as-of date (no run)")
    cl.add_argument("--as-of", type=_date, default=None)
    cl.add_argument("--settings")
    return p


# ---------------------------------------------------------------------------------------------

def cmd_simulate(args: argparse.Namespace) -> int:
    from tallywave.pipeline.simulate import write_scenario

    info = write_scenario(args.out, n_regions=args.regions, n_days=args.days,
                          n_snapshots=args.snapshots, window=args.window, seed=args.seed,
                          start=args.start.isoformat())
    print(f"wrote scenario to {args.out}: {info.get('n_files', '?')} files, "
          f"{info.get('bytes', 0) / 1e6:.1f} MB (feed spec {Path(args.out) / DEMO_SPEC})")
    return 0


def cmd_ingest(args: argparse.Namespace) -> int:
    from tallywave.pipeline import store
    from tallywave.pipeline.ingest import ingest_spec

    con = store.connect(args.db)
    summary = ingest_spec(con, args.spec)
    for f in summary.files:
        if f.status in ("failed", "partial", "empty"):
            print(f"{f.status}: {f.message}")
    print(summary.line())
    return 0 if not any(f.status == "failed" for f in summary.files) else 2


def cmd_sql(args: argparse.Namespace) -> int:
    from tallywave.pipeline.query import read_only_query

    df = read_only_query(args.db, args.query)
    import pandas as pd

    with pd.option_context("display.max_rows", args.max_rows, "display.max_columns", 50,
                           "display.width", 200):
        print(df.to_string(index=False, max_rows=args.max_rows) if len(df) else "(no rows)")
    return 0


def cmd_export(args: argparse.Namespace) -> int:
    from tallywave.pipeline.query import export_table

    n = export_table(args.db, args.table, args.to)
    print(f"exported {n} rows of {args.table} to {args.to}")
    return 0


def cmd_run(args: argparse.Namespace) -> int:
    from tallywave.pipeline import store

    as_of = args.as_of or dt.date.today()
    _check_database(args.db)  # busy or unusable: one line before Prefect starts
    with _orchestrated(args):
        from tallywave.flows.daily import daily, hand_over, release

        hand_over(args.db, store.connect(args.db))  # the lock is ours from here on
        try:
            result = daily(as_of=as_of.isoformat(), db=args.db, specs=args.spec,
                           settings=args.settings, runner=args.runner, address=args.address,
                           report=not args.no_report)
        finally:
            release(args.db)
    print(result["line"] if args.verbose else
          f"published run {result['run_id']} (as of {result['as_of']}) in "
          f"{result['seconds']:.1f} s")
    if result.get("report"):
        print(f"report: {result['report']}")
    print(f"log: {_LOG['path']}")
    return 0


def cmd_backfill(args: argparse.Namespace) -> int:
    from tallywave.pipeline import store

    if args.end < args.start:
        raise UserError("--end is before --start")
    _check_database(args.db)
    with _orchestrated(args):
        from tallywave.flows.backfill import backfill
        from tallywave.flows.daily import hand_over, release

        hand_over(args.db, store.connect(args.db))
        try:
            result = backfill(start=args.start.isoformat(), end=args.end.isoformat(),
                              db=args.db, settings=args.settings, runner=args.runner,
                              address=args.address)
        finally:
            release(args.db)
    print(result["line"])
    print(f"log: {_LOG['path']}")
    return 0


def cmd_score(args: argparse.Namespace) -> int:
    from tallywave.pipeline import store
    from tallywave.pipeline.scoring import score
    from tallywave.pipeline.settings import load_settings

    con = store.connect(args.db)
    summary = score(con, args.as_of, load_settings(args.settings), full=args.full)
    print(summary["line"])
    return 0


def cmd_report(args: argparse.Namespace) -> int:
    from tallywave.pipeline import store
    from tallywave.pipeline.report import write_report

    con = store.connect(args.db, read_only=True)
    path = write_report(con, as_of=args.as_of, out_dir=args.out)
    print(f"report: {path}")
    return 0


def cmd_clean(args: argparse.Namespace) -> int:
    from tallywave.pipeline import store
    from tallywave.pipeline.clean import clean
    from tallywave.pipeline.settings import load_settings

    con = store.connect(args.db)
    as_of = args.as_of or _latest_as_of(con)
    summary = clean(con, as_of, load_settings(args.settings), run_id=f"clean-{as_of}")
    print(summary["line"])
    return 0


def cmd_serve(args: argparse.Namespace) -> int:
    from tallywave.flows.daily import serve_daily

    args.verbose = True  # a service's console is its log: keep Prefect's lines there too
    with _orchestrated(args):
        serve_daily(cron=args.cron, timezone=args.timezone, db=args.db, specs=args.spec,
                settings=args.settings, runner=args.runner, address=args.address)
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    _check_database(args.db)
    with _orchestrated(args):
        from tallywave.flows.backfill import demo

        result = demo(feeds=args.feeds, db=args.db, days=args.days, settings=args.settings,
                      runner=args.runner)
    print(result["text"])
    print(f"log: {_LOG['path']}")
    return 0


def cmd_prune(args: argparse.Namespace) -> int:
    from tallywave.flows.console import LOG_DIR
    from tallywave.pipeline import store
    from tallywave.pipeline.retention import prune
    from tallywave.pipeline.settings import load_settings

    keep = args.keep_days
    if keep is None:
        keep = int(load_settings(args.settings).get("retention_days"))
    if keep < 0:
        raise UserError(f"--keep-days {keep}: must be 0 or more")
    summary = prune(store.db_path(args.db), keep_days=keep, dry_run=args.dry_run,
                    compact=args.compact, log_dir=store.db_path(args.db).resolve().parent
                    / LOG_DIR)
    print(summary["line"])
    return 0


def _latest_as_of(con) -> dt.date:
    v = con.execute("SELECT max(as_of) FROM core.observations").fetchall()[0][0]
    if v is None:
        raise UserError("no observations yet: ingest a feed spec first")
    return v


COMMANDS = {
    "simulate": cmd_simulate, "ingest": cmd_ingest, "sql": cmd_sql, "export": cmd_export,
    "run": cmd_run, "backfill": cmd_backfill, "score": cmd_score, "report": cmd_report,
    "serve": cmd_serve, "demo": cmd_demo, "clean": cmd_clean, "prune": cmd_prune,
}


def main(argv: list[str] | None = None) -> int:
    """Entry point of the console script."""
    os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
    debug = os.environ.get("TALLYWAVE_DEBUG") == "1"
    try:
        args = build_parser().parse_args(argv)
        if args.wait is not None:  # reaches every connection, the flows' included
            from tallywave.pipeline.store import LOCK_WAIT_ENV

            os.environ[LOCK_WAIT_ENV] = repr(args.wait)
        return COMMANDS[args.verb](args)
    except (UserError, RunFailed) as exc:
        if debug:
            raise
        msg = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        _log_failure(f"error: {msg}", exc if isinstance(exc, RunFailed) else None)
        print(f"tallywave: error: {msg}{_log_hint()}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("tallywave: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # an internal bug: still one line unless debugging
        if debug:
            raise
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
        _log_failure(f"internal error: {type(exc).__name__}: {first}", exc)
        where = f"traceback in {_LOG['path']}" if "path" in _LOG else \
            "set TALLYWAVE_DEBUG=1 for the traceback"
        print(f"tallywave: internal error: {type(exc).__name__}: {first[:300]} ({where})",
              file=sys.stderr)
        return 1
    finally:
        _LOG.clear()


def _log_failure(text: str, exc: BaseException | None) -> None:
    """Write a failure (and its traceback, if any) to the command's log file, if it has one."""
    if "path" in _LOG:
        logging.getLogger("tallywave").error(text, exc_info=exc)


def _log_hint() -> str:
    return f" (log: {_LOG['path']})" if "path" in _LOG else ""


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
