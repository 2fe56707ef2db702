"""Retention: bound the database's growth without losing anything a published forecast needs.

Every run writes its intermediate outputs again — the whole repaired history (``core.cleaned``),
the nowcast, R_t, growth and delay tables — about 90 MB a day at 3,000 regions.  ``tallywave
prune`` (or the setting ``prune_after_run``) deletes the intermediate rows of

* superseded runs (a later run of the same as-of date replaced them), failed runs, and rows of
  run ids with no ``out.runs`` record (``tallywave clean`` inspections);
* published runs whose as-of date is ``keep_days`` or more days before the newest published run.

It never touches ``raw.*``, ``core.observations``, ``core.regions``, ``out.runs``,
``out.forecasts``, ``out.fits`` or ``out.scores`` (everything needed to reproduce and score every
published forecast: the data as known on each date, the settings and code version of each run,
its forecasts and fitted parameters), nor any output of the newest published run.  A pruned run
keeps its ``out.runs`` row; ``out.pruned_runs`` says when and why its intermediate rows went, and
each table keeps its meaning (``core.cleaned`` holds the full series of every run it holds).

DuckDB reuses the space of deleted rows for later inserts but does not shrink the file; with
``compact=True`` (:func:`compact_file`) the database is copied into a fresh file
(``COPY FROM DATABASE``) that replaces the old one, so the file shrinks.
"""

from __future__ import annotations

import datetime as dt
import os
import time
from pathlib import Path
from typing import Any

import duckdb
import pandas as pd

from tallywave.pipeline import store
from tallywave.pipeline.errors import UserError

#: Per-run tables whose rows of superseded, unpublished and old runs are deleted.
PRUNED_TABLES = ("core.cleaned", "core.clean_actions", "core.weekday_effects", "out.delay_pmf",
                 "out.delay_drift", "out.delay_model", "out.nowcast", "out.rt", "out.growth")
#: Tables never pruned (listed for the README and the tests).
KEPT_TABLES = ("raw.feed_files", "raw.reports", "raw.rejected_rows", "core.observations",
               "core.regions", "core.vintaged_files", "out.runs", "out.forecasts", "out.fits",
               "out.scores")


def _newest_published(con: duckdb.DuckDBPyConnection) -> tuple[str, dt.date] | None:
    rows = con.execute(
        "SELECT run_id, as_of FROM out.runs WHERE status = 'published' "
        "ORDER BY as_of DESC, finished_at DESC NULLS LAST, started_at DESC LIMIT 1").fetchall()
    return (str(rows[0][0]), rows[0][1]) if rows else None


def prune_plan(con: duckdb.DuckDBPyConnection, keep_days: int) -> pd.DataFrame:
    """The runs whose intermediate rows would go: columns run_id, as_of, status, reason."""
    if keep_days < 0:
        raise UserError(f"retention: keep_days {keep_days} must be 0 or more")
    newest = _newest_published(con)
    held = " UNION ".join(f"SELECT DISTINCT run_id FROM {t}" for t in PRUNED_TABLES)
    cutoff = newest[1] - dt.timedelta(days=keep_days) if newest else None
    plan = con.execute(f"""
        SELECT h.run_id, r.as_of, r.status,
               CASE WHEN r.run_id IS NULL THEN 'no run record'
                    WHEN r.status IN ('superseded', 'failed') THEN r.status
                    WHEN r.status = 'published' AND h.run_id <> ? AND r.as_of <= ?
                         THEN 'older than {int(keep_days)} days'
               END AS reason
        FROM ({held}) h LEFT JOIN out.runs r USING (run_id)
        ORDER BY r.as_of NULLS FIRST, h.run_id""",
        [newest[0] if newest else "", cutoff]).df()
    return plan[plan["reason"].notna()].reset_index(drop=True)


def prune_connection(con: duckdb.DuckDBPyConnection, keep_days: int, *,
                     dry_run: bool = False) -> dict[str, Any]:
    """Delete the planned runs' intermediate rows in one transaction and record them in
    ``out.pruned_runs``; then CHECKPOINT so the freed space is reusable at once."""
    plan = prune_plan(con, keep_days)
    deleted: dict[str, int] = {}
    if plan.empty or dry_run:
        return {"plan": plan, "deleted": deleted, "rows": 0}
    con.register("_prune_plan", plan[["run_id", "reason"]])
    try:
        with store.transaction(con):
            con.execute("CREATE OR REPLACE TEMP TABLE _prune AS SELECT * FROM _prune_plan")
            per_run = {r: 0 for r in plan["run_id"]}
            for table in PRUNED_TABLES:
                counts = con.execute(f"SELECT run_id, count(*) FROM {table} "
                                     "WHERE run_id IN (SELECT run_id FROM _prune) "
                                     "GROUP BY run_id").fetchall()
                for run_id, n in counts:
                    per_run[run_id] += int(n)
                deleted[table] = sum(int(n) for _, n in counts)
                con.execute(f"DELETE FROM {table} WHERE run_id IN (SELECT run_id FROM _prune)")
            rows = pd.DataFrame({"run_id": list(per_run), "rows_deleted": list(per_run.values())})
            con.register("_prune_rows", rows)
            con.execute("""INSERT INTO out.pruned_runs (run_id, pruned_at, reason, rows_deleted)
                           SELECT p.run_id, now(), p.reason, r.rows_deleted
                           FROM _prune p JOIN _prune_rows r USING (run_id)""")
            con.unregister("_prune_rows")
            con.execute("DROP TABLE _prune")
    finally:
        con.unregister("_prune_plan")
    con.execute("CHECKPOINT")
    return {"plan": plan, "deleted": deleted, "rows": sum(deleted.values())}


