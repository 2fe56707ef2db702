"""Issue "hostile feeds": every malformed input has a documented, contained outcome.

Each case below is generated in the test (no hand-copied files).  A good feed is ingested first
(template database); then the hostile file is ingested through the CLI (``tallywave.pipeline.cli.main``)
and we check: the file's status in ``raw.feed_files`` (or the spec's UserError), a one-line
message naming the file and the cause (and the line where relevant), the quarantined rows in
``raw.rejected_rows`` (line = physical line in the file, reason words, content verbatim), the
exit code (0 ok / partial / empty, 2 failed file or user error), no traceback, and that the
good feed's data is byte-for-byte unchanged.

Outcome column: status in raw.feed_files, then "line → reason words" of the quarantined rows.

| case                      | input                             | outcome                          |
|---------------------------|-----------------------------------|----------------------------------|
| empty_file                | 0 bytes                           | failed "empty file"              |
| header_only               | header line only                  | empty "no data rows" (exit 0)    |
| header_then_blank_lines   | header + blank lines              | empty                            |
| semicolon_delimiter       | ``;`` separated                   | accepted (sniffer finds ``;``)   |
| tab_delimiter             | tab separated                     | accepted                         |
| colon_delimiter           | ``:`` separated (not sniffed)     | failed "missing column(s) …"     |
| utf8_bom                  | byte-order mark before the header | accepted, BOM in no value        |
| latin1_bytes              | a latin-1 byte 0xFC in one line   | partial: 2 → "invalid encoding"  |
| quoted_commas_newlines    | quoted comma + newline, bad row   | partial: 5 (physical line)       |
| extra_column              | a row with 4 fields               | partial: 2 → "too many columns"  |
| missing_field             | a row with 2 fields               | partial: 2 → "missing columns"   |
| missing_column_header     | no ``value`` column               | failed "missing column(s) value" |
| repeated_header           | the header again mid-file         | partial: 3 → "repeated header"   |
| date_us, date_slashes,    | 01/02/2026, 2026/01/02,           | partial: 2 → "unparseable"       |
| date_compact, date_word   | 20260102, yesterday               |                                  |
| date_after_as_of          | ref 2026-02-01, as_of 2026-01-10  | partial: 2 → "after as_of"       |
| date_before_1900          | 1899-12-31                        | partial: 2 → "before 1900"       |
| value_negative, _nan,     | -3, NaN, inf, 1e300, many         | partial: 2 → negative / not a    |
| _inf, _huge, _text        |                                   | finite number / implausibly      |
|                           |                                   | large / non-numeric              |
| duplicate_conflicting     | same key twice, values 2 and 5    | partial: 2, 3 → "conflicting"    |
| duplicate_identical       | same row twice                    | partial: 3 → "duplicate of …"    |
| hostile_region_names      | quotes, ``;``, SQL bits, unicode  | accepted verbatim, tables intact |
| apostrophe_edges          | names ``'Ardel`` and ``Brisk'``   | accepted, two rows (quote is ")  |
| stray_quote               | ``"Ivel`` (unterminated quote)    | accepted, read unquoted: quote   |
|                           |                                   | kept in the text                 |
| whitespace_only_line      | a line of spaces                  | partial: 3 → "missing columns"   |
| crlf_blank_lines          | CRLF line ends and blank lines    | partial: 6 → "non-numeric"       |
| all_rows_invalid          | every row bad                     | failed "no valid rows (line 2…"  |
| binary_garbage            | 10 kB of arbitrary bytes          | failed "cannot parse as csv"     |
| ten_mb_field              | a 10 MB region name               | partial: 2 → "characters long",  |
|                           |                                   | content clipped to 64 Ki chars   |
| truncated_parquet         | first half of a Parquet file      | failed "not a readable Parquet"  |
| parquet_missing_column    | Parquet without ``value``         | failed "missing column(s) value" |
| parquet_nested_region     | region column of type list        | failed "has type …"              |
| jsonl_wrong_types         | value obj/array/bool, region list | partial: 1-4 → "is a JSON …"     |
| jsonl_garbage_lines       | CRLF/LF mix, blank, not JSON,     | partial: 3, 4 → "not a JSON      |
|                           | array, invalid UTF-8              | object", 5 → "invalid UTF-8"     |
| jsonl_missing_key         | no record has ``value``           | failed "no record has the key"   |
| jsonl_bad_as_of           | as_of field "soon"                | partial: 2 → "unparseable as_of" |
| data_path_is_folder       | a folder matched by the glob      | failed "is a folder"             |
| symlink_loop              | a link to itself                  | failed "symbolic link loop"      |
| symlink_missing_target    | a link to a missing file          | failed "broken symbolic link"    |
| named_pipe                | a FIFO matched by the glob        | failed "not a regular file"      |
| no_date_in_filename       | ``cases.csv`` (as_of from name)   | failed "no date matching …"      |
| impossible_date_in_name   | ``cases_2026-13-45.csv``          | failed "not a valid date"        |
| spec_unknown_key          | ``colour = "red"`` in a source    | UserError "unknown key" (exit 2) |
| spec_glob_matches_nothing | path glob with no match           | UserError "matches no files"     |
| spec_is_folder            | the spec path is a folder         | UserError "is not a file"        |
| spec_invalid_toml         | broken TOML                       | UserError "not valid TOML"       |
| spec_bad_date_format      | ``date_format = "%Q"``            | UserError "date_format '%Q'"     |

Line lists, weekly feeds, region hierarchies and their spec keys (``NEW_KEY_CASES``): every new
key refused with one line naming the file, source and key when unknown, of the wrong type or out
of its set (``spec_*``); records quarantined for a reported_on before ref_date or after the
file's as_of, missing / unparseable dates, a missing record_id, the same record_id twice in one
file (duplicate or conflicting versions) (``records_*``); weekly rows on the wrong weekday or for
an unfinished week, ISO week labels, Sunday-start weeks, a signal already known as daily
(``weekly_*``); a cycle in the region tree or a region that is its own parent.

Exit codes through the CLI: 0 for accepted / partial / empty, 2 for a failed file or a spec error.
"""

