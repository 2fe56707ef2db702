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
import numpy as np
import pandas as pd

from tallywave.pipeline.frames import WEEK, SeriesBlock, week_axis_bounds
from tallywave.pipeline.hierarchy import aggregate_parents
from tallywave.pipeline.store import transaction

#: Latest file of each snapshot row (a re-issued snapshot replaces the earlier file); ``step`` is
#: the days between two reference dates of the signal (7 for weekly signals).
_SNAPSHOTS = """WITH snap AS (
    SELECT r.source, r.region, r.signal, r.ref_date, r.as_of, r.value, r.value_kind, r.file_id,
           CASE WHEN s.frequency = 'weekly' THEN 7 ELSE 1 END AS step
    FROM raw.reports r LEFT JOIN core.signals s USING (signal)
    WHERE r.value_kind <> 'records' AND r.{where}
    QUALIFY row_number() OVER (PARTITION BY r.source, r.region, r.signal, r.as_of, r.ref_date
                               ORDER BY r.file_id DESC) = 1
)"""

#: Daily values of every snapshot: daily feeds as they are; cumulative feeds differenced within
#: the snapshot (from CTE ``cum``), with absent dates inside the span set to 0.
_DIFFERENCED = """daily AS (
    SELECT region, signal, ref_date, as_of, value, file_id FROM snap WHERE value_kind = 'daily'
    UNION ALL
    SELECT region, signal, ref_date, as_of,
           CASE WHEN prev_value IS NULL THEN value ELSE value - prev_value END, file_id
    FROM cum WHERE prev_value IS NOT NULL OR first_snapshot
    UNION ALL
    SELECT region, signal, unnest(range(prev_ref + step, ref_date, to_days(step)))::DATE,
           as_of, 0.0, file_id
    FROM cum WHERE prev_ref IS NOT NULL AND ref_date - prev_ref > step
)"""

#: Line lists: the records that count (every file merged by record id, the latest version of a
#: record winning; or the newest complete list of a source; or every increment), then the value
#: of (region, signal, ref_date) on D = number of those records reported on or before D.  Files
#: are ordered by their as_of, then by arrival (file_id); files without an as_of by arrival.
_RECORDS = """rec_files AS (
    SELECT file_id, source, list_files,
           row_number() OVER (PARTITION BY source ORDER BY as_of DESC NULLS LAST,
                              file_id DESC) AS newest
    FROM raw.feed_files
    WHERE status IN ('accepted', 'partial') AND list_files IS NOT NULL
),
recs AS (
    SELECT r.region, r.signal, r.ref_date, r.as_of, r.file_id
    FROM raw.reports r JOIN rec_files f USING (file_id)
    WHERE r.value_kind = 'records' AND r.signal IN (SELECT signal FROM _affected)
      AND (f.list_files <> 'complete' OR f.newest = 1)
    QUALIFY f.list_files <> 'by_record_id'
         OR row_number() OVER (PARTITION BY r.source, r.record_id
                               ORDER BY f.newest, r.line_no DESC) = 1
),
rec_daily AS (
    SELECT region, signal, ref_date, as_of, file_id,
           sum(n) OVER (PARTITION BY region, signal, ref_date ORDER BY as_of
                        ROWS UNBOUNDED PRECEDING)::DOUBLE AS value
    FROM (SELECT region, signal, ref_date, as_of, count(*) AS n, max(file_id) AS file_id
          FROM recs GROUP BY region, signal, ref_date, as_of)
)"""

_DAILY_SQL = """
{snapshots_affected},
cum AS (
    SELECT *,
        lag(value) OVER w AS prev_value,
        lag(ref_date) OVER w AS prev_ref,
        as_of = min(as_of) OVER (PARTITION BY source, region, signal) AS first_snapshot
    FROM snap WHERE value_kind = 'cumulative'
    WINDOW w AS (PARTITION BY source, region, signal, as_of ORDER BY ref_date)
),
{records},
{differenced},
every AS (
    SELECT region, signal, ref_date, as_of, value, file_id FROM daily
    UNION ALL
    SELECT region, signal, ref_date, as_of, value, file_id FROM rec_daily
)
SELECT region, signal, ref_date, as_of, value, file_id FROM every
QUALIFY value IS DISTINCT FROM lag(value) OVER (PARTITION BY region, signal, ref_date
                                                ORDER BY as_of, file_id)
""".format(snapshots_affected=_SNAPSHOTS.format(where="signal IN (SELECT signal FROM _affected)"),
           records=_RECORDS, differenced=_DIFFERENCED)


