"""Nowcast calibration on the simulator's reporting scenarios (figures for the README).

For every named scenario of :mod:`tallywave.models.outbreak` (stationary, delay lengthens,
delay shortens, weekend/holiday report-day closures, long-tailed delays) the same invented
epidemic is observed, its vintages are loaded into an in-memory warehouse (no files, no ingest:
``pipeline.simulate.observations_frame``), and the real nowcast stage runs on several as-of dates.
The published nowcast of the last 14 reference dates is compared with the eventual counts
(all reports, however late):

* ``cov90`` / ``cov50``: share of (region, signal, ref_date) cells inside the closed 90 % / 50 %
  interval (goal 0.80–0.97 for 90 %);
* ``log_bias``: median of log((nowcast median + 1) / (eventual count + 1)).

    python -m benchmarks.nowcast_coverage                 # README figures (40 regions, 8 dates)
    python -m benchmarks.nowcast_coverage --regions 12 --dates 3 --scenario long_tail
    python -m benchmarks.nowcast_coverage --timing 3000   # nowcast stage time at full size

Nothing here is asserted; ``tests/test_nowcast_scenarios.py`` runs a smaller version with bounds.
"""

from __future__ import annotations

import argparse
import datetime as dt
import time
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from tallywave.models.outbreak import SCENARIOS, reporting_scenario, simulate_outbreak
from tallywave.pipeline import store
from tallywave.pipeline.nowcast import nowcast
from tallywave.pipeline.settings import Settings
from tallywave.pipeline.simulate import observations_frame

START = dt.date(2026, 3, 2)  # a Monday: day 0 of every scenario
N_DAYS = 210  # a second wave is growing at the end (relaxation near day 120)
LAST_DAYS = 14  # the reference dates scored: the last two weeks of each nowcast


@dataclass
class Trial:
    """One scenario observed once: its warehouse (vintages loaded) and the eventual counts."""

    name: str
    con: Any
    truth: pd.DataFrame  # region, signal, ref_date, truth
    last_day: int


def build_trial(name: str, n_regions: int, seed: int = 20260302, first_as_of: int = 60
                ) -> Trial:
    """Simulate scenario ``name`` and load its vintages into an in-memory warehouse."""
    rep = reporting_scenario(name, N_DAYS, START.weekday())
    sc = simulate_outbreak(n_regions=n_regions, n_days=N_DAYS, n_snapshots=N_DAYS - first_as_of,
                           window=35, seed=seed, first_weekday=START.weekday(), reporting=rep)
    con = store.memory()
    obs = observations_frame(sc, START, first_as_of=first_as_of)
    obs["file_id"] = None
    store.insert_df(con, "core.observations", obs)
    days = np.datetime64(START, "D") + np.arange(N_DAYS)
    truth = pd.concat([pd.DataFrame({
        "region": np.repeat(np.asarray(sc.names, dtype=object), N_DAYS), "signal": sig,
        "ref_date": np.tile(days, len(sc.names)), "truth": tri.sum(axis=2).ravel().astype(float)})
        for sig, tri in sc.triangles.items()], ignore_index=True)
    return Trial(name, con, truth, N_DAYS - 1)


def as_of_days(trial: Trial, n_dates: int, step: int = 3) -> list[dt.date]:
    """As-of dates L, L-3, L-6, ... (every weekday appears within a week of dates)."""
    return [START + dt.timedelta(days=trial.last_day - step * k) for k in range(n_dates)]


