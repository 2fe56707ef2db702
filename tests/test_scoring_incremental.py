"""Incremental scoring: the daily stage keeps the scores whose forecast and truth did not change
and computes only the rest, and the table it leaves equals a full recomputation (the scores are
a pure function of the published forecasts and the data known on the scoring date) — after a
backfill, after a revised truth, after a superseding re-run and when scoring an earlier date."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest

from tallywave.pipeline import store
from tallywave.pipeline.run import execute_run
from tallywave.pipeline.scoring import score
from tallywave.pipeline.settings import load_settings

KEY = ["run_id", "issued_on", "model", "region", "signal", "target_date", "horizon_days"]


def _table(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    return con.execute("SELECT * EXCLUDE (scored_at) FROM out.scores").df() \
        .sort_values(KEY).reset_index(drop=True)


def _assert_same_as_full(con: duckdb.DuckDBPyConnection, as_of: dt.date | None,
                         settings) -> pd.DataFrame:
    """The table as left by the incremental stage equals a full recomputation (floating sums
    in DuckDB's parallel aggregation may differ in the last bits: 1e-12)."""
    kept = _table(con)
    score(con, as_of, settings, full=True)
    full = _table(con)
    assert len(kept) == len(full) > 0
    pd.testing.assert_frame_equal(kept, full, check_exact=False, rtol=1e-12, atol=1e-12)
    return full


@pytest.fixture(scope="module")
def backfilled(template: dict, tmp_path_factory: pytest.TempPathFactory):
    """Five daily runs at the end of the template's snapshots, each scoring after publishing."""
    import shutil

    db = Path(tmp_path_factory.mktemp("incremental")) / "t.duckdb"
    shutil.copy(template["db"], db)
    con = store.connect(db)
    settings = load_settings(template["settings"])
    days = [template["last"] - dt.timedelta(days=k) for k in (20, 10, 5, 1, 0)]
    summaries = [execute_run(con, d, settings) for d in days]
    yield con, settings, days, summaries
    con.close()


def test_daily_runs_score_only_what_is_new_and_match_a_full_recomputation(backfilled) -> None:
    con, settings, _, summaries = backfilled
    last = summaries[-1]["scoring"]
    # the last run of the backfill kept most earlier scores and computed only the new ones
    assert 0 < last["new_rows"] < last["rows"]
    print(f"[measured] last run: {last['new_rows']} of {last['rows']} scores computed")
    _assert_same_as_full(con, None, settings)
    # scoring again with nothing new computes nothing and changes nothing
    again = score(con, None, settings)
    assert again["new_rows"] == 0 and again["rows"] == last["rows"]


def test_revised_truth_and_earlier_dates_rescore_exactly(backfilled) -> None:
    con, settings, days, _ = backfilled
    latest = con.execute("SELECT max(as_of) FROM core.observations").fetchall()[0][0]
    before = _table(con)
    region, signal, target = con.execute(
        "SELECT region, signal, target_date FROM out.scores ORDER BY target_date, region "
        "LIMIT 1").fetchall()[0]
    old = float(con.execute("SELECT truth_raw FROM out.scores WHERE region = ? AND signal = ? "
                            "AND target_date = ? LIMIT 1", [region, signal, target]
                            ).fetchall()[0][0])
    con.execute("INSERT INTO core.observations VALUES (?, ?, ?, ?, ?, NULL)",
                [region, signal, target, latest, old + 25.0])
    try:
        res = score(con, None, settings)
        n_target = int(((before["region"] == region) & (before["signal"] == signal)
                        & (before["target_date"] == pd.Timestamp(target))).sum())
        assert res["new_rows"] == n_target > 0          # only that target's forecasts
        got = _assert_same_as_full(con, None, settings)
        hit = got[(got["region"] == region) & (got["signal"] == signal)
                  & (got["target_date"] == pd.Timestamp(target))]
        assert np.allclose(hit["truth_raw"], old + 25.0)
    finally:
        con.execute("DELETE FROM core.observations WHERE region = ? AND signal = ? AND "
                    "ref_date = ? AND as_of = ? AND file_id IS NULL",
                    [region, signal, target, latest])
    # an earlier scoring date: fewer settled targets, older truth — equal to a full recomputation
    earlier = days[-2] - dt.timedelta(days=3)
    score(con, earlier, settings)
    small = _assert_same_as_full(con, earlier, settings)
    assert len(small) < len(before)
    score(con, None, settings)
    pd.testing.assert_frame_equal(_table(con).drop(columns=["truth_as_of"]),
                                  before.drop(columns=["truth_as_of"]),
                                  check_exact=False, rtol=1e-12, atol=1e-12)


def test_a_superseding_rerun_replaces_its_date_scores(backfilled) -> None:
    con, settings, days, _ = backfilled
    old_run = con.execute("SELECT run_id FROM out.runs WHERE status = 'published' AND "
                          "as_of = ?", [days[0]]).fetchall()[0][0]
    n_old = con.execute("SELECT count(*) FROM out.scores WHERE run_id = ?", [old_run]
                        ).fetchall()[0][0]
    assert n_old > 0
    new_run = execute_run(con, days[0], settings, score_after=False)["run_id"]
    score(con, None, settings)
    assert con.execute("SELECT count(*) FROM out.scores WHERE run_id = ?", [old_run]
                       ).fetchall()[0][0] == 0
    assert con.execute("SELECT count(*) FROM out.scores WHERE run_id = ?", [new_run]
                       ).fetchall()[0][0] > 0
    _assert_same_as_full(con, None, settings)
