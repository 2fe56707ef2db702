"""Prefect orchestration: the daily flow publishes a run and a report; every runner and batch size
gives the same numbers; the scheduled deployment builds without serving."""

from __future__ import annotations

import datetime as dt
import shutil
from pathlib import Path

import duckdb
import pytest

PNG = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def small_db(template) -> tuple[Path, dt.date]:
    """The session's small ingested scenario (conftest ``template``); tests copy the file."""
    return template["db"], template["last"]


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


_OUTPUTS = {
    "forecasts": "SELECT model, region, signal, horizon_days, q_level, value FROM out.forecasts",
    "rt": "SELECT region, signal, ref_date, q_level, value FROM out.rt",
    "growth": "SELECT region, signal, ref_date, growth_rate, p_growing FROM out.growth",
    "nowcast": "SELECT region, signal, ref_date, q_level, value FROM out.nowcast",
    "delay_pmf": "SELECT region, signal, delay_days, prob FROM out.delay_pmf",
    "cleaned": "SELECT region, signal, ref_date, value_clean FROM core.cleaned",
    "weights": "SELECT signal, horizon_from, model, weight FROM out.ensemble_weights",
}


def _outputs(db: str, run_id: str) -> dict[str, list[tuple]]:
    con = duckdb.connect(db, read_only=True)
    try:
        return {k: con.execute(f"{q} WHERE run_id = ? ORDER BY ALL", [run_id]).fetchall()
                for k, q in _OUTPUTS.items()}
    finally:
        con.close()


def _same(a: list[tuple], b: list[tuple], what: str) -> None:
    assert len(a) == len(b), what
    for x, y in zip(a, b, strict=True):
        for u, v in zip(x, y, strict=True):
            if isinstance(u, float) and isinstance(v, float):
                assert u == pytest.approx(v, rel=1e-9, abs=1e-9, nan_ok=True), (what, x, y)
            else:
                assert u == v, (what, x, y)


@pytest.mark.slow
def test_runners_and_batch_sizes_give_identical_outputs(prefect_server, small_db,
                                                         tmp_path) -> None:
    """A parallelism knob never changes a published number: serial with one batch, threads with
    batches of 1, processes with batches of 7 (here: one batch per 4 regions → one) and Dask
    with batches of 2 publish the same outputs to 1e-9 (one random stream per region)."""
    from tallywave.flows.daily import daily
    from tallywave.pipeline import store
    from tallywave.pipeline.run import execute_run
    from tallywave.pipeline.settings import load_settings

    base, last = small_db
    day = last - dt.timedelta(days=3)
    results = {}
    for runner, batch in (("serial", 250), ("threads", 1), ("processes", 7), ("dask", 2)):
        db = _copy(base, tmp_path / f"{runner}.duckdb")
        p = tmp_path / f"{runner}.toml"
        p.write_text("[defaults]\nforecast_draws = 150\nnowcast_draws = 150\n"
                     f"batch_regions = {batch}\n")
        if runner == "serial":
            con = store.connect(db)
            run_id = execute_run(con, day, load_settings(p), score_after=False)["run_id"]
            con.close()
        else:
            run_id = daily(as_of=day.isoformat(), db=db, settings=str(p), runner=runner,
                           report=False)["run_id"]
        results[runner] = _outputs(db, run_id)
    ref = results["serial"]
    assert len(ref["forecasts"]) > 1000 and len(ref["rt"]) > 100 and len(ref["nowcast"]) > 100
    for runner in ("threads", "processes", "dask"):
        for table in _OUTPUTS:
            _same(ref[table], results[runner][table], f"{runner}: {table}")


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
