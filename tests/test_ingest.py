"""Foundation behaviour of the ingest stage: feeds in, exact value history out.

Feeds are written here (CSV cumulative, CSV daily, JSON lines with as_of from a column, Parquet
written by pandas/pyarrow); invented regions only.  Every expected number below is worked out by
hand from the documented rules in ``pipeline/vintages.py`` (cumulative → daily by differencing
within a snapshot; the first reference date of a later snapshot is only a base; a date absent
inside a snapshot's span is 0 in that vintage; a row only when a value changes).
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import textwrap
from pathlib import Path

import duckdb
import pandas as pd
import pytest

from tallywave.pipeline import store
from tallywave.pipeline.cli import main
from tallywave.pipeline.ingest import ingest_spec
from tallywave.pipeline.vintages import observations_as_of

D = dt.date


def day(n: int) -> dt.date:
    """2026-01-n (the whole module lives in January 2026)."""
    return D(2026, 1, n)


def write_spec(folder: Path, sources: dict[str, dict[str, str]]) -> Path:
    """A feed spec with one [source.NAME] table per entry (values are TOML fragments)."""
    parts = []
    for name, keys in sources.items():
        body = "\n".join(f"{k} = {v}" for k, v in keys.items())
        parts.append(f"[source.{name}]\n{body}\n")
    p = folder / "feeds.toml"
    p.write_text("\n".join(parts), encoding="utf-8")
    return p


FILENAME_ASOF = '{ from = "filename", pattern = "%Y-%m-%d" }'
COLS = '{ region = "district", ref_date = "date", value = "count" }'


def cumulative_feed(folder: Path) -> None:
    """Two cumulative snapshots of regions Avalon and Brindle (CSV, as_of in the file name)."""
    d = folder / "cum"
    d.mkdir()
    # Snapshot 2026-01-05: ref dates 01..05.  Earliest snapshot: 01-01 keeps its total (10).
    (d / "cases_2026-01-05.csv").write_text(
        "district,date,count\n"
        "Avalon,2026-01-01,10\nAvalon,2026-01-02,12\nAvalon,2026-01-03,15\n"
        "Avalon,2026-01-04,15\nAvalon,2026-01-05,20\n"
        "Brindle,2026-01-01,0\nBrindle,2026-01-02,4\nBrindle,2026-01-03,4\n"
        "Brindle,2026-01-04,9\nBrindle,2026-01-05,9\n")
    # Snapshot 2026-01-07, window-limited to ref dates 03..07; Avalon's 01-05 is absent.
    (d / "cases_2026-01-07.csv").write_text(
        "district,date,count\n"
        "Avalon,2026-01-03,15\nAvalon,2026-01-04,16\nAvalon,2026-01-06,22\nAvalon,2026-01-07,30\n"
        "Brindle,2026-01-03,4\nBrindle,2026-01-04,9\nBrindle,2026-01-05,9\n"
        "Brindle,2026-01-06,11\nBrindle,2026-01-07,11\n")


# (region, ref_date day, as_of day, daily value) expected from cumulative_feed, by hand:
CUM_EXPECTED = [
    # vintage 01-05 (earliest snapshot: first date is its own total)
    ("Avalon", 1, 5, 10.0), ("Avalon", 2, 5, 2.0), ("Avalon", 3, 5, 3.0), ("Avalon", 4, 5, 0.0),
    ("Avalon", 5, 5, 5.0),
    ("Brindle", 1, 5, 0.0), ("Brindle", 2, 5, 4.0), ("Brindle", 3, 5, 0.0),
    ("Brindle", 4, 5, 5.0), ("Brindle", 5, 5, 0.0),
    # vintage 01-07: 01-03 is only a base (no row); Avalon 01-04 revised 0 -> 1; Avalon 01-05
    # absent inside the span -> 0 (was 5); 01-06 = 22 - 16; 01-07 = 30 - 22.
    ("Avalon", 4, 7, 1.0), ("Avalon", 5, 7, 0.0), ("Avalon", 6, 7, 6.0), ("Avalon", 7, 7, 8.0),
    # Brindle: 01-04 = 9 - 4 = 5 and 01-05 = 0 unchanged -> no rows; 01-06 = 2, 01-07 = 0.
    ("Brindle", 6, 7, 2.0), ("Brindle", 7, 7, 0.0),
]


def daily_feed(folder: Path) -> None:
    """Daily admissions (CSV): a revision, an unchanged re-report and a new date."""
    d = folder / "daily"
    d.mkdir()
    (d / "adm_2026-01-05.csv").write_text(
        "district,date,count\nAvalon,2026-01-03,4\nAvalon,2026-01-04,6\nCarrow,2026-01-04,1\n")
    (d / "adm_2026-01-06.csv").write_text(  # Avalon 01-04 revised 6 -> 7; others unchanged
        "district,date,count\nAvalon,2026-01-03,4\nAvalon,2026-01-04,7\nCarrow,2026-01-04,1\n"
        "Avalon,2026-01-05,2\n")


DAILY_EXPECTED = [
    ("Avalon", 3, 5, 4.0), ("Avalon", 4, 5, 6.0), ("Carrow", 4, 5, 1.0),
    ("Avalon", 4, 6, 7.0), ("Avalon", 5, 6, 2.0),
]


def jsonl_feed(folder: Path) -> None:
    """Daily deaths as JSON lines; as_of comes from a field, two vintages in one file."""
    d = folder / "jsonl"
    d.mkdir()
    recs = [
        {"district": "Dunmere", "date": "2026-01-02", "count": 1, "published": "2026-01-03"},
        {"district": "Dunmere", "date": "2026-01-03", "count": 0, "published": "2026-01-03"},
        {"district": "Dunmere", "date": "2026-01-03", "count": 2, "published": "2026-01-04"},
        {"district": "Dunmere", "date": "2026-01-02", "count": 1, "published": "2026-01-04"},
    ]
    (d / "deaths.jsonl").write_text("".join(json.dumps(r) + "\n" for r in recs))


JSONL_EXPECTED = [("Dunmere", 2, 3, 1.0), ("Dunmere", 3, 3, 0.0), ("Dunmere", 3, 4, 2.0)]


def parquet_feed(folder: Path) -> None:
    """Daily tests (Parquet from pandas, dates as timestamps, signal from a column)."""
    d = folder / "pq"
    d.mkdir()
    pd.DataFrame({
        "district": ["Estover", "Estover", "Fallow"],
        "date": pd.to_datetime(["2026-01-01", "2026-01-02", "2026-01-02"]),
        "count": [5, 7, 3],
        "what": ["tests", "tests", "tests"],
    }).to_parquet(d / "tests_2026-01-03.parquet", index=False)


PARQUET_EXPECTED = [("Estover", 1, 3, 5.0), ("Estover", 2, 3, 7.0), ("Fallow", 2, 3, 3.0)]


@pytest.fixture()
def feeds(tmp_path: Path) -> Path:
    """All four feeds plus their spec; returns the spec path."""
    cumulative_feed(tmp_path)
    daily_feed(tmp_path)
    jsonl_feed(tmp_path)
    parquet_feed(tmp_path)
    return write_spec(tmp_path, {
        "cases_cum": {"path": '"cum/*.csv"', "format": '"csv"', "signal": '"cases"',
                      "value_kind": '"cumulative"', "as_of": FILENAME_ASOF, "columns": COLS},
        "admissions": {"path": '"daily/*.csv"', "format": '"csv"', "signal": '"admissions"',
                       "value_kind": '"daily"', "as_of": FILENAME_ASOF, "columns": COLS},
        "deaths": {"path": '"jsonl/*.jsonl"', "format": '"jsonl"', "signal": '"deaths"',
                   "value_kind": '"daily"',
                   "as_of": '{ from = "column", column = "published" }', "columns": COLS},
        "tests": {"path": '"pq/*.parquet"', "format": '"parquet"', "signal_column": '"what"',
                  "value_kind": '"daily"', "as_of": FILENAME_ASOF, "columns": COLS},
    })


def expected_frame(rows: list[tuple], signal: str) -> pd.DataFrame:
    """The hand-computed rows as a core.observations-shaped frame."""
    return pd.DataFrame([(r, signal, day(a), day(b), v) for r, a, b, v in rows],
                        columns=["region", "signal", "ref_date", "as_of", "value"])


def observations(con: duckdb.DuckDBPyConnection, signal: str | None = None) -> pd.DataFrame:
    """core.observations (one signal or all), sorted, dates as datetime.date."""
    sql = "SELECT region, signal, ref_date, as_of, value FROM core.observations"
    params: list = []
    if signal:
        sql += " WHERE signal = ?"
        params.append(signal)
    df = con.execute(sql + " ORDER BY ALL", params).df()
    df["ref_date"] = pd.to_datetime(df["ref_date"]).dt.date
    df["as_of"] = pd.to_datetime(df["as_of"]).dt.date
    return df


def assert_frame(got: pd.DataFrame, want: pd.DataFrame) -> None:
    """Exact equality of two observation frames (values are small integers: no tolerance)."""
    want = want.sort_values(list(want.columns)).reset_index(drop=True)
    got = got.reset_index(drop=True)
    pd.testing.assert_frame_equal(got, want, check_dtype=False)


def counts(con: duckdb.DuckDBPyConnection) -> dict[str, int]:
    """Row counts of the ingest tables."""
    return {t: con.execute(f"SELECT count(*) FROM {t}").fetchall()[0][0]
            for t in ("raw.feed_files", "raw.reports", "raw.rejected_rows", "core.observations")}


# ------------------------------------------------------------------------------- round trip ---

def test_round_trip_all_formats(feeds: Path) -> None:
    """Four feeds in, the hand-computed value history out, exactly."""
    con = store.memory()
    summary = ingest_spec(con, feeds)
    assert [f.status for f in summary.files] == ["accepted"] * 6
    assert_frame(observations(con, "cases"), expected_frame(CUM_EXPECTED, "cases"))
    assert_frame(observations(con, "admissions"), expected_frame(DAILY_EXPECTED, "admissions"))
    assert_frame(observations(con, "deaths"), expected_frame(JSONL_EXPECTED, "deaths"))
    assert_frame(observations(con, "tests"), expected_frame(PARQUET_EXPECTED, "tests"))
    # raw.reports keeps exactly what arrived (cumulative totals, not differences).
    raw = con.execute("SELECT region, ref_date, value, value_kind, line_no FROM raw.reports "
                      "WHERE signal = 'cases' AND as_of = DATE '2026-01-07' "
                      "AND region = 'Avalon' ORDER BY ref_date").fetchall()
    assert [(r[1].day, r[2], r[3], r[4]) for r in raw] == [
        (3, 15.0, "cumulative", 2), (4, 16.0, "cumulative", 3), (6, 22.0, "cumulative", 4),
        (7, 30.0, "cumulative", 5)]


def test_reingest_same_files_adds_nothing(feeds: Path) -> None:
    """The same bytes twice: every file skipped, no table grows."""
    con = store.memory()
    ingest_spec(con, feeds)
    before = counts(con)
    obs_before = observations(con)
    again = ingest_spec(con, feeds)
    assert [f.status for f in again.files] == ["skipped"] * 6
    assert all("already ingested" in f.message for f in again.files)
    assert counts(con) == before
    assert_frame(observations(con), obs_before)


def test_as_of_replay_and_unchanged_values(feeds: Path) -> None:
    """observations_as_of replays each date; an unchanged re-report adds no row."""
    con = store.memory()
    ingest_spec(con, feeds)
    # The revision Avalon 01-04 6 -> 7 is a new vintage row; both dates replay correctly.
    def value(as_of: dt.date, region: str, ref: int, signal: str) -> float:
        df = observations_as_of(con, as_of, signals=[signal])
        row = df[(df.region == region) & (pd.to_datetime(df.ref_date).dt.date == day(ref))]
        assert len(row) == 1
        return float(row["value"].iloc[0])

    assert value(day(5), "Avalon", 4, "admissions") == 6.0
    assert value(day(6), "Avalon", 4, "admissions") == 7.0
    assert value(day(30), "Avalon", 4, "admissions") == 7.0
    # Cumulative: 01-05 as of 01-06 still the first vintage (5), as of 01-07 it is 0.
    assert value(day(6), "Avalon", 5, "cases") == 5.0
    assert value(day(7), "Avalon", 5, "cases") == 0.0
    # 01-03 was only a base in the later snapshot: its first-vintage value stands.
    assert value(day(7), "Avalon", 3, "cases") == 3.0
    # Nothing known before the first vintage.
    assert observations_as_of(con, day(4), signals=["cases"]).empty
    # A third daily snapshot repeating every value and adding one date adds exactly one row.
    n_before = counts(con)["core.observations"]
    (feeds.parent / "daily" / "adm_2026-01-08.csv").write_text(
        "district,date,count\nAvalon,2026-01-03,4\nAvalon,2026-01-04,7\nCarrow,2026-01-04,1\n"
        "Avalon,2026-01-05,2\nCarrow,2026-01-07,3\n")
    s = ingest_spec(con, feeds)
    assert [f.status for f in s.files].count("accepted") == 1
    assert counts(con)["core.observations"] == n_before + 1
    new = con.execute("SELECT region, ref_date, as_of, value FROM core.observations "
                      "WHERE as_of = DATE '2026-01-08'").fetchall()
    assert new == [("Carrow", day(7), day(8), 3.0)]


def test_same_bytes_under_a_later_date_is_a_new_snapshot(tmp_path: Path) -> None:
    """Daily snapshots 5 -> 7 -> 5, the first and third byte-identical: the third is ingested
    (not skipped as seen content) and the value is 5 again as of its date."""
    d = tmp_path / "daily"
    d.mkdir()
    for n, v in ((2, 5), (3, 7), (4, 5)):
        (d / f"adm_2026-01-0{n}.csv").write_text(f"district,date,count\nAvalon,2026-01-01,{v}\n")
    spec = write_spec(tmp_path, {"a": {
        "path": '"daily/*.csv"', "format": '"csv"', "signal": '"admissions"',
        "value_kind": '"daily"', "as_of": FILENAME_ASOF, "columns": COLS}})
    con = store.memory()
    assert [f.status for f in ingest_spec(con, spec).files] == ["accepted"] * 3
    assert_frame(observations(con), expected_frame(
        [("Avalon", 1, 2, 5.0), ("Avalon", 1, 3, 7.0), ("Avalon", 1, 4, 5.0)], "admissions"))
    assert [f.status for f in ingest_spec(con, spec).files] == ["skipped"] * 3


def test_late_older_snapshot_is_slotted_into_history(tmp_path: Path) -> None:
    """Ingesting the later cumulative snapshot first, then the older one, ends in the same
    history as in-order ingest (core.observations is a pure function of raw.reports)."""
    cumulative_feed(tmp_path)
    spec = write_spec(tmp_path, {"c": {
        "path": '"cum/*_2026-01-07.csv"', "format": '"csv"', "signal": '"cases"',
        "value_kind": '"cumulative"', "as_of": FILENAME_ASOF, "columns": COLS}})
    con = store.memory()
    ingest_spec(con, spec)
    # Alone, the 01-07 snapshot is the earliest: its first date keeps its total (15).
    first = con.execute("SELECT value FROM core.observations WHERE region = 'Avalon' "
                        "AND ref_date = DATE '2026-01-03'").fetchall()
    assert first == [(15.0,)]
    spec.write_text(spec.read_text().replace("cum/*_2026-01-07.csv", "cum/*.csv"))
    ingest_spec(con, spec)
    assert_frame(observations(con, "cases"), expected_frame(CUM_EXPECTED, "cases"))


# ------------------------------------------------------------------------------- provenance ---

def test_provenance_rows_and_hash(tmp_path: Path) -> None:
    """raw.feed_files records the content hash and row counts that match the file."""
    d = tmp_path / "f"
    d.mkdir()
    body = ("district,date,count\nAvalon,2026-01-01,3\nAvalon,2026-01-02,oops\n"
            "Avalon,2026-01-03,4\nBrindle,2026-01-09,1\n")
    f = d / "x_2026-01-05.csv"
    f.write_bytes(body.encode())
    spec = write_spec(tmp_path, {"s": {"path": '"f/*.csv"', "format": '"csv"',
                                       "signal": '"cases"', "value_kind": '"daily"',
                                       "as_of": FILENAME_ASOF, "columns": COLS}})
    con = store.memory()
    ingest_spec(con, spec)
    rows = con.execute("SELECT file_id, source, path, sha256, as_of, rows_read, rows_accepted, "
                       "rows_rejected, status, message FROM raw.feed_files").fetchall()
    assert len(rows) == 1
    fid, source, path, sha, as_of, n_read, n_ok, n_bad, status, msg = rows[0]
    assert (source, path, as_of) == ("s", str(f), day(5))
    assert sha == hashlib.sha256(body.encode()).hexdigest()  # hashlib (Python standard library)
    assert (n_read, n_ok, n_bad, status) == (4, 2, 2, "partial")  # 4 data lines in the file
    assert n_ok == con.execute("SELECT count(*) FROM raw.reports WHERE file_id = ?",
                               [fid]).fetchall()[0][0]
    rej = con.execute("SELECT line_no, content, reason FROM raw.rejected_rows "
                      "WHERE file_id = ? ORDER BY line_no", [fid]).fetchall()
    assert len(rej) == n_bad
    assert rej[0] == (3, "Avalon,2026-01-02,oops", "non-numeric value 'oops'")
    assert rej[1][:2] == (5, "Brindle,2026-01-09,1") and "after as_of 2026-01-05" in rej[1][2]
    assert "line 3" in msg and str(f) in msg and "\n" not in msg


# -------------------------------------------------------------------------------------- CLI ---

def test_cli_ingest_sql_export(feeds: Path, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    """ingest, sql and export through pipeline.cli.main; exports read back row for row."""
    db = str(tmp_path / "tw.duckdb")
    assert main(["--db", db, "ingest", str(feeds)]) == 0
    out = capsys.readouterr().out
    assert "6 files (6 accepted)" in out
    assert main(["--db", db, "sql", "SELECT count(*) AS n FROM core.observations"]) == 0
    n_obs = len(CUM_EXPECTED) + len(DAILY_EXPECTED) + len(JSONL_EXPECTED) + len(PARQUET_EXPECTED)
    assert str(n_obs) in capsys.readouterr().out.split()
    for suffix in (".parquet", ".csv"):
        dest = tmp_path / f"obs{suffix}"
        assert main(["--db", db, "export", "core.observations", "--to", str(dest)]) == 0
        assert f"exported {n_obs} rows" in capsys.readouterr().out
        # Read back with pandas/pyarrow, independent of DuckDB.
        back = pd.read_parquet(dest) if suffix == ".parquet" else pd.read_csv(dest)
        assert len(back) == n_obs
        assert set(back.columns) >= {"region", "signal", "ref_date", "as_of", "value"}
        assert back["value"].sum() == pytest.approx(
            sum(r[3] for r in CUM_EXPECTED + DAILY_EXPECTED + JSONL_EXPECTED + PARQUET_EXPECTED))
    rc = main(["--db", db, "export", "core.no_such_table", "--to", str(tmp_path / "x.csv")])
    err = capsys.readouterr().err
    assert rc == 2
    assert err.count("\n") == 1 and "unknown table 'core.no_such_table'" in err
    assert "Traceback" not in err
    # Ingesting again through the CLI: everything skipped, exit 0.
    assert main(["--db", db, "ingest", str(feeds)]) == 0
    assert "6 skipped" in capsys.readouterr().out


def test_cli_bad_export_target_and_missing_db(tmp_path: Path,
                                              capsys: pytest.CaptureFixture) -> None:
    """A missing database and a wrong export suffix are one-line user errors (exit 2)."""
    db = str(tmp_path / "none.duckdb")
    assert main(["--db", db, "sql", "SELECT 1"]) == 2
    err = capsys.readouterr().err
    assert "no such database" in err and err.count("\n") == 1
    store.connect(db).close()
    assert main(["--db", db, "export", "raw.reports", "--to", str(tmp_path / "x.txt")]) == 2
    err = capsys.readouterr().err
    assert ".parquet or .csv" in err and "Traceback" not in err


def test_design_example_spec_loads(tmp_path: Path) -> None:
    """The design.md example spec shape loads (keys, inline tables)."""
    from tallywave.pipeline.ingest import load_spec

    p = tmp_path / "s.toml"
    p.write_text(textwrap.dedent('''
        [source.district_cases]
        path = "sample_feeds/cases/*.csv"
        format = "csv"
        signal = "cases"
        value_kind = "cumulative"
        as_of = { from = "filename", pattern = "%Y-%m-%d" }
        columns = { region = "district", ref_date = "date", value = "total" }
    '''))
    (spec,) = load_spec(p)
    assert (spec.name, spec.format, spec.value_kind, spec.columns["value"]) == (
        "district_cases", "csv", "cumulative", "total")