from __future__ import annotations

import io
import json
import os
import shutil
import subprocess
import sys
import textwrap
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import duckdb
import pandas as pd
import pytest

from tallywave.pipeline import store
from tallywave.pipeline.cli import main
from tallywave.pipeline.errors import UserError
from tallywave.pipeline.ingest import ingest_spec

H = "region,date,value\n"
OK = "Ivel,2026-01-03,2\n"  # a valid row (as_of of every hostile file is 2026-01-10)
NAME = "cases_2026-01-10.csv"
GOOD = "region,date,value\nGoodland,2026-01-01,5\nGoodland,2026-01-02,6\nHarbour,2026-01-02,1\n"


def spec_text(path: str, fmt: str = "csv", as_of: str | None = None, extra: str = "") -> str:
    """A one-source feed spec (source "district", signal "cases", daily values)."""
    as_of = as_of or '{ from = "filename", pattern = "%Y-%m-%d" }'
    return textwrap.dedent(f"""\
        [source.district]
        path = "{path}"
        format = "{fmt}"
        signal = "cases"
        value_kind = "daily"
        as_of = {as_of}
        columns = {{ region = "region", ref_date = "date", value = "value" }}
        """) + extra


@dataclass
class Case:
    """One hostile input and its documented outcome."""

    id: str
    write: Callable[[Path], str | None]  # writes into feed/, returns the file name (None: spec)
    status: str | None = None  # expected raw.feed_files status; None = the spec is refused
    words: tuple[str, ...] = ()  # words the one-line message must contain
    rejected: tuple[tuple[int, str, str | None], ...] = ()  # (line, reason words, content)
    accepted: set[tuple[str, str, float]] | None = None  # (region, ref_date, value) accepted
    fmt: str = "csv"
    as_of: str | None = None
    spec: Callable[[Path], Path] | None = None  # custom spec writer (spec-level cases)
    line_in_message: int | None = None


def text(body: str | bytes, name: str = NAME) -> Callable[[Path], str]:
    """A writer for one file with the given content."""
    def w(folder: Path) -> str:
        data = body.encode("utf-8") if isinstance(body, str) else body
        (folder / name).write_bytes(data)
        return name
    return w


def parquet(df: pd.DataFrame, cut: float | None = None,
            name: str = "cases_2026-01-10.parquet") -> Callable[[Path], str]:
    """A writer for a Parquet file from pandas/pyarrow, optionally cut to a fraction."""
    def w(folder: Path) -> str:
        buf = io.BytesIO()
        df.to_parquet(buf, index=False)
        data = buf.getvalue()
        (folder / name).write_bytes(data[: int(len(data) * cut)] if cut else data)
        return name
    return w


def jsonl(lines: list, name: str = "cases_2026-01-10.jsonl", eol: str = "\n"
          ) -> Callable[[Path], str]:
    """A writer for JSON lines: dicts become one line each, str/bytes are written as given."""
    def w(folder: Path) -> str:
        out = b""
        for r in lines:  # bytes and str are written as given, records as one JSON line each
            out += r if isinstance(r, bytes) else (
                r if isinstance(r, str) else json.dumps(r) + eol).encode()
        (folder / name).write_bytes(out)
        return name
    return w


def special(kind: str) -> Callable[[Path], str]:
    """Folders, links and pipes matched by the glob."""
    def w(folder: Path) -> str:
        p = folder / NAME
        if kind == "folder":
            p.mkdir()
        elif kind == "loop":
            os.symlink(p, p)
        elif kind == "missing":
            os.symlink(folder / "gone.csv", p)
        elif kind == "fifo":
            os.mkfifo(p)
        return NAME
    return w


def bad_spec(kind: str) -> Callable[[Path], Path]:
    """A writer for a broken feed spec of the given kind."""
    def w(case_dir: Path) -> Path:
        spec = case_dir / "hostile.toml"
        if kind == "unknown_key":
            spec.write_text(spec_text("feed/*.csv", extra='colour = "red"\n'))
        elif kind == "no_match":
            spec.write_text(spec_text("feed/*.nothing"))
        elif kind == "folder":
            spec = case_dir / "spec_folder"
            spec.mkdir()
        elif kind == "toml":
            spec.write_text("[source.district\npath = ")
        elif kind == "date_format":
            spec.write_text(spec_text("feed/*.csv", extra='date_format = "%Q"\n'))
        return spec
    return w


def _row(region: str, ref: str, value: float) -> tuple[str, str, float]:
    """An accepted row as read back from raw.reports."""
    return (region, ref, value)


JSON_OK = {"region": "Ivel", "date": "2026-01-03", "value": 2}
HOSTILE_NAMES = ["O'Brien \"Quay\"", "Semi;colon", "x'); DROP TABLE raw.reports; --",
                 "Øster-Ås 東区 🦠", "Robert'); DELETE FROM core.observations; --"]


def _csv_field(s: str) -> str:
    """Quote a CSV field (RFC 4180, from memory: wrap in quotes, double inner quotes)."""
    return '"' + s.replace('"', '""') + '"'


