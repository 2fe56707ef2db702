"""Stage 1 — ingest: feed files → ``raw.feed_files``, ``raw.reports``, ``raw.rejected_rows``.

A feed spec (TOML, see design.md) names where the files are and how their columns map.  DuckDB
parses every file (CSV reader, JSON functions, Parquet reader); validation is one SQL pass that
gives each bad row a reason.  Each file is its own transaction: a bad file never disturbs data
accepted before it, and the same bytes seen twice (same sha256 and as_of) are skipped.

Documented outcomes (``raw.feed_files.status``; messages are one line naming the file):

- ``failed``: the file cannot be used at all: zero bytes, not UTF-8-parsable at all, unreadable
  Parquet, mapped columns missing or of a nested type, a line longer than ``MAX_LINE_BYTES``, no
  date in the file name, a folder / pipe / broken or looping symbolic link, or no valid row.
- ``empty``: a header (or blank lines) but no data rows.
- ``partial``: some rows quarantined in ``raw.rejected_rows`` (line number = physical line in the
  file, content = the line's bytes as UTF-8 with undecodable bytes shown as ``\\xNN``, at most
  ``MAX_CONTENT_CHARS`` characters), the rest accepted.
- ``accepted``: every row valid.  ``skipped``: same content already ingested for this source
  with the same as_of (identical bytes under a new date in the file name are a new snapshot).

CSV dialect: DuckDB's sniffer detects the delimiter (``,`` ``;`` tab ``|``) unless the spec sets
``delimiter``; if the detected header does not contain the mapped column names the file fails and
the message lists the columns found.  Quoting is RFC 4180 double quotes; a file whose double
quotes are not well formed is read without quoting (the quotes stay in the text).  A UTF-8
byte-order mark is ignored.  Text fields (region, signal) are stored verbatim (trimmed) whatever
they contain; they are data, never SQL.  In JSON lines a nested or boolean value is a type error;
numbers are accepted for text fields and numeric strings for the value.  Parquet DATE /
TIMESTAMP columns are taken as dates.
"""

from __future__ import annotations

import datetime as dt
import errno
import hashlib
import mmap
import os
import re
import stat
from dataclasses import dataclass, field
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa

from tallywave.pipeline.errors import UserError
from tallywave.pipeline.feedspec import FORMATS, ISO_WEEK, VALUE_KINDS, FeedSpec, load_spec
from tallywave.pipeline.hierarchy import load_regions
from tallywave.pipeline.store import transaction

__all__ = ["FORMATS", "VALUE_KINDS", "FeedSpec", "FileOutcome", "IngestSummary", "ingest_file",
           "ingest_spec", "load_spec"]

MAX_VALUE = 1e9  # a daily or cumulative count above this is refused as implausible
MIN_DATE = dt.date(1900, 1, 1)
MAX_LINE_BYTES = 32 * 1024 * 1024  # a longer physical line fails the file (bounded memory)
MAX_TEXT_CHARS = 1000  # a longer region / signal name is quarantined as implausible
MAX_CONTENT_CHARS = 65536  # quarantined content is kept verbatim up to this many characters
_CHUNK = 1 << 23  # bytes per block when scanning a file for line ends


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
    regions: str | None = None

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


@dataclass
class _Parsed:
    """Parser-level results besides the staging table ``_stage``."""

    rejects: pd.DataFrame  # line_no, content, reason (rows the reader itself refused)
    spans: pd.DataFrame | None = None  # line_no, start, end: byte span of each CSV record


def _no_rejects() -> pd.DataFrame:
    return pd.DataFrame({"line_no": pd.Series(dtype="int64"), "content": pd.Series(dtype=object),
                         "reason": pd.Series(dtype=object)})


