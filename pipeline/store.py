"""The DuckDB warehouse: open the file, create the schemas and tables, migrate forward.

Layers (design.md): ``raw.*`` is what arrived and is never edited, ``core.*`` is a pure transform
of ``raw``, ``out.*`` holds one row set per published run.  The schema carries a version number in
``core.schema_info``; :data:`MIGRATIONS` lists the forward steps, each applied once, in order.
"""

from __future__ import annotations

import math
import os
import re
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import duckdb
import pandas as pd

from tallywave.pipeline.accuracy import ACCURACY_VIEWS
from tallywave.pipeline.errors import DatabaseBusy, UserError

DEFAULT_DB = "tallywave.duckdb"

_V1 = [
    "CREATE SCHEMA IF NOT EXISTS raw",
    "CREATE SCHEMA IF NOT EXISTS core",
    "CREATE SCHEMA IF NOT EXISTS out",
    "CREATE SEQUENCE IF NOT EXISTS raw.file_id_seq START 1",
    """CREATE TABLE IF NOT EXISTS raw.feed_files (
        file_id BIGINT PRIMARY KEY, source VARCHAR NOT NULL, path VARCHAR NOT NULL,
        sha256 VARCHAR NOT NULL, as_of DATE, received_at TIMESTAMP NOT NULL,
        rows_read BIGINT NOT NULL, rows_accepted BIGINT NOT NULL, rows_rejected BIGINT NOT NULL,
        status VARCHAR NOT NULL, message VARCHAR)""",
    """CREATE TABLE IF NOT EXISTS raw.rejected_rows (
        file_id BIGINT NOT NULL, line_no BIGINT, content VARCHAR, reason VARCHAR NOT NULL)""",
    """CREATE TABLE IF NOT EXISTS raw.reports (
        file_id BIGINT NOT NULL, source VARCHAR NOT NULL, region VARCHAR NOT NULL,
        signal VARCHAR NOT NULL, ref_date DATE NOT NULL, as_of DATE NOT NULL,
        value DOUBLE NOT NULL, value_kind VARCHAR NOT NULL, line_no BIGINT)""",
    """CREATE TABLE IF NOT EXISTS core.observations (
        region VARCHAR NOT NULL, signal VARCHAR NOT NULL, ref_date DATE NOT NULL,
        as_of DATE NOT NULL, value DOUBLE NOT NULL, file_id BIGINT)""",
    """CREATE TABLE IF NOT EXISTS core.regions (
        region VARCHAR PRIMARY KEY, population DOUBLE, file_id BIGINT)""",
    """CREATE TABLE IF NOT EXISTS core.vintaged_files (file_id BIGINT PRIMARY KEY)""",
    """CREATE TABLE IF NOT EXISTS core.cleaned (
        run_id VARCHAR NOT NULL, region VARCHAR NOT NULL, signal VARCHAR NOT NULL,
        ref_date DATE NOT NULL, value_reported DOUBLE, value_clean DOUBLE NOT NULL,
        flag VARCHAR, value_adjusted DOUBLE)""",
    """CREATE TABLE IF NOT EXISTS core.clean_actions (
        run_id VARCHAR NOT NULL, region VARCHAR NOT NULL, signal VARCHAR NOT NULL,
        ref_date DATE NOT NULL, action VARCHAR NOT NULL, delta DOUBLE NOT NULL,
        detail VARCHAR)""",
    """CREATE TABLE IF NOT EXISTS core.weekday_effects (
        run_id VARCHAR NOT NULL, region VARCHAR NOT NULL, signal VARCHAR NOT NULL,
        weekday INTEGER NOT NULL, weekday_name VARCHAR NOT NULL, effect DOUBLE NOT NULL)""",
    """CREATE TABLE IF NOT EXISTS out.runs (
        run_id VARCHAR PRIMARY KEY, as_of DATE NOT NULL, started_at TIMESTAMP NOT NULL,
        finished_at TIMESTAMP, status VARCHAR NOT NULL, settings_json VARCHAR,
        code_version VARCHAR, skipped_json VARCHAR, message VARCHAR)""",
    """CREATE TABLE IF NOT EXISTS out.delay_pmf (
        run_id VARCHAR NOT NULL, region VARCHAR NOT NULL, signal VARCHAR NOT NULL,
        delay_days INTEGER NOT NULL, prob DOUBLE NOT NULL)""",
    """CREATE TABLE IF NOT EXISTS out.delay_drift (
        run_id VARCHAR NOT NULL, region VARCHAR NOT NULL, signal VARCHAR NOT NULL,
        week_start DATE NOT NULL, mean_delay_days DOUBLE)""",
    """CREATE TABLE IF NOT EXISTS out.nowcast (
        run_id VARCHAR NOT NULL, region VARCHAR NOT NULL, signal VARCHAR NOT NULL,
        ref_date DATE NOT NULL, reported DOUBLE, q_level DOUBLE NOT NULL, value DOUBLE NOT NULL)""",
    """CREATE TABLE IF NOT EXISTS out.rt (
        run_id VARCHAR NOT NULL, region VARCHAR NOT NULL, signal VARCHAR NOT NULL,
        ref_date DATE NOT NULL, q_level DOUBLE NOT NULL, value DOUBLE NOT NULL,
        mean DOUBLE, nowcast_dependent BOOLEAN)""",
    """CREATE TABLE IF NOT EXISTS out.growth (
        run_id VARCHAR NOT NULL, region VARCHAR NOT NULL, signal VARCHAR NOT NULL,
        ref_date DATE NOT NULL, growth_rate DOUBLE, doubling_days DOUBLE, p_growing DOUBLE,
        rt_mean DOUBLE, nowcast_dependent BOOLEAN)""",
    """CREATE TABLE IF NOT EXISTS out.fits (
        run_id VARCHAR NOT NULL, region VARCHAR NOT NULL, model VARCHAR NOT NULL,
        params_json VARCHAR, objective DOUBLE, converged BOOLEAN, message VARCHAR,
        signal VARCHAR)""",
    """CREATE TABLE IF NOT EXISTS out.forecasts (
        run_id VARCHAR NOT NULL, issued_on DATE NOT NULL, model VARCHAR NOT NULL,
        region VARCHAR NOT NULL, signal VARCHAR NOT NULL, target_date DATE NOT NULL,
        horizon_days INTEGER NOT NULL, q_level DOUBLE NOT NULL, value DOUBLE NOT NULL)""",
    """CREATE TABLE IF NOT EXISTS out.scores (
        run_id VARCHAR, issued_on DATE NOT NULL, model VARCHAR NOT NULL, region VARCHAR NOT NULL,
        signal VARCHAR NOT NULL, target_date DATE NOT NULL, horizon_days INTEGER NOT NULL,
        truth DOUBLE NOT NULL, truth_as_of DATE NOT NULL, wis DOUBLE NOT NULL,
        dispersion DOUBLE, overprediction DOUBLE, underprediction DOUBLE,
        abs_error DOUBLE, covered_50 BOOLEAN, covered_90 BOOLEAN, pit DOUBLE, bias DOUBLE,
        scored_at TIMESTAMP)""",
]