CASES: list[Case] = [
    Case("empty_file", text(b""), "failed", ("empty file",)),
    Case("header_only", text(H), "empty", ("no data rows",)),
    Case("header_then_blank_lines", text(H + "\n\n\n"), "empty", ("no data rows",)),
    Case("semicolon_delimiter", text("region;date;value\nIvel;2026-01-03;2\n"), "accepted",
         accepted={_row("Ivel", "2026-01-03", 2)}),
    Case("tab_delimiter", text("region\tdate\tvalue\nIvel\t2026-01-03\t2\n"), "accepted",
         accepted={_row("Ivel", "2026-01-03", 2)}),
    Case("colon_delimiter", text("region:date:value\nIvel:2026-01-03:2\n"), "failed",
         ("missing column(s) region, date, value", "found: region:date:value")),
    Case("utf8_bom", text(b"\xef\xbb\xbf" + (H + OK).encode()), "accepted",
         accepted={_row("Ivel", "2026-01-03", 2)}),
    Case("latin1_bytes", text(H.encode() + b"Z\xfcrichsee,2026-01-03,2\n" + b"Jura,2026-01-03,1\n"),
         "partial", ("invalid encoding",),
         rejected=((2, "invalid encoding", "Z\\xfcrichsee,2026-01-03,2"),),
         accepted={_row("Jura", "2026-01-03", 1)}, line_in_message=2),
    Case("quoted_commas_newlines",
         text(H + '"Ivel, upper",2026-01-03,2\n"Jura\nlower",2026-01-03,3\nKest,xx,1\n'),
         "partial", ("unparseable ref_date 'xx'",),
         rejected=((5, "unparseable ref_date", "Kest,xx,1"),),
         accepted={_row("Ivel, upper", "2026-01-03", 2), _row("Jura\nlower", "2026-01-03", 3)},
         line_in_message=5),
    Case("extra_column", text(H + "Ivel,2026-01-03,2,99\nJura,2026-01-03,1\n"), "partial",
         ("too many columns",), rejected=((2, "too many columns", "Ivel,2026-01-03,2,99"),),
         accepted={_row("Jura", "2026-01-03", 1)}, line_in_message=2),
    Case("missing_field", text(H + "Ivel,2026-01-03\n" + "Jura,2026-01-03,1\n"), "partial",
         ("missing columns",), rejected=((2, "missing columns", "Ivel,2026-01-03"),),
         accepted={_row("Jura", "2026-01-03", 1)}, line_in_message=2),
    Case("missing_column_header", text("region,date\nIvel,2026-01-03\n"), "failed",
         ("missing column(s) value", "found: region, date")),
    Case("repeated_header", text(H + OK + H + "Jura,2026-01-04,1\n"), "partial",
         ("repeated header line",), rejected=((3, "repeated header line", "region,date,value"),),
         accepted={_row("Ivel", "2026-01-03", 2), _row("Jura", "2026-01-04", 1)},
         line_in_message=3),
    *[Case(f"date_{tag}", text(H + f"Ivel,{d},2\n" + "Jura,2026-01-03,1\n"), "partial",
           (f"unparseable ref_date '{d}'",),
           rejected=((2, f"unparseable ref_date '{d}' (expected %Y-%m-%d)", f"Ivel,{d},2"),),
           accepted={_row("Jura", "2026-01-03", 1)}, line_in_message=2)
      for tag, d in [("us", "01/02/2026"), ("slashes", "2026/01/02"), ("compact", "20260102"),
                     ("word", "yesterday")]],
    Case("date_after_as_of", text(H + "Ivel,2026-02-01,2\n" + OK), "partial",
         ("after as_of 2026-01-10",),
         rejected=((2, "ref_date 2026-02-01 is after as_of 2026-01-10", "Ivel,2026-02-01,2"),),
         accepted={_row("Ivel", "2026-01-03", 2)}, line_in_message=2),
    Case("date_before_1900", text(H + "Ivel,1899-12-31,2\n" + OK), "partial", ("before 1900",),
         rejected=((2, "ref_date 1899-12-31 is before 1900", "Ivel,1899-12-31,2"),),
         accepted={_row("Ivel", "2026-01-03", 2)}, line_in_message=2),
    *[Case(f"value_{tag}", text(H + f"Ivel,2026-01-02,{v}\n" + OK), "partial", (why,),
           rejected=((2, why, f"Ivel,2026-01-02,{v}"),),
           accepted={_row("Ivel", "2026-01-03", 2)}, line_in_message=2)
      for tag, v, why in [("negative", "-3", "negative daily value -3"),
                          ("nan", "NaN", "value 'NaN' is not a finite number"),
                          ("inf", "inf", "value 'inf' is not a finite number"),
                          ("huge", "1e300", "implausibly large value 1e300"),
                          ("text", "many", "non-numeric value 'many'")]],
    Case("duplicate_conflicting", text(H + "Ivel,2026-01-03,2\nIvel,2026-01-03,5\n"
                                       "Jura,2026-01-03,1\n"),
         "partial", ("conflicting values",),
         rejected=((2, "conflicting values", "Ivel,2026-01-03,2"),
                   (3, "conflicting values", "Ivel,2026-01-03,5")),
         accepted={_row("Jura", "2026-01-03", 1)}, line_in_message=2),
    Case("duplicate_identical", text(H + OK + OK), "partial", ("duplicate of an earlier row",),
         rejected=((3, "duplicate of an earlier row", OK.strip()),),
         accepted={_row("Ivel", "2026-01-03", 2)}, line_in_message=3),
    Case("hostile_region_names",
         text(H + "".join(f"{_csv_field(r)},2026-01-03,{i + 1}\n"
                          for i, r in enumerate(HOSTILE_NAMES))),
         "accepted",
         accepted={_row(r, "2026-01-03", i + 1) for i, r in enumerate(HOSTILE_NAMES)}),
    Case("apostrophe_edges", text(H + "'Ardel,2026-01-03,1\nBrisk',2026-01-03,2\n"), "accepted",
         accepted={_row("'Ardel", "2026-01-03", 1), _row("Brisk'", "2026-01-03", 2)}),
    Case("stray_quote", text(H + '"Ivel,2026-01-03,2\nJura,2026-01-03,1\n'), "accepted",
         accepted={_row('"Ivel', "2026-01-03", 2), _row("Jura", "2026-01-03", 1)}),
    Case("whitespace_only_line", text(H + OK + "   \n" + "Jura,2026-01-04,1\n"), "partial",
         ("missing columns",), rejected=((3, "missing columns", "   "),),
         accepted={_row("Ivel", "2026-01-03", 2), _row("Jura", "2026-01-04", 1)},
         line_in_message=3),
    Case("crlf_blank_lines",
         text("region,date,value\r\n\r\nIvel,2026-01-03,2\r\n\r\n\r\nJura,2026-01-03,x\r\n"),
         "partial", ("non-numeric value 'x'",),
         rejected=((6, "non-numeric value 'x'", "Jura,2026-01-03,x"),),
         accepted={_row("Ivel", "2026-01-03", 2)}, line_in_message=6),
    Case("all_rows_invalid", text(H + "Ivel,xx,1\nJura,2026-01-03,-1\n"), "failed",
         ("no valid rows", "unparseable ref_date"),
         rejected=((2, "unparseable ref_date", "Ivel,xx,1"),
                   (3, "negative daily value -1", "Jura,2026-01-03,-1")),
         line_in_message=2),
    Case("binary_garbage", text(bytes(range(256)) * 40), "failed", ("cannot parse as csv",)),
    Case("ten_mb_field", text(H + "A" * 10_000_000 + ",2026-01-03,2\n" + "Jura,2026-01-03,1\n"),
         "partial", ("region is 10000000 characters long",),
         rejected=((2, "region is 10000000 characters long (limit 1000)", None),),
         accepted={_row("Jura", "2026-01-03", 1)}, line_in_message=2),
    Case("truncated_parquet",
         parquet(pd.DataFrame({"region": ["Ivel"] * 50, "date": ["2026-01-03"] * 50,
                               "value": range(50)}), cut=0.5),
         "failed", ("not a readable Parquet file",), fmt="parquet"),
    Case("parquet_missing_column",
         parquet(pd.DataFrame({"region": ["Ivel"], "date": ["2026-01-03"]})),
         "failed", ("missing column(s) value",), fmt="parquet"),
    Case("parquet_nested_region",
         parquet(pd.DataFrame({"region": [["Ivel", "Jura"]], "date": ["2026-01-03"],
                               "value": [2]})),
         "failed", ("column 'region'", "has type", "expected text"), fmt="parquet"),
    Case("jsonl_wrong_types",
         jsonl([{**JSON_OK, "value": {"n": 2}}, {**JSON_OK, "value": [2]},
                {**JSON_OK, "value": True}, {**JSON_OK, "region": ["Ivel"]},
                {**JSON_OK, "region": "Jura"}]),
         "partial", ("value is a JSON object, expected a number",),
         rejected=((1, "value is a JSON object, expected a number", None),
                   (2, "value is a JSON array, expected a number", None),
                   (3, "value is a JSON boolean, expected a number", None),
                   (4, "region is a JSON array, expected a string",
                    json.dumps({**JSON_OK, "region": ["Ivel"]}))),
         accepted={_row("Jura", "2026-01-03", 2)}, fmt="jsonl", line_in_message=1),
    Case("jsonl_garbage_lines",
         jsonl([json.dumps(JSON_OK) + "\r\n", "\n", "not json\n", "[1, 2]\r\n",
                b'\xff\xfe{"region": "Kest"}\n', {**JSON_OK, "region": "Jura"}]),
         "partial", ("not a JSON object",),
         rejected=((3, "not a JSON object", "not json"), (4, "not a JSON object", "[1, 2]"),
                   (5, "invalid UTF-8", '\\xff\\xfe{"region": "Kest"}')),
         accepted={_row("Ivel", "2026-01-03", 2), _row("Jura", "2026-01-03", 2)},
         fmt="jsonl", line_in_message=3),
    Case("jsonl_missing_key", jsonl([{"region": "Ivel", "date": "2026-01-03"}]), "failed",
         ("no record has the key 'value'",), fmt="jsonl"),
    Case("jsonl_bad_as_of",
         jsonl([{**JSON_OK, "asof": "2026-01-10"}, {**JSON_OK, "region": "Jura", "asof": "soon"}],
               name="cases.jsonl"),
         "partial", ("missing or unparseable as_of",),
         rejected=((2, "missing or unparseable as_of", None),),
         accepted={_row("Ivel", "2026-01-03", 2)}, fmt="jsonl",
         as_of='{ from = "column", column = "asof" }', line_in_message=2),
    Case("data_path_is_folder", special("folder"), "failed", ("is a folder",)),
    Case("symlink_loop", special("loop"), "failed", ("symbolic link loop",)),
    Case("symlink_missing_target", special("missing"), "failed",
         ("broken symbolic link", "gone.csv")),
    Case("named_pipe", special("fifo"), "failed", ("not a regular file",)),
    Case("no_date_in_filename", text(H + OK, name="cases.csv"), "failed",
         ("no date matching '%Y-%m-%d' in the file name",)),
    Case("impossible_date_in_name", text(H + OK, name="cases_2026-13-45.csv"), "failed",
         ("'2026-13-45' in the file name is not a valid date",)),
    Case("spec_unknown_key", text(H + OK), spec=bad_spec("unknown_key"),
         words=("[source.district]", "unknown key 'colour'")),
    Case("spec_glob_matches_nothing", text(H + OK), spec=bad_spec("no_match"),
         words=("matches no files", "feed/*.nothing")),
    Case("spec_is_folder", text(H + OK), spec=bad_spec("folder"),
         words=("feed spec is not a file",)),
    Case("spec_invalid_toml", text(H + OK), spec=bad_spec("toml"), words=("not valid TOML",)),
    Case("spec_bad_date_format", text(H + OK), spec=bad_spec("date_format"),
         words=("date_format '%Q'",)),
]