def _segments(path: Path, quoted: bool) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Split a file at its record ends, reading it in blocks (memory bounded by the block size).

    Returns start byte, end byte (without the line end) and physical first line of every segment.
    With ``quoted`` a newline inside double quotes does not end a record (RFC 4180; a doubled
    quote keeps the parity, so it needs no special case).
    """
    terms: list[np.ndarray] = []
    lines: list[np.ndarray] = []
    crs: list[np.ndarray] = []
    parity, n_nl, offset, last = 0, 0, 0, 0
    with open(path, "rb") as fh:
        while buf := fh.read(_CHUNK):
            a = np.frombuffer(buf, dtype=np.uint8)
            nl = np.flatnonzero(a == 10)
            if quoted:
                par = np.bitwise_xor.accumulate((a == 34).view(np.uint8)) ^ np.uint8(parity)
                parity = int(par[-1])
                idx = np.flatnonzero(par[nl] == 0)
            else:
                idx = np.arange(len(nl))
            t = nl[idx]
            terms.append(t.astype(np.int64) + offset)
            lines.append(n_nl + 1 + idx.astype(np.int64))
            prev = np.where(t > 0, a[np.maximum(t - 1, 0)], last) if len(t) else t
            crs.append(np.asarray(prev == 13, dtype=np.int64))
            last, n_nl, offset = int(a[-1]), n_nl + len(nl), offset + len(buf)
    t = np.concatenate(terms) if terms else np.zeros(0, np.int64)
    tl = np.concatenate(lines) if lines else np.zeros(0, np.int64)
    cr = np.concatenate(crs) if crs else np.zeros(0, np.int64)
    starts = np.concatenate([[0], t + 1])
    ends = np.concatenate([t - cr, [offset - (last == 13 and offset > 0)]])
    return starts, np.maximum(ends, starts), np.concatenate([[1], tl + 1])


def _csv_spans(path: Path, n_parsed: int, rejected: np.ndarray,
               modes: tuple[bool, ...]) -> pd.DataFrame | None:
    """Physical line and byte span of every CSV data record, matched to what DuckDB read.

    DuckDB skips blank lines and numbers a rejected record by the count of record ends before
    it; records are matched in order.  ``None`` when the split does not agree with DuckDB's
    (an unusual dialect): the caller then falls back to DuckDB's own numbering.
    """
    want = {int(x) for x in rejected}
    for quoted in modes:  # split honouring double quotes or not, in this order
        starts, ends, first = _segments(path, quoted)
        seg_no = np.arange(1, len(starts) + 1)
        data = np.flatnonzero(ends > starts)[1:]  # the first non-blank record is the header
        is_rej = np.isin(seg_no[data], list(want))
        if int(is_rej.sum()) != len(want) or int((~is_rej).sum()) != n_parsed:
            continue
        return pd.DataFrame({"seg_no": seg_no[data], "line_no": first[data],
                             "start": starts[data], "end": ends[data], "rejected": is_rej})
    return None


def _clip(text: str, n_bytes: int | None = None) -> str:
    """Quarantined content: verbatim up to MAX_CONTENT_CHARS characters, then a marker."""
    if len(text) <= MAX_CONTENT_CHARS and (n_bytes is None or n_bytes <= 4 * MAX_CONTENT_CHARS):
        return text
    total = f"{n_bytes} bytes" if n_bytes is not None else f"{len(text)} characters"
    return text[:MAX_CONTENT_CHARS] + f" ... [truncated, {total} in total]"


def _raw_lines(path: Path, spans: pd.DataFrame) -> pd.DataFrame:
    """The bytes of some records as text (undecodable bytes shown as \\xNN), clipped."""
    out: list[str] = []
    if len(spans):
        with open(path, "rb") as fh, mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ) as mm:
            for s, e in zip(spans["start"].to_numpy(), spans["end"].to_numpy(), strict=True):
                stop = min(int(e), int(s) + 4 * MAX_CONTENT_CHARS + 4)
                text = mm[int(s):stop].decode("utf-8", "backslashreplace")
                out.append(_clip(text, int(e) - int(s)))
    return pd.DataFrame({"line_no": spans["line_no"].to_numpy(), "content": out})


def _one_line(text: str) -> str:
    return " ".join(str(text).split())


def _read_csv(con: duckdb.DuckDBPyConnection, spec: FeedSpec,
              path: Path) -> tuple[list[str], bool]:
    """Parse a CSV file into temp table ``_parsed`` (all text) with record numbers.

    Returns the column names and whether double quotes were honoured.
    """
    opts = ("all_varchar = true, header = true, store_rejects = true, "
            "rejects_table = '_csv_rejects', rejects_scan = '_csv_scans', "
            f"max_line_size = {MAX_LINE_BYTES}, auto_type_candidates = ['VARCHAR']")
    # (Only VARCHAR candidates: DuckDB's type sniffing is quadratic in a very long field.)
    if spec.delimiter:
        opts += f", delim = {_lit(spec.delimiter)}"
    # Quoting is RFC 4180 (double quotes); left to the sniffer, names that start or end with an
    # apostrophe can make it pick ' and merge rows silently.  A file whose double quotes are not
    # well formed cannot be read that way: it is read without quoting (quotes kept as data).
    quoted = True
    for quoting in ("quote = '\"'", "quote = '', escape = ''"):
        con.execute("DROP TABLE IF EXISTS _csv_rejects")
        con.execute("DROP TABLE IF EXISTS _csv_scans")
        try:
            con.execute(
                f"CREATE OR REPLACE TEMP TABLE _parsed AS SELECT *, row_number() OVER () AS _rec "
                f"FROM read_csv({_lit(str(path))}, {opts}, {quoting})"
            )
            break
        except duckdb.Error as exc:
            if "maximum line size of" in str(exc).lower():
                starts, ends, first = _segments(path, quoted=False)
                i = int(np.argmax(ends - starts))
                if ends[i] - starts[i] > MAX_LINE_BYTES:
                    raise UserError(
                        f"{path}: line {int(first[i])} is {int(ends[i] - starts[i])} bytes long "
                        f"(limit {MAX_LINE_BYTES}); file not ingested") from exc
            if not quoted or "sniffing" not in str(exc):
                raise
            quoted = False
    names = [r[0] for r in con.execute("DESCRIBE _parsed").fetchall() if r[0] != "_rec"]
    return names, quoted


def _csv_parser_rejects(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """Rows DuckDB's CSV reader refused: one per record (it may log one per missing column)."""
    try:
        df = con.execute(
            "SELECT line AS line_no, arg_min(csv_line, column_idx) AS content, "
            "arg_min(lower(replace(error_type, '_', ' ')) || ': ' || error_message, column_idx) "
            "AS reason FROM _csv_rejects GROUP BY line ORDER BY line"
        ).df()
    except duckdb.Error:
        return _no_rejects()
    df["reason"] = df["reason"].map(_one_line)
    return df


