"""The forecast stage end to end on a small simulated province: results independent of batching,
scenario projections published apart and labelled, weights and scenarios in the report,
settings refused with one line."""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from benchmarks.forecast_eval import START, load_world, simulate
from tallywave.pipeline import store
from tallywave.pipeline.errors import UserError
from tallywave.pipeline.forecast import forecast
from tallywave.pipeline.report import write_report
from tallywave.pipeline.run import execute_run
from tallywave.pipeline.scoring import score
from tallywave.pipeline.settings import Settings, load_settings

DAYS = (143, 150)  # as-of days (the second warm-starts from the first)
SCENARIOS = [{"name": "fall-20", "change": 0.8, "after_days": 3},
             {"name": "one-region-up", "change": 1.3, "start": "2026-08-01"}]


@pytest.fixture(scope="module")
def world():
    sim = simulate("default", 5, 8)
    con = store.memory()
    load_world(con, sim)
    settings = Settings()
    settings.base.update({"forecast_draws": 100, "nowcast_draws": 100,
                          "scenarios": [*SCENARIOS[:1],
                                        {**SCENARIOS[1], "regions": [sim["names"][0]]}]})
    runs = [execute_run(con, START + dt.timedelta(days=d), settings,
                        score_after=False)["run_id"] for d in DAYS]
    yield con, settings, runs, sim
    con.close()


_TABLES = {
    "forecasts": "SELECT model, region, signal, target_date, q_level, value FROM out.forecasts "
                 "WHERE run_id = ? ORDER BY ALL",
    "fits": "SELECT model, region, signal, params_json, objective, converged FROM out.fits "
            "WHERE run_id = ? AND model IN ('renewal', 'compartmental') ORDER BY ALL",
    "scenarios": "SELECT scenario, region, signal, target_date, q_level, value "
                 "FROM out.scenarios WHERE run_id = ? ORDER BY ALL",
    "weights": "SELECT signal, horizon_from, model, weight FROM out.ensemble_weights "
               "WHERE run_id = ? ORDER BY ALL",
}


def _rerun(con, settings: Settings, run_id: str, as_of: dt.date, batch: int
           ) -> dict[str, pd.DataFrame]:
    """The forecast stage of a published run again with another batch size (rolled back)."""
    s = Settings(base={**settings.base, "batch_regions": batch})
    con.execute("BEGIN TRANSACTION")
    try:
        for t in ("out.forecasts", "out.scenarios", "out.ensemble_weights"):
            con.execute(f"DELETE FROM {t} WHERE run_id = ?", [run_id])
        con.execute("DELETE FROM out.fits WHERE run_id = ? AND model IN "
                    "('renewal', 'compartmental')", [run_id])
        forecast(con, as_of, s, run_id=run_id)
        return {k: con.execute(q, [run_id]).df() for k, q in _TABLES.items()}
    finally:
        con.execute("ROLLBACK")


def test_results_do_not_depend_on_batch_size(world) -> None:
    con, settings, runs, _ = world
    as_of = START + dt.timedelta(days=DAYS[1])
    outs = {b: _rerun(con, settings, runs[1], as_of, b) for b in (1, 7, 250)}
    for name in _TABLES:
        ref = outs[250][name]
        assert len(ref) > 0, name
        for b in (1, 7):
            got = outs[b][name]
            assert list(got.columns) == list(ref.columns) and len(got) == len(ref), (name, b)
            for col in ref.columns:
                if col == "params_json":  # JSON numbers: compare after parsing
                    for a, c in zip(got[col], ref[col], strict=True):
                        _same_json(json.loads(a), json.loads(c))
                elif pd.api.types.is_float_dtype(ref[col]):
                    np.testing.assert_allclose(got[col], ref[col], rtol=1e-9, atol=1e-9,
                                               err_msg=f"{name}.{col}, batch {b}")
                else:
                    assert got[col].fillna("").astype(str).equals(
                        ref[col].fillna("").astype(str)), (name, col, b)


def _same_json(a: object, b: object) -> None:
    """Two parsed JSON values equal, numbers to 1e-9."""
    if isinstance(a, dict) and isinstance(b, dict):
        assert a.keys() == b.keys()
        for k in a:
            _same_json(a[k], b[k])
    elif isinstance(a, list) and isinstance(b, list):
        assert len(a) == len(b)
        for x, y in zip(a, b, strict=True):
            _same_json(x, y)
    elif isinstance(a, float) or isinstance(b, float):
        assert a == pytest.approx(b, rel=1e-9, abs=1e-9)
    else:
        assert a == b


