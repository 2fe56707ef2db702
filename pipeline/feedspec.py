"""Feed specs: read a TOML feed spec and validate every ``[source.NAME]`` table.

Every key is checked here, once, before any file is read: an unknown key, a wrong type or a
value outside its allowed set is refused with one line naming the spec file, the source and
the key.  The ``[regions]`` table is validated by :mod:`tallywave.pipeline.hierarchy`.

Kinds of feed (``value_kind``):

- ``cumulative`` / ``daily``: one count per (region, signal, ref_date) per snapshot; needs
  ``as_of`` and ``columns = {region, ref_date, value}``.
- ``records``: a line list, one row per event; ``columns = {region, ref_date, reported_on}``
  plus optional ``record_id``.  ``as_of`` is optional (when given it bounds ``reported_on``).
  ``list_files = "complete"`` (default: each file is the whole list as of its date) or
  ``"increments"`` (each file holds new records only); with ``record_id`` files are merged
  record by record (the latest version of a record wins) and ``list_files`` is refused.

Time resolution: ``frequency = "daily"`` (default) or ``"weekly"``; weekly rows are dated on
the week's last day (``week_date = "last_day"``, default) or first day (``"first_day"``); weeks
start on ``week_start = "monday"`` (ISO 8601, default) or ``"sunday"``.
``date_format = "iso_week"`` reads ISO week labels such as ``2026-W03`` (Monday-start weeks).
"""

from __future__ import annotations

import functools
import glob
import os
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import duckdb

from tallywave.pipeline.errors import UserError

FORMATS = ("csv", "jsonl", "parquet")
VALUE_KINDS = ("cumulative", "daily", "records")
FREQUENCIES = ("daily", "weekly")
WEEK_STARTS = ("monday", "sunday")
WEEK_DATES = ("last_day", "first_day")
LIST_FILES = ("complete", "increments")
ISO_WEEK = "iso_week"  # date_format value for ISO week labels such as 2026-W03

SPEC_KEYS = {
    "path", "format", "signal", "signal_column", "value_kind", "as_of", "columns",
    "date_format", "delimiter", "frequency", "week_start", "week_date", "list_files",
}
COUNT_COLUMNS = {"region", "ref_date", "value"}
RECORD_COLUMNS = {"region", "ref_date", "reported_on"}
RECORD_OPTIONAL = {"record_id"}
_AS_OF_KEYS = {"from", "pattern", "column"}


@dataclass
class FeedSpec:
    """One ``[source.NAME]`` table of a feed spec, validated."""

    name: str
    path: str
    format: str
    value_kind: str
    columns: dict[str, str]
    as_of: dict[str, str] | None
    spec_file: Path
    signal: str | None = None
    signal_column: str | None = None
    date_format: str = "%Y-%m-%d"
    delimiter: str | None = None
    frequency: str = "daily"
    week_start: str = "monday"
    week_date: str = "last_day"
    list_files: str = "complete"

    @property
    def records(self) -> bool:
        """True for a line list (one row per event)."""
        return self.value_kind == "records"

    @property
    def list_mode(self) -> str | None:
        """How the files of a line list combine (stored per file): ``by_record_id``,
        ``complete`` or ``increments``; None for count feeds."""
        if not self.records:
            return None
        return "by_record_id" if "record_id" in self.columns else self.list_files

    def files(self) -> list[Path]:
        """Files matched by the glob (relative to the spec file), sorted by name.

        A file reached through several paths (symbolic links, a folder linking to itself) is
        listed once, under its shortest path.
        """
        pattern = self.path if os.path.isabs(self.path) else str(self.spec_file.parent / self.path)
        first: dict[str, str] = {}
        for p in sorted(glob.glob(pattern, recursive=True), key=lambda q: (q.count(os.sep), q)):
            first.setdefault(os.path.realpath(p), p)
        return [Path(p) for p in sorted(first.values())]