def _parse_csv(con: duckdb.DuckDBPyConnection, spec: FeedSpec, path: Path,
               cols: dict[str, str]) -> _Parsed:
    names, quoted = _read_csv(con, spec, path)
    missing = [c for c in cols.values() if c not in names]
    if missing:
        raise UserError(f"{path}: missing column(s) {', '.join(missing)} "
                        f"(found: {', '.join(names) or 'none'})")
    rejects = _csv_parser_rejects(con)
    sel = ", ".join(f"{_q(src)} AS {k}" for k, src in cols.items())
    n = con.execute("SELECT count(*) FROM _parsed").fetchall()[0][0]
    nl_inside = con.execute(
        f"SELECT count(*) FROM _parsed WHERE strpos(concat({', '.join(map(_q, names))}), "
        "chr(10)) > 0").fetchall()[0][0] > 0
    nl_inside |= bool(rejects["content"].astype(str).str.strip().str.contains("\n").any())
    spans = _csv_spans(path, n, rejects["line_no"].to_numpy(),
                       modes=(nl_inside, not nl_inside) if quoted else (False,))
    if spans is not None:
        # Physical line numbers for every record, verbatim bytes for the reader's rejects.
        kept = spans.loc[~spans["rejected"], "line_no"].to_numpy()
        linemap = pd.DataFrame({"_rec": np.arange(1, n + 1), "line_no": kept})
        rej = spans.loc[spans["rejected"]].set_index("seg_no")
        by_seg = rejects.set_index("line_no")
        rej_spans = rej.loc[by_seg.index.to_numpy()]
        raw = _raw_lines(path, rej_spans)
        rejects = pd.DataFrame({"line_no": raw["line_no"].to_numpy(),
                                "content": raw["content"].to_numpy(),
                                "reason": by_seg["reason"].to_numpy()})
        spans = spans.loc[:, ["line_no", "start", "end"]]
    else:
        # Fallback: DuckDB's numbering (one record per line, blank lines skipped).
        rej = {int(x) for x in rejects["line_no"]}
        lines = np.arange(2, 2 + n + len(rej))
        if rej:
            lines = lines[~np.isin(lines, list(rej))]
        linemap = pd.DataFrame({"_rec": np.arange(1, n + 1), "line_no": lines[:n]})
        rejects["content"] = rejects["content"].astype(str).str.lstrip("\r\n").map(_clip)
    # With the record spans known, quarantined rows are later copied from the file's bytes, so
    # the rebuilt text of every row is only needed in the fallback.
    content = ("NULL::VARCHAR" if spans is not None else
               " || ',' || ".join(f"coalesce({_q(c)}, '')" for c in names))
    con.register("_linemap", linemap)
    con.execute(f"CREATE OR REPLACE TEMP TABLE _stage AS SELECT m.line_no, {sel}, "
                f"{content} AS content, NULL::VARCHAR AS type_error "
                "FROM _parsed p JOIN _linemap m USING (_rec)")
    con.unregister("_linemap")
    return _Parsed(rejects=rejects, spans=spans)


def _parse_jsonl(con: duckdb.DuckDBPyConnection, path: Path, cols: dict[str, str]) -> _Parsed:
    """One record per physical line; each line parsed with DuckDB's JSON functions, so a bad
    line is quarantined, not fatal.  Lines are split here (LF or CRLF, any mix)."""
    data = path.read_bytes()  # memory: the file's size (the DuckDB CSV reader mis-splits mixes)
    a = np.frombuffer(data, dtype=np.uint8)
    nl = np.flatnonzero(a == 10)
    tail = [[len(a)]] if len(a) and a[-1] != 10 else []
    bounds = np.concatenate([[0], nl + 1, *tail]).astype(np.int64)
    long = np.flatnonzero(np.diff(bounds) > MAX_LINE_BYTES)
    if len(long):
        raise UserError(f"{path}: line {int(long[0]) + 1} is {int(np.diff(bounds)[long[0]])} "
                        f"bytes long (limit {MAX_LINE_BYTES}); file not ingested")
    arr = pa.LargeBinaryArray.from_buffers(pa.large_binary(), len(bounds) - 1,
                                           [None, pa.py_buffer(bounds), pa.py_buffer(data)])
    con.register("_jsonl_raw", pa.table({"raw": arr,
                                         "line_no": np.arange(1, len(bounds), dtype=np.int64)}))
    try:
        con.execute(
            "CREATE OR REPLACE TEMP TABLE _lines AS SELECT line_no, "
            "rtrim(CASE WHEN line_no = 1 THEN ltrim(TRY(decode(raw)), chr(65279)) "
            "ELSE TRY(decode(raw)) END, chr(13) || chr(10)) AS line FROM _jsonl_raw"
        )
    finally:
        con.unregister("_jsonl_raw")
    bad_lines = [r[0] for r in con.execute(
        "SELECT line_no FROM _lines WHERE line IS NULL ORDER BY line_no").fetchall()]
    rejects = _no_rejects()
    if bad_lines:
        idx = np.asarray(bad_lines, dtype=np.int64) - 1
        start, end = bounds[idx], bounds[idx + 1].copy()
        end -= (end > start) & (a[np.maximum(end - 1, 0)] == 10)
        end -= (end > start) & (a[np.maximum(end - 1, 0)] == 13)
        raw = _raw_lines(path, pd.DataFrame({"line_no": idx + 1, "start": start, "end": end}))
        rejects = raw.assign(reason="invalid UTF-8 byte sequence (feeds must be UTF-8)")
    key = {k: _lit("$." + _json_key(src)) for k, src in cols.items()}
    sel = ", ".join(
        f"CASE WHEN json_type(content, {key[k]}) IN ('OBJECT', 'ARRAY') "
        f"THEN '<' || lower(json_type(content, {key[k]})) || '>' "
        f"ELSE json_extract_string(content, {key[k]}) END AS {k}"
        for k in cols
    )
    # A nested or boolean JSON value is a type error (numbers are fine for text fields, and a
    # numeric string is fine for the value).
    bad_type = ", ".join(
        f"CASE WHEN json_type(content, {key[k]}) IN ('OBJECT', 'ARRAY', 'BOOLEAN') "
        f"THEN '{k} is a JSON ' || lower(json_type(content, {key[k]})) || ', expected "
        f"{'a number' if k == 'value' else 'a string'}' END"
        for k in cols
    )
    con.execute(
        "CREATE OR REPLACE TEMP TABLE _json AS SELECT line_no, line AS content, "
        "CASE WHEN json_valid(line) THEN json_type(line) = 'OBJECT' ELSE false END AS _ok "
        "FROM _lines WHERE line IS NOT NULL AND trim(line) <> ''"
    )
    bad = con.execute("SELECT line_no, content, 'not a JSON object' AS reason "
                      "FROM _json WHERE NOT _ok ORDER BY line_no").df()
    bad["content"] = bad["content"].map(_clip)
    parts = [d for d in (rejects, bad) if len(d)]
    rejects = pd.concat(parts, ignore_index=True) if parts else rejects
    con.execute(f"CREATE OR REPLACE TEMP TABLE _stage AS SELECT line_no, content, {sel}, "
                f"nullif(concat_ws('; ', {bad_type}), '') AS type_error FROM _json WHERE _ok")
    if con.execute("SELECT count(*) FROM _stage").fetchall()[0][0] > 0:
        for k, src in cols.items():
            have = con.execute(f"SELECT count(*) FROM _stage WHERE json_exists(content, {key[k]})"
                               ).fetchall()[0][0]
            if have == 0:
                raise UserError(f"{path}: no record has the key '{src}' (mapped to {k})")
    return _Parsed(rejects=rejects)


