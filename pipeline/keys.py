"""Natural keys of every table, checked in CI, and the clearing that makes stages idempotent.

Layered warehouse practice: each table declares the columns that identify a row; a test runs the
whole path — and re-runs verbs — and asserts no key appears twice.  DuckDB primary keys would
enforce the same but slow bulk inserts and block in-place updates, so the keys are declared here
and checked, not enforced.  Stages that write under a fixed ``run_id`` (e.g. ``tallywave clean``)
first clear that run's rows, so re-running a verb leaves the same rows.
"""

from __future__ import annotations

import duckdb

#: table → columns identifying a row.  Every base table in raw / core / out must appear here.
NATURAL_KEYS: dict[str, tuple[str, ...]] = {
    "raw.feed_files": ("file_id",),
    "raw.rejected_rows": ("file_id", "line_no", "reason"),
    "raw.reports": ("file_id", "line_no", "region", "signal", "ref_date"),
    "core.schema_info": ("version",),
    "core.observations": ("region", "signal", "ref_date", "as_of"),
    "core.regions": ("region",),
    "core.signals": ("signal",),
    "core.vintaged_tree": ("region",),
    "core.vintaged_files": ("file_id",),
    "core.cleaned": ("run_id", "region", "signal", "ref_date"),
    "core.clean_actions": ("run_id", "region", "signal", "ref_date", "action", "detail"),
    "core.weekday_effects": ("run_id", "region", "signal", "weekday"),
    "out.runs": ("run_id",),
    "out.delay_pmf": ("run_id", "region", "signal", "delay_days"),
    "out.delay_drift": ("run_id", "region", "signal", "week_start"),
    "out.delay_model": ("run_id", "region", "signal"),
    "out.delay_signal": ("run_id", "signal"),
    "out.nowcast": ("run_id", "region", "signal", "ref_date", "q_level"),
    "out.rt": ("run_id", "region", "signal", "ref_date", "q_level"),
    "out.growth": ("run_id", "region", "signal", "ref_date"),
    "out.fits": ("run_id", "region", "model", "signal"),
    "out.forecasts": ("run_id", "model", "region", "signal", "target_date", "q_level"),
    "out.scores": ("issued_on", "model", "region", "signal", "target_date"),
    "out.ensemble_weights": ("run_id", "signal", "horizon_from", "model"),
    "out.scenarios": ("run_id", "scenario", "region", "signal", "target_date", "q_level"),
}

#: The tables a stage writes under its run_id (cleared before it writes again).
STAGE_TABLES: dict[str, tuple[str, ...]] = {
    "clean": ("core.cleaned", "core.clean_actions", "core.weekday_effects"),
}


def base_tables(con: duckdb.DuckDBPyConnection) -> list[str]:
    """Every base table of the raw / core / out layers."""
    return [r[0] for r in con.execute(
        "SELECT table_schema || '.' || table_name FROM information_schema.tables "
        "WHERE table_type = 'BASE TABLE' AND table_schema IN ('raw', 'core', 'out') "
        "ORDER BY 1").fetchall()]


def duplicate_keys(con: duckdb.DuckDBPyConnection) -> dict[str, int]:
    """Per table, how many key values occur more than once (0 everywhere when healthy);
    a table with no declared key is reported with -1."""
    out: dict[str, int] = {}
    for table in base_tables(con):
        key = NATURAL_KEYS.get(table)
        if key is None:
            out[table] = -1
            continue
        cols = ", ".join(key)
        out[table] = int(con.execute(
            f"SELECT count(*) FROM (SELECT {cols} FROM {table} GROUP BY ALL "
            "HAVING count(*) > 1)").fetchall()[0][0])
    return out


def clear_run(con: duckdb.DuckDBPyConnection, stage: str, run_id: str) -> None:
    """Delete what ``stage`` wrote earlier under ``run_id`` (so a re-run replaces, not adds)."""
    for table in STAGE_TABLES.get(stage, ()):
        con.execute(f"DELETE FROM {table} WHERE run_id = ?", [run_id])