_VIEWS = [
    """CREATE OR REPLACE VIEW out.latest_forecasts AS
       SELECT f.* FROM out.forecasts f
       WHERE f.run_id = (SELECT run_id FROM out.runs WHERE status = 'published'
                         ORDER BY as_of DESC, finished_at DESC LIMIT 1)""",
]

#: Version 2: line lists, region hierarchies, signal frequencies (issue 15).
_V2 = [
    # Line-list records: the record's id when the feed maps one (NULL for counts).
    "ALTER TABLE raw.reports ADD COLUMN IF NOT EXISTS record_id VARCHAR",
    # How the files of a line list combine: by_record_id | complete | increments (NULL: counts).
    "ALTER TABLE raw.feed_files ADD COLUMN IF NOT EXISTS list_files VARCHAR",
    # Region hierarchy: parent region, depth below the top (0 = top), number of direct children
    # (0 = a leaf); a parent's series is the aggregate of its children's.
    "ALTER TABLE core.regions ADD COLUMN IF NOT EXISTS parent VARCHAR",
    "ALTER TABLE core.regions ADD COLUMN IF NOT EXISTS level INTEGER",
    "ALTER TABLE core.regions ADD COLUMN IF NOT EXISTS n_children INTEGER",
    # One row per signal: its time resolution, as declared by the feed that first brought it.
    """CREATE TABLE IF NOT EXISTS core.signals (
        signal VARCHAR PRIMARY KEY, frequency VARCHAR NOT NULL, week_start VARCHAR,
        source VARCHAR NOT NULL, file_id BIGINT, path VARCHAR)""",
    # The region tree core.observations' parent rows were last derived with (vintages step).
    "CREATE TABLE IF NOT EXISTS core.vintaged_tree (region VARCHAR, parent VARCHAR)",
    # Signals ingested before version 2 were daily.
    """INSERT INTO core.signals SELECT r.signal, 'daily', NULL, arg_min(r.source, r.file_id),
        min(r.file_id), arg_min(f.path, r.file_id)
        FROM raw.reports r LEFT JOIN raw.feed_files f USING (file_id)
        WHERE r.signal NOT IN (SELECT signal FROM core.signals) GROUP BY r.signal""",
]