# ---- issue 15: line lists, weekly feeds, region hierarchies (new spec keys) ----

RH = "id,site,onset,reported\n"  # a line-list header
REC_OK = "r1,Ivel,2026-01-03,2026-01-04\n"  # a valid record (file as_of 2026-01-10)
REC_COLS = '{ region = "site", ref_date = "onset", reported_on = "reported", record_id = "id" }'


def custom_spec(body: str, regions: str | None = None) -> Callable[[Path], Path]:
    """A writer for a one-source spec (TOML body of [source.district]) and optional regions.csv
    (then a [regions] table with columns region, population, parent)."""
    def w(case_dir: Path) -> Path:
        spec = case_dir / "hostile.toml"
        text_ = "[source.district]\n" + textwrap.dedent(body)
        if regions is not None:
            (case_dir / "regions.csv").write_text(regions)
            text_ += ('\n[regions]\npath = "regions.csv"\n'
                      'columns = { region = "region", population = "population", '
                      'parent = "parent" }\n')
        spec.write_text(text_)
        return spec
    return w


def records_spec(cols: str = REC_COLS, extra: str = "", fmt: str = "csv",
                 as_of: str | None = '{ from = "filename", pattern = "%Y-%m-%d" }'
                 ) -> Callable[[Path], Path]:
    """A line-list spec (signal "tests", value_kind "records")."""
    body = (f'path = "feed/*.{fmt}"\nformat = "{fmt}"\nsignal = "tests"\n'
            f'value_kind = "records"\ncolumns = {cols}\n'
            + (f"as_of = {as_of}\n" if as_of else "") + extra)
    return custom_spec(body)


