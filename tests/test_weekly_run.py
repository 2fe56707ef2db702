"""A weekly feed end to end: ``execute_run`` publishes nowcasts, R_t and 1-4-week forecasts on
week dates, scores them by week, and the report draws them; daily signals beside a weekly one
are unchanged; the CLI (``tallywave ingest`` + ``run`` + ``report``) on a weekly feed.

The feeds are invented outbreaks (``benchmarks/weekly_scenario.py``: the simulator's daily
epidemic, published as weekly totals every Tuesday) with known truth: eventual weekly counts and
the R_t of each infection week.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pandas as pd
import pytest

from benchmarks.weekly_scenario import evaluate, write_weekly_feed
from tallywave.pipeline import store
from tallywave.pipeline.forecast import WEEKLY_MESSAGE
from tallywave.pipeline.ingest import ingest_spec
from tallywave.pipeline.run import execute_run
from tallywave.pipeline.settings import Settings
from tallywave.pipeline.simulate import write_scenario

# 20 regions: with 10 the renewal-to-baseline WIS ratio at 4 weeks was 0.96 with one half-life
# and 1.06 with the half-life mixture, one sample's noise against a 1.0 bound (20 regions:
# 0.76 and 0.83; benchmarks/weekly_scenario pools 72 regions)
N_REGIONS = 20


def report(name: str, value: Any) -> None:
    """Print a measured number (shown with ``pytest -s``)."""
    print(f"[measured] {name}: {value}")


@pytest.fixture(scope="module")
def weekly_runs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """A weekly feed (cases, admissions) run on four Tuesdays two weeks apart, each scored."""
    world = write_weekly_feed(tmp_path_factory.mktemp("weekly_run"), n_regions=N_REGIONS)
    con = store.memory()
    ingest_spec(con, world.spec)
    dates = world.as_of[:-4][::-2][:4][::-1]  # the last four weeks ahead stay inside the truth
    runs = {d: execute_run(con, d, Settings())["run_id"] for d in dates}
    return {"world": world, "con": con, "runs": runs, "dates": dates}


def test_weekly_run_publishes_every_stage_on_week_dates(weekly_runs: dict[str, Any]) -> None:
    """Every run is published; forecasts are 1-4 weeks ahead (horizon_days 7-28) on the Sundays
    after the last week; the compartmental model says per region why it has no forecast."""
    con, runs = weekly_runs["con"], weekly_runs["runs"]
    assert con.execute("SELECT DISTINCT status FROM out.runs").fetchall() == [("published",)]
    last = max(runs)
    rid = runs[last]
    fc = con.execute("SELECT DISTINCT model, signal, horizon_days, target_date FROM "
                     "out.forecasts WHERE run_id = ?", [rid]).df()
    assert set(fc["model"]) == {"baseline", "renewal", "ensemble", "ensemble_weighted"}
    assert sorted(set(fc["horizon_days"])) == [7, 14, 21, 28]
    sunday = last - dt.timedelta(days=2)  # snapshots come out on the Tuesday after a week
    want = {h: sunday + dt.timedelta(days=h) for h in (7, 14, 21, 28)}
    got = {int(h): pd.Timestamp(t).date() for h, t in zip(fc["horizon_days"], fc["target_date"],
                                                         strict=True)}
    assert got == want
    fits = con.execute("SELECT signal, message, count(*) FROM out.fits WHERE run_id = ? AND "
                       "model = 'compartmental' GROUP BY ALL ORDER BY 1", [rid]).fetchall()
    assert fits == [("admissions", WEEKLY_MESSAGE, N_REGIONS), ("cases", WEEKLY_MESSAGE,
                                                                 N_REGIONS)]
    assert con.execute("SELECT count(*) FROM core.weekday_effects").fetchall() == [(0,)]


def test_weekly_run_against_truth(weekly_runs: dict[str, Any]) -> None:
    """Nowcast, R_t and forecasts against the simulated truth: nowcast 90 % intervals cover the
    eventual weekly counts, R_t covers the week's true R_t, the renewal forecast beats the
    baseline at 2-4 weeks and covers the truth at 1-2 weeks."""
    w, con, runs = weekly_runs["world"], weekly_runs["con"], weekly_runs["runs"]
    got = evaluate(con, w, runs)
    report("weekly run: nowcast 90% coverage, R_t 90% coverage / median abs error",
           f"{got['nowcast_cov90']:.3f}, {got['rt_cov90']:.3f} / {got['rt_mae']:.3f}")
    rel = [got[f"fc_renewal_h{h}_wis"] / got[f"fc_baseline_h{h}_wis"] for h in (7, 14, 21, 28)]
    report("weekly run: renewal WIS / baseline WIS at 1-4 weeks",
           " ".join(f"{x:.2f}" for x in rel))
    report("weekly run: renewal 90% coverage at 1-4 weeks",
           " ".join(f"{got[f'fc_renewal_h{h}_cov90']:.2f}" for h in (7, 14, 21, 28)))
    assert 0.80 <= got["nowcast_cov90"] <= 1.0
    assert 0.80 <= got["rt_cov90"] <= 1.0 and got["rt_mae"] < 0.12
    assert max(rel[1:]) < 1.0
    assert min(got["fc_renewal_h7_cov90"], got["fc_renewal_h14_cov90"]) >= 0.75


def test_weekly_scores_by_week(weekly_runs: dict[str, Any]) -> None:
    """Matured weekly forecasts are scored on week dates with a settle horizon of whole weeks;
    the accuracy view has one row per model x signal x weekly horizon."""
    con = weekly_runs["con"]
    sc = con.execute("SELECT DISTINCT dayofweek(target_date) AS dow, settle_days, horizon_days "
                     "FROM out.scores").df()
    assert len(sc) and set(sc["dow"]) == {0} and set(sc["settle_days"] % 7) == {0}
    assert set(sc["horizon_days"]) <= {7, 14, 21, 28}
    acc = con.execute("SELECT model, signal, horizon_days, n, rel_wis FROM out.accuracy").df()
    assert set(acc["horizon_days"]) <= {7, 14, 21, 28}
    base = acc[acc["model"] == "baseline"]
    assert len(base) and np.allclose(base["rel_wis"], 1.0)


def test_daily_signals_are_unchanged_beside_a_weekly_one(tmp_path: Path) -> None:
    """The daily demo feed alone, and with a weekly feed of another signal from the same
    outbreak: the daily signals' published rows are identical; the weekly signal, run on a
    Friday (no weekly snapshot that day), is nowcast up to the Sunday before."""
    write_scenario(tmp_path / "daily", n_regions=4, n_days=126, n_snapshots=40, window=35,
                   seed=7)
    world = write_weekly_feed(tmp_path / "weekly", n_regions=4, n_days=126, seed=7,
                              signals=("deaths",), rename={"deaths": "deaths_weekly"},
                              regions_file=False)
    friday = dt.date(2026, 3, 2) + dt.timedelta(days=123)
    assert friday.weekday() == 4
    out = {}
    for with_weekly in (False, True):
        con = store.memory()
        ingest_spec(con, tmp_path / "daily" / "feeds.toml")
        if with_weekly:
            ingest_spec(con, world.spec)
        rid = execute_run(con, friday, Settings(), score_after=False)["run_id"]
        out[with_weekly] = {t: con.execute(
            f"SELECT * EXCLUDE (run_id) FROM {t} WHERE run_id = ? AND signal <> 'deaths_weekly'"
            " ORDER BY ALL", [rid]).df() for t in ("out.nowcast", "out.rt", "out.forecasts")}
        if with_weekly:
            wk = con.execute("SELECT max(ref_date), min(dayofweek(ref_date)), "
                             "max(dayofweek(ref_date)) FROM out.nowcast WHERE run_id = ? AND "
                             "signal = 'deaths_weekly'", [rid]).fetchall()[0]
            assert wk == (friday - dt.timedelta(days=5), 0, 0)
            hz = con.execute("SELECT DISTINCT horizon_days FROM out.forecasts WHERE run_id = ? "
                             "AND signal = 'deaths_weekly' ORDER BY 1", [rid]).fetchall()
            assert [h[0] for h in hz] == [7, 14, 21, 28]
    for table, df in out[False].items():
        assert len(df) > 0
        pd.testing.assert_frame_equal(df, out[True][table], check_exact=True, obj=table)


@pytest.mark.slow
def test_cli_ingest_run_report_on_a_weekly_feed(prefect_server: Any, tmp_path: Path) -> None:
    """``tallywave ingest`` + ``tallywave run`` (through the Prefect flow) + ``tallywave report``
    on a weekly feed: published, forecasts by week, a figure per region x signal."""
    from tallywave.pipeline.cli import main

    world = write_weekly_feed(tmp_path / "feeds", n_regions=3, n_days=140)
    db = str(tmp_path / "weekly.duckdb")
    settings = tmp_path / "settings.toml"
    settings.write_text("[defaults]\nforecast_draws = 150\nnowcast_draws = 150\n")
    as_of = world.as_of[-1].isoformat()
    assert main(["--db", db, "ingest", str(world.spec)]) == 0
    assert main(["--db", db, "run", "--as-of", as_of, "--settings", str(settings),
                 "--no-report"]) == 0
    out = tmp_path / "reports"
    assert main(["--db", db, "report", "--as-of", as_of, "--out", str(out)]) == 0
    con = duckdb.connect(db, read_only=True)
    try:
        assert con.execute("SELECT status FROM out.runs").fetchall() == [("published",)]
        hz = con.execute("SELECT DISTINCT horizon_days FROM out.forecasts ORDER BY 1").fetchall()
        assert [h[0] for h in hz] == [7, 14, 21, 28]
    finally:
        con.close()
    pngs = list(out.glob("*/figures/*.png"))
    assert len(pngs) == 3 * 2


def test_weekly_results_do_not_depend_on_batching(tmp_path: Path) -> None:
    """batch_regions = 1 and 250 publish the same weekly nowcasts, R_t and forecasts (1e-9):
    everything pooled over regions is computed before the batches."""
    world = write_weekly_feed(tmp_path, n_regions=4, n_days=140)
    got = []
    for size in (1, 250):
        con = store.memory()
        ingest_spec(con, world.spec)
        s = Settings()
        s.base["batch_regions"] = size
        rid = execute_run(con, world.as_of[-1], s, score_after=False)["run_id"]
        got.append({t: con.execute(f"SELECT * EXCLUDE (run_id) FROM {t} WHERE run_id = ? "
                                   "ORDER BY ALL", [rid]).df()
                    for t in ("out.nowcast", "out.rt", "out.forecasts")})
    for table, df in got[0].items():
        assert len(df) > 0
        pd.testing.assert_frame_equal(df, got[1][table], rtol=1e-9, obj=table)