#: Version 3: R_t and growth say which date they refer to (``'infection'``: R_t is published by
#: date of infection, back-calculated through the signal's infection-to-reference-date delay).
_V3 = [
    "ALTER TABLE out.rt ADD COLUMN IF NOT EXISTS date_basis VARCHAR",
    "ALTER TABLE out.growth ADD COLUMN IF NOT EXISTS date_basis VARCHAR",
]

#: Version 4: the delay model per region and per signal (drift, tail, back-test, settle
#: horizon); scores for counts (raw truth beside the cleaned one, log-scale WIS, PIT range,
#: tie-corrected coverage, the settle horizon used).
_V4 = [
    """CREATE TABLE IF NOT EXISTS out.delay_model (
        run_id VARCHAR NOT NULL, region VARCHAR NOT NULL, signal VARCHAR NOT NULL,
        delay_model VARCHAR NOT NULL, mean_delay_days DOUBLE, mean_delay_before_days DOUBLE,
        lookback_days INTEGER, tail_prob DOUBLE, q99_delay_days DOUBLE, backtest_gain DOUBLE,
        backtest_miss90 DOUBLE, backtest_rows BIGINT, weekday_effect BOOLEAN,
        n_holidays INTEGER)""",
    """CREATE TABLE IF NOT EXISTS out.delay_signal (
        run_id VARCHAR NOT NULL, signal VARCHAR NOT NULL, n_regions INTEGER, n_drifting INTEGER,
        weekday_effect BOOLEAN, weekday_test DOUBLE, holidays VARCHAR, tail_size DOUBLE,
        tail_mean_days DOUBLE, tail_prob DOUBLE, mean_delay_days DOUBLE, q99_delay_days DOUBLE,
        backtest_gain DOUBLE)""",
    "ALTER TABLE out.scores ADD COLUMN IF NOT EXISTS truth_raw DOUBLE",
    "ALTER TABLE out.scores ADD COLUMN IF NOT EXISTS truth_run_id VARCHAR",
    "ALTER TABLE out.scores ADD COLUMN IF NOT EXISTS settle_days INTEGER",
    "ALTER TABLE out.scores ADD COLUMN IF NOT EXISTS wis_log DOUBLE",
    "ALTER TABLE out.scores ADD COLUMN IF NOT EXISTS pit_low DOUBLE",
    "ALTER TABLE out.scores ADD COLUMN IF NOT EXISTS pit_high DOUBLE",
    "ALTER TABLE out.scores ADD COLUMN IF NOT EXISTS cover_frac_50 DOUBLE",
    "ALTER TABLE out.scores ADD COLUMN IF NOT EXISTS cover_frac_90 DOUBLE",
]