def weekly_spec(extra: str = "", signal: str = "weekly_cases") -> Callable[[Path], Path]:
    """A weekly daily-count spec (as_of from the file name)."""
    return custom_spec(
        f'path = "feed/*.csv"\nformat = "csv"\nsignal = "{signal}"\nvalue_kind = "daily"\n'
        'as_of = { from = "filename", pattern = "%Y-%m-%d" }\n'
        'columns = { region = "region", ref_date = "date", value = "value" }\n'
        'frequency = "weekly"\n' + extra)


def count_spec(extra: str = "", cols: str = '{ region = "region", ref_date = "date", '
               'value = "value" }', kind: str = "daily") -> Callable[[Path], Path]:
    """A count spec with extra TOML lines (for refused keys)."""
    return custom_spec(
        f'path = "feed/*.csv"\nformat = "csv"\nsignal = "cases"\nvalue_kind = "{kind}"\n'
        f'as_of = {{ from = "filename", pattern = "%Y-%m-%d" }}\ncolumns = {cols}\n' + extra)


def _rec(rid: str, site: str, ref: str) -> tuple[str, str, float]:
    """An accepted record as read back from raw.reports (region, ref_date, value 1)."""
    del rid
    return (site, ref, 1.0)


NEW_KEY_CASES: list[Case] = [
    # -- spec keys refused with one line naming the file, the source and the key --
    Case("spec_records_with_value", text(RH + REC_OK),
         spec=records_spec('{ region = "site", ref_date = "onset", value = "n" }'),
         words=("[source.district]", "value_kind = \"records\"", "not 'value'")),
    Case("spec_records_no_reported_on", text(RH + REC_OK),
         spec=records_spec('{ region = "site", ref_date = "onset" }'),
         words=("[source.district]", "reported_on")),
    Case("spec_column_not_text", text(RH + REC_OK),
         spec=records_spec('{ region = "site", ref_date = "onset", reported_on = "reported", '
                           'record_id = 5 }'),
         words=("columns.record_id must be a column name",)),
    Case("spec_value_kind_unknown", text(H + OK), spec=count_spec(kind="events"),
         words=("value_kind must be one of cumulative, daily, records", "'events'")),
    Case("spec_frequency_not_text", text(H + OK), spec=count_spec("frequency = 7\n"),
         words=("frequency must be one of daily, weekly", "7")),
    Case("spec_frequency_unknown", text(H + OK), spec=count_spec('frequency = "monthly"\n'),
         words=("frequency must be one of daily, weekly", "'monthly'")),
    Case("spec_week_start_on_daily", text(H + OK), spec=count_spec('week_start = "sunday"\n'),
         words=("week_start applies only with frequency = \"weekly\"",)),
    Case("spec_week_start_unknown", text(H + OK), spec=weekly_spec('week_start = "tuesday"\n'),
         words=("week_start must be one of monday, sunday", "'tuesday'")),
    Case("spec_week_date_not_text", text(H + OK), spec=weekly_spec("week_date = 1\n"),
         words=("week_date must be one of last_day, first_day",)),
    Case("spec_iso_week_sunday_start", text(H + OK),
         spec=weekly_spec('week_start = "sunday"\ndate_format = "iso_week"\n'),
         words=("date_format = \"iso_week\" needs", "Monday-start")),
    Case("spec_weekly_line_list", text(RH + REC_OK),
         spec=records_spec(extra='frequency = "weekly"\n'),
         words=("frequency = \"weekly\" is for counts",)),
    Case("spec_list_files_on_counts", text(H + OK), spec=count_spec('list_files = "complete"\n'),
         words=("list_files applies only to value_kind = \"records\"",)),
    Case("spec_list_files_with_record_id", text(RH + REC_OK),
         spec=records_spec(extra='list_files = "increments"\n'),
         words=("list_files does not apply with a record_id",)),
    Case("spec_list_files_unknown", text(RH + REC_OK),
         spec=records_spec('{ region = "site", ref_date = "onset", reported_on = "reported" }',
                           extra='list_files = "all"\n'),
         words=("list_files must be one of complete, increments", "'all'")),
    Case("spec_as_of_unknown_subkey", text(H + OK),
         spec=custom_spec('path = "feed/*.csv"\nformat = "csv"\nsignal = "cases"\n'
                          'value_kind = "daily"\ncolumns = { region = "region", '
                          'ref_date = "date", value = "value" }\nas_of = { from = "filename", '
                          'pattern = "%Y-%m-%d", colour = "red" }\n'),
         words=("unknown key 'as_of.colour'",)),
    Case("spec_signal_not_text", text(H + OK),
         spec=custom_spec('path = "feed/*.csv"\nformat = "csv"\nsignal = 5\n'
                          'value_kind = "daily"\ncolumns = { region = "region", '
                          'ref_date = "date", value = "value" }\n'
                          'as_of = { from = "filename", pattern = "%Y-%m-%d" }\n'),
         words=("signal must be non-empty text",)),
    Case("spec_regions_cycle", text(H + OK),
         spec=custom_spec(spec_text("feed/*.csv").split("\n", 1)[1],
                          regions="region,population,parent\nIvel,10,Jura\nJura,,Kest\n"
                                  "Kest,,Ivel\n"),
         words=("regions.csv", "cycle", "Ivel → Jura → Kest → Ivel")),
    Case("spec_regions_own_parent", text(H + OK),
         spec=custom_spec(spec_text("feed/*.csv").split("\n", 1)[1],
                          regions="region,population,parent\nIvel,10,Ivel\n"),
         words=("region 'Ivel' is its own parent",)),
    # -- line-list records: quarantined with a reason, the rest accepted --
    Case("records_reported_before_ref",
         text(RH + "r0,Ivel,2026-01-05,2026-01-04\n" + REC_OK), "partial",
         ("reported_on 2026-01-04 is before ref_date 2026-01-05",),
         rejected=((2, "is before ref_date", "r0,Ivel,2026-01-05,2026-01-04"),),
         accepted={_rec("r1", "Ivel", "2026-01-03")}, spec=records_spec(), line_in_message=2),
    Case("records_missing_dates",
         text(RH + "r0,Ivel,,2026-01-04\nr2,Ivel,2026-01-03,\n" + REC_OK), "partial",
         ("missing ref_date",),
         rejected=((2, "missing ref_date", None), (3, "missing reported_on", None)),
         accepted={_rec("r1", "Ivel", "2026-01-03")}, spec=records_spec(), line_in_message=2),
    Case("records_unparseable_reported_on",
         text(RH + "r0,Ivel,2026-01-03,soon\n" + REC_OK), "partial",
         ("unparseable reported_on 'soon'",),
         rejected=((2, "unparseable reported_on 'soon' (expected %Y-%m-%d)", None),),
         accepted={_rec("r1", "Ivel", "2026-01-03")}, spec=records_spec(), line_in_message=2),
    Case("records_reported_after_file_as_of",
         text(RH + "r0,Ivel,2026-01-03,2026-01-12\n" + REC_OK), "partial",
         ("reported_on 2026-01-12 is after the file's as_of 2026-01-10",),
         rejected=((2, "is after the file's as_of", None),),
         accepted={_rec("r1", "Ivel", "2026-01-03")}, spec=records_spec(), line_in_message=2),
    Case("records_missing_record_id",
         text(RH + " ,Ivel,2026-01-03,2026-01-04\nr2,Ivel,2026-01-03,2026-01-04\n"), "partial",
         ("missing record_id",), rejected=((2, "missing record_id", None),),
         accepted={_rec("r2", "Ivel", "2026-01-03")}, spec=records_spec(), line_in_message=2),
    Case("records_conflicting_versions",
         text(RH + "r1,Ivel,2026-01-03,2026-01-04\nr1,Ivel,2026-01-02,2026-01-04\n"
              "r2,Jura,2026-01-03,2026-01-05\n"), "partial",
         ("conflicting versions of record r1",),
         rejected=((2, "conflicting versions", None), (3, "conflicting versions", None)),
         accepted={_rec("r2", "Jura", "2026-01-03")}, spec=records_spec(), line_in_message=2),
    Case("records_duplicate_identical", text(RH + REC_OK + REC_OK), "partial",
         ("duplicate of an earlier row",), rejected=((3, "duplicate of an earlier row", None),),
         accepted={_rec("r1", "Ivel", "2026-01-03")}, spec=records_spec(), line_in_message=3),
    Case("records_without_id_repeat_is_two_events",
         text("site,onset,reported\nIvel,2026-01-03,2026-01-04\nIvel,2026-01-03,2026-01-04\n"),
         "accepted", spec=records_spec('{ region = "site", ref_date = "onset", '
                                       'reported_on = "reported" }', as_of=None)),
    Case("records_all_invalid", text(RH + "r0,Ivel,2026-01-05,2026-01-04\nr2,,2026-01-03,x\n"),
         "failed", ("no valid rows", "is before ref_date"),
         rejected=((2, "is before ref_date", None), (3, "missing region", None)),
         spec=records_spec(), line_in_message=2),
    Case("records_jsonl_nested_date",
         jsonl([{"id": "r0", "site": "Ivel", "onset": "2026-01-03", "reported": {"d": 1}},
                {"id": "r1", "site": "Ivel", "onset": "2026-01-03", "reported": "2026-01-04"}]),
         "partial", ("reported_on is a JSON object, expected a string",),
         rejected=((1, "reported_on is a JSON object", None),),
         accepted={_rec("r1", "Ivel", "2026-01-03")}, spec=records_spec(fmt="jsonl"),
         fmt="jsonl", line_in_message=1),
    # -- weekly counts --
    Case("weekly_wrong_weekday", text(H + "Ivel,2026-01-07,2\nIvel,2026-01-04,3\n"), "partial",
         ("2026-01-07 is a Wednesday", "week's last day (Sunday"),
         rejected=((2, "is a Wednesday", "Ivel,2026-01-07,2"),),
         accepted={_row("Ivel", "2026-01-04", 3)}, spec=weekly_spec(), line_in_message=2),
    Case("weekly_unfinished_week", text(H + "Ivel,2026-01-11,2\nIvel,2026-01-04,3\n"), "partial",
         ("the week ending 2026-01-11 is not over on as_of 2026-01-10",),
         rejected=((2, "is not over", None),),
         accepted={_row("Ivel", "2026-01-04", 3)}, spec=weekly_spec(), line_in_message=2),
    Case("weekly_iso_week_labels", text(H + "Ivel,2026-W01,2\nIvel,2025-W52,5\nIvel,W3,1\n"),
         "partial", ("unparseable ref_date 'W3'",), rejected=((4, "unparseable", None),),
         accepted={_row("Ivel", "2026-01-04", 2), _row("Ivel", "2025-12-28", 5)},
         spec=weekly_spec('date_format = "iso_week"\n'), line_in_message=4),
    Case("weekly_sunday_start_first_day",
         text(H + "Ivel,2025-12-28,2\nIvel,2026-01-04,5\nIvel,2026-01-05,1\n"), "partial",
         ("2026-01-05 is a Monday", "first day (Sunday: weeks start on Sunday)"),
         rejected=((4, "is a Monday", None),),
         accepted={_row("Ivel", "2026-01-03", 2), _row("Ivel", "2026-01-10", 5)},
         spec=weekly_spec('week_start = "sunday"\nweek_date = "first_day"\n'),
         line_in_message=4),
    Case("weekly_signal_already_daily", text(H + "Ivel,2026-01-04,3\n"), "failed",
         ("signal 'cases' is daily", "declares it weekly (monday-start weeks)",
          "file not ingested"), spec=weekly_spec(signal="cases")),
]
CASES += NEW_KEY_CASES


