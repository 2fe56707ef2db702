"""The scoring stage: cleaned truth beside the raw one, and a settle horizon per signal from its
published delay distribution (pipeline/scoring.py), on a hand-made warehouse."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest

from tallywave.pipeline import store
from tallywave.pipeline.scoring import score, scores_as_of
from tallywave.pipeline.settings import Settings

DAY0 = dt.date(2031, 4, 1)
LEVELS = [0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975]


def _warehouse() -> tuple:
    con = store.memory()
    days = [DAY0 + dt.timedelta(days=i) for i in range(60)]
    as_of = days[-1]
    obs = []
    for sig in ("cases", "deaths"):
        for d in days:
            obs.append(("Vellmar", sig, d, d, 10.0))
    # a later revision of one cases value, and the run's cleaning repaired another one
    obs.append(("Vellmar", "cases", days[5], days[40], 13.0))
    store.insert_df(con, "core.observations", pd.DataFrame(
        obs, columns=["region", "signal", "ref_date", "as_of", "value"]).assign(file_id=None))
    store.insert_df(con, "out.runs", pd.DataFrame({
        "run_id": ["r-old", "r-new"], "as_of": [days[20], days[50]],
        "started_at": pd.Timestamp("2031-06-01"), "finished_at": pd.Timestamp("2031-06-01"),
        "status": "published"}))
    store.insert_df(con, "core.cleaned", pd.DataFrame({
        "run_id": "r-new", "region": "Vellmar", "signal": "cases", "ref_date": days[:51],
        "value_reported": 10.0, "value_clean": [4.0 if i == 8 else 10.0 for i in range(51)]}))
    store.insert_df(con, "out.delay_signal", pd.DataFrame({
        "run_id": ["r-new", "r-new"], "signal": ["cases", "deaths"], "q99_delay_days": [9.0, 25.3]}))
    fc = []
    for sig in ("cases", "deaths"):
        for t in days[:50]:
            for lv, v in zip(LEVELS, np.linspace(6, 14, 9), strict=True):
                fc.append(("r-old", days[0], "baseline", "Vellmar", sig, t, 1, lv, v))
    store.insert_df(con, "out.forecasts", pd.DataFrame(fc, columns=[
        "run_id", "issued_on", "model", "region", "signal", "target_date", "horizon_days",
        "q_level", "value"]))
    return con, days, as_of


def test_truth_is_cleaned_with_raw_beside_and_settle_follows_the_delay() -> None:
    con, days, as_of = _warehouse()
    score(con, as_of, Settings())
    sc = con.execute("SELECT * FROM out.scores").df().set_index(["signal", "target_date"])
    # settle: cases the floor (14 > 9), deaths ceil(25.3) = 26 days
    cases = sc.loc["cases"]
    deaths = sc.loc["deaths"]
    assert pd.Timestamp(cases.index.max()).date() == as_of - dt.timedelta(days=14)
    assert pd.Timestamp(deaths.index.max()).date() == as_of - dt.timedelta(days=26)
    assert set(cases["settle_days"]) == {14} and set(deaths["settle_days"]) == {26}
    # truth: raw latest + the newest run's repair (value_clean - value_reported)
    repaired = cases.loc[pd.Timestamp(days[8])]
    assert repaired["truth_raw"] == 10.0 and repaired["truth"] == 4.0
    assert repaired["truth_run_id"] == "r-new"
    revised = cases.loc[pd.Timestamp(days[5])]  # revision after the run: raw moves truth
    assert revised["truth_raw"] == 13.0 and revised["truth"] == 13.0
    plain = deaths.iloc[0]
    assert plain["truth"] == plain["truth_raw"] == 10.0 and pd.isna(plain["truth_run_id"])
    assert sc["wis_log"].notna().all() and sc["cover_frac_90"].between(0, 1).all()
    # the same as what scores_as_of computes without writing
    again = scores_as_of(con, as_of, Settings())
    assert len(again) == len(sc)
    np.testing.assert_allclose(np.sort(again["wis"]), np.sort(sc["wis"]))


@pytest.mark.parametrize(("rule", "cap", "want"), [("fixed", 90, 14), ("delay", 20, 20)])
def test_settle_rule_fixed_and_cap(rule, cap, want) -> None:
    con, _, as_of = _warehouse()
    s = Settings()
    s.base["settle_rule"] = rule
    s.base["settle_max_days"] = cap
    score(con, as_of, s)
    got = con.execute("SELECT max(settle_days), max(target_date) FROM out.scores "
                      "WHERE signal = 'deaths'").fetchall()[0]
    assert got[0] == want and got[1] == as_of - dt.timedelta(days=want)