#: The rows the new files add when every one of them is later than all earlier snapshots of
#: their signals: the same rules as ``_DAILY_SQL`` applied to the new snapshots only, each key
#: compared with its last known value (the last kept row of a key carries the value of its last
#: vintage, since a row is dropped only when it repeats the one before it).
_APPEND_SQL = """
{snapshots_new},
seen AS (  -- cumulative series that already had a snapshot before the new files
    SELECT DISTINCT source, region, signal FROM raw.reports
    WHERE value_kind = 'cumulative' AND signal IN (SELECT signal FROM _affected)
      AND file_id IN (SELECT file_id FROM core.vintaged_files)
),
cum AS (
    SELECT s.region, s.signal, s.ref_date, s.as_of, s.value, s.file_id, s.step,
        lag(s.value) OVER w AS prev_value,
        lag(s.ref_date) OVER w AS prev_ref,
        s.as_of = min(s.as_of) OVER (PARTITION BY s.source, s.region, s.signal)
            AND e.source IS NULL AS first_snapshot
    FROM snap s
    LEFT JOIN seen e ON e.source = s.source AND e.region = s.region AND e.signal = s.signal
    WHERE s.value_kind = 'cumulative'
    WINDOW w AS (PARTITION BY s.source, s.region, s.signal, s.as_of ORDER BY s.ref_date)
),
{differenced},
keys AS (SELECT DISTINCT region, signal, ref_date FROM daily),
last AS (
    SELECT o.region, o.signal, o.ref_date, o.value
    FROM core.observations o
    JOIN keys k ON o.region = k.region AND o.signal = k.signal AND o.ref_date = k.ref_date
    QUALIFY row_number() OVER (PARTITION BY o.region, o.signal, o.ref_date
                               ORDER BY o.as_of DESC, o.file_id DESC NULLS FIRST) = 1
),
both_ AS (
    SELECT region, signal, ref_date, NULL::DATE AS as_of, value, NULL::BIGINT AS file_id,
           true AS known FROM last
    UNION ALL
    SELECT region, signal, ref_date, as_of, value, file_id, false FROM daily
)
SELECT region, signal, ref_date, as_of, value, file_id FROM both_
QUALIFY NOT known AND value IS DISTINCT FROM lag(value) OVER (
    PARTITION BY region, signal, ref_date ORDER BY known DESC, as_of, file_id)
""".format(snapshots_new=_SNAPSHOTS.format(where="file_id IN (SELECT file_id FROM _new_files)"),
                                 differenced=_DIFFERENCED)


def _appendable(con: duckdb.DuckDBPyConnection) -> bool:
    """True when every new file is later than every earlier snapshot of the affected signals
    (the daily case): the history then only grows at its end and need not be rebuilt."""
    new_min = con.execute("SELECT min(as_of) FROM raw.reports "
                          "WHERE file_id IN (SELECT file_id FROM _new_files)").fetchall()[0][0]
    old_max = con.execute(
        "SELECT max(as_of) FROM raw.reports WHERE signal IN (SELECT signal FROM _affected) "
        "AND file_id IN (SELECT file_id FROM core.vintaged_files)").fetchall()[0][0]
    return new_min is not None and old_max is not None and new_min > old_max