_NESTED = ("STRUCT", "MAP", "UNION", "LIST", "BLOB", "BIT")


def _parse_parquet(con: duckdb.DuckDBPyConnection, spec: FeedSpec, path: Path,
                   cols: dict[str, str]) -> _Parsed:
    try:
        described = con.execute(
            f"DESCRIBE SELECT * FROM read_parquet({_lit(str(path))})").fetchall()
    except duckdb.Error as exc:
        raise UserError(f"{path}: not a readable Parquet file "
                        f"({_one_line(str(exc).strip().splitlines()[0])[:160]})") from exc
    types = {r[0]: str(r[1]) for r in described}
    missing = [c for c in cols.values() if c not in types]
    if missing:
        raise UserError(f"{path}: missing column(s) {', '.join(missing)} "
                        f"(found: {', '.join(types) or 'none'})")
    for k, src in cols.items():
        t = types[src].upper()
        if t.startswith(_NESTED) or t.endswith("]") or (k == "value" and t == "BOOLEAN"):
            raise UserError(f"{path}: column '{src}' (mapped to {k}) has type {types[src]}, "
                            f"expected {'a number' if k == 'value' else 'text or a date'}")

    def expr(k: str, src: str) -> str:
        t = types[src].upper()
        is_date = t == "DATE" or t.startswith("TIMESTAMP")
        if k in ("ref_date", "as_of", "reported_on") and is_date:
            return f"strftime(CAST({_q(src)} AS DATE), {_lit(spec.date_format)}) AS {k}"
        return f"CAST({_q(src)} AS VARCHAR) AS {k}"

    sel = ", ".join(expr(k, src) for k, src in cols.items())
    con.execute(
        f"CREATE OR REPLACE TEMP TABLE _stage AS SELECT file_row_number + 1 AS line_no, "
        f"{sel}, CAST(to_json(p) AS VARCHAR) AS content, NULL::VARCHAR AS type_error "
        f"FROM read_parquet({_lit(str(path))}, file_row_number = true) p"
    )
    # to_json(p) includes file_row_number; harmless and shows the row position.
    return _Parsed(rejects=_no_rejects())


def _parse(con: duckdb.DuckDBPyConnection, spec: FeedSpec, path: Path) -> _Parsed:
    """Parse one file with DuckDB into a staging table ``_stage``.

    ``_stage`` has columns line_no, content, type_error and one text column per mapped field;
    the returned object holds the rows the reader itself refused.
    """
    cols = dict(spec.columns)
    if spec.signal_column:
        cols["signal"] = spec.signal_column
    if spec.as_of is not None and spec.as_of["from"] == "column":
        cols["as_of"] = spec.as_of["column"]
    if spec.format == "csv":
        return _parse_csv(con, spec, path, cols)
    if spec.format == "jsonl":
        return _parse_jsonl(con, path, cols)
    return _parse_parquet(con, spec, path, cols)


def _first(con: duckdb.DuckDBPyConnection, sql: str, params: list | None = None) -> tuple | None:
    """First row of a query or None (fully consumes the result, as DuckDB requires)."""
    rows = con.execute(sql, params or []).fetchall()
    return rows[0] if rows else None


def _json_key(name: str) -> str:
    return '"' + name.replace('"', '\\"') + '"'


#: The checks of the region and signal text shared by every validation query.
_NAME_CHECKS = """    WHEN region IS NULL THEN 'missing region'
    WHEN length(region) > {max_text}
         THEN 'region is ' || length(region) || ' characters long (limit {max_text})'
    WHEN signal IS NULL THEN 'missing signal'
    WHEN length(signal) > {max_text}
         THEN 'signal is ' || length(signal) || ' characters long (limit {max_text})'
"""

