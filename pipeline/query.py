"""Read-only access for analysts: ``tallywave sql`` and ``tallywave export``.

Queries run on a read-only DuckDB connection with external access switched off and the
configuration locked, and only query statements are admitted, so a query can neither change the
database nor read or write files, attach databases or load extensions.
"""

from __future__ import annotations

import os
from pathlib import Path

import duckdb
import pandas as pd

from pipeline import store
from pipeline.errors import UserError

_ALLOWED = {"SELECT", "EXPLAIN"}


def _locked(db: str | os.PathLike | None) -> duckdb.DuckDBPyConnection:
    con = store.connect(db, read_only=True)
    con.execute("SET enable_external_access = false")
    con.execute("SET lock_configuration = true")
    return con


def check_read_only(con: duckdb.DuckDBPyConnection, sql: str) -> None:
    """Refuse anything but queries, naming the statement type."""
    try:
        statements = con.extract_statements(sql)
    except duckdb.Error as exc:
        raise UserError(f"SQL does not parse: {str(exc).splitlines()[0]}") from exc
    if not statements:
        raise UserError("SQL is empty")
    for st in statements:
        kind = st.type.name
        if kind not in _ALLOWED:
            raise UserError(f"refused: {kind} statement; `tallywave sql` is read-only "
                            "(queries only)")


def read_only_query(db: str | os.PathLike | None, sql: str) -> pd.DataFrame:
    """Run one read-only query and return its result."""
    con = _locked(db)
    try:
        check_read_only(con, sql)
        try:
            return con.execute(sql).df()
        except duckdb.PermissionException as exc:
            raise UserError(f"refused: {str(exc).splitlines()[0]}") from exc
        except duckdb.Error as exc:
            raise UserError(f"SQL error: {str(exc).splitlines()[0]}") from exc
    finally:
        con.close()


def export_table(db: str | os.PathLike | None, table: str, to: str | os.PathLike) -> int:
    """Copy a table or view to a Parquet or CSV file; the name must be a Tallywave table."""
    dest = Path(to)
    suffix = dest.suffix.lower()
    if suffix not in (".parquet", ".csv"):
        raise UserError(f"--to {dest}: file must end in .parquet or .csv")
    if not dest.parent.exists():
        raise UserError(f"--to {dest}: folder {dest.parent} does not exist")
    con = store.connect(db, read_only=True)
    try:
        names = store.table_names(con)
        if table not in names:
            raise UserError(f"unknown table '{table}' (known: {', '.join(names)})")
        schema, name = table.split(".", 1)
        fmt = "PARQUET" if suffix == ".parquet" else "CSV, HEADER"
        target = str(dest).replace("'", "''")
        con.execute(f'COPY (SELECT * FROM "{schema}"."{name}") TO \'{target}\' (FORMAT {fmt})')
        return int(con.execute(f'SELECT count(*) FROM "{schema}"."{name}"').fetchall()[0][0])
    finally:
        con.close()