def run_dates(trial: Trial, dates: list[dt.date], settings: Settings) -> pd.DataFrame:
    """Nowcast each date; return the last 14 reference dates' 5/25/50/75/95 % quantiles with the
    eventual counts, one row per (as_of, region, signal, ref_date)."""
    rows = []
    for as_of in dates:
        run_id = f"cov-{trial.name}-{as_of}"
        nowcast(trial.con, as_of, settings, run_id=run_id)
        long = trial.con.execute(
            """SELECT region, signal, ref_date, reported, q_level, value FROM out.nowcast
               WHERE run_id = ? AND ref_date > ?::DATE - ?
                 AND q_level IN (0.05, 0.25, 0.5, 0.75, 0.95)""",
            [run_id, as_of, LAST_DAYS]).df()
        q = long.pivot_table(index=["region", "signal", "ref_date", "reported"],
                             columns="q_level", values="value").reset_index()
        q.columns = [str(c) for c in q.columns]
        q["as_of"] = as_of
        rows.append(q)
    out = pd.concat(rows, ignore_index=True)
    out["ref_date"] = pd.to_datetime(out["ref_date"])
    truth = trial.truth.assign(ref_date=pd.to_datetime(trial.truth["ref_date"]))
    return out.merge(truth, on=["region", "signal", "ref_date"], how="left")


def summarise(df: pd.DataFrame) -> dict[str, float]:
    """Coverage of the closed 90 % and 50 % intervals and the median log bias of the median."""
    y = df["truth"].to_numpy()
    cov90 = float(((df["0.05"] <= y) & (y <= df["0.95"])).mean())
    cov50 = float(((df["0.25"] <= y) & (y <= df["0.75"])).mean())
    bias = float(np.median(np.log((df["0.5"].to_numpy() + 1.0) / (y + 1.0))))
    return {"cells": len(df), "cov90": cov90, "cov50": cov50, "log_bias": bias}


def coverage_table(scenarios: list[str], n_regions: int, n_dates: int,
                   settings: Settings | None = None) -> pd.DataFrame:
    """One row per scenario (and per scenario × signal) with the calibration figures."""
    settings = settings or Settings()
    out = []
    for name in scenarios:
        t0 = time.perf_counter()
        trial = build_trial(name, n_regions)
        df = run_dates(trial, as_of_days(trial, n_dates), settings)
        out.append({"scenario": name, "signal": "all", **summarise(df),
                    "seconds": time.perf_counter() - t0})
        for sig, g in df.groupby("signal"):
            out.append({"scenario": name, "signal": sig, **summarise(g), "seconds": np.nan})
        sunday = df[pd.to_datetime(df["as_of"]).dt.day_of_week == 6]
        for label, g in (("all", sunday), ("cases", sunday[sunday["signal"] == "cases"])):
            if len(g):
                out.append({"scenario": name, "signal": f"{label}, as of a Sunday",
                            **summarise(g), "seconds": np.nan})
    return pd.DataFrame(out)


def markdown(tab: pd.DataFrame) -> str:
    """A markdown table of the figures (3 decimals)."""
    cols = list(tab.columns)
    lines = ["| " + " | ".join(cols) + " |", "|" + "---|" * len(cols)]
    for row in tab.itertuples(index=False):
        lines.append("| " + " | ".join(f"{v:.3f}" if isinstance(v, float) else str(v)
                                       for v in row) + " |")
    return "\n".join(lines)


def timing(n_regions: int, seed: int = 7) -> dict[str, float]:
    """Wall and CPU time of the nowcast stage for ``n_regions`` regions × 3 signals (one as-of
    date; 70 days of vintages, so the tail history is what a feed of that age offers)."""
    trial = build_trial("default", n_regions, seed=seed, first_as_of=N_DAYS - 70)
    as_of = START + dt.timedelta(days=trial.last_day)
    t0, c0 = time.perf_counter(), time.process_time()
    nowcast(trial.con, as_of, Settings(), run_id="timing")
    return {"regions": n_regions, "nowcast_wall_s": round(time.perf_counter() - t0, 1),
            "nowcast_cpu_s": round(time.process_time() - c0, 1)}


def main(argv: list[str] | None = None) -> int:
    """Print the coverage table (markdown) or a timing."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--regions", type=int, default=40)
    ap.add_argument("--dates", type=int, default=8)
    ap.add_argument("--scenario", action="append", choices=list(SCENARIOS))
    ap.add_argument("--timing", type=int, metavar="N_REGIONS")
    ns = ap.parse_args(argv)
    if ns.timing:
        print(timing(ns.timing))
        return 0
    tab = coverage_table(ns.scenario or list(SCENARIOS), ns.regions, ns.dates)
    print(markdown(tab))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