_VALIDATE = ("""
CREATE OR REPLACE TEMP TABLE _checked AS
WITH parsed AS (
    SELECT line_no, content, type_error,
           nullif(trim(region), '') AS region,
           {signal_expr} AS signal,
           ref_date AS ref_raw,
           {ref_expr} AS ref_label,
           {as_of_expr} AS as_of,
           value AS value_raw,
           TRY_CAST(trim(value) AS DOUBLE) AS value
    FROM _stage
), typed AS (
    SELECT *, ref_label + {shift} AS ref_date FROM parsed
)
SELECT line_no, content, type_error, region, signal, ref_date, as_of, value,
  NULL::VARCHAR AS record_id,
  CASE
    WHEN type_error IS NOT NULL THEN type_error
    WHEN region = {region_name} AND trim(ref_raw) = {ref_name} AND trim(value_raw) = {value_name}
         THEN 'repeated header line'
"""
    + _NAME_CHECKS
    + """    WHEN ref_raw IS NULL OR trim(ref_raw) = '' THEN 'missing ref_date'
    WHEN ref_label IS NULL
         THEN 'unparseable ref_date ''' || left(ref_raw, 40) || ''' (expected {fmt_txt})'
    WHEN ref_label < DATE '1900-01-01' THEN 'ref_date ' || ref_label || ' is before 1900'
    {weekday_check}
    WHEN as_of IS NULL THEN 'missing or unparseable as_of'
    WHEN ref_date > as_of THEN {after_as_of}
    WHEN value_raw IS NULL OR trim(value_raw) = '' THEN 'missing value'
    WHEN value IS NULL THEN 'non-numeric value ''' || left(value_raw, 40) || ''''
    WHEN isnan(value) OR isinf(value)
         THEN 'value ''' || left(value_raw, 40) || ''' is not a finite number'
    WHEN value < 0 THEN 'negative {kind} value ' || left(value_raw, 40)
    WHEN value > {max_value} THEN 'implausibly large value ' || left(value_raw, 40)
  END AS reason
FROM typed
""")

#: Line lists: one row per event.  ``as_of`` of a record is its ``reported_on`` date; the file's
#: own as_of (when the spec gives one) only bounds it.
_VALIDATE_RECORDS = ("""
CREATE OR REPLACE TEMP TABLE _checked AS
WITH typed AS (
    SELECT line_no, content, type_error,
           nullif(trim(region), '') AS region,
           {signal_expr} AS signal,
           ref_date AS ref_raw,
           try_strptime(trim(ref_date), {fmt})::DATE AS ref_date,
           reported_on AS rep_raw,
           try_strptime(trim(reported_on), {fmt})::DATE AS reported_on,
           {as_of_expr} AS file_as_of,
           {record_expr} AS record_id
    FROM _stage
)
SELECT line_no, content, type_error, region, signal, ref_date, reported_on AS as_of,
  1.0::DOUBLE AS value, record_id,
  CASE
    WHEN type_error IS NOT NULL THEN type_error
    WHEN region = {region_name} AND trim(ref_raw) = {ref_name} AND trim(rep_raw) = {rep_name}
         THEN 'repeated header line'
"""
    + _NAME_CHECKS
    + """    {record_check}
    WHEN ref_raw IS NULL OR trim(ref_raw) = '' THEN 'missing ref_date'
    WHEN ref_date IS NULL
         THEN 'unparseable ref_date ''' || left(ref_raw, 40) || ''' (expected {fmt_txt})'
    WHEN ref_date < DATE '1900-01-01' THEN 'ref_date ' || ref_date || ' is before 1900'
    WHEN rep_raw IS NULL OR trim(rep_raw) = '' THEN 'missing reported_on'
    WHEN reported_on IS NULL
         THEN 'unparseable reported_on ''' || left(rep_raw, 40) || ''' (expected {fmt_txt})'
    WHEN reported_on < ref_date
         THEN 'reported_on ' || reported_on || ' is before ref_date ' || ref_date
    {as_of_check}
  END AS reason
FROM typed
""")

_DUPLICATES = """
CREATE OR REPLACE TEMP TABLE _checked AS
WITH k AS (
    SELECT *,
      count(*) FILTER (WHERE reason IS NULL)
          OVER (PARTITION BY {key}) AS n_key,
      count(DISTINCT {val}) FILTER (WHERE reason IS NULL)
          OVER (PARTITION BY {key}) AS n_val,
      row_number() OVER (PARTITION BY {key}, reason IS NULL
                         ORDER BY line_no) AS rn
    FROM _checked
)
SELECT line_no, content, region, signal, ref_date, as_of, value, record_id,
  CASE
    WHEN reason IS NOT NULL THEN reason
    WHEN n_key > 1 AND n_val > 1 THEN {conflict}
    WHEN n_key > 1 AND rn > 1 THEN 'duplicate of an earlier row (same key and value)'
  END AS reason
FROM k
"""

_WEEKDAYS = ("Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday", "Sunday")


def _week_sql(spec: FeedSpec) -> tuple[str, str, str]:
    """(ref_date parse expression, days added to reach the week's last day, weekday check)."""
    fmt = _lit(spec.date_format)
    if spec.date_format == ISO_WEEK:  # 2026-W03 -> the Sunday ending ISO week 3 of 2026
        return "try_strptime(trim(ref_date) || '-7', '%G-W%V-%u')::DATE", "0", ""
    parse = f"try_strptime(trim(ref_date), {fmt})::DATE"
    if spec.frequency != "weekly":
        return parse, "0", ""
    first = 1 if spec.week_start == "monday" else 7  # ISO day of week of the week's first day
    last_day = spec.week_date == "last_day"
    dow = (first + 5) % 7 + 1 if last_day else first
    which = "last day" if last_day else "first day"
    check = (f"WHEN isodow(ref_label) <> {dow} THEN 'ref_date ' || ref_label || ' is a ' || "
             f"dayname(ref_label) || '; weekly rows are dated on the week''s {which} "
             f"({_WEEKDAYS[dow - 1]}: weeks start on {spec.week_start.capitalize()})'")
    return parse, ("0" if last_day else "6"), check


