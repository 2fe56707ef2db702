"""Stage 1 — ingest: feed files → ``raw.feed_files``, ``raw.reports``, ``raw.rejected_rows``.

A feed spec (TOML, see design.md) names where the files are and how their columns map.  DuckDB
parses every file (CSV reader, JSON functions, Parquet reader); validation is one SQL pass that
gives each bad row a reason.  Each file is its own transaction: a bad file never disturbs data
accepted before it, and the same bytes seen twice (same sha256) are skipped.
"""

from __future__ import annotations

import datetime as dt
import glob
import hashlib
import os
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pandas as pd

from pipeline.errors import UserError
from pipeline.store import transaction

FORMATS = ("csv", "jsonl", "parquet")
VALUE_KINDS = ("cumulative", "daily")
_SPEC_KEYS = {
    "path", "format", "signal", "signal_column", "value_kind", "as_of", "columns",
    "date_format", "delimiter",
}
_COLUMN_KEYS = {"region", "ref_date", "value"}
MAX_VALUE = 1e9  # a daily or cumulative count above this is refused as implausible
MIN_DATE = dt.date(1900, 1, 1)


@dataclass
class FeedSpec:
    """One ``[source.NAME]`` table of a feed spec, validated."""

    name: str
    path: str
    format: str
    value_kind: str
    columns: dict[str, str]
    as_of: dict[str, str]
    spec_file: Path
    signal: str | None = None
    signal_column: str | None = None
    date_format: str = "%Y-%m-%d"
    delimiter: str | None = None

    def files(self) -> list[Path]:
        """Files matched by the glob (relative to the spec file), sorted by name."""
        pattern = self.path if os.path.isabs(self.path) else str(self.spec_file.parent / self.path)
        return [Path(p) for p in sorted(glob.glob(pattern, recursive=True))]


@dataclass
class FileOutcome:
    """What happened to one file."""

    path: str
    source: str
    status: str  # accepted | partial | empty | failed | skipped
    rows_read: int = 0
    rows_accepted: int = 0
    rows_rejected: int = 0
    message: str = ""
    file_id: int | None = None


@dataclass
class IngestSummary:
    """Outcomes for every file an ingest saw."""

    files: list[FileOutcome] = field(default_factory=list)

    def count(self, status: str) -> int:
        return sum(f.status == status for f in self.files)

    @property
    def rows_accepted(self) -> int:
        return sum(f.rows_accepted for f in self.files)

    @property
    def rows_rejected(self) -> int:
        return sum(f.rows_rejected for f in self.files)

    def line(self) -> str:
        parts = [f"{self.count(s)} {s}" for s in ("accepted", "partial", "empty", "failed",
                                                   "skipped") if self.count(s)]
        return (f"{len(self.files)} files ({', '.join(parts) or 'none'}); "
                f"{self.rows_accepted} rows accepted, {self.rows_rejected} rejected")


