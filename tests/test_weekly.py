"""Weekly feeds (``frequency = "weekly"``): dates normalised to the week's last day, ISO and
Sunday-start weeks, cumulative weekly totals differenced week by week, each signal's frequency
recorded in core.signals, and a run through every stage (a history too short for any forecast
refused with one line).

Calendar facts used below (checked with Python's ``datetime.date.isocalendar``, a reference
implementation of ISO 8601 weeks): 2026-01-04 is a Sunday, the last day of ISO week 2026-W01;
2025-12-28 is the Sunday ending 2025-W52; Sunday-start weeks end on Saturdays.
"""

from __future__ import annotations

import datetime as dt
import textwrap
from pathlib import Path

import duckdb
import pandas as pd
import pytest

from tallywave.pipeline import store
from tallywave.pipeline.errors import RunFailed
from tallywave.pipeline.ingest import ingest_spec
from tallywave.pipeline.run import execute_run
from tallywave.pipeline.settings import load_settings
from tallywave.pipeline.store import MIGRATIONS
from tallywave.pipeline.vintages import observations_as_of

D = dt.date


def spec(folder: Path, kind: str, extra: str = "", signal: str = "cases") -> Path:
    p = folder / f"feeds_{signal}.toml"
    p.write_text(textwrap.dedent(f"""\
        [source.{signal}_weekly]
        path = "{signal}/*.csv"
        format = "csv"
        signal = "{signal}"
        value_kind = "{kind}"
        frequency = "weekly"
        as_of = {{ from = "filename", pattern = "%Y-%m-%d" }}
        columns = {{ region = "region", ref_date = "week", value = "n" }}
        """) + extra)
    (folder / signal).mkdir(exist_ok=True)
    return p


def test_calendar_facts_used_here() -> None:
    """The ISO facts the other tests rely on (Python's datetime as the reference)."""
    assert D(2026, 1, 4).isocalendar()[:] == (2026, 1, 7)
    assert D(2025, 12, 28).isocalendar()[:] == (2025, 52, 7)
    assert D(2026, 1, 10).weekday() == 5  # Saturday


def test_cumulative_weekly_totals_are_differenced_by_week(tmp_path: Path) -> None:
    """Cumulative weekly totals 10, 15, 15, 22 (weeks ending Sundays) → weekly values 10, 5, 0,
    7; a week missing inside a later snapshot's span gets 0 (no daily zeros are invented
    between weeks)."""
    p = spec(tmp_path, "cumulative")
    (tmp_path / "cases" / "c_2026-01-25.csv").write_text(
        "region,week,n\nAsh,2026-01-04,10\nAsh,2026-01-11,15\nAsh,2026-01-18,15\n"
        "Ash,2026-01-25,22\n")
    (tmp_path / "cases" / "c_2026-02-01.csv").write_text(  # 01-25 absent: 0 in that vintage
        "region,week,n\nAsh,2026-01-11,15\nAsh,2026-01-18,16\nAsh,2026-02-01,30\n")
    con = store.memory()
    s = ingest_spec(con, p)
    assert [f.status for f in s.files] == ["accepted", "accepted"]
    v1 = observations_as_of(con, D(2026, 1, 25))
    assert list(v1["value"]) == [10.0, 5.0, 0.0, 7.0]
    assert list(pd.to_datetime(v1["ref_date"]).dt.day) == [4, 11, 18, 25]
    v2 = observations_as_of(con, D(2026, 2, 1))
    assert dict(zip(pd.to_datetime(v2["ref_date"]).dt.strftime("%m-%d"), v2["value"],
                    strict=True)) == {"01-04": 10.0, "01-11": 5.0, "01-18": 1.0, "01-25": 0.0,
                                      "02-01": 14.0}
    assert con.execute("SELECT signal, frequency, week_start, source FROM core.signals"
                       ).fetchall() == [("cases", "weekly", "monday", "cases_weekly")]