def _validate(con: duckdb.DuckDBPyConnection, spec: FeedSpec, as_of: dt.date | None) -> None:
    """Type and check every staged row (``_stage`` → ``_checked`` with a reason per bad row)."""
    fmt = _lit(spec.date_format)
    signal_expr = ("nullif(trim(signal), '')" if spec.signal_column else _lit(spec.signal or ""))
    if as_of is not None:
        as_of_expr = f"DATE {_lit(as_of.isoformat())}"
    elif spec.as_of is not None:
        as_of_expr = f"try_strptime(trim(as_of), {fmt})::DATE"
    else:
        as_of_expr = "NULL::DATE"
    common: dict[str, str | int] = {
        "signal_expr": signal_expr, "fmt": fmt, "as_of_expr": as_of_expr,
        "fmt_txt": spec.date_format.replace("'", "''"), "max_text": MAX_TEXT_CHARS,
        "region_name": _lit(spec.columns["region"]), "ref_name": _lit(spec.columns["ref_date"])}
    if spec.records:
        _validate_records(con, spec, common)
    else:
        ref_expr, shift, weekday_check = _week_sql(spec)
        after = ("'ref_date ' || ref_date || ' is after as_of ' || as_of" if spec.frequency ==
                 "daily" else "'the week ending ' || ref_date || ' is not over on as_of ' || as_of")
        con.execute(_VALIDATE.format(
            **common, ref_expr=ref_expr, shift=shift, weekday_check=weekday_check,
            after_as_of=after, kind=spec.value_kind, max_value=MAX_VALUE,
            value_name=_lit(spec.columns["value"])))
        _duplicates(con, key="region, signal, ref_date, as_of", val="value",
                    conflict="'conflicting values for the same region, signal and ref_date ' "
                             "|| ref_date || ' in one file'")
    # Reasons quote the offending text; keep each on one line.
    con.execute("UPDATE _checked SET reason = regexp_replace(reason, '\\s+', ' ', 'g') "
                "WHERE regexp_matches(reason, '[\\r\\n\\t]')")


def _duplicates(con: duckdb.DuckDBPyConnection, key: str, val: str, conflict: str) -> None:
    """Refuse repeated keys among the valid rows (the window pass runs only when a key repeats:
    one distinct count decides, which keeps millions of unique records fast)."""
    n, n_keys = con.execute(f"SELECT count(*), count(DISTINCT ({key})) FROM _checked "
                            "WHERE reason IS NULL").fetchall()[0]
    if n != n_keys:
        con.execute(_DUPLICATES.format(key=key, val=val, conflict=conflict))


def _validate_records(con: duckdb.DuckDBPyConnection, spec: FeedSpec,
                      common: dict[str, str | int]) -> None:
    """Line-list checks; with a record_id, the same record twice in one file is a duplicate
    (identical) or a conflict (different versions)."""
    has_id = "record_id" in spec.columns
    record_check = (
        "WHEN record_id IS NULL THEN 'missing record_id' "
        f"WHEN length(record_id) > {MAX_TEXT_CHARS} THEN 'record_id is ' || "
        f"length(record_id) || ' characters long (limit {MAX_TEXT_CHARS})'") if has_id else ""
    as_of_check = "" if spec.as_of is None else (
        "WHEN file_as_of IS NULL THEN 'missing or unparseable as_of' "
        "WHEN reported_on > file_as_of THEN 'reported_on ' || reported_on || "
        "' is after the file''s as_of ' || file_as_of")
    con.execute(_VALIDATE_RECORDS.format(
        **common, rep_name=_lit(spec.columns["reported_on"]), record_check=record_check,
        record_expr="nullif(trim(record_id), '')" if has_id else "NULL::VARCHAR",
        as_of_check=as_of_check))
    if has_id:
        _duplicates(con, key="record_id", val="(region, signal, ref_date, as_of)",
                    conflict="'conflicting versions of record ' || left(record_id, 40) || "
                             "' in one file'")


def _check_regular_file(path: Path) -> None:
    """Refuse what cannot be read as a feed file, naming why (link, folder, pipe)."""
    try:
        st = path.stat()
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise UserError(f"{path}: symbolic link loop (the chain of links never "
                            "reaches a file)") from exc
        if path.is_symlink():
            raise UserError(f"{path}: broken symbolic link (target "
                            f"{os.readlink(path)} does not exist)") from exc
        raise UserError(f"{path}: file not found ({exc.strerror or exc})") from exc
    if stat.S_ISDIR(st.st_mode):
        raise UserError(f"{path}: is a folder, not a file")
    if not stat.S_ISREG(st.st_mode):
        raise UserError(f"{path}: not a regular file (pipe, socket or device)")


def _rejected_content(con: duckdb.DuckDBPyConnection, path: Path, parsed: _Parsed) -> pd.DataFrame:
    """Verbatim bytes of the CSV records rejected by validation (when their spans are known)."""
    if parsed.spans is None:
        return pd.DataFrame({"line_no": pd.Series(dtype="int64"),
                             "content": pd.Series(dtype=object)})
    bad = con.execute("SELECT line_no FROM _checked WHERE reason IS NOT NULL").df()
    spans = parsed.spans.merge(bad, on="line_no")
    return _raw_lines(path, spans)