def test_corpus_size() -> None:
    """The corpus has at least 30 distinct cases."""
    assert len(CASES) >= 30
    assert len({c.id for c in CASES}) == len(CASES)


@pytest.fixture(scope="module")
def template_db(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, int]:
    """A database holding one good feed (ingested before every hostile file)."""
    root = tmp_path_factory.mktemp("good")
    (root / "good").mkdir()
    (root / "good" / "cases_2026-01-05.csv").write_text(GOOD)
    (root / "good.toml").write_text(spec_text("good/*.csv"))
    db = root / "template.duckdb"
    con = store.connect(db)
    s = ingest_spec(con, root / "good.toml")
    assert [f.status for f in s.files] == ["accepted"]
    con.execute("CHECKPOINT")
    con.close()
    return db, int(s.files[0].file_id)


def _snapshot(con: duckdb.DuckDBPyConnection) -> tuple[list, list, list]:
    """core.observations, the good file's raw.reports rows and raw.feed_files, sorted."""
    obs = con.execute("SELECT * FROM core.observations ORDER BY ALL").fetchall()
    reports = con.execute("SELECT * FROM raw.reports WHERE file_id IN "
                          "(SELECT file_id FROM raw.feed_files WHERE path LIKE '%good%') "
                          "ORDER BY ALL").fetchall()
    files = con.execute("SELECT * FROM raw.feed_files ORDER BY file_id").fetchall()
    return obs, reports, files


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_hostile_feed(case: Case, template_db: tuple[Path, int], tmp_path: Path,
                      capsys: pytest.CaptureFixture) -> None:
    """One corpus case through the CLI: documented status, message, quarantine, exit code."""
    db = tmp_path / "tw.duckdb"
    shutil.copy(template_db[0], db)
    feed = tmp_path / "feed"
    feed.mkdir()
    name = case.write(feed)
    if case.spec:
        spec = case.spec(tmp_path)
    else:
        spec = tmp_path / "hostile.toml"
        spec.write_text(spec_text(f"feed/*.{case.fmt}", case.fmt, case.as_of))
    con = store.connect(db)
    obs0, good0, files0 = _snapshot(con)
    con.close()

    rc = main(["--db", str(db), "ingest", str(spec)])
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err

    con = store.connect(db)
    try:
        obs1, good1, files1 = _snapshot(con)
        assert good1 == good0  # the good file's raw rows are untouched
        if case.status is None:  # the spec is refused before any file is touched
            assert rc == 2
            assert err.startswith("tallywave: error: ") and err.count("\n") == 1
            assert str(spec) in err
            for w in case.words:
                assert w in err
            assert (obs1, files1) == (obs0, files0)
            with pytest.raises(UserError) as info:
                ingest_spec(con, spec)
            assert "\n" not in str(info.value) and case.words[0] in str(info.value)
            return

        new = con.execute("SELECT file_id, path, status, message, rows_read, rows_accepted, "
                          "rows_rejected FROM raw.feed_files WHERE file_id > ? ORDER BY file_id",
                          [template_db[1]]).fetchall()
        assert len(new) == 1, new
        fid, path, status, message, n_read, n_ok, n_bad = new[0]
        assert path == str(feed / name)
        assert status == case.status, message
        assert rc == (2 if status == "failed" else 0)
        assert err == ""
        assert "\n" not in (message or "")
        if status != "accepted":
            assert path in message
            assert f"{status}: {message}" in out
        for w in case.words:
            assert w in message
        if case.line_in_message is not None:
            assert f"line {case.line_in_message}:" in message

        rejected = con.execute("SELECT line_no, content, reason FROM raw.rejected_rows "
                               "WHERE file_id = ? ORDER BY line_no", [fid]).fetchall()
        assert [r[0] for r in rejected] == [r[0] for r in case.rejected]
        for (line, content, reason), (_want_line, want_reason, want_content) in zip(
                rejected, case.rejected, strict=True):
            assert want_reason.lower() in reason.lower(), (line, reason)
            assert "\n" not in reason
            if want_content is not None:
                assert content == want_content
        accepted = con.execute("SELECT region, strftime(ref_date, '%Y-%m-%d'), value "
                               "FROM raw.reports WHERE file_id = ?", [fid]).fetchall()
        if case.accepted is not None:
            assert set(accepted) == case.accepted
        assert (n_ok, n_bad, n_read) == (len(accepted), len(rejected), len(accepted) + n_bad)

        # Everything known before is unchanged; only the new file's rows were added.
        obs_kept = con.execute("SELECT * FROM core.observations WHERE file_id IS DISTINCT FROM ? "
                               "ORDER BY ALL", [fid]).fetchall()
        assert obs_kept == obs0
        if status in ("failed", "empty"):
            assert obs1 == obs0
        assert files1[: len(files0)] == files0
    finally:
        con.close()


