"""Read-only access for analysts: ``tallywave sql`` and ``tallywave export``.

Queries run on a read-only DuckDB connection with external access switched off and the
configuration locked, and only query statements are admitted, so a query can neither change the
database nor read or write files, attach databases or load extensions.
"""

from __future__ import annotations

import os
import re
from pathlib import Path

import duckdb
import pandas as pd

from tallywave.pipeline import store
from tallywave.pipeline.errors import UserError

_ALLOWED = {"SELECT", "EXPLAIN"}
_LEADING = re.compile(r"^(?:\s+|--[^\n]*(?:\n|$)|/\*.*?\*/)*", re.DOTALL)
_EXPLAIN = re.compile(r"^EXPLAIN(?:\s+ANALY[SZ]E)?\b|^EXPLAIN\s*\([^)]*\)", re.IGNORECASE)


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
        text = _LEADING.sub("", st.query).strip().rstrip(";")
        if kind == "EXPLAIN":  # EXPLAIN [ANALYZE] runs or plans its inner statement: check it
            inner = _EXPLAIN.sub("", text, count=1)
            if inner.strip() and inner != text:
                check_read_only(con, inner)
                continue
        if kind not in _ALLOWED:
            word = (re.findall(r"^[A-Za-z]+", text) or [kind])[0].upper()
            name = kind if word == "WITH" else word  # INSTALL, CHECKPOINT, USE: their own word
            raise UserError(f"refused: {name} statement; `tallywave sql` is read-only "
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
            first = str(exc).splitlines()[0] if str(exc).strip() else type(exc).__name__
            if "read-only" in first:  # a write that slipped past the statement check
                raise UserError(f"refused: {first}") from exc
            raise UserError(f"SQL error: {first}") from exc
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
