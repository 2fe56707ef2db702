"""Prefect orchestration: the daily flow publishes a run and a report; Dask gives the same numbers
as the local runner; the scheduled deployment builds without serving."""

from __future__ import annotations

import datetime as dt
import shutil
from pathlib import Path

import duckdb
import pytest

from tallywave.pipeline import store
from tallywave.pipeline.ingest import ingest_spec
from tallywave.pipeline.simulate import write_scenario

PNG = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def small_db(tmp_path_factory) -> tuple[Path, dt.date]:
    """A small invented scenario, ingested once; tests copy the database file."""
    root = tmp_path_factory.mktemp("flows")
    info = write_scenario(root / "feeds", n_regions=4, n_days=120, n_snapshots=40, window=35,
                          seed=7)
    db = root / "base.duckdb"
    con = store.connect(db)
    ingest_spec(con, root / "feeds" / "feeds.toml")
    con.close()
    return db, dt.date.fromisoformat(info["as_of_last"])


def _copy(db: Path, dest: Path) -> str:
    shutil.copy(db, dest)
    return str(dest)


def _settings_file(tmp_path: Path) -> str:
    p = tmp_path / "settings.toml"
    p.write_text("[defaults]\nforecast_draws = 150\nnowcast_draws = 150\nbatch_regions = 2\n")
    return str(p)


def test_daily_flow_publishes_run_and_report(prefect_server, small_db, tmp_path) -> None:
    from tallywave.flows.daily import daily

    base, last = small_db
    db = _copy(base, tmp_path / "t.duckdb")
    out = daily(as_of=last.isoformat(), db=db, settings=_settings_file(tmp_path),
                report=True, report_dir=str(tmp_path / "reports"))
    assert out["run_id"].startswith(last.isoformat())
    con = duckdb.connect(db, read_only=True)
    status = con.execute("SELECT status FROM out.runs WHERE run_id = ?",
                         [out["run_id"]]).fetchall()
    assert status == [("published",)]
    pairs = con.execute("SELECT DISTINCT region, signal FROM core.cleaned WHERE run_id = ?",
                        [out["run_id"]]).fetchall()
    models = {r[0] for r in con.execute("SELECT DISTINCT model FROM out.forecasts "
                                        "WHERE run_id = ?", [out["run_id"]]).fetchall()}
    con.close()
    assert len(pairs) == 4 * 3
    assert models == {"baseline", "renewal", "compartmental", "ensemble", "ensemble_weighted"}
    index = Path(out["report"])
    html = index.read_text(encoding="utf-8")
    pngs = sorted((index.parent / "figures").glob("*.png"))
    assert len(pngs) == len(pairs)  # one figure per region x signal
    for png in pngs:
        assert png.read_bytes()[:8] == PNG
        assert f'figures/{png.name}' in html


def test_dask_runner_matches_local(prefect_server, small_db, tmp_path) -> None:
    from tallywave.flows.daily import daily

    base, last = small_db
    settings = _settings_file(tmp_path)
    day = (last - dt.timedelta(days=3)).isoformat()
    results = {}
    for runner in ("local", "dask"):
        db = _copy(base, tmp_path / f"{runner}.duckdb")
        out = daily(as_of=day, db=db, settings=settings, runner=runner, report=False)
        con = duckdb.connect(db, read_only=True)
        results[runner] = con.execute(
            "SELECT model, region, signal, horizon_days, q_level, value FROM out.forecasts "
            "WHERE run_id = ? ORDER BY ALL", [out["run_id"]]).fetchall()
        results[runner + "_rt"] = con.execute(
            "SELECT region, signal, ref_date, q_level, value FROM out.rt WHERE run_id = ? "
            "ORDER BY ALL", [out["run_id"]]).fetchall()
        con.close()
    assert len(results["local"]) > 1000
    assert results["local"] == results["dask"]
    assert results["local_rt"] == results["dask_rt"]


def test_serve_builds_a_scheduled_deployment(tmp_path) -> None:
    from tallywave.flows.daily import build_deployment

    dep = build_deployment(cron="0 7 * * *", timezone="Europe/Paris", db=str(tmp_path / "x.db"),
                           specs=["feeds.toml"])
    assert dep.name == "tallywave-daily"
    sched = dep.schedules[0].schedule
    assert sched.cron == "0 7 * * *"
    assert sched.timezone == "Europe/Paris"
    assert dep.parameters["specs"] == ["feeds.toml"]


def test_unknown_runner_is_a_user_error() -> None:
    from tallywave.flows.runners import make_task_runner
    from tallywave.pipeline.errors import UserError

    with pytest.raises(UserError, match="--runner"):
        make_task_runner("gpu")