#: Version 5: the weighted ensemble's scoreboard weights and the scenario projections.
_V5 = [
    """CREATE TABLE IF NOT EXISTS out.ensemble_weights (
        run_id VARCHAR NOT NULL, issued_on DATE NOT NULL, signal VARCHAR NOT NULL,
        horizon_from INTEGER NOT NULL, horizon_to INTEGER NOT NULL, model VARCHAR NOT NULL,
        weight DOUBLE NOT NULL, mean_wis DOUBLE, n_scores INTEGER, basis VARCHAR,
        PRIMARY KEY (run_id, signal, horizon_from, model))""",
    """CREATE TABLE IF NOT EXISTS out.scenarios (
        run_id VARCHAR NOT NULL, issued_on DATE NOT NULL, scenario VARCHAR NOT NULL,
        description VARCHAR, region VARCHAR NOT NULL, signal VARCHAR NOT NULL,
        target_date DATE NOT NULL, horizon_days INTEGER NOT NULL, transmission_change DOUBLE,
        q_level DOUBLE NOT NULL, value DOUBLE NOT NULL,
        PRIMARY KEY (run_id, scenario, region, signal, target_date, q_level))""",
]

#: Forward migrations: (version, statements).  Append new steps; never edit a shipped one.
MIGRATIONS: list[tuple[int, list[str]]] = [(1, _V1), (2, _V2), (3, _V3), (4, _V4), (5, _V5)]
SCHEMA_VERSION = MIGRATIONS[-1][0]


def db_path(path: str | os.PathLike | None = None) -> Path:
    """Resolve the database path: explicit argument, else ``TALLYWAVE_DB``, else the default."""
    return Path(path or os.environ.get("TALLYWAVE_DB") or DEFAULT_DB)


#: Environment variable with the seconds to wait for a database another process is using.
LOCK_WAIT_ENV = "TALLYWAVE_LOCK_WAIT"
DEFAULT_LOCK_WAIT_S = 30.0


def lock_wait_seconds(wait_s: float | None = None) -> float:
    """Seconds to wait for a lock another process holds.

    ``wait_s`` if given, else ``$TALLYWAVE_LOCK_WAIT``, else 30 (the CLI's ``--wait`` sets it).
    """
    if wait_s is not None:
        return max(0.0, float(wait_s))
    text = os.environ.get(LOCK_WAIT_ENV, "").strip()
    if not text:
        return DEFAULT_LOCK_WAIT_S
    try:
        value = float(text)
    except ValueError:
        value = float("nan")
    if not math.isfinite(value) or value < 0:
        raise UserError(f"{LOCK_WAIT_ENV}='{text}' is not a number of seconds >= 0")
    return value


def _connect(path: Path, read_only: bool, wait_s: float) -> duckdb.DuckDBPyConnection:
    deadline = time.monotonic() + wait_s
    while True:
        try:
            return duckdb.connect(str(path), read_only=read_only)
        except duckdb.IOException as exc:
            text = str(exc)
            if "lock" not in text.lower():
                raise UserError(f"{path}: cannot open database ({text.splitlines()[0]})") from exc
            left = deadline - time.monotonic()
            if left <= 0:
                pid = re.search(r"\(PID (\d+)\)", text)
                holder = f" (PID {pid.group(1)})" if pid else ""
                raise DatabaseBusy(
                    f"{path}: database in use by another process{holder} "
                    f"(waited {wait_s:g} s); try again when it has finished"
                ) from exc
            time.sleep(min(0.25, left))