def test_iso_week_labels_and_sunday_weeks(tmp_path: Path) -> None:
    """``2026-W01`` is stored as 2026-01-04; a Sunday-start week labelled by its first day
    (2025-12-28) is stored as its last day, Saturday 2026-01-03."""
    p = spec(tmp_path, "daily", 'date_format = "iso_week"\n')
    (tmp_path / "cases" / "c_2026-01-10.csv").write_text(
        "region,week,n\nAsh,2026-W01,4\nAsh,2025-W52,3\n")
    q = spec(tmp_path, "daily", 'week_start = "sunday"\nweek_date = "first_day"\n',
             signal="deaths")
    (tmp_path / "deaths" / "d_2026-01-10.csv").write_text("region,week,n\nAsh,2025-12-28,2\n")
    con = store.memory()
    ingest_spec(con, p)
    ingest_spec(con, q)
    got = con.execute("SELECT signal, ref_date, value FROM core.observations ORDER BY ALL"
                      ).fetchall()
    assert got == [("cases", D(2025, 12, 28), 3.0), ("cases", D(2026, 1, 4), 4.0),
                   ("deaths", D(2026, 1, 3), 2.0)]
    assert con.execute("SELECT signal, week_start FROM core.signals ORDER BY 1").fetchall() == [
        ("cases", "monday"), ("deaths", "sunday")]


def test_run_with_a_weekly_signal(tmp_path: Path) -> None:
    """A weekly signal runs through every stage (tests/test_weekly_run.py checks the numbers);
    one with too short a history for any forecast is refused with one line, nothing published."""
    p = spec(tmp_path, "daily")
    f = tmp_path / "cases" / "c_2026-01-07.csv"
    f.write_text("region,week,n\nAsh,2026-01-04,4\n")
    con = store.memory()
    ingest_spec(con, p)
    with pytest.raises(RunFailed) as info:
        execute_run(con, D(2026, 1, 7), load_settings(None))
    msg = str(info.value)
    assert "\n" not in msg and "'cases'" in msg and "nothing published" in msg
    assert con.execute("SELECT count(*) FROM out.runs WHERE status = 'published'"
                       ).fetchall() == [(0,)]
    weeks = [D(2026, 1, 4) + dt.timedelta(days=7 * k) for k in range(6)]
    (tmp_path / "cases" / "c_2026-02-11.csv").write_text("region,week,n\n" + "".join(
        f"Ash,{w},{40 + 5 * k}\n" for k, w in enumerate(weeks)))
    ingest_spec(con, p)
    out = execute_run(con, D(2026, 2, 11), load_settings(None))
    assert con.execute("SELECT status FROM out.runs WHERE run_id = ?", [out["run_id"]]
                       ).fetchall() == [("published",)]
    assert con.execute("SELECT max(ref_date) FROM out.nowcast").fetchall() == [(weeks[-1],)]


def test_migration_records_existing_signals_as_daily(tmp_path: Path) -> None:
    """A database written before version 2 gets a core.signals row (daily) for every signal."""
    db = tmp_path / "old.duckdb"
    con = duckdb.connect(str(db))
    con.execute("CREATE SCHEMA core")
    con.execute("CREATE TABLE core.schema_info (version INTEGER, applied_at TIMESTAMP)")
    for stmt in MIGRATIONS[0][1]:
        con.execute(stmt)
    con.execute("INSERT INTO core.schema_info VALUES (1, now())")
    con.execute("INSERT INTO raw.feed_files VALUES (1, 'src', 'a.csv', 'x', DATE '2026-01-02', "
                "now(), 1, 1, 0, 'accepted', NULL)")
    con.execute("INSERT INTO raw.reports VALUES (1, 'src', 'Ash', 'cases', DATE '2026-01-01', "
                "DATE '2026-01-02', 3, 'daily', 2)")
    con.close()
    con = store.connect(db)
    assert con.execute("SELECT signal, frequency, source, path FROM core.signals").fetchall() == [
        ("cases", "daily", "src", "a.csv")]
    assert con.execute("SELECT record_id FROM raw.reports").fetchall() == [(None,)]
    con.close()
