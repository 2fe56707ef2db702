"""Tests for models.scores (and its SQL in pipeline.scores_sql / pipeline.accuracy): closed
forms, reference libraries, hand arithmetic, SQL = numpy, counts."""

from __future__ import annotations

import duckdb
import numpy as np
import pandas as pd
import properscoring
import pytest
from scipy import stats

from tallywave.models.scores import (
    FORECAST_KEY,
    bias_from_quantiles,
    central_intervals,
    coverage_fraction,
    interval_coverage,
    log_wis,
    pairwise_relative_wis,
    pit_bounds,
    pit_from_quantiles,
    pit_histogram,
    quantile_score,
    randomised_pit,
    weighted_interval_score,
)
from tallywave.pipeline import store
from tallywave.pipeline.scores_sql import pit_uniform_sql, score_sql

LEVELS_9 = np.array([0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975])
# 23 levels: 0.01, 0.025, 0.05, 0.10, ..., 0.95, 0.975, 0.99 (common practice in forecast hubs)
LEVELS_23 = np.array(
    [0.01, 0.025, *np.round(np.arange(0.05, 0.951, 0.05), 10), 0.975, 0.99]
)


def normal_quantiles(mu: np.ndarray, sigma: np.ndarray, levels: np.ndarray) -> np.ndarray:
    """(n, k) quantiles of N(mu, sigma^2)."""
    return mu[:, None] + sigma[:, None] * stats.norm.ppf(levels)[None, :]


def random_symmetric_levels(rng: np.random.Generator, k_pairs: int) -> np.ndarray:
    """Median plus k_pairs random symmetric pairs, shuffled."""
    low = np.sort(rng.uniform(0.005, 0.495, size=k_pairs))
    lev = np.concatenate([low, [0.5], 1.0 - low])
    return rng.permutation(lev)


# ---------------------------------------------------------------------------------------------
# hand-computed example
# ---------------------------------------------------------------------------------------------


def test_hand_computed_example():
    # Levels 0.1, 0.25, 0.5, 0.75, 0.9; quantiles 1, 2, 4, 6, 8; K = 2 intervals:
    #   alpha = 0.5 -> [2, 6], alpha = 0.2 -> [1, 8]; weights w0 = 1/2, w1 = 0.25, w2 = 0.1;
    #   normaliser K + 1/2 = 2.5.
    # y = 3: median term 0.5*|3-4| = 0.5 (m > y: overprediction);
    #   IS_0.5 = 6-2 = 4 -> 0.25*4 = 1.0;  IS_0.2 = 8-1 = 7 -> 0.1*7 = 0.7  (both dispersion)
    #   WIS = (0.5 + 1.0 + 0.7)/2.5 = 0.88; dispersion 1.7/2.5 = 0.68; over 0.5/2.5 = 0.2.
    #   Pinball: 0.1*2 + 0.25*1 + 0.5*1 + 0.25*3 + 0.1*5 = 0.2+0.25+0.5+0.75+0.5 = 2.2;
    #   2 * mean = 2 * 2.2/5 = 0.88.
    #   PIT: 3 lies halfway between q(0.25)=2 and q(0.5)=4 -> 0.25 + 0.25*0.5 = 0.375;
    #   bias = 1 - 2*0.375 = 0.25.
    # y = 10: median term 0.5*6 = 3 (under); IS_0.5 = 4 + (2/0.5)*(10-6) = 20 -> 0.25*20 = 5
    #   (1 dispersion + 4 under); IS_0.2 = 7 + (2/0.2)*(10-8) = 27 -> 0.1*27 = 2.7
    #   (0.7 dispersion + 2 under).  WIS = (3+5+2.7)/2.5 = 4.28; dispersion 0.68;
    #   under (3+4+2)/2.5 = 3.6.  PIT range beyond q(0.9) = [0.9, 1]; bias = -1 (flat tails).
    levels = [0.1, 0.25, 0.5, 0.75, 0.9]
    q = np.array([[1.0, 2.0, 4.0, 6.0, 8.0], [1.0, 2.0, 4.0, 6.0, 8.0]])
    y = np.array([3.0, 10.0])
    parts = weighted_interval_score(y, levels, q)
    np.testing.assert_allclose(parts.wis, [0.88, 4.28], rtol=1e-12)
    np.testing.assert_allclose(parts.dispersion, [0.68, 0.68], rtol=1e-12)
    np.testing.assert_allclose(parts.overprediction, [0.2, 0.0], atol=1e-12)
    np.testing.assert_allclose(parts.underprediction, [0.0, 3.6], rtol=1e-12)
    np.testing.assert_allclose(quantile_score(y, levels, q)[0], [0.2, 0.25, 0.5, 0.75, 0.5])
    np.testing.assert_array_equal(interval_coverage(y, levels, q, 0.5), [True, False])
    np.testing.assert_array_equal(interval_coverage(y, levels, q, 0.8), [True, False])
    np.testing.assert_allclose(pit_from_quantiles(y, levels, q), [0.375, 0.95])
    low, high = pit_bounds(y, levels, q)
    np.testing.assert_allclose(low, [0.375, 0.9])
    np.testing.assert_allclose(high, [0.375, 1.0])
    np.testing.assert_allclose(bias_from_quantiles(y, levels, q), [0.25, -1.0])
    with pytest.raises(ValueError, match="0.05"):
        interval_coverage(y, levels, q, 0.9)