def test_scenarios_published_apart_and_labelled(world) -> None:
    con, _, runs, sim = world
    run_id = runs[1]
    as_of = START + dt.timedelta(days=DAYS[1])
    sc = con.execute("SELECT * FROM out.scenarios WHERE run_id = ?", [run_id]).df()
    assert set(sc["scenario"]) == {"fall-20", "one-region-up"}
    assert sc["description"].str.contains("scenario").all()
    assert set(sc.loc[sc["scenario"] == "one-region-up", "region"]) == {sim["names"][0]}
    assert not con.execute("SELECT count(*) FROM out.forecasts WHERE model LIKE '%fall%'"
                           ).fetchall()[0][0]
    fc = con.execute("SELECT region, signal, horizon_days, q_level, value FROM out.forecasts "
                     "WHERE run_id = ? AND model = 'compartmental'", [run_id]).df()
    fall = sc[sc["scenario"] == "fall-20"].merge(
        fc, on=["region", "signal", "horizon_days", "q_level"], suffixes=("", "_fc"))
    # same draws as the forecast: identical before the change starts (after_days = 3: the
    # change applies from as_of + 3, and cases are counted from infection on the same day)
    early = fall[fall["horizon_days"] <= 2]
    np.testing.assert_allclose(early["value"], early["value_fc"], rtol=1e-12)
    assert (early["transmission_change"] == 1.0).all()
    late = fall[(fall["horizon_days"] == 28) & (fall["q_level"] == 0.5)
                & (fall["signal"] == "cases") & (fall["value_fc"] > 20)]
    assert len(late) and (late["value"] < late["value_fc"]).all()
    assert (fall.loc[fall["horizon_days"] >= 3, "transmission_change"] == 0.8).all()
    # scenarios are never scored: scoring reads forecasts only
    score(con, as_of + dt.timedelta(days=60), Settings())
    scored = {r[0] for r in con.execute("SELECT DISTINCT model FROM out.scores").fetchall()}
    assert scored <= {"baseline", "renewal", "compartmental", "ensemble", "ensemble_weighted"}
    # the renewal projection says what noise it used and where its R_t came from
    fits = con.execute("SELECT params_json FROM out.fits WHERE run_id = ? AND model = 'renewal'",
                       [run_id]).df()
    p = json.loads(fits["params_json"].iloc[0])
    assert {"r_source", "dispersion", "log_r_drift_sd", "depletion_capacity"} <= set(p)
    assert 0 < p["log_r_drift_sd"] <= Settings().base["drift_sd"]


def test_report_shows_weights_and_scenarios(world, tmp_path: Path) -> None:
    con = world[0]
    index = write_report(con, out_dir=tmp_path, max_regions=2)
    page = index.read_text(encoding="utf-8")
    assert "Weighted ensemble" in page and "ensemble_weighted" in page
    assert "fall-20" in page and "not forecasts" in page
    assert "equal weights" in page  # no settled scores yet in this short history
    assert len(list((index.parent / "figures").glob("*.png"))) >= 2


@pytest.mark.parametrize("text, fragment", [
    ('scenarios = [{name = "a", change = -1, after_days = 1}]', "change must be a number > 0"),
    ('scenarios = [{name = "a", change = 0.8}]', "exactly one of start"),
    ('scenarios = [{name = "a", change = 0.8, start = "next monday"}]', "is not a date"),
    ('scenarios = [{name = "a", change = 0.8, after_days = 1, region = ["x"]}]',
     "unknown key 'region'"),
    (('scenarios = [{name = "a", change = 0.8, after_days = 1}, '
      '{name = "a", change = 0.9, after_days = 2}]'), "different for each scenario"),
    ("compartmental_fractions = {cases = 1.5}", "compartmental_fractions.cases"),
    ("compartmental_delays = {hospital = [3, 1]}", "not one of cases"),
    ("immune_fraction = 1.5", "immune_fraction must be a share"),
    ('ode_method = "euler2"', "ode_method"),
])
def test_forecast_settings_refused_in_one_line(tmp_path: Path, text: str, fragment: str) -> None:
    p = tmp_path / "s.toml"
    p.write_text(f"[defaults]\n{text}\n")
    with pytest.raises(UserError) as err:
        load_settings(p)
    msg = str(err.value)
    assert fragment in msg and "\n" not in msg and str(p) in msg


def test_forecast_settings_accepted_and_stored_as_json(tmp_path: Path) -> None:
    p = tmp_path / "s.toml"
    p.write_text('[defaults]\nscenarios = [{name = "fall", change = 0.8, start = 2026-08-03, '
                 'regions = ["Orvane"]}]\ncompartmental_fractions = {deaths = 0.004}\n'
                 'immune_fraction_regions = {Orvane = 0.2}\n')
    s = load_settings(p)
    assert s.get("scenarios") == [{"name": "fall", "change": 0.8, "start": "2026-08-03",
                                   "regions": ["Orvane"]}]
    assert s.get("compartmental_fractions") == {"cases": 0.3, "admissions": 0.02,
                                                "deaths": 0.004}
    assert '"2026-08-03"' in s.to_json()  # dates from TOML become text: the run stores JSON