def _record(con: duckdb.DuckDBPyConnection, spec: FeedSpec, path: Path, sha: str,
            as_of: dt.date | None, out: FileOutcome) -> int:
    fid = con.execute("SELECT nextval('raw.file_id_seq')").fetchall()[0][0]
    con.execute(
        "INSERT INTO raw.feed_files (file_id, source, path, sha256, as_of, received_at, "
        "rows_read, rows_accepted, rows_rejected, status, message, list_files) "
        "VALUES (?, ?, ?, ?, ?, now(), ?, ?, ?, ?, ?, ?)",
        [fid, spec.name, str(path), sha, as_of, out.rows_read, out.rows_accepted,
         out.rows_rejected, out.status, out.message, spec.list_mode],
    )
    out.file_id = int(fid)
    return int(fid)


def ingest_file(con: duckdb.DuckDBPyConnection, spec: FeedSpec, path: Path) -> FileOutcome:
    """Ingest one file in one transaction; never raises for a bad file (status ``failed``)."""
    out = FileOutcome(path=str(path), source=spec.name, status="failed")
    try:
        _check_regular_file(path)
        sha = sha256_of(path)
    except OSError as exc:
        out.message = f"{path}: cannot read ({exc.strerror or exc})"
        return _record_failed(con, spec, path, "", None, out)
    except UserError as exc:
        out.message = str(exc)
        return _record_failed(con, spec, path, "", None, out)
    as_of = None
    try:
        if spec.as_of is not None and spec.as_of["from"] == "filename":
            as_of = as_of_from_filename(path, spec.as_of["pattern"])
    except UserError as exc:
        out.message = str(exc)
        return _record_failed(con, spec, path, sha, None, out)
    # Same bytes for the same as_of: nothing new.  Same bytes under a later date in the file
    # name is a new snapshot (a value may have gone back to an earlier one), so it is ingested.
    # A line list with no as_of: a repeated increment is skipped, but a complete list (or a
    # merge by record id) that went back to an earlier file's content is the newest state.
    seen = _first(con, "SELECT status FROM raw.feed_files WHERE sha256 = ? AND source = ? "
                  "AND status <> 'failed' AND (? OR as_of IS NOT DISTINCT FROM ?) "
                  "AND (NOT ? OR file_id = (SELECT max(file_id) FROM raw.feed_files "
                  "WHERE source = ? AND status NOT IN ('failed', 'skipped'))) LIMIT 1",
                  [sha, spec.name, as_of is None, as_of,
                   spec.records and spec.as_of is None and spec.list_mode != "increments",
                   spec.name])
    if seen:
        out.status = "skipped"
        out.message = f"{path}: already ingested (same content, earlier status {seen[0]})"
        return out
    try:
        if path.stat().st_size == 0:
            raise UserError(f"{path}: empty file")
        try:
            parsed = _parse(con, spec, path)
            _validate(con, spec, as_of)
        except duckdb.Error as exc:
            why = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
            raise UserError(f"{path}: cannot parse as {spec.format} ({why[:200]})") from exc
    except UserError as exc:
        out.message = str(exc)
        return _record_failed(con, spec, path, sha, as_of, out)

    parser_rejects = parsed.rejects
    n_ok, n_bad = con.execute(
        "SELECT count(*) FILTER (WHERE reason IS NULL), count(*) FILTER (WHERE reason IS NOT NULL) "
        "FROM _checked").fetchall()[0]
    out.rows_accepted = int(n_ok)
    out.rows_rejected = int(n_bad) + len(parser_rejects)
    out.rows_read = out.rows_accepted + out.rows_rejected
    first: tuple | None = None
    if out.rows_rejected:  # the earliest quarantined line, whichever check refused it
        first = _first(con, "SELECT line_no, reason FROM _checked WHERE reason IS NOT NULL "
                       "ORDER BY line_no LIMIT 1")
        if len(parser_rejects):
            i = int(np.argmin(parser_rejects["line_no"].to_numpy()))
            pr = (int(parser_rejects["line_no"].iloc[i]), parser_rejects["reason"].iloc[i])
            first = pr if first is None or pr[0] < first[0] else first
    if first is None:
        first = (0, "unknown")
    if out.rows_read == 0:
        out.status, out.message = "empty", f"{path}: no data rows"
    elif out.rows_accepted == 0:
        out.status = "failed"
        out.message = _one_line(f"{path}: no valid rows (line {first[0]}: {first[1]})")
    elif out.rows_rejected:
        out.status = "partial"
        out.message = _one_line(f"{path}: {out.rows_rejected} row(s) quarantined "
                                f"(first: line {first[0]}: {first[1]})")
    else:
        out.status = "accepted"
    if out.rows_accepted:
        clash = _signal_clash(con, spec, path)
        if clash:  # a signal cannot change its time resolution: the whole file is refused
            out.rows_read = out.rows_accepted = out.rows_rejected = 0
            out.message = clash
            return _record_failed(con, spec, path, sha, as_of, out)
    if as_of is None:
        as_of = _file_as_of(con, spec)
    with transaction(con):
        fid = _record(con, spec, path, sha, as_of, out)
        con.execute(
            "INSERT INTO raw.reports (file_id, source, region, signal, ref_date, as_of, value, "
            "value_kind, line_no, record_id) SELECT ?, ?, region, signal, ref_date, as_of, "
            "value, ?, line_no, record_id FROM _checked WHERE reason IS NULL",
            [fid, spec.name, spec.value_kind])
        _register_signals(con, spec, path, fid)
        raw = _rejected_content(con, path, parsed)
        con.register("_raw_content", raw)
        con.execute(
            "INSERT INTO raw.rejected_rows SELECT ?, c.line_no, "
            "coalesce(CAST(r.content AS VARCHAR), "
            f"CASE WHEN length(c.content) > {MAX_CONTENT_CHARS} "
            f"THEN left(c.content, {MAX_CONTENT_CHARS}) || ' ... [truncated, ' || "
            "length(c.content) || ' characters in total]' ELSE c.content END), c.reason "
            "FROM _checked c LEFT JOIN _raw_content r USING (line_no) "
            "WHERE c.reason IS NOT NULL ORDER BY c.line_no", [fid])
        con.unregister("_raw_content")
        if len(parser_rejects):
            pr = parser_rejects.assign(file_id=fid)[["file_id", "line_no", "content", "reason"]]
            con.register("_pr", pr)
            con.execute("INSERT INTO raw.rejected_rows SELECT file_id, line_no, content, reason "
                        "FROM _pr")
            con.unregister("_pr")
    return out