# ---------------------------------------------------------------------------------------------
# WIS
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("k_pairs", [1, 4, 11, 30])
def test_wis_is_twice_mean_pinball_loss(k_pairs):
    # Bracher, Ray, Gneiting & Reich (2021, PLoS Comput Biol): WIS equals the mean of the
    # 2K + 1 quantile scores QS = 2 * pinball, i.e. 2 * mean pinball loss.
    rng = np.random.default_rng(100 + k_pairs)
    n = 500
    levels = random_symmetric_levels(rng, k_pairs)
    q = rng.normal(50, 20, size=(n, levels.size))  # unsorted on purpose: crossing allowed
    q[: n // 2] = np.sort(q[: n // 2], axis=1)[:, np.argsort(np.argsort(levels))]
    y = rng.normal(50, 30, size=n)
    parts = weighted_interval_score(y, levels, q)
    pin = quantile_score(y, levels, q)
    np.testing.assert_allclose(parts.wis, 2 * pin.mean(axis=1), rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(
        parts.dispersion + parts.overprediction + parts.underprediction, parts.wis, rtol=1e-12
    )
    assert (parts.dispersion[: n // 2] >= 0).all()
    assert (parts.overprediction >= 0).all() and (parts.underprediction >= 0).all()


def test_pinball_against_direct_formula():
    # Koenker & Bassett (1978, Econometrica) check loss rho_tau(u) = u (tau - 1{u < 0}),
    # u = y - q; from memory.
    rng = np.random.default_rng(7)
    y = rng.normal(size=200)
    lev = np.array([0.1, 0.5, 0.9])
    q = rng.normal(size=(200, 3))
    u = y[:, None] - q
    np.testing.assert_allclose(quantile_score(y, lev, q), u * (lev - (u < 0)), atol=1e-15)


@pytest.mark.parametrize(("k", "tol"), [(99, 0.015), (199, 0.008)])
def test_wis_approaches_normal_crps(k, tol):
    # Closed-form CRPS of N(mu, s^2) (Gneiting & Raftery 2007, JASA):
    #   s * [z (2 Phi(z) - 1) + 2 phi(z) - 1/sqrt(pi)], z = (y - mu)/s.
    # WIS over levels i/(k+1) approximates CRPS (Bracher et al. 2021); measured gap ~1/(k+1).
    rng = np.random.default_rng(k)
    levels = np.arange(1, k + 1) / (k + 1)
    n = 300
    mu, sd = rng.normal(10, 5, n), rng.uniform(0.5, 4, n)
    y = mu + sd * rng.uniform(-4, 4, n)
    wis = weighted_interval_score(y, levels, normal_quantiles(mu, sd, levels)).wis
    z = (y - mu) / sd
    crps = sd * (z * (2 * stats.norm.cdf(z) - 1) + 2 * stats.norm.pdf(z) - 1 / np.sqrt(np.pi))
    assert np.max(np.abs(wis / crps - 1)) < tol
    # properscoring (reference library, PyPI) on the same inputs
    ref = properscoring.crps_gaussian(y, mu, sd)
    np.testing.assert_allclose(ref, crps, rtol=1e-10)
    assert np.max(np.abs(wis / ref - 1)) < tol


@pytest.mark.parametrize(
    ("levels", "bad"),
    [
        ([0.1, 0.5, 0.8], "0.1"),
        ([0.05, 0.5, 0.95, 0.3], "0.3"),
        ([0.25, 0.75], "0.5"),
        ([0.25, 0.5, 0.75, 0.25], "0.25"),
        ([0.0, 0.5, 1.0], "0.0"),
        ([0.5, 0.9, 1.1], "1.1"),
    ],
)
def test_level_validation_names_offending_level(levels, bad):
    with pytest.raises(ValueError, match=bad.replace(".", r"\.")):
        central_intervals(levels)
    with pytest.raises(ValueError):
        weighted_interval_score([1.0], levels, [np.arange(len(levels), dtype=float)])


def test_level_pairing_tolerates_rounding():
    ci = central_intervals([0.975, 0.5, 0.025, 1 - 0.9, 0.9])
    assert ci.median == 1
    np.testing.assert_allclose(sorted(ci.alpha), [0.05, 0.2])


# ---------------------------------------------------------------------------------------------
# calibration: coverage, PIT, bias
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("levels", "n", "seed"), [(LEVELS_9, 3000, 11), (LEVELS_23, 5000, 12)])
def test_calibrated_normal_forecasts(levels, n, seed):
    # Observations drawn from the predictive itself: central 50%/90% coverage within +-3
    # points, PIT ~ U(0,1) (Dawid 1984, J R Stat Soc A, PIT uniform under calibration; from
    # memory) checked with scipy.stats.kstest.
    rng = np.random.default_rng(seed)
    mu, sd = rng.normal(100, 30, n), rng.uniform(1, 20, n)
    y = rng.normal(mu, sd)
    q = normal_quantiles(mu, sd, levels)
    cov50 = interval_coverage(y, levels, q, 0.5).mean()
    cov90 = interval_coverage(y, levels, q, 0.9).mean()
    assert abs(cov50 - 0.5) < 0.03, cov50
    assert abs(cov90 - 0.9) < 0.03, cov90
    pit = pit_from_quantiles(y, levels, q, rng=np.random.default_rng(seed + 1))
    assert stats.kstest(pit, "uniform").pvalue > 0.01
    # mean bias near 0 for calibrated symmetric predictives (our property of the definition)
    assert abs(bias_from_quantiles(y, levels, q).mean()) < 0.05


def test_calibrated_skewed_forecasts_pit():
    # Gamma predictives (skewed); observations from the predictive -> PIT ~ U(0,1) (kstest).
    rng = np.random.default_rng(21)
    n = 4000
    shape, scale = rng.uniform(1, 10, n), rng.uniform(1, 50, n)
    y = rng.gamma(shape, scale)
    q = stats.gamma.ppf(LEVELS_23[None, :], shape[:, None], scale=scale[:, None])
    pit = pit_from_quantiles(y, LEVELS_23, q, rng=22)
    assert stats.kstest(pit, "uniform").pvalue > 0.01
    assert abs(interval_coverage(y, LEVELS_23, q, 0.9).mean() - 0.9) < 0.03


def test_pit_constant_predictive_is_randomised_uniformly():
    # Randomised PIT on ties (Czado, Gneiting & Held 2009, Biometrics; from memory):
    # y equal to a constant predictive -> PIT ~ U(0, 1).
    n = 3000
    q = np.full((n, LEVELS_9.size), 5.0)
    y = np.full(n, 5.0)
    low, high = pit_bounds(y, LEVELS_9, q)
    assert (low == 0).all() and (high == 1).all()
    pit = pit_from_quantiles(y, LEVELS_9, q, rng=np.random.default_rng(3))
    assert stats.kstest(pit, "uniform").pvalue > 0.01
    np.testing.assert_array_equal(pit, pit_from_quantiles(y, LEVELS_9, q, rng=3))  # seeded
    np.testing.assert_allclose(pit_from_quantiles(y, LEVELS_9, q), 0.5)  # mid-PIT
    np.testing.assert_allclose(bias_from_quantiles(y, LEVELS_9, q), 0.0)


def test_pit_ties_and_tails():
    lev = [0.1, 0.25, 0.5, 0.75, 0.9]
    q = np.array([[1.0, 2.0, 2.0, 2.0, 8.0]] * 5)
    y = np.array([2.0, 0.0, 9.0, 1.0, 5.0])
    low, high = pit_bounds(y, lev, q)
    # y = 2 ties levels 0.25..0.75; y = 0 below all -> [0, 0.1]; y = 9 above -> [0.9, 1];
    # y = 1 equals the lowest quantile -> [0, 0.1]; y = 5 halfway 2..8 -> 0.75 + 0.15*0.5.
    np.testing.assert_allclose(low, [0.25, 0.0, 0.9, 0.0, 0.825])
    np.testing.assert_allclose(high, [0.75, 0.1, 1.0, 0.1, 0.825])
    flo, fhi = pit_bounds(y, lev, q, tails="flat")
    np.testing.assert_allclose(flo, [0.25, 0.0, 1.0, 0.0, 0.825])
    np.testing.assert_allclose(fhi, [0.75, 0.0, 1.0, 0.1, 0.825])
    np.testing.assert_allclose(bias_from_quantiles(y, lev, q), [0.0, 1.0, -1.0, 0.9, -0.65])
    pit = pit_from_quantiles(y, lev, q, u=np.array([0.2, 0.5, 1.0, 0.0, 0.3]))
    np.testing.assert_allclose(pit, [0.35, 0.05, 1.0, 0.0, 0.825])


def test_pit_rearranges_crossing_quantiles():
    rng = np.random.default_rng(5)
    q = np.sort(rng.normal(size=(100, 9)), axis=1)
    crossed = q[:, rng.permutation(9)]
    y = rng.normal(size=100)
    np.testing.assert_allclose(
        pit_from_quantiles(y, LEVELS_9, crossed), pit_from_quantiles(y, LEVELS_9, q)
    )


# ---------------------------------------------------------------------------------------------
# pairwise relative WIS
# ---------------------------------------------------------------------------------------------


def _score_frame(rng: np.random.Generator, models: dict[str, float], n_regions=4, n_dates=6):
    """Long frame of invented WIS values: model -> multiplicative skill factor."""
    rows = []
    for r in range(n_regions):
        for d in range(n_dates):
            for h in (7, 14):
                base = rng.gamma(2.0, 10.0)
                for m, f in models.items():
                    rows.append({
                        "model": m, "region": f"Vellmar-{r}", "signal": "cases",
                        "issued_on": pd.Timestamp("2031-03-01") + pd.Timedelta(days=7 * d),
                        "horizon_days": h, "wis": base * f,
                    })
    df = pd.DataFrame(rows)
    df["target_date"] = df["issued_on"] + pd.to_timedelta(df["horizon_days"], unit="D")
    return df


def test_relative_wis_baseline_one_and_half():
    # Cramer et al. (2022, PNAS): relative WIS = geometric-mean pairwise ratio / baseline's.
    rng = np.random.default_rng(1)
    df = _score_frame(rng, {"baseline": 1.0, "halfway": 0.5})
    other = df[df.model == "baseline"].copy()
    other["model"] = "wobbly"
    other["wis"] = other["wis"] * rng.uniform(0.3, 3.0, len(other))
    df = pd.concat([df, other], ignore_index=True)
    res = pairwise_relative_wis(df, baseline="baseline", by=["signal", "horizon_days"])
    assert len(res) == 6
    assert (res.loc[res.model == "baseline", "rel_wis"] == 1.0).all()
    np.testing.assert_allclose(res.loc[res.model == "halfway", "rel_wis"], 0.5, rtol=1e-12)


def test_relative_wis_uses_common_forecasts_only():
    # baseline WIS 1, 1, 10, 10 on four forecasts; "sparse" made only the first two, WIS 0.5.
    # Common forecasts: theta(sparse, baseline) = 0.5/1 = 0.5 -> rel = sqrt(0.5*1)/sqrt(2*1)
    # = 0.5.  (Naive means over all forecasts would give 0.5/5.5.)
    base = pd.DataFrame({
        "model": "baseline", "region": ["Ostmark", "Ostmark", "Lindau-Nord", "Lindau-Nord"],
        "signal": "cases", "issued_on": pd.Timestamp("2031-01-05"),
        "target_date": [pd.Timestamp("2031-01-12"), pd.Timestamp("2031-01-19")] * 2,
        "horizon_days": 7, "wis": [1.0, 1.0, 10.0, 10.0],
    })
    sparse = base.iloc[:2].assign(model="sparse", wis=0.5)
    res = pairwise_relative_wis(pd.concat([base, sparse]), by=["signal"])
    got = res.set_index("model")
    assert got.loc["baseline", "rel_wis"] == 1.0
    assert got.loc["sparse", "rel_wis"] == pytest.approx(0.5, rel=1e-12)
    assert got.loc["sparse", "n_forecasts"] == 2
    assert got.loc["baseline", "mean_wis"] == pytest.approx(5.5)


def test_relative_wis_matches_direct_pairwise_loop():
    # Reference: straightforward pair-by-pair merge, mean ratio, geometric mean (Cramer 2022).
    rng = np.random.default_rng(9)
    df = _score_frame(rng, {"baseline": 1.0, "a": 0.8, "b": 1.3, "c": 0.6})
    df["wis"] *= rng.uniform(0.5, 1.5, len(df))
    df = df[rng.uniform(size=len(df)) > 0.3]  # knock out 30% of forecasts
    by = ["horizon_days"]
    res = pairwise_relative_wis(df, by=by)
    key = ["region", "signal", "issued_on", "target_date", "horizon_days"]
    for h, g in df.groupby("horizon_days"):
        models = sorted(g.model.unique())
        theta = {}
        for i in models:
            logs = []
            for j in models:
                mm = g[g.model == i].merge(g[g.model == j], on=key)
                if len(mm):
                    logs.append(np.log(mm.wis_x.mean() / mm.wis_y.mean()))
            theta[i] = np.exp(np.mean(logs))
        for m in models:
            got = res[(res.horizon_days == h) & (res.model == m)]["rel_wis"].item()
            assert got == pytest.approx(theta[m] / theta["baseline"], rel=1e-10)


def test_relative_wis_rejects_duplicates():
    df = _score_frame(np.random.default_rng(2), {"baseline": 1.0})
    with pytest.raises(ValueError, match="more than one WIS"):
        pairwise_relative_wis(pd.concat([df, df.iloc[:1]]))


# ---------------------------------------------------------------------------------------------
# SQL
# ---------------------------------------------------------------------------------------------


def _sql_case(seed: int = 0):
    """Random long forecast table + truth table with ties, tails, crossings, 3 level sets."""
    rng = np.random.default_rng(seed)
    level_sets = {"nine": LEVELS_9, "hub": LEVELS_23, "three": np.array([0.1, 0.5, 0.9])}
    regions = [f"Korvath-{i}" for i in range(6)]
    dates = pd.date_range("2032-05-01", periods=40, freq="D")
    truth = pd.DataFrame(
        [(r, "cases", d, float(rng.poisson(30))) for r in regions for d in dates],
        columns=["region", "signal", "target_date", "truth"],
    )
    truth["truth_as_of"] = truth["target_date"] + pd.Timedelta(days=14)
    long, wide = [], []
    for model, lev in level_sets.items():
        for issued in dates[:20:3]:
            for h in (1, 5, 9, 13):
                for r in regions:
                    target = issued + pd.Timedelta(days=h)
                    y = truth.loc[(truth.region == r) & (truth.target_date == target), "truth"]
                    y = y.item()
                    mu, sd = y + rng.normal(0, 8), rng.uniform(0.5, 10)
                    v = np.round(mu + sd * stats.norm.ppf(lev), int(rng.integers(0, 3)))
                    kind = rng.integers(0, 6)
                    if kind == 0:
                        v[rng.integers(lev.size)] = y  # tie with one level
                    elif kind == 1:
                        v[:] = y  # constant predictive tied with y
                    elif kind == 2:
                        v = rng.permutation(v)  # crossing quantiles
                    elif kind == 3:
                        v = v + (100.0 if rng.uniform() < 0.5 else -100.0)  # y in a tail
                    wide.append((issued, model, r, "cases", target, h, y, lev, v))
                    long += [
                        (issued, model, r, "cases", target, h, t, x)
                        for t, x in zip(lev, v, strict=True)
                    ]
    fc = pd.DataFrame(long, columns=[*FORECAST_KEY, "q_level", "value"])
    return fc, truth, wide


def _load(con, fc: pd.DataFrame, truth: pd.DataFrame) -> None:
    con.register("fc_df", fc)
    con.register("truth_df", truth)
    con.execute(
        "CREATE TABLE fc AS SELECT CAST(issued_on AS DATE) AS issued_on, model, region, signal,"
        " CAST(target_date AS DATE) AS target_date, horizon_days, q_level, value FROM fc_df"
    )
    con.execute(
        "CREATE TABLE truth AS SELECT region, signal, CAST(target_date AS DATE) AS target_date,"
        " truth, CAST(truth_as_of AS DATE) AS truth_as_of FROM truth_df"
    )


@pytest.mark.parametrize("counts", [False, True])
def test_sql_matches_numpy(counts):
    fc, truth, wide = _sql_case(0)
    con = duckdb.connect()
    _load(con, fc, truth)
    sql = score_sql("fc", "truth", extra_truth_columns=["truth_as_of"], counts=counts)
    got = con.execute(sql + " ORDER BY " + ", ".join(FORECAST_KEY)).df()
    u = con.execute(
        f"SELECT DISTINCT {', '.join(FORECAST_KEY)}, {pit_uniform_sql(0)} AS u FROM fc"
        " ORDER BY " + ", ".join(FORECAST_KEY)
    ).df()["u"].to_numpy()
    assert len(got) == len(wide) == len(u)
    assert got["levels_ok"].all()
    assert ((u >= 0) & (u <= 1)).all() and 0.3 < u.mean() < 0.7
    order = sorted(range(len(wide)), key=lambda i: (wide[i][0], wide[i][1], wide[i][2],
                                                    wide[i][3], wide[i][4], wide[i][5]))
    checked = 0
    for lev_name in ("nine", "hub", "three"):
        idx = [i for i in order if wide[i][1] == lev_name]
        rows = np.array([order.index(i) for i in idx])
        lev = wide[idx[0]][7]
        y = np.array([wide[i][6] for i in idx])
        q = np.array([wide[i][8] for i in idx])
        g = got.iloc[rows]
        np.testing.assert_allclose(g["truth"], y)
        parts = weighted_interval_score(y, lev, q)
        for name in ("wis", "dispersion", "overprediction", "underprediction"):
            np.testing.assert_allclose(g[name], getattr(parts, name), rtol=1e-9, atol=1e-9)
        # the SQL computes WIS as 2 * mean pinball; numpy from intervals (Bracher et al. 2021)
        np.testing.assert_allclose(
            g["wis"], 2 * quantile_score(y, lev, q).mean(axis=1), rtol=1e-9, atol=1e-9
        )
        np.testing.assert_allclose(g["wis_log"], log_wis(y, lev, q), rtol=1e-9, atol=1e-9)
        med = q[:, np.argmin(np.abs(lev - 0.5))]
        np.testing.assert_allclose(g["abs_error"], np.abs(med - y), atol=1e-9)
        low, high = pit_bounds(y, lev, q, discrete=counts)
        np.testing.assert_allclose(g["pit_low"], low, atol=1e-9)
        np.testing.assert_allclose(g["pit_high"], high, atol=1e-9)
        np.testing.assert_allclose(
            g["pit"], pit_from_quantiles(y, lev, q, u=u[rows], discrete=counts), atol=1e-9
        )
        np.testing.assert_allclose(g["bias"], bias_from_quantiles(y, lev, q, discrete=counts),
                                   atol=1e-9)
        for w, col in ((0.5, "cover_frac_50"), (0.9, "cover_frac_90")):
            np.testing.assert_allclose(g[col], coverage_fraction(low, high, w), atol=1e-9)
        if lev_name != "three":
            for w, col in ((0.5, "covered_50"), (0.9, "covered_90")):
                np.testing.assert_array_equal(
                    g[col].astype(bool), interval_coverage(y, lev, q, w)
                )
        else:  # no 0.25/0.75/0.05/0.95 levels -> NULL coverage
            assert g["covered_50"].isna().all() and g["covered_90"].isna().all()
        checked += len(idx)
    assert checked == len(wide)
    assert (got["truth_as_of"] == got["target_date"] + pd.Timedelta(days=14)).all()
    # ties and tails really occurred in the random cases
    assert (got["pit_high"] - got["pit_low"] > 0.5).sum() > 10
    assert (got["bias"].abs() == 1).sum() > 10


def test_sql_mid_pit_and_level_check():
    fc, truth, _ = _sql_case(1)
    con = duckdb.connect()
    # break one forecast's symmetry (0.9 -> 0.8) and duplicate another forecast's rows
    first = fc[fc.model == "three"].iloc[:3].copy()
    fc = fc[~fc.index.isin(first.index)]
    first["q_level"] = [0.1, 0.5, 0.8]
    first["model"] = "broken"
    dup = fc[fc.model == "nine"].iloc[:9]
    _load(con, pd.concat([fc, first, dup], ignore_index=True), truth)
    got = con.execute(score_sql("fc", "truth", randomise_pit=False)).df()
    assert not got.loc[got.model == "broken", "levels_ok"].any()
    assert (~got["levels_ok"]).sum() == 2  # the broken one and the duplicated one
    ok = got[got.levels_ok]
    np.testing.assert_allclose(ok["pit"], (ok["pit_low"] + ok["pit_high"]) / 2, atol=1e-12)


def test_sql_rejects_bad_identifiers():
    with pytest.raises(ValueError, match="forecast table"):
        score_sql("fc; DROP TABLE truth", "truth")
    with pytest.raises(ValueError, match="truth column"):
        score_sql("out.forecasts", "truth", extra_truth_columns=["x y"])


# ---------------------------------------------------------------------------------------------
# counts: randomised PIT, tie-corrected coverage, log-scale WIS
# ---------------------------------------------------------------------------------------------


def _poisson_support(lam: float) -> tuple[np.ndarray, np.ndarray]:
    y = np.arange(0, int(stats.poisson.ppf(1 - 1e-12, lam)) + 2, dtype=float)
    return y, stats.poisson.pmf(y, lam)


@pytest.mark.parametrize("lam", [0.7, 2.0, 12.0])
def test_randomised_pit_of_a_perfect_poisson_forecast_is_uniform(lam):
    # Czado, Gneiting & Held (2009, Biometrics): for a discrete predictive F equal to the law
    # of y, F(y - 1) + U (F(y) - F(y - 1)) is exactly U(0, 1) (from memory); reference CDF
    # scipy.stats.poisson.  Checked by scipy.stats.kstest on draws, and in closed form: the
    # non-randomised PIT histogram (its expectation) is flat to 1e-12.
    rng = np.random.default_rng(int(lam * 10))
    y = rng.poisson(lam, 20000)
    pit = randomised_pit(stats.poisson.cdf(y - 1, lam), stats.poisson.cdf(y, lam),
                         rng.uniform(size=y.size))
    assert stats.kstest(pit, "uniform").pvalue > 0.01
    ys, pmf = _poisson_support(lam)
    lo, hi = stats.poisson.cdf(ys - 1, lam), stats.poisson.cdf(ys, lam)
    bins = np.array([pit_histogram(lo[i:i + 1], hi[i:i + 1]) for i in range(ys.size)])
    np.testing.assert_allclose(pmf @ bins, 0.1, atol=1e-12)
    # tie-corrected coverage of the exact PIT range is nominal (same closed form)
    for w in (0.5, 0.9):
        assert pmf @ coverage_fraction(lo, hi, w) == pytest.approx(w, abs=1e-12)


@pytest.mark.parametrize(("lam", "levels", "tol"),
                         [(2.0, LEVELS_23, 0.02), (12.0, LEVELS_23, 0.025),
                          (60.0, LEVELS_23, 0.02), (2.0, LEVELS_9, 0.06)])
def test_count_pit_and_coverage_from_quantiles_of_a_perfect_poisson_forecast(lam, levels, tol):
    # A perfect Poisson(lam) forecast published as quantiles (scipy.stats.poisson.ppf), truth
    # from the same law; expectations summed exactly over the support (no sampling).
    ys, pmf = _poisson_support(lam)
    q = np.broadcast_to(stats.poisson.ppf(levels, lam), (ys.size, levels.size))
    lo, hi = pit_bounds(ys, levels, q, discrete=True)
    bins = np.array([pit_histogram(lo[i:i + 1], hi[i:i + 1]) for i in range(ys.size)])
    deciles = pmf @ bins
    assert np.abs(deciles - 0.1).max() < tol * 1.5, deciles
    for w in (0.5, 0.9):
        assert pmf @ coverage_fraction(lo, hi, w) == pytest.approx(w, abs=tol)
    if lam == 2.0:
        # the closed intervals over-cover: P(q25 <= Y <= q75) = 0.72, P(q05 <= Y <= q95) =
        # 0.98 for Poisson(2) (issue figures, recomputed here with scipy.stats.poisson)
        i = {round(v, 3): j for j, v in enumerate(levels)}
        closed50 = pmf @ ((q[:, i[0.25]] <= ys) & (ys <= q[:, i[0.75]]))
        closed90 = pmf @ ((q[:, i[0.05]] <= ys) & (ys <= q[:, i[0.95]]))
        assert closed50 == pytest.approx(0.722, abs=0.002)
        assert closed90 == pytest.approx(0.983, abs=0.002)
        # and the continuous PIT (no count treatment) is much further from flat
        clo, chi = pit_bounds(ys, levels, q)
        old = pmf @ np.array([pit_histogram(clo[i:i + 1], chi[i:i + 1])
                              for i in range(ys.size)])
        assert np.abs(old - 0.1).max() > 2.5 * np.abs(deciles - 0.1).max()


def test_count_pit_small_cases_by_hand():
    # levels 0.25/0.5/0.75 with quantiles 1, 2, 4: H interpolates (q, tau) linearly and reaches
    # 0 at -1/2 (counts >= 0).
    lev = [0.25, 0.5, 0.75]
    q = np.array([[1.0, 2.0, 4.0]] * 4)
    y = np.array([0.0, 2.0, 3.0, 7.0])
    low, high = pit_bounds(y, lev, q, discrete=True)
    # y = 0: [H(-0.5), H(0.5)] = [0, 0.25 * 1/1.5]; y = 2: [H(1.5), H(2.5)] = [0.375, 0.5625];
    # y = 3: [H(2.5), H(3.5)] = [0.5625, 0.6875]; y = 7: beyond q(0.75): [0.75, 1]
    np.testing.assert_allclose(low, [0.0, 0.375, 0.5625, 0.75])
    np.testing.assert_allclose(high, [0.25 / 1.5, 0.5625, 0.6875, 1.0])
    # 50% interval [0.25, 0.75]: y = 0 outside, y = 2 and 3 inside, y = 7 outside
    np.testing.assert_allclose(coverage_fraction(low, high, 0.5), [0.0, 1.0, 1.0, 0.0])
    # a non-integer truth is scored as continuous
    lo2, hi2 = pit_bounds(np.array([2.5]), lev, q[:1], discrete=True)
    np.testing.assert_allclose([lo2[0], hi2[0]], [0.5625, 0.5625])
    # PIT range straddling a bound: [0.2, 0.4] against [0.25, 0.75] -> 3/4 inside
    assert coverage_fraction(np.array([0.2]), np.array([0.4]), 0.5)[0] == pytest.approx(0.75)


def test_log_scale_wis_by_hand_and_scale_free():
    # Bosse et al. (2023): WIS of log(y + 1) against log(q + 1).  Hand: levels 0.25/0.5/0.75,
    # quantiles e-1, e^2-1, e^3-1 -> log-scale 1, 2, 3; y = e^4 - 1 -> 4 (above all).  Pinball
    # tau (y - q): 0.25*3 + 0.5*2 + 0.75*1 = 2.5, WIS = 2 * 2.5 / 3 = 5/3.
    e = np.e
    got = log_wis([e**4 - 1], [0.25, 0.5, 0.75], [[e - 1, e**2 - 1, e**3 - 1]])
    assert got[0] == pytest.approx(5.0 / 3.0, rel=1e-12)
    # relative errors: a forecast 10x too high scores the same at every size (nearly: + 1)
    big = log_wis([1e6], LEVELS_9, 1e7 * np.ones((1, 9)))[0]
    huge = log_wis([1e8], LEVELS_9, 1e9 * np.ones((1, 9)))[0]
    assert big == pytest.approx(huge, rel=1e-5) and big == pytest.approx(np.log(10), rel=1e-5)
    # negatives count as 0
    assert log_wis([-3.0], LEVELS_9, np.zeros((1, 9)))[0] == 0.0


def test_relative_wis_view_equals_python():
    # One relative-WIS definition: the out.accuracy views (SQL) and pairwise_relative_wis
    # (numpy) on the same scores, natural and log scale, incl. a model with zero WIS somewhere
    # and models missing forecasts.
    rng = np.random.default_rng(44)
    df = _score_frame(rng, {"baseline": 1.0, "a": 0.7, "b": 1.4, "c": 0.9}, n_regions=3)
    df["wis"] *= rng.uniform(0.5, 1.5, len(df))
    df["wis_log"] = np.log1p(df["wis"]) * rng.uniform(0.8, 1.2, len(df))
    df.loc[df.sample(frac=0.05, random_state=1).index, ["wis", "wis_log"]] = 0.0
    df = df[(rng.uniform(size=len(df)) > 0.25) | (df.model == "baseline")].reset_index(drop=True)
    df["issued_on"] = df["issued_on"].dt.date
    df["target_date"] = df["target_date"].dt.date
    con = store.memory()
    rows = df.assign(truth=1.0, truth_as_of=df["target_date"], covered_50=True,
                     covered_90=True, bias=0.0, abs_error=1.0)
    store.insert_df(con, "out.scores", rows)
    for view, by in (("out.accuracy", ["signal", "horizon_days"]),
                     ("out.accuracy_by_region", ["signal", "horizon_days", "region"])):
        sql = con.execute(f"SELECT * FROM {view}").df()
        for col, rel in (("wis", "rel_wis"), ("wis_log", "rel_wis_log")):
            py = pairwise_relative_wis(df, by=by, column=col)[[*by, "model", "rel_wis"]]
            both = sql.merge(py.rename(columns={"rel_wis": "python"}), on=[*by, "model"])
            assert len(both) == len(py) == len(sql)
            np.testing.assert_allclose(both[rel], both["python"], rtol=1e-10)
    base = con.execute("SELECT rel_wis FROM out.accuracy WHERE model = 'baseline'").df()
    assert (base["rel_wis"] == 1.0).all()
