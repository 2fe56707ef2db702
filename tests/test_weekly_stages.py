"""Weekly signals in every modelling stage, against truth: 7-day series blocks, the artefact
repair in weeks, reporting triangles in weeks (as_of on any weekday), week-lag delays and
generation intervals (closed forms, Monte Carlo), R_t from weekly totals of a simulated daily
renewal epidemic with known R_t, and the nowcast of a weekly feed against its eventual counts.

Measured figures are printed with ``pytest -s`` (``[measured] ...``) and quoted in the README.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from benchmarks.weekly_rt import run as run_weekly_rt
from benchmarks.weekly_scenario import evaluate, week_date, write_weekly_feed
from tallywave.models.artefacts import ReportingRepair
from tallywave.models.deconvolution import delay_pmf, weekly_lags
from tallywave.models.renewal import (
    discretise_gamma_interval,
    reproduction_number_from_growth,
    weekly_r_factor,
)
from tallywave.pipeline import store
from tallywave.pipeline.clean import clean, repair_params
from tallywave.pipeline.frames import to_blocks, week_axis_bounds
from tallywave.pipeline.ingest import ingest_spec
from tallywave.pipeline.nowcast import build_triangles, nowcast
from tallywave.pipeline.settings import Settings
from tallywave.pipeline.transmission import transmission
from tallywave.pipeline.vintages import observation_blocks

D = dt.date
SUNDAY = np.datetime64("2026-01-04")  # a Sunday: Python's date(2026, 1, 4).weekday() == 6


def report(name: str, value: Any) -> None:
    """Print a measured number (shown with ``pytest -s``)."""
    print(f"[measured] {name}: {value}")


# ---------------------------------------------------------------------------------------------
# series blocks on a weekly axis
# ---------------------------------------------------------------------------------------------


def test_weekly_blocks_step_seven_and_end_inside_a_week() -> None:
    """A weekly signal's block has one column per week date; ``end`` inside a week stops at the
    week before it; a daily signal beside it is unchanged; mixed weekdays are refused."""
    assert D(2026, 1, 4).weekday() == 6
    weeks = SUNDAY + 7 * np.arange(4)
    df = pd.DataFrame({"region": "Ash", "signal": ["w"] * 3 + ["d"] * 2,
                       "ref_date": np.r_[weeks[[0, 1, 3]], SUNDAY + np.arange(2)],
                       "value": [1.0, 2.0, 4.0, 5.0, 6.0]})
    got = to_blocks(df, end=D(2026, 1, 30), steps={"w": 7})
    w = got["w"]
    assert w.step == 7 and list(w.dates) == list(weeks)  # 01-30 is a Friday: last week 01-25
    np.testing.assert_array_equal(w.values, [[1.0, 2.0, np.nan, 4.0]])
    assert got["d"].step == 1 and len(got["d"].dates) == 27
    lo, hi = week_axis_bounds(weeks, SUNDAY - 3, SUNDAY + 30, 7)
    assert (lo, hi) == (SUNDAY, SUNDAY + 28)
    with pytest.raises(ValueError, match="different weekdays"):
        week_axis_bounds(np.r_[weeks, SUNDAY + 1], SUNDAY, SUNDAY + 30, 7)


# ---------------------------------------------------------------------------------------------
# artefact repair in weeks
# ---------------------------------------------------------------------------------------------


def test_weekly_repair_spreads_a_missing_week_and_keeps_the_total() -> None:
    """Weekly NB totals around a smooth level; one week missing and its count in the next
    week's report: the catch-up is spread over both weeks (each near its true value), the
    total is kept, no weekday effect is estimated, and the audit trail speaks of weeks.  The
    refilled week is compared with the best split the sum allows (shares in proportion to the
    true expected counts)."""
    rng = np.random.default_rng(3)
    n, t_len = 30, 40
    level = 400 * np.exp(0.03 * np.arange(t_len))[None, :] * rng.uniform(0.5, 2, (n, 1))
    truth = rng.negative_binomial(50, 50 / (50 + level)).astype(float)
    y = truth.copy()
    gap = 25
    y[:, gap + 1] += y[:, gap]
    y[:, gap] = np.nan
    dates = SUNDAY + 7 * np.arange(t_len)
    params = repair_params(Settings().for_signal("cases"), 7)
    assert params["level_window"] == 5 and params["step"] == 7
    res = ReportingRepair(**params).fit(y, dates).result()
    np.testing.assert_allclose(res.clean.sum(axis=1), np.nansum(y, axis=1), rtol=1e-9)
    assert np.all(res.weekday_effect == 1.0)
    rel = np.abs(res.clean[:, gap] / truth[:, gap] - 1)
    # the best possible split: the catch-up shared in proportion to the true expected counts
    both = truth[:, gap] + truth[:, gap + 1]
    oracle = np.abs(both * level[:, gap] / (level[:, gap] + level[:, gap + 1])
                    / truth[:, gap] - 1)
    report("weekly repair: median relative error of the refilled week (best split)",
           f"{np.median(rel):.3f} ({np.median(oracle):.3f})")
    assert np.median(rel) < 1.2 * np.median(oracle) + 0.01
    acts = res.actions
    assert set(acts["action"]) == {"gap_spread", "catchup_source"}
    assert acts["detail"].str.contains("week").all()
    assert not acts["detail"].str.contains(r"\bdays?\b", regex=True).any()
    with pytest.raises(ValueError, match="7 days apart"):
        ReportingRepair(step=7).fit(y[:, :3], SUNDAY + np.arange(3))


def test_clean_stage_on_a_weekly_signal(tmp_path: Path) -> None:
    """The clean stage repairs a weekly feed on week dates and writes no weekday effects."""
    world = write_weekly_feed(tmp_path, n_regions=3, signals=("cases",), n_days=140,
                              first_week=16)
    con = store.memory()
    ingest_spec(con, world.spec)
    as_of = world.as_of[-1]
    clean(con, as_of, Settings(), run_id="r1")
    dates = pd.to_datetime(con.execute("SELECT DISTINCT ref_date FROM core.cleaned").df()
                           ["ref_date"])
    assert (dates.dt.day_of_week == 6).all() and dates.max().date() == as_of - dt.timedelta(days=2)
    assert con.execute("SELECT count(*) FROM core.weekday_effects").fetchall() == [(0,)]
    blocks = observation_blocks(con, as_of, end=as_of)
    assert blocks["cases"].step == 7


# ---------------------------------------------------------------------------------------------
# reporting triangles in weeks
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("offset", [0, 2, 5])
def test_weekly_triangle_is_anchored_on_the_as_of_weekday(offset: int) -> None:
    """Week W (a Sunday) is reported 4 on W+1, 7 on W+3, 9 on W+9, 10 on W+16.  With as_of =
    a Sunday + offset, delay k is what was known on W + offset + 7k: the cells are the
    increments of those values, and the newest week has delay 0 on as_of itself."""
    weeks = SUNDAY + 7 * np.arange(4)
    rows = []
    for w in weeks:
        for lag, v in ((1, 4.0), (3, 7.0), (9, 9.0), (16, 10.0)):
            rows.append(("Ash", "w", w, w + lag, v))
    vint = pd.DataFrame(rows, columns=["region", "signal", "ref_date", "as_of", "value"])
    as_of = (weeks[-1] + offset).astype(dt.date)
    vint = vint[vint["as_of"] <= np.datetime64(as_of)]
    tri = build_triangles(vint, as_of, 3, 4, {}, steps={"w": 7})["w"]
    assert tri.step == 7 and list(tri.dates) == list(weeks)
    known = {0: 0.0}  # value known at a report time, from the vintages above
    for k in range(4):
        t = offset + 7 * k
        known[k + 1] = max([v for lag, v in ((1, 4.0), (3, 7.0), (9, 9.0), (16, 10.0))
                            if lag <= t], default=0.0)
    want = np.diff([known[k + 1] for k in range(4)], prepend=0.0)
    row0 = tri.cells[0, 0]
    np.testing.assert_allclose(row0, want)
    # only what is observable on as_of: row t has delays 0 .. 3 - t
    assert np.isnan(tri.cells[0, 3, 1:]).all() and np.isfinite(tri.cells[0, 3, 0])
    assert tri.latest[0, 3] == known[1]


# ---------------------------------------------------------------------------------------------
# week lags of daily delays and intervals
# ---------------------------------------------------------------------------------------------


def test_weekly_lags_monte_carlo_and_mean() -> None:
    """The week lag of a daily delay with the first event uniform over its week: the pmf sums
    to 1, its mean is exactly the daily mean / 7 (floor((a + s) / 7) averages to s / 7 over a),
    and it matches a Monte Carlo of (uniform day, daily delay) within sampling error."""
    f = delay_pmf({"mean": 7.0, "sd": 2.8})
    w = weekly_lags(f)
    assert w.sum() == pytest.approx(1.0, abs=1e-12)
    assert (w * np.arange(w.size)).sum() == pytest.approx((f * np.arange(f.size)).sum() / 7,
                                                          abs=1e-12)
    rng = np.random.default_rng(1)
    a = rng.integers(0, 7, 200_000)
    s = rng.choice(f.size, 200_000, p=f)
    mc = np.bincount((a + s) // 7, minlength=w.size)[: w.size] / a.size
    np.testing.assert_allclose(mc, w, atol=0.004)
    gi = discretise_gamma_interval(5.2, 2.4)
    assert weekly_lags(gi)[0] == pytest.approx(0.313, abs=0.002)  # transmission within a week


def test_weekly_r_factor_is_exact_under_exponential_growth() -> None:
    """Under growth at daily rate r the week-lag renewal gives R_w = 1 / sum_j W_j e^{-7rj};
    the factor takes it to the daily interval's R (Wallinga & Lipsitch 2007); 1 at R = 1."""
    gi = discretise_gamma_interval(5.2, 2.4)
    big_w = weekly_lags(gi)
    for r in (-0.1, -0.03, 0.0, 0.05, 0.12):
        r_week = 1.0 / np.sum(big_w * np.exp(-7 * r * np.arange(big_w.size)))
        r_day = float(reproduction_number_from_growth(r, gi))
        assert r_week * weekly_r_factor(r_week, gi) == pytest.approx(r_day, rel=1e-4)
    assert weekly_r_factor(1.0, gi) == pytest.approx(1.0, abs=1e-9)