def _file_as_of(con: duckdb.DuckDBPyConnection, spec: FeedSpec) -> dt.date | None:
    """A file's as_of when its name gives none: the latest as_of column value of its accepted
    rows; None for a line list whose spec gives no as_of (its records carry their own dates,
    and its files are ordered by arrival)."""
    if spec.records and spec.as_of is None:
        return None
    if spec.records:
        fmt = _lit(spec.date_format)
        row = _first(con, f"SELECT max(try_strptime(trim(s.as_of), {fmt})::DATE) FROM _stage s "
                     "JOIN _checked c USING (line_no) WHERE c.reason IS NULL")
    else:
        row = _first(con, "SELECT max(as_of) FROM _checked WHERE reason IS NULL")
    return row[0] if row else None


def _signal_clash(con: duckdb.DuckDBPyConnection, spec: FeedSpec, path: Path) -> str | None:
    """A one-line message when a signal of this file is known at another time resolution."""
    row = _first(con, "SELECT c.signal, s.frequency, s.week_start, s.source, s.path "
                 "FROM (SELECT DISTINCT signal FROM _checked WHERE reason IS NULL) c "
                 "JOIN core.signals s USING (signal) WHERE s.frequency <> ? "
                 "OR s.week_start IS DISTINCT FROM ? ORDER BY 1 LIMIT 1",
                 [spec.frequency, _week_start(spec)])
    if row is None:
        return None
    signal, freq, start, source, first = row
    have = freq + (f" ({start}-start weeks)" if start else "")
    want = spec.frequency + (f" ({spec.week_start}-start weeks)" if _week_start(spec) else "")
    return _one_line(f"{path}: signal '{signal}' is {have} (source {source}, file {first}) but "
                     f"[source.{spec.name}] declares it {want}; file not ingested")


def _week_start(spec: FeedSpec) -> str | None:
    return spec.week_start if spec.frequency == "weekly" else None


def _register_signals(con: duckdb.DuckDBPyConnection, spec: FeedSpec, path: Path,
                      fid: int) -> None:
    """Record the time resolution of signals seen for the first time (``core.signals``)."""
    con.execute("INSERT INTO core.signals SELECT DISTINCT signal, ?, ?, ?, ?, ? FROM _checked "
                "WHERE reason IS NULL AND signal NOT IN (SELECT signal FROM core.signals)",
                [spec.frequency, _week_start(spec), spec.name, fid, str(path)])


def _record_failed(con: duckdb.DuckDBPyConnection, spec: FeedSpec, path: Path, sha: str,
                   as_of: dt.date | None, out: FileOutcome) -> FileOutcome:
    out.status = "failed"
    out.message = _one_line(out.message) if out.message else f"{path}: unreadable"
    # A file that failed the same way before (same path, content and message) is not recorded
    # again on every re-run; a new path or new content is.
    if _first(con, "SELECT 1 FROM raw.feed_files WHERE sha256 = ? AND source = ? AND path = ? "
              "AND status = 'failed' AND message IS NOT DISTINCT FROM ?",
              [sha or "", spec.name, str(path), out.message]):
        return out
    with transaction(con):
        _record(con, spec, path, sha or "", as_of, out)
    return out


def ingest_regions(con: duckdb.DuckDBPyConnection, spec_path: str | Path) -> str | None:
    """Load the optional ``[regions]`` table (sizes, hierarchy) into core.regions; a message."""
    res = load_regions(con, spec_path)
    return None if res is None else res.message


def ingest_spec(con: duckdb.DuckDBPyConnection, spec_path: str | Path,
                *, update_vintages: bool = True) -> IngestSummary:
    """Ingest every file of every source in a feed spec, then refresh ``core.observations``."""
    specs = load_spec(spec_path)
    summary = IngestSummary()
    # Every glob is checked before any file is ingested: a spec mistake changes nothing.
    matched = [(spec, spec.files()) for spec in specs]
    for spec, files in matched:
        if not files:
            raise UserError(f"{spec.spec_file}: [source.{spec.name}] path '{spec.path}' "
                            "matches no files")
    regions = load_regions(con, spec_path)
    summary.regions = None if regions is None else regions.message
    for spec, files in matched:
        for path in files:
            summary.files.append(ingest_file(con, spec, path))
    if update_vintages:
        from tallywave.pipeline.vintages import update_observations

        update_observations(con)
    return summary