def connect(
    path: str | os.PathLike | None = None, *, read_only: bool = False,
    wait_s: float | None = None,
) -> duckdb.DuckDBPyConnection:
    """Open (and, for writers, create and migrate) the Tallywave database.

    DuckDB lets one process write a file, or several read it.  Opening a file another process
    holds waits up to ``wait_s`` seconds (default :func:`lock_wait_seconds`) for the lock, then
    fails with a one-line "database in use" message (:class:`DatabaseBusy`, exit code 3).
    """
    p = db_path(path)
    wait = lock_wait_seconds(wait_s)
    if read_only:
        if not p.exists():
            raise UserError(f"{p}: no such database (run `tallywave demo` or `tallywave ingest`)")
        return _connect(p, True, wait)
    if p.parent and not p.parent.exists():
        raise UserError(f"{p}: folder {p.parent} does not exist")
    con = _connect(p, False, wait)
    migrate(con)
    return con


def memory() -> duckdb.DuckDBPyConnection:
    """An in-memory database with the full schema (tests, benchmarks)."""
    con = duckdb.connect(":memory:")
    migrate(con)
    return con


def schema_version(con: duckdb.DuckDBPyConnection) -> int:
    """The schema version recorded in the database (0 for an empty file)."""
    exists = con.execute(
        "SELECT count(*) FROM information_schema.tables "
        "WHERE table_schema = 'core' AND table_name = 'schema_info'"
    ).fetchall()[0][0]
    if not exists:
        return 0
    v = con.execute("SELECT max(version) FROM core.schema_info").fetchall()[0][0]
    return int(v or 0)


def migrate(con: duckdb.DuckDBPyConnection) -> int:
    """Apply every migration newer than the database's version, each in its own transaction."""
    con.execute("CREATE SCHEMA IF NOT EXISTS core")
    con.execute(
        "CREATE TABLE IF NOT EXISTS core.schema_info (version INTEGER, applied_at TIMESTAMP)"
    )
    current = schema_version(con)
    if current > SCHEMA_VERSION:
        raise UserError(
            f"database schema version {current} is newer than this tallywave ({SCHEMA_VERSION}); "
            "upgrade tallywave"
        )
    for version, statements in MIGRATIONS:
        if version <= current:
            continue
        with transaction(con):
            for stmt in statements:
                con.execute(stmt)
            con.execute("INSERT INTO core.schema_info VALUES (?, now())", [version])
    for stmt in _VIEWS + _accuracy_views():
        con.execute(stmt)
    return SCHEMA_VERSION


@contextmanager
def transaction(con: duckdb.DuckDBPyConnection) -> Iterator[duckdb.DuckDBPyConnection]:
    """All-or-nothing block: commit on success, roll back on any exception."""
    con.execute("BEGIN TRANSACTION")
    try:
        yield con
    except BaseException:
        con.execute("ROLLBACK")
        raise
    else:
        con.execute("COMMIT")


def insert_df(con: duckdb.DuckDBPyConnection, table: str, df: pd.DataFrame) -> int:
    """Append a DataFrame to ``table`` by column name (one vectorised insert, no row loop)."""
    if df is None or len(df) == 0:
        return 0
    name = f"_ins_{abs(hash(table))}"
    con.register(name, df)
    try:
        cols = ", ".join(f'"{c}"' for c in df.columns)
        con.execute(f"INSERT INTO {table} ({cols}) SELECT {cols} FROM {name}")
    finally:
        con.unregister(name)
    return len(df)


def table_names(con: duckdb.DuckDBPyConnection) -> list[str]:
    """Qualified names of all Tallywave tables and views."""
    rows = con.execute(
        "SELECT table_schema || '.' || table_name FROM information_schema.tables "
        "WHERE table_schema IN ('raw', 'core', 'out') ORDER BY 1"
    ).fetchall()
    return [r[0] for r in rows]


def _accuracy_views() -> list[str]:
    """The accuracy views (defined beside their SQL in :mod:`tallywave.pipeline.accuracy`)."""
    return list(ACCURACY_VIEWS)