def test_hostile_region_names_are_data(tmp_path: Path) -> None:
    """SQL fragments in region names are stored and queried back verbatim, tables intact."""
    (tmp_path / "feed").mkdir()
    text(H + "".join(f"{_csv_field(r)},2026-01-03,{i + 1}\n"
                     for i, r in enumerate(HOSTILE_NAMES)))(tmp_path / "feed")
    spec = tmp_path / "s.toml"
    spec.write_text(spec_text("feed/*.csv"))
    con = store.memory()
    ingest_spec(con, spec)
    got = con.execute("SELECT region, value FROM core.observations ORDER BY value").fetchall()
    assert got == [(r, float(i + 1)) for i, r in enumerate(HOSTILE_NAMES)]
    for i, r in enumerate(HOSTILE_NAMES):  # parameterised look-up finds each name exactly
        assert con.execute("SELECT value FROM raw.reports WHERE region = ?",
                           [r]).fetchall() == [(float(i + 1),)]


def test_failed_file_recorded_once_across_reruns(tmp_path: Path) -> None:
    """Re-running an ingest does not pile up rows for the same failed file; a fixed file (new
    content) is then ingested normally."""
    (tmp_path / "feed").mkdir()
    f = tmp_path / "feed" / NAME
    f.write_text("region,date\nIvel,2026-01-03\n")
    spec = tmp_path / "s.toml"
    spec.write_text(spec_text("feed/*.csv"))
    con = store.memory()
    for _ in range(3):
        s = ingest_spec(con, spec)
        assert [x.status for x in s.files] == ["failed"]
    assert con.execute("SELECT count(*) FROM raw.feed_files").fetchall() == [(1,)]
    f.write_text(H + OK)
    s = ingest_spec(con, spec)
    assert [x.status for x in s.files] == ["accepted"]