def load_spec(path: str | Path) -> list[FeedSpec]:
    """Read and validate a feed spec file; every problem names the file and the key."""
    p = Path(path)
    if not p.exists():
        raise UserError(f"{p}: feed spec not found")
    if not p.is_file():
        raise UserError(f"{p}: feed spec is not a file")
    try:
        data = tomllib.loads(p.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise UserError(f"{p}: not valid TOML ({exc})") from exc
    extra = set(data) - {"source"}
    if extra:
        raise UserError(f"{p}: unknown table [{min(extra)}] (only [source.NAME] tables)")
    sources = data.get("source")
    if not sources or not isinstance(sources, dict):
        raise UserError(f"{p}: no [source.NAME] tables")
    specs = []
    for name, t in sources.items():
        where = f"{p}: [source.{name}]"
        if not isinstance(t, dict):
            raise UserError(f"{where} must be a table")
        unknown = set(t) - _SPEC_KEYS
        if unknown:
            raise UserError(f"{where}: unknown key '{min(unknown)}'")
        for key in ("path", "format", "value_kind", "as_of", "columns"):
            if key not in t:
                raise UserError(f"{where}: missing key '{key}'")
        if t["format"] not in FORMATS:
            raise UserError(f"{where}: format must be one of {', '.join(FORMATS)}")
        if t["value_kind"] not in VALUE_KINDS:
            raise UserError(f"{where}: value_kind must be cumulative or daily")
        if ("signal" in t) == ("signal_column" in t):
            raise UserError(f"{where}: give exactly one of 'signal' or 'signal_column'")
        cols = t["columns"]
        if not isinstance(cols, dict) or set(cols) != _COLUMN_KEYS:
            raise UserError(f"{where}: columns must map exactly region, ref_date, value")
        asof = t["as_of"]
        if not isinstance(asof, dict) or asof.get("from") not in ("filename", "column"):
            raise UserError(f"{where}: as_of must be {{from = \"filename\"|\"column\", ...}}")
        if asof["from"] == "filename" and "pattern" not in asof:
            raise UserError(f"{where}: as_of from filename needs a pattern, e.g. \"%Y-%m-%d\"")
        if asof["from"] == "column" and "column" not in asof:
            raise UserError(f"{where}: as_of from column needs column = \"...\"")
        specs.append(FeedSpec(
            name=name, path=str(t["path"]), format=t["format"], value_kind=t["value_kind"],
            columns={k: str(v) for k, v in cols.items()}, as_of=dict(asof), spec_file=p,
            signal=t.get("signal"), signal_column=t.get("signal_column"),
            date_format=t.get("date_format", "%Y-%m-%d"), delimiter=t.get("delimiter"),
        ))
    return specs


def _pattern_regex(pattern: str) -> re.Pattern[str]:
    """Turn a strftime pattern such as ``%Y-%m-%d`` into a regex that finds it in a file name."""
    parts = {"%Y": r"\d{4}", "%m": r"\d{2}", "%d": r"\d{2}", "%j": r"\d{3}", "%y": r"\d{2}"}
    out = ""
    i = 0
    while i < len(pattern):
        tok = pattern[i:i + 2]
        if tok in parts:
            out += parts[tok]
            i += 2
        else:
            out += re.escape(pattern[i])
            i += 1
    return re.compile(out)


def as_of_from_filename(path: Path, pattern: str) -> dt.date:
    """Find the as_of date in a file name by its strftime pattern."""
    m = _pattern_regex(pattern).search(path.name)
    if not m:
        raise UserError(f"{path}: no date matching '{pattern}' in the file name")
    try:
        return dt.datetime.strptime(m.group(0), pattern).date()
    except ValueError as exc:
        raise UserError(f"{path}: '{m.group(0)}' in the file name is not a valid date") from exc


def sha256_of(path: Path) -> str:
    """Content hash used to recognise a file already ingested."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _q(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _lit(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


def _read_csv(con: duckdb.DuckDBPyConnection, spec: FeedSpec, path: Path) -> list[str]:
    """Parse a CSV file into temp table ``_parsed`` (all text) with line numbers; rejects kept."""
    opts = "all_varchar = true, header = true, store_rejects = true, " \
           "rejects_table = '_csv_rejects', rejects_scan = '_csv_scans'"
    if spec.delimiter:
        opts += f", delim = {_lit(spec.delimiter)}"
    con.execute("DROP TABLE IF EXISTS _csv_rejects")
    con.execute("DROP TABLE IF EXISTS _csv_scans")
    con.execute(
        f"CREATE OR REPLACE TEMP TABLE _parsed AS "
        f"SELECT *, row_number() OVER () AS _rec FROM read_csv({_lit(str(path))}, {opts})"
    )
    return [r[0] for r in con.execute("DESCRIBE _parsed").fetchall() if r[0] != "_rec"]


def _csv_parser_rejects(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    try:
        return con.execute(
            "SELECT line AS line_no, csv_line AS content, "
            "lower(replace(error_type, '_', ' ')) || ': ' || error_message AS reason "
            "FROM _csv_rejects ORDER BY line"
        ).df()
    except duckdb.Error:
        return pd.DataFrame(columns=["line_no", "content", "reason"])


def _parse(con: duckdb.DuckDBPyConnection, spec: FeedSpec, path: Path) -> tuple[pd.DataFrame, str]:
    """Parse one file with DuckDB into a staging table ``_stage``.

    Returns the parser-level rejects and a note.  ``_stage`` has columns line_no, content and one
    text column per mapped field.
    """
    cols = dict(spec.columns)
    if spec.signal_column:
        cols["signal"] = spec.signal_column
    if spec.as_of["from"] == "column":
        cols["as_of"] = spec.as_of["column"]
    parser_rejects = pd.DataFrame(columns=["line_no", "content", "reason"])
    if spec.format == "csv":
        names = _read_csv(con, spec, path)
        missing = [c for c in cols.values() if c not in names]
        if missing:
            raise UserError(f"{path}: missing column(s) {', '.join(missing)} "
                            f"(found: {', '.join(names) or 'none'})")
        parser_rejects = _csv_parser_rejects(con)
        sel = ", ".join(f"{_q(src)} AS {k}" for k, src in cols.items())
        content = " || ',' || ".join(f"coalesce({_q(c)}, '')" for c in names)
        con.execute(f"CREATE OR REPLACE TEMP TABLE _stage AS SELECT _rec, {sel}, "
                    f"{content} AS content FROM _parsed")
        # Record number -> physical line: skip the header and the lines the parser rejected.
        n = con.execute("SELECT count(*) FROM _stage").fetchall()[0][0]
        rej = {int(x) for x in parser_rejects["line_no"]}
        lines = np.arange(2, 2 + n + len(rej))
        if rej:
            lines = lines[~np.isin(lines, list(rej))]
        con.register("_linemap", pd.DataFrame({"_rec": np.arange(1, n + 1),
                                               "line_no": lines[:n]}))
        con.execute("CREATE OR REPLACE TEMP TABLE _stage AS SELECT m.line_no, s.* EXCLUDE (_rec) "
                    "FROM _stage s JOIN _linemap m USING (_rec)")
        con.unregister("_linemap")
    elif spec.format == "jsonl":
        # One record per physical line: read lines with the CSV reader (no quoting), then parse
        # each with DuckDB's JSON functions so a bad line is quarantined, not fatal.
        con.execute("DROP TABLE IF EXISTS _csv_rejects")
        con.execute("DROP TABLE IF EXISTS _csv_scans")
        con.execute(
            f"CREATE OR REPLACE TEMP TABLE _lines AS SELECT row_number() OVER () AS line_no, line "
            f"FROM read_csv({_lit(str(path))}, columns = {{'line': 'VARCHAR'}}, header = false, "
            f"delim = '\x1f', quote = '', escape = '', store_rejects = true, "
            f"rejects_table = '_csv_rejects', rejects_scan = '_csv_scans', "
            f"max_line_size = 20000000)"
        )
        parser_rejects = _csv_parser_rejects(con)
        sel = ", ".join(
            f"CASE WHEN json_type(line, {_lit('$.' + _json_key(src))}) IN ('OBJECT', 'ARRAY') "
            f"THEN '<' || lower(json_type(line, {_lit('$.' + _json_key(src))})) || '>' "
            f"ELSE json_extract_string(line, {_lit('$.' + _json_key(src))}) END AS {k}"
            for k, src in cols.items()
        )
        con.execute(
            "CREATE OR REPLACE TEMP TABLE _json AS SELECT line_no, line AS content, "
            "CASE WHEN json_valid(line) THEN json_type(line) = 'OBJECT' ELSE false END AS _ok "
            "FROM _lines WHERE trim(coalesce(line, '')) <> ''"
        )
        bad = con.execute("SELECT line_no, content, 'not a JSON object' AS reason "
                          "FROM _json WHERE NOT _ok").df()
        parser_rejects = pd.concat([parser_rejects, bad], ignore_index=True)
        con.execute(f"CREATE OR REPLACE TEMP TABLE _stage AS SELECT line_no, content, "
                    f"{sel.replace('(line,', '(content,')} FROM _json WHERE _ok")
        if con.execute("SELECT count(*) FROM _stage").fetchall()[0][0] > 0:
            for k, src in cols.items():
                have = con.execute(
                    f"SELECT count(*) FROM _stage WHERE json_exists(content, "
                    f"{_lit('$.' + _json_key(src))})").fetchall()[0][0]
                if have == 0:
                    raise UserError(f"{path}: no record has the key '{src}' (mapped to {k})")
    else:  # parquet
        try:
            names = [r[0] for r in con.execute(
                f"DESCRIBE SELECT * FROM read_parquet({_lit(str(path))})").fetchall()]
        except duckdb.Error as exc:
            raise UserError(f"{path}: not a readable Parquet file "
                            f"({str(exc).splitlines()[0][:160]})") from exc
        missing = [c for c in cols.values() if c not in names]
        if missing:
            raise UserError(f"{path}: missing column(s) {', '.join(missing)} "
                            f"(found: {', '.join(names) or 'none'})")
        sel = ", ".join(f"CAST({_q(src)} AS VARCHAR) AS {k}" for k, src in cols.items())
        con.execute(
            f"CREATE OR REPLACE TEMP TABLE _stage AS SELECT file_row_number + 1 AS line_no, "
            f"{sel}, CAST(to_json(p) AS VARCHAR) AS content "
            f"FROM read_parquet({_lit(str(path))}, file_row_number = true) p"
        )
        # to_json(p) includes file_row_number; harmless and shows the row position.
    return parser_rejects, ""


def _first(con: duckdb.DuckDBPyConnection, sql: str, params: list | None = None) -> tuple | None:
    """First row of a query or None (fully consumes the result, as DuckDB requires)."""
    rows = con.execute(sql, params or []).fetchall()
    return rows[0] if rows else None


def _json_key(name: str) -> str:
    return '"' + name.replace('"', '\\"') + '"'


_VALIDATE = """
CREATE OR REPLACE TEMP TABLE _checked AS
WITH typed AS (
    SELECT line_no, content,
           nullif(trim(region), '') AS region,
           {signal_expr} AS signal,
           ref_date AS ref_raw,
           try_strptime(trim(ref_date), {fmt})::DATE AS ref_date,
           {as_of_expr} AS as_of,
           value AS value_raw,
           TRY_CAST(trim(value) AS DOUBLE) AS value
    FROM _stage
)
SELECT *,
  CASE
    WHEN region IS NULL THEN 'missing region'
    WHEN signal IS NULL THEN 'missing signal'
    WHEN ref_raw IS NULL OR trim(ref_raw) = '' THEN 'missing ref_date'
    WHEN ref_date IS NULL THEN 'unparseable ref_date ''' || left(ref_raw, 40) || ''' (expected {fmt_txt})'
    WHEN ref_date < DATE '1900-01-01' THEN 'ref_date ' || ref_date || ' is before 1900'
    WHEN as_of IS NULL THEN 'missing or unparseable as_of'
    WHEN ref_date > as_of THEN 'ref_date ' || ref_date || ' is after as_of ' || as_of
    WHEN value_raw IS NULL OR trim(value_raw) = '' THEN 'missing value'
    WHEN value IS NULL THEN 'non-numeric value ''' || left(value_raw, 40) || ''''
    WHEN isnan(value) OR isinf(value) THEN 'value ''' || left(value_raw, 40) || ''' is not a finite number'
    WHEN value < 0 THEN 'negative {kind} value ' || value_raw
    WHEN value > {max_value} THEN 'implausibly large value ' || left(value_raw, 40)
  END AS reason
FROM typed
"""

_DUPLICATES = """
CREATE OR REPLACE TEMP TABLE _checked AS
WITH k AS (
    SELECT *,
      count(*) FILTER (WHERE reason IS NULL)
          OVER (PARTITION BY region, signal, ref_date, as_of) AS n_key,
      count(DISTINCT value) FILTER (WHERE reason IS NULL)
          OVER (PARTITION BY region, signal, ref_date, as_of) AS n_val,
      row_number() OVER (PARTITION BY region, signal, ref_date, as_of, reason IS NULL
                         ORDER BY line_no) AS rn
    FROM _checked
)
SELECT line_no, content, region, signal, ref_date, as_of, value,
  CASE
    WHEN reason IS NOT NULL THEN reason
    WHEN n_key > 1 AND n_val > 1 THEN 'conflicting values for the same region, signal and '
         || 'ref_date ' || ref_date || ' in one file'
    WHEN n_key > 1 AND rn > 1 THEN 'duplicate of an earlier row (same key and value)'
  END AS reason
FROM k
"""


def _validate(con: duckdb.DuckDBPyConnection, spec: FeedSpec, as_of: dt.date | None) -> None:
    fmt = _lit(spec.date_format)
    signal_expr = ("nullif(trim(signal), '')" if spec.signal_column else _lit(spec.signal or ""))
    if as_of is not None:
        as_of_expr = f"DATE {_lit(as_of.isoformat())}"
    else:
        as_of_expr = f"try_strptime(trim(as_of), {fmt})::DATE"
    con.execute(_VALIDATE.format(
        signal_expr=signal_expr, fmt=fmt, fmt_txt=spec.date_format.replace("'", ""),
        as_of_expr=as_of_expr, kind=spec.value_kind, max_value=MAX_VALUE,
    ))
    con.execute(_DUPLICATES)


def _record(con: duckdb.DuckDBPyConnection, spec: FeedSpec, path: Path, sha: str,
            as_of: dt.date | None, out: FileOutcome) -> int:
    fid = con.execute("SELECT nextval('raw.file_id_seq')").fetchall()[0][0]
    con.execute(
        "INSERT INTO raw.feed_files VALUES (?, ?, ?, ?, ?, now(), ?, ?, ?, ?, ?)",
        [fid, spec.name, str(path), sha, as_of, out.rows_read, out.rows_accepted,
         out.rows_rejected, out.status, out.message],
    )
    out.file_id = int(fid)
    return int(fid)


def ingest_file(con: duckdb.DuckDBPyConnection, spec: FeedSpec, path: Path) -> FileOutcome:
    """Ingest one file in one transaction; never raises for a bad file (status ``failed``)."""
    out = FileOutcome(path=str(path), source=spec.name, status="failed")
    try:
        if not path.exists():
            raise UserError(f"{path}: file not found (broken link?)")
        if path.is_dir():
            raise UserError(f"{path}: is a folder, not a file")
        sha = sha256_of(path)
    except OSError as exc:
        out.message = f"{path}: cannot read ({exc.strerror or exc})"
        return _record_failed(con, spec, path, "", None, out)
    except UserError as exc:
        out.message = str(exc)
        return _record_failed(con, spec, path, "", None, out)
    seen = _first(con, "SELECT status FROM raw.feed_files WHERE sha256 = ? AND source = ? "
                  "AND status <> 'failed' LIMIT 1", [sha, spec.name])
    if seen:
        out.status = "skipped"
        out.message = f"{path}: already ingested (same content, earlier status {seen[0]})"
        return out
    as_of = None
    try:
        if spec.as_of["from"] == "filename":
            as_of = as_of_from_filename(path, spec.as_of["pattern"])
        if path.stat().st_size == 0:
            raise UserError(f"{path}: empty file")
        try:
            parser_rejects, _ = _parse(con, spec, path)
        except duckdb.Error as exc:
            first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
            raise UserError(f"{path}: cannot parse as {spec.format} ({first[:200]})") from exc
        _validate(con, spec, as_of)
    except UserError as exc:
        out.message = str(exc)
        return _record_failed(con, spec, path, sha, as_of, out)

    n_ok, n_bad = con.execute(
        "SELECT count(*) FILTER (WHERE reason IS NULL), count(*) FILTER (WHERE reason IS NOT NULL) "
        "FROM _checked").fetchall()[0]
    out.rows_accepted = int(n_ok)
    out.rows_rejected = int(n_bad) + len(parser_rejects)
    out.rows_read = out.rows_accepted + out.rows_rejected
    if out.rows_read == 0:
        out.status, out.message = "empty", f"{path}: no data rows"
    elif out.rows_accepted == 0:
        out.status = "failed"
        first = _first(con, "SELECT line_no, reason FROM _checked WHERE reason IS NOT NULL "
                       "ORDER BY line_no LIMIT 1")
        if first is None and len(parser_rejects):
            first = (int(parser_rejects.iloc[0]["line_no"]), parser_rejects.iloc[0]["reason"])
        out.message = f"{path}: no valid rows (line {first[0]}: {first[1]})"
    elif out.rows_rejected:
        out.status = "partial"
        first = _first(con, "SELECT line_no, reason FROM _checked WHERE reason IS NOT NULL "
                       "ORDER BY line_no LIMIT 1")
        if first is None:
            first = (int(parser_rejects.iloc[0]["line_no"]), parser_rejects.iloc[0]["reason"])
        out.message = (f"{path}: {out.rows_rejected} row(s) quarantined "
                       f"(first: line {first[0]}: {first[1]})")
    else:
        out.status = "accepted"
    if as_of is None:
        as_of = con.execute("SELECT max(as_of) FROM _checked WHERE reason IS NULL").fetchall()[0][0]
    with transaction(con):
        fid = _record(con, spec, path, sha, as_of, out)
        con.execute(
            "INSERT INTO raw.reports SELECT ?, ?, region, signal, ref_date, as_of, value, ?, "
            "line_no FROM _checked WHERE reason IS NULL", [fid, spec.name, spec.value_kind])
        con.execute("INSERT INTO raw.rejected_rows SELECT ?, line_no, content, reason "
                    "FROM _checked WHERE reason IS NOT NULL", [fid])
        if len(parser_rejects):
            pr = parser_rejects.assign(file_id=fid)[["file_id", "line_no", "content", "reason"]]
            con.register("_pr", pr)
            con.execute("INSERT INTO raw.rejected_rows SELECT file_id, line_no, content, reason "
                        "FROM _pr")
            con.unregister("_pr")
    return out


def _record_failed(con: duckdb.DuckDBPyConnection, spec: FeedSpec, path: Path, sha: str,
                   as_of: dt.date | None, out: FileOutcome) -> FileOutcome:
    out.status = "failed"
    out.message = out.message.splitlines()[0] if out.message else f"{path}: unreadable"
    if sha and _first(con, "SELECT 1 FROM raw.feed_files WHERE sha256 = ? AND source = ?",
                      [sha, spec.name]):
        return out
    with transaction(con):
        _record(con, spec, path, sha or "", as_of, out)
    return out


def ingest_spec(con: duckdb.DuckDBPyConnection, spec_path: str | Path,
                *, update_vintages: bool = True) -> IngestSummary:
    """Ingest every file of every source in a feed spec, then refresh ``core.observations``."""
    specs = load_spec(spec_path)
    summary = IngestSummary()
    for spec in specs:
        files = spec.files()
        if not files:
            raise UserError(f"{spec.spec_file}: [source.{spec.name}] path '{spec.path}' "
                            "matches no files")
        for path in files:
            summary.files.append(ingest_file(con, spec, path))
    if update_vintages:
        from pipeline.vintages import update_observations

        update_observations(con)
    return summary


def spec_settings(spec: FeedSpec) -> dict[str, Any]:
    """The spec as a plain dict (for logs and run records)."""
    return {"name": spec.name, "path": spec.path, "format": spec.format,
            "value_kind": spec.value_kind, "signal": spec.signal or spec.signal_column}