# ---------------------------------------------------------------------------------------------
# R_t from weekly totals of a daily renewal epidemic with known R_t
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("name", ["drop", "fast growth then control", "long delay (18 d)"])
def test_weekly_rt_covers_the_true_reproduction_number(name: str) -> None:
    """benchmarks/weekly_rt (30 regions): 90 % intervals cover the week's true R_t, the median
    is close, and the growth correction leaves no bias; on the fast-growth scenario the
    uncorrected week-lag renewal is biased towards 1 by about 3 %."""
    got = run_weekly_rt(name, 30)
    report(f"weekly R_t, {name}: coverage / median abs error / median relative error",
           f"{got['coverage']:.3f} / {got['mae']:.3f} / {got['bias']:+.3f}")
    assert got["n"] >= 0.9 * 30 * 21
    assert 0.85 <= got["coverage"] <= 0.995
    assert got["mae"] <= 0.05
    assert abs(got["bias"]) <= 0.012
    if name == "fast growth then control":
        raw = run_weekly_rt(name, 30, correction=False)
        report("weekly R_t, fast growth: median relative error without the correction",
               f"{raw['bias']:+.3f}")
        assert raw["bias"] < -0.02 and abs(got["bias"]) < abs(raw["bias"]) / 3


# ---------------------------------------------------------------------------------------------
# the stages on a weekly feed against its truth
# ---------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def weekly_world(tmp_path_factory: pytest.TempPathFactory) -> tuple[Any, Any]:
    """A weekly feed of 12 invented regions (cases, admissions) ingested once."""
    world = write_weekly_feed(tmp_path_factory.mktemp("weekly"), n_regions=12,
                              scenario="long_tail")
    con = store.memory()
    ingest_spec(con, world.spec)
    return world, con


