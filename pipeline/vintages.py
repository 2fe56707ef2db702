"""Stage 2 — vintages: ``raw.reports`` → ``core.observations`` (append-only value history).

Every published snapshot tells what each (region, signal, ref_date) was worth on its ``as_of``.
Cumulative feeds are differenced within each snapshot; daily feeds are taken as they are.  A row
is kept only when the value differs from the previous vintage, so ``core.observations`` is the
full revision history in compact form, and :func:`observations_as_of` replays any past date.

Rules for cumulative feeds (documented in the README):
- the first reference date of a snapshot is only a base for differencing, except in the earliest
  snapshot of a series, where its cumulative total is the daily value of that date;
- a date absent from a snapshot but inside its date span gets daily value 0 in that vintage (its
  events are inside the next present date's increment); cleaning then sees the gap.
"""

from __future__ import annotations

import datetime as dt

import duckdb
import pandas as pd

from pipeline.store import transaction

_DAILY_SQL = """
WITH snap AS (
    SELECT source, region, signal, ref_date, as_of, value, value_kind, file_id
    FROM raw.reports
    WHERE signal IN (SELECT signal FROM _affected)
    QUALIFY row_number() OVER (PARTITION BY source, region, signal, as_of, ref_date
                               ORDER BY file_id DESC) = 1
),
cum AS (
    SELECT *,
        lag(value) OVER w AS prev_value,
        lag(ref_date) OVER w AS prev_ref,
        as_of = min(as_of) OVER (PARTITION BY source, region, signal) AS first_snapshot
    FROM snap WHERE value_kind = 'cumulative'
    WINDOW w AS (PARTITION BY source, region, signal, as_of ORDER BY ref_date)
),
daily AS (
    SELECT region, signal, ref_date, as_of, value, file_id FROM snap WHERE value_kind = 'daily'
    UNION ALL
    SELECT region, signal, ref_date, as_of,
           CASE WHEN prev_value IS NULL THEN value ELSE value - prev_value END, file_id
    FROM cum WHERE prev_value IS NOT NULL OR first_snapshot
    UNION ALL
    SELECT region, signal, unnest(range(prev_ref + 1, ref_date, INTERVAL 1 DAY))::DATE,
           as_of, 0.0, file_id
    FROM cum WHERE prev_ref IS NOT NULL AND ref_date - prev_ref > 1
)
SELECT region, signal, ref_date, as_of, value, file_id FROM daily
QUALIFY value IS DISTINCT FROM lag(value) OVER (PARTITION BY region, signal, ref_date
                                                ORDER BY as_of, file_id)
"""


def update_observations(con: duckdb.DuckDBPyConnection) -> dict[str, int]:
    """Rebuild the value history of every signal that received new files (one transaction).

    ``core.observations`` stays a pure function of ``raw.reports``: a late-arriving older snapshot
    is slotted into its place in the history rather than appended out of order.
    """
    new = con.execute(
        "SELECT file_id FROM raw.feed_files WHERE status IN ('accepted', 'partial') "
        "AND file_id NOT IN (SELECT file_id FROM core.vintaged_files)"
    ).df()
    if new.empty:
        return {"files": 0, "signals": 0, "rows": 0}
    with transaction(con):
        con.register("_new_files", new)
        con.execute("CREATE OR REPLACE TEMP TABLE _affected AS SELECT DISTINCT signal "
                    "FROM raw.reports WHERE file_id IN (SELECT file_id FROM _new_files)")
        con.execute("DELETE FROM core.observations WHERE signal IN (SELECT signal FROM _affected)")
        con.execute(f"INSERT INTO core.observations {_DAILY_SQL}")
        con.execute("INSERT INTO core.vintaged_files SELECT file_id FROM _new_files")
        con.unregister("_new_files")
        n_sig = con.execute("SELECT count(*) FROM _affected").fetchall()[0][0]
        n_rows = con.execute("SELECT count(*) FROM core.observations WHERE signal IN "
                             "(SELECT signal FROM _affected)").fetchall()[0][0]
    return {"files": len(new), "signals": int(n_sig), "rows": int(n_rows)}


def observations_as_of(
    con: duckdb.DuckDBPyConnection,
    as_of: dt.date | str,
    *,
    signals: list[str] | None = None,
) -> pd.DataFrame:
    """Latest known daily value of every (region, signal, ref_date) using vintages <= ``as_of``.

    Every later stage reads through this (or :func:`vintages_as_of`): a backtest as of D never
    sees a vintage published after D.
    """
    sql = ("SELECT region, signal, ref_date, arg_max(value, as_of) AS value, "
           "max(as_of) AS last_changed FROM core.observations WHERE as_of <= ?")
    params: list = [as_of]
    if signals:
        sql += " AND signal IN (SELECT unnest(?::VARCHAR[]))"
        params.append(list(signals))
    sql += " GROUP BY region, signal, ref_date ORDER BY signal, region, ref_date"
    return con.execute(sql, params).df()


def vintages_as_of(con: duckdb.DuckDBPyConnection, as_of: dt.date | str,
                   *, since: dt.date | str | None = None) -> pd.DataFrame:
    """All vintage rows known on ``as_of`` (optionally only ref_dates >= ``since``)."""
    sql = "SELECT region, signal, ref_date, as_of, value FROM core.observations WHERE as_of <= ?"
    params: list = [as_of]
    if since is not None:
        sql += " AND ref_date >= ?"
        params.append(since)
    return con.execute(sql + " ORDER BY signal, region, ref_date, as_of", params).df()


def first_vintage(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """Earliest as_of per signal: reference dates before it were never seen at delay 0."""
    return con.execute("SELECT signal, min(as_of) AS first_as_of, max(as_of) AS last_as_of "
                       "FROM core.observations GROUP BY signal ORDER BY signal").df()