def update_observations(con: duckdb.DuckDBPyConnection, *,
                        rebuild: bool = False) -> dict[str, int]:
    """Bring the value history of every signal that received new files up to date (one
    transaction).

    ``core.observations`` stays a pure function of ``raw.reports`` (and of the region tree in
    ``core.regions``): a late-arriving older snapshot is slotted into its place in the history
    rather than appended out of order (the signal's history is rebuilt); new snapshots later than
    everything known (the daily case) only append their changes, which gives the same rows
    without re-reading the whole history.  Line lists always rebuild their signals (a later file
    may revise or drop records).  Parent regions get the sums of their leaves.  A changed region
    tree, or ``rebuild``, rebuilds every signal.
    """
    new = con.execute(
        "SELECT file_id FROM raw.feed_files WHERE status IN ('accepted', 'partial') "
        "AND file_id NOT IN (SELECT file_id FROM core.vintaged_files)"
    ).df()
    rebuild = rebuild or _tree_changed(con)
    if new.empty and not rebuild:
        return {"files": 0, "signals": 0, "rows": 0}
    with transaction(con):
        con.register("_new_files", new)
        if rebuild:
            con.execute("CREATE OR REPLACE TEMP TABLE _affected AS SELECT DISTINCT signal "
                        "FROM raw.reports")
        else:  # a new line-list file affects every signal its source ever had
            con.execute(
                "CREATE OR REPLACE TEMP TABLE _affected AS SELECT DISTINCT signal "
                "FROM raw.reports WHERE file_id IN (SELECT file_id FROM _new_files) "
                "OR (value_kind = 'records' AND source IN (SELECT DISTINCT source "
                "FROM raw.reports WHERE value_kind = 'records' "
                "AND file_id IN (SELECT file_id FROM _new_files)))")
        records = con.execute("SELECT count(*) FROM (SELECT 1 FROM raw.reports WHERE "
                              "value_kind = 'records' AND signal IN (SELECT signal FROM "
                              "_affected) LIMIT 1)").fetchall()[0][0]
        if not rebuild and not records and _appendable(con):
            con.execute("INSERT INTO core.observations (region, signal, ref_date, as_of, value, "
                        f"file_id) {_APPEND_SQL}")
        else:
            con.execute("DELETE FROM core.observations "
                        "WHERE signal IN (SELECT signal FROM _affected)")
            con.execute("INSERT INTO core.observations (region, signal, ref_date, as_of, value, "
                        f"file_id) {_DAILY_SQL}")
        n_parent = aggregate_parents(con)
        con.execute("DELETE FROM core.vintaged_tree")
        con.execute("INSERT INTO core.vintaged_tree SELECT region, parent FROM core.regions "
                    "WHERE parent IS NOT NULL")
        con.execute("INSERT INTO core.vintaged_files SELECT file_id FROM _new_files")
        con.unregister("_new_files")
        n_sig = con.execute("SELECT count(*) FROM _affected").fetchall()[0][0]
        n_rows = con.execute("SELECT count(*) FROM core.observations WHERE signal IN "
                             "(SELECT signal FROM _affected)").fetchall()[0][0]
    return {"files": len(new), "signals": int(n_sig), "rows": int(n_rows),
            "parent_rows": n_parent}


def _tree_changed(con: duckdb.DuckDBPyConnection) -> bool:
    """True when the region tree differs from the one the parent rows were derived with."""
    return bool(con.execute(
        "SELECT count(*) FROM ((SELECT region, parent FROM core.regions WHERE parent IS NOT NULL "
        "EXCEPT SELECT region, parent FROM core.vintaged_tree) UNION ALL "
        "(SELECT region, parent FROM core.vintaged_tree EXCEPT "
        "SELECT region, parent FROM core.regions WHERE parent IS NOT NULL))").fetchall()[0][0])


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
                   *, since: dt.date | str | None = None,
                   signals: list[str] | None = None) -> pd.DataFrame:
    """All vintage rows known on ``as_of`` (optionally only ref_dates >= ``since``, only some
    signals)."""
    sql = "SELECT region, signal, ref_date, as_of, value FROM core.observations WHERE as_of <= ?"
    params: list = [as_of]
    if since is not None:
        sql += " AND ref_date >= ?"
        params.append(since)
    if signals:
        sql += " AND signal IN (SELECT unnest(?::VARCHAR[]))"
        params.append(list(signals))
    return con.execute(sql + " ORDER BY signal, region, ref_date, as_of", params).df()