def read_toml(p: Path) -> dict[str, Any]:
    """The parsed spec file; a missing file, a folder or broken TOML is a one-line error."""
    if not p.exists():
        raise UserError(f"{p}: feed spec not found")
    if not p.is_file():
        raise UserError(f"{p}: feed spec is not a file")
    try:
        return tomllib.loads(p.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise UserError(f"{p}: not valid TOML ({exc})") from exc


def load_spec(path: str | Path) -> list[FeedSpec]:
    """Read and validate a feed spec file; every problem names the file and the key."""
    p = Path(path)
    data = read_toml(p)
    extra = set(data) - {"source", "regions"}
    if extra:
        raise UserError(f"{p}: unknown table [{min(extra)}] (only [source.NAME] and [regions])")
    sources = data.get("source")
    if not sources or not isinstance(sources, dict):
        raise UserError(f"{p}: no [source.NAME] tables")
    return [_source(p, name, t) for name, t in sources.items()]


def _choice(t: dict, key: str, choices: tuple[str, ...], default: str, where: str) -> str:
    value = t.get(key, default)
    if not isinstance(value, str) or value not in choices:
        raise UserError(f"{where}: {key} must be one of {', '.join(choices)} (got {value!r})")
    return value


def _text(t: dict, key: str, where: str) -> str | None:
    value = t.get(key)
    if value is not None and (not isinstance(value, str) or not value.strip()):
        raise UserError(f"{where}: {key} must be non-empty text (got {value!r})")
    return value


def _columns(t: dict, kind: str, where: str) -> dict[str, str]:
    cols = t["columns"]
    if not isinstance(cols, dict):
        raise UserError(f"{where}: columns must be a table such as "
                        "{ region = \"...\", ref_date = \"...\", value = \"...\" }")
    if kind == "records":
        unknown = set(cols) - RECORD_COLUMNS - RECORD_OPTIONAL
        if unknown or not RECORD_COLUMNS <= set(cols):
            bad = min(unknown) if unknown else min(RECORD_COLUMNS - set(cols))
            raise UserError(f"{where}: columns for value_kind = \"records\" map region, "
                            f"ref_date, reported_on and optionally record_id (not '{bad}')")
    elif set(cols) != COUNT_COLUMNS:
        raise UserError(f"{where}: columns must map exactly region, ref_date, value")
    for k, v in cols.items():
        if not isinstance(v, str) or not v.strip():
            raise UserError(f"{where}: columns.{k} must be a column name (text), got {v!r}")
    if len(set(cols.values())) != len(cols):
        raise UserError(f"{where}: columns maps one file column to two fields")
    return {k: str(v) for k, v in cols.items()}


def _as_of(t: dict, kind: str, where: str) -> dict[str, str] | None:
    if "as_of" not in t:
        if kind == "records":
            return None
        raise UserError(f"{where}: missing key 'as_of'")
    asof = t["as_of"]
    if not isinstance(asof, dict) or asof.get("from") not in ("filename", "column"):
        raise UserError(f"{where}: as_of must be {{from = \"filename\"|\"column\", ...}}")
    if set(asof) - _AS_OF_KEYS:
        raise UserError(f"{where}: unknown key 'as_of.{min(set(asof) - _AS_OF_KEYS)}'")
    if asof["from"] == "filename" and not isinstance(asof.get("pattern"), str):
        raise UserError(f"{where}: as_of from filename needs a pattern, e.g. \"%Y-%m-%d\"")
    if asof["from"] == "column" and not isinstance(asof.get("column"), str):
        raise UserError(f"{where}: as_of from column needs column = \"...\"")
    return {k: str(v) for k, v in asof.items()}


def _source(p: Path, name: str, t: Any) -> FeedSpec:
    """Validate one ``[source.NAME]`` table."""
    where = f"{p}: [source.{name}]"
    if not isinstance(t, dict):
        raise UserError(f"{where} must be a table")
    unknown = set(t) - SPEC_KEYS
    if unknown:
        raise UserError(f"{where}: unknown key '{min(unknown)}'")
    for key in ("path", "format", "value_kind", "columns"):
        if key not in t:
            raise UserError(f"{where}: missing key '{key}'")
    if not isinstance(t["path"], str) or not t["path"].strip():
        raise UserError(f"{where}: path must be a glob (text)")
    fmt = _choice(t, "format", FORMATS, "csv", where)
    kind = _choice(t, "value_kind", VALUE_KINDS, "daily", where)
    if ("signal" in t) == ("signal_column" in t):
        raise UserError(f"{where}: give exactly one of 'signal' or 'signal_column'")
    signal, signal_column = _text(t, "signal", where), _text(t, "signal_column", where)
    cols = _columns(t, kind, where)
    if signal_column is not None and signal_column in cols.values():
        raise UserError(f"{where}: signal_column '{signal_column}' is also mapped in columns")
    asof = _as_of(t, kind, where)
    date_format = t.get("date_format", "%Y-%m-%d")
    frequency = _choice(t, "frequency", FREQUENCIES, "daily", where)
    for key in ("week_start", "week_date"):
        if key in t and frequency != "weekly":
            raise UserError(f"{where}: {key} applies only with frequency = \"weekly\"")
    week_start = _choice(t, "week_start", WEEK_STARTS, "monday", where)
    week_date = _choice(t, "week_date", WEEK_DATES, "last_day", where)
    if frequency == "weekly" and kind == "records":
        raise UserError(f"{where}: frequency = \"weekly\" is for counts; a line list "
                        "(value_kind = \"records\") has daily dates")
    if date_format == ISO_WEEK:
        if frequency != "weekly" or week_start != "monday" or "week_date" in t:
            raise UserError(f"{where}: date_format = \"iso_week\" needs frequency = \"weekly\" "
                            "with Monday-start weeks (and no week_date)")
    elif not isinstance(date_format, str) or not _valid_date_format(date_format):
        raise UserError(f"{where}: date_format '{date_format}' is not a strptime pattern "
                        "such as \"%Y-%m-%d\" (or \"iso_week\")")
    if "list_files" in t:
        if kind != "records":
            raise UserError(f"{where}: list_files applies only to value_kind = \"records\"")
        if "record_id" in cols:
            raise UserError(f"{where}: list_files does not apply with a record_id column "
                            "(files are merged record by record)")
    list_files = _choice(t, "list_files", LIST_FILES, "complete", where)
    delimiter = t.get("delimiter")
    if delimiter is not None and (not isinstance(delimiter, str) or len(delimiter) != 1):
        raise UserError(f"{where}: delimiter must be one character")
    return FeedSpec(
        name=name, path=str(t["path"]), format=fmt, value_kind=kind, columns=cols, as_of=asof,
        spec_file=p, signal=signal, signal_column=signal_column, date_format=date_format,
        delimiter=delimiter, frequency=frequency, week_start=week_start, week_date=week_date,
        list_files=list_files,
    )


@functools.lru_cache(maxsize=64)
def _valid_date_format(fmt: str) -> bool:
    """True when DuckDB understands the strptime pattern (checked once, at spec load)."""
    if fmt == "%Y-%m-%d":
        return True
    con = duckdb.connect()
    try:
        con.execute("SELECT try_strptime('2026-01-02', ?)", [fmt]).fetchall()
        return "%" in fmt
    except duckdb.Error:
        return False
    finally:
        con.close()