def test_symlinked_folder_loop_lists_each_file_once(tmp_path: Path) -> None:
    """A recursive glob through a folder that links to itself sees each real file once."""
    feed = tmp_path / "feed"
    feed.mkdir()
    (feed / NAME).write_text(H + OK)
    os.symlink(feed, feed / "again")
    spec = tmp_path / "s.toml"
    spec.write_text(spec_text("feed/**/*.csv"))
    con = store.memory()
    s = ingest_spec(con, spec)
    assert [(Path(x.path).name, x.status) for x in s.files] == [(NAME, "accepted")]


_MEMORY_PROBE = """
import resource, sys
from pathlib import Path
from tallywave.pipeline import store
from tallywave.pipeline.ingest import ingest_spec
folder = Path(sys.argv[1])
con = store.memory()
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
s = ingest_spec(con, folder / "s.toml")
after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(",".join(f.status for f in s.files), (after - before) / 1024)
"""


def test_ten_mb_line_memory_stays_bounded(tmp_path: Path) -> None:
    """A 10 MB field (CSV) and a 10 MB JSON line: ingest in a fresh process grows peak RSS by
    well under 500 MB (ru_maxrss is in KiB on Linux)."""
    feed = tmp_path / "feed"
    feed.mkdir()
    (feed / NAME).write_text(H + "Ivel," + "2" * 10_000_000 + ",2\n" + "Jura,2026-01-03,1\n")
    (feed / "cases_2026-01-11.jsonl").write_text(
        json.dumps({"region": "K" * 10_000_000, "date": "2026-01-03", "value": 1}) + "\n"
        + json.dumps(JSON_OK) + "\n")
    (tmp_path / "s.toml").write_text(
        spec_text("feed/*.csv") + spec_text("feed/*.jsonl", "jsonl").replace(
            "[source.district]", "[source.district_json]"))
    res = subprocess.run([sys.executable, "-c", _MEMORY_PROBE, str(tmp_path)],
                         capture_output=True, text=True, timeout=120, check=True)
    statuses, growth_mb = res.stdout.split()  # ru_maxrss is in KiB on Linux (getrusage(2))
    assert statuses == "partial,partial"
    assert float(growth_mb) < 500
