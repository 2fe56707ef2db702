"""The report's reporting-delay alerts (pipeline/report_delay.py) on hand-made delay tables."""

from __future__ import annotations

import pandas as pd

from tallywave.pipeline import store
from tallywave.pipeline.report_delay import delay_alerts, delay_alerts_html


def _con():
    con = store.memory()
    store.insert_df(con, "out.delay_model", pd.DataFrame({
        "run_id": "r1", "region": ["Tamarov", "Sarilath", "Orv<ene>", "Dovum"],
        "signal": "cases", "delay_model": ["drifting", "drifting", "stationary", "stationary"],
        "mean_delay_days": [7.5, 3.2, 4.0, 4.1], "mean_delay_before_days": [4.0, 3.0, 4.0, 4.1],
        "lookback_days": 28, "tail_prob": 0.0, "q99_delay_days": 20.0,
        "backtest_gain": [9.0, 2.0, -1.0, -0.5], "backtest_miss90": [0.1, 0.0, 0.7, 0.2],
        "backtest_rows": [20, 20, 20, 20], "weekday_effect": True, "n_holidays": 1}))
    store.insert_df(con, "out.delay_signal", pd.DataFrame({
        "run_id": ["r1"], "signal": ["cases"], "n_regions": [4], "n_drifting": [2],
        "weekday_effect": [True], "weekday_test": [80.0], "holidays": ['["2031-05-01"]'],
        "tail_size": [1.5], "tail_mean_days": [20.0], "tail_prob": [0.12],
        "mean_delay_days": [5.0], "q99_delay_days": [61.0], "backtest_gain": [3.0]}))
    return con


def test_alerts_pick_drift_and_misses_only() -> None:
    got = delay_alerts(_con(), "r1")
    # Tamarov: drifting, +3.5 days; Orv<ene>: stationary but 70 % of the last days missed;
    # Sarilath drifts by only 0.2 days and Dovum is fine
    assert list(got["region"]) == ["Tamarov", "Orv<ene>"]
    assert list(got["kind"]) == ["lengthening", "missed"]
    assert delay_alerts(_con(), "other-run").empty


def test_fragment_lists_signal_structure_and_escapes() -> None:
    page, warn = delay_alerts_html(_con(), "r1")
    assert warn
    assert "delay lengthening" in page and "nowcast missed the last days" in page
    assert "Orv&lt;ene&gt;" in page and "Orv<ene>" not in page
    assert "no reporting on 2031-05-01" in page and "12% of reports come later" in page
    assert "99 % within 61 d" in page
    quiet, warn = delay_alerts_html(store.memory(), "r1")
    assert not warn and "no region shows" in quiet