def dense_blocks(con: duckdb.DuckDBPyConnection, relation: str, params: list,
                 *, end: dt.date | None = None) -> dict[str, SeriesBlock]:
    """One :class:`SeriesBlock` per signal from a relation (region, signal, ref_date, value).

    The same blocks as ``frames.to_blocks(df, end=end, steps=signal_steps(con))`` of the
    relation's rows (regions sorted, dates contiguous from the signal's first ref_date to its last
    or ``end`` — every 7th day for a weekly signal —, NaN where no row),
    but the positions are computed in DuckDB and only numbers cross into Python: at thousands of
    regions this avoids millions of Python strings.  ``relation`` is trusted SQL (a query or
    table written by the pipeline, never user text); ``params`` fill its placeholders.
    """
    rel = f"({relation})"
    cap = "" if end is None else " WHERE ref_date <= ?::DATE"
    cap_params = [] if end is None else [end]
    con.execute(f"CREATE OR REPLACE TEMP TABLE _blocks_src AS SELECT * FROM {rel}{cap}",
                params + cap_params)
    try:
        meta = con.execute("SELECT signal, min(ref_date), max(ref_date), "
                           "list(DISTINCT region ORDER BY region) FROM _blocks_src "
                           "GROUP BY signal ORDER BY signal").fetchall()
        out: dict[str, SeriesBlock] = {}
        steps = signal_steps(con)
        for signal, lo, hi, names in meta:
            regions = np.asarray(names, dtype=str)
            if len(regions) > 1 and not np.all(regions[:-1] < regions[1:]):
                regions = np.unique(regions)  # a collation that differs from numpy's order
            hi = end if end is not None else hi
            step = steps.get(str(signal), 1)
            d_lo, d_hi = np.datetime64(lo, "D"), np.datetime64(hi, "D")
            if step > 1:  # a weekly axis through the signal's week dates, ending by `end`
                d_lo, d_hi = week_axis_bounds(np.array([d_lo]), d_lo, d_hi, step)
            dates = np.arange(d_lo, d_hi + 1, step, dtype="datetime64[D]")
            con.register("_blocks_regions", pd.DataFrame(
                {"region": regions, "r": np.arange(len(regions), dtype=np.int64)}))
            try:
                got = con.execute(
                    "SELECT g.r, CAST(s.ref_date - ?::DATE AS BIGINT) AS t, "
                    "CAST(s.value AS DOUBLE) AS v FROM _blocks_src s "
                    "JOIN _blocks_regions g USING (region) WHERE s.signal = ?",
                    [lo, signal]).fetchnumpy()
            finally:
                con.unregister("_blocks_regions")
            vals = np.full((len(regions), len(dates)), np.nan)
            v = got["v"]
            v = np.ma.filled(v.astype(float), np.nan) if np.ma.isMaskedArray(v) else v
            t = np.asarray(got["t"], dtype=np.int64)
            if step > 1:
                if np.any(t % step):
                    raise ValueError(f"signal {signal!r} is weekly but has reference dates on "
                                     "different weekdays")
                t = t // step
            vals[np.asarray(got["r"], dtype=np.int64), t] = v
            out[str(signal)] = SeriesBlock(str(signal), regions, dates, vals, step)
        return out
    finally:
        con.execute("DROP TABLE IF EXISTS _blocks_src")


def signal_steps(con: duckdb.DuckDBPyConnection) -> dict[str, int]:
    """Days between two reference dates of each signal that is not daily (7 for a weekly
    signal, from ``core.signals``); signals not listed are daily."""
    return {str(r[0]): WEEK for r in con.execute(
        "SELECT signal FROM core.signals WHERE frequency = 'weekly'").fetchall()}


def observation_blocks(con: duckdb.DuckDBPyConnection, as_of: dt.date | str,
                       *, end: dt.date | None = None) -> dict[str, SeriesBlock]:
    """:func:`observations_as_of` as one array per signal (``to_blocks(..., end=end)``)."""
    sql = ("SELECT region, signal, ref_date, arg_max(value, as_of) AS value "
           "FROM core.observations WHERE as_of <= ? GROUP BY region, signal, ref_date")
    return dense_blocks(con, sql, [as_of], end=end)