def test_weekly_nowcast_and_rt_against_truth(weekly_world: tuple[Any, Any]) -> None:
    """clean → nowcast → R_t on four as-of dates, one a Friday (no snapshot that day: the
    report grid is anchored on Friday): the nowcast's 90 % intervals of the last three weeks
    cover the eventual counts of a long-tailed delay (over 20 % of reports after 4 weeks), its
    median removes the under-count, delays are published in multiples of 7 days, and R_t sits
    on the Sundays of the infection weeks, covering the truth."""
    world, con = weekly_world
    dates = [world.as_of[-7], world.as_of[-5], world.as_of[-3] + dt.timedelta(days=3),
             world.as_of[-1]]
    assert dates[2].weekday() == 4
    runs = {}
    for d in dates:
        rid = f"wk-{d}"
        for stage in (clean, nowcast, transmission):
            stage(con, d, Settings(), run_id=rid)
        runs[d] = rid
    got = evaluate(con, world, runs)
    report("weekly nowcast (long tail), 90% / 50% coverage, log bias (reported)",
           f"{got['nowcast_cov90']:.3f} / {got['nowcast_cov50']:.3f}, "
           f"{got['nowcast_log_bias']:+.3f} ({got['reported_log_bias']:+.3f})")
    report("weekly R_t from cases, 90% coverage / median abs error",
           f"{got['rt_cov90']:.3f} / {got['rt_mae']:.3f}")
    assert got["nowcast_cells"] == 4 * 12 * 2 * 3
    assert 0.80 <= got["nowcast_cov90"] <= 0.99
    assert got["reported_log_bias"] < -0.2 and abs(got["nowcast_log_bias"]) < 0.06
    assert got["rt_cells"] > 4 * 12 * 10 and 0.8 <= got["rt_cov90"] <= 0.99
    assert got["rt_mae"] < 0.1
    fri = runs[dates[2]]
    pmf = con.execute("SELECT DISTINCT delay_days FROM out.delay_pmf WHERE run_id = ? "
                      "ORDER BY 1", [fri]).fetchall()
    assert [r[0] for r in pmf] == [0, 7, 14, 21, 28]
    last = con.execute("SELECT max(ref_date) FROM out.nowcast WHERE run_id = ?",
                       [fri]).fetchall()[0][0]
    assert last == dates[2] - dt.timedelta(days=5) == week_date((last - week_date(0)).days // 7)
    rt_days = con.execute("SELECT DISTINCT dayofweek(ref_date), date_basis FROM out.rt "
                          "WHERE run_id = ?", [fri]).fetchall()
    assert rt_days == [(0, "infection")]