def _file_mb(path: Path) -> float:
    wal = path.with_name(path.name + ".wal")
    return (path.stat().st_size + (wal.stat().st_size if wal.exists() else 0)) / 1e6


def compact_file(con: duckdb.DuckDBPyConnection, path: Path) -> None:
    """Copy the open database into a fresh file and put it in place of ``path`` (closes
    ``con``).  Other processes wait while the marker file of :func:`store.compaction_marker`
    exists, so none writes to the old file in between."""
    tmp = path.with_name(path.name + ".compact")
    for p in (tmp, tmp.with_name(tmp.name + ".wal")):
        p.unlink(missing_ok=True)
    name = con.execute("SELECT current_database()").fetchall()[0][0]
    counts = {t: con.execute(f"SELECT count(*) FROM {t}").fetchall()[0][0]
              for t in store.table_names(con) if _is_table(con, t)}
    con.execute(f"ATTACH '{str(tmp).replace(chr(39), chr(39) * 2)}' AS _compact")
    try:
        con.execute(f'COPY FROM DATABASE "{name}" TO _compact')
        copied = {t: con.execute(f"SELECT count(*) FROM _compact.{t}").fetchall()[0][0]
                  for t in counts}
    finally:
        con.execute("DETACH _compact")
    if copied != counts:  # pragma: no cover - a copy that lost rows is never put in place
        tmp.unlink(missing_ok=True)
        raise UserError(f"{path}: compaction copy differs from the database; nothing replaced")
    marker = store.compaction_marker(path)
    marker.write_text(f"{os.getpid()}\n")
    try:
        time.sleep(0.5)  # a process that checked for the marker just before sees the lock
        con.close()
        wal = path.with_name(path.name + ".wal")
        if wal.exists():  # pragma: no cover - a clean close leaves no WAL
            raise UserError(f"{path}: write-ahead log left after closing; not compacted")
        os.replace(tmp, path)
    finally:
        marker.unlink(missing_ok=True)


def _is_table(con: duckdb.DuckDBPyConnection, qualified: str) -> bool:
    schema, name = qualified.split(".", 1)
    return bool(con.execute("SELECT count(*) FROM information_schema.tables WHERE table_schema "
                            "= ? AND table_name = ? AND table_type = 'BASE TABLE'",
                            [schema, name]).fetchall()[0][0])


def prune_logs(log_dir: Path | None, keep_days: int, today: dt.date | None = None) -> int:
    """Delete ``tallywave-YYYY-MM-DD.log`` files older than ``keep_days`` days."""
    if log_dir is None or not log_dir.is_dir():
        return 0
    cutoff = (today or dt.date.today()) - dt.timedelta(days=keep_days)
    n = 0
    for p in log_dir.glob("tallywave-*.log"):
        try:
            day = dt.date.fromisoformat(p.stem.removeprefix("tallywave-"))
        except ValueError:
            continue
        if day < cutoff:
            p.unlink()
            n += 1
    return n


def prune(path: str | os.PathLike, *, keep_days: int, dry_run: bool = False,
          compact: bool = False, log_dir: Path | None = None) -> dict[str, Any]:
    """``tallywave prune``: apply the retention policy to the database file at ``path``."""
    db = Path(path)
    if not db.exists():
        raise UserError(f"{db}: no such database")
    before = _file_mb(db)
    con = store.connect(db)
    closed = False
    try:
        res = prune_connection(con, keep_days, dry_run=dry_run)
        if compact and not dry_run:
            compact_file(con, db)
            closed = True
    finally:
        if not closed:
            con.close()
    logs = 0 if dry_run else prune_logs(log_dir, keep_days)
    after = _file_mb(db)
    plan = res["plan"]
    reasons = ", ".join(f"{n} {r}" for r, n in plan["reason"].value_counts().items())
    what = "would drop" if dry_run else "dropped"
    if plan.empty:
        line = (f"nothing to drop (every run's outputs are within the last {keep_days} days or "
                f"already pruned); file {before:.1f} MB → {after:.1f} MB")
    else:
        line = (f"{what} the intermediate outputs of {len(plan)} run(s) ({reasons})"
                + ("" if dry_run else f": {res['rows']:,} rows")
                + f"; kept every run's forecasts and fits and all outputs of runs from the last "
                  f"{keep_days} days; file {before:.1f} MB → {after:.1f} MB")
    if not compact and not dry_run and res["rows"]:
        line += " (freed space is reused by later runs; --compact shrinks the file)"
    if logs:
        line += f"; {logs} old log file(s) removed"
    return {**res, "mb_before": before, "mb_after": after, "logs_removed": logs, "line": line}
