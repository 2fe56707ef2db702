"""Tests for models.delay: chain ladder, delay GLM, nowcast sampling, pooling, diagnostics."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats

from tallywave.models.base import series_seeds
from tallywave.models.delay import (
    ChainLadder,
    DelayGLM,
    DelayNowcaster,
    PooledDelay,
    backtest_arrivals,
    closed_report_days,
    cumulative_to_incremental,
    fit_tail,
    fold_tail,
    incremental_to_cumulative,
    mean_delay_by_week,
    simulate_triangle,
    total_variation,
    weekday_lr_test,
)

# Taylor & Ashe (1983) cumulative run-off triangle, 10 accident years;
# typed in from Mack 1993 (from memory)
TAYLOR_ASHE = [
    [357848, 1124788, 1735330, 2218270, 2745596, 3319994, 3466336, 3606286, 3833515, 3901463],
    [352118, 1236139, 2170033, 3353322, 3799067, 4120063, 4647867, 4914039, 5339085],
    [290507, 1292306, 2218525, 3235179, 3985995, 4132918, 4628910, 4909315],
    [310608, 1418858, 2195047, 3757447, 4029929, 4381982, 4588268],
    [443160, 1136350, 2128333, 2897821, 3402672, 3873311],
    [396132, 1333217, 2180715, 2985752, 3691712],
    [440832, 1288463, 2419861, 3483130],
    [359480, 1421128, 2864498],
    [376686, 1363294],
    [344014],
]
# Mack (1993), ASTIN Bulletin 23(2): chain-ladder total reserve (from memory)
MACK_TOTAL_RESERVE = 18_680_856
# Mack (1993), ASTIN Bulletin 23(2): reserves of accident years 2..10 (from memory)
MACK_RESERVES = [94_634, 469_511, 709_638, 984_889, 1_419_459, 2_177_641, 3_920_301,
                 4_278_972, 4_625_811]
# Mack (1993), ASTIN Bulletin 23(2): development factors to 4 decimals (from memory)
MACK_FACTORS = [3.4906, 1.7473, 1.4574, 1.1739, 1.1038, 1.0863, 1.0539, 1.0766, 1.0177]


def _taylor_ashe_incremental() -> np.ndarray:
    cum = np.full((10, 10), np.nan)
    for i, row in enumerate(TAYLOR_ASHE):
        cum[i, : len(row)] = row
    return cumulative_to_incremental(cum)


def _gamma_pmf(mean: float, shape: float = 2.0, max_delay: int = 28) -> np.ndarray:
    """Discretised gamma delay pmf on 0..max_delay (truth for simulations)."""
    cdf = stats.gamma.cdf(np.arange(max_delay + 2), a=shape, scale=mean / shape)
    pmf = np.diff(cdf)
    return pmf / pmf.sum()


def _statsmodels_reserve(inc: np.ndarray) -> float:
    """Reserve of a Poisson GLM with row + column factors fitted directly with statsmodels."""
    n_ref, k = inc.shape
    t, d = np.meshgrid(np.arange(n_ref), np.arange(k), indexing="ij")
    observed = (t + d <= n_ref - 1) & np.isfinite(inc)
    future = t + d > n_ref - 1

    def design(tt: np.ndarray, dd: np.ndarray) -> np.ndarray:
        rows = (tt[:, None] == np.arange(n_ref)[None, :]).astype(float)
        cols = (dd[:, None] == np.arange(1, k)[None, :]).astype(float)
        return np.hstack([rows, cols])

    res = sm.GLM(inc[observed], design(t[observed], d[observed]),
                 family=sm.families.Poisson()).fit(tol=1e-10, tol_criterion="params",
                                                     maxiter=300)
    return float(np.exp(design(t[future], d[future]) @ res.params).sum())


# --------------------------------------------------------------------------- chain ladder


def test_cumulative_incremental_roundtrip() -> None:
    rng = np.random.default_rng(0)
    inc = rng.poisson(5.0, size=(3, 8, 6)).astype(float)
    np.testing.assert_array_equal(cumulative_to_incremental(incremental_to_cumulative(inc)), inc)
    inc[0, 2, 3] = np.nan
    cum = incremental_to_cumulative(inc)
    assert np.isnan(cum[0, 2, 3:]).all() and np.isfinite(cum[0, 2, :3]).all()


def test_taylor_ashe_chain_ladder_matches_mack() -> None:
    cl = ChainLadder().fit(_taylor_ashe_incremental())
    # Mack (1993) total reserve 18,680,856 (from memory): within 1 unit, relative 1e-6
    assert abs(cl.reserve_[0] - MACK_TOTAL_RESERVE) < 1.0
    assert cl.reserve_[0] == pytest.approx(MACK_TOTAL_RESERVE, rel=1e-6)
    # Mack (1993) first development factor 3.4906 and the others (4 decimals, from memory)
    assert cl.factors_[0, 0] == pytest.approx(3.4906, abs=5e-5)
    np.testing.assert_allclose(cl.factors_[0], MACK_FACTORS, atol=5e-5)
    # Mack (1993) per-accident-year reserves (from memory), to within 1 unit
    per_year = (cl.expected_total_ - cl.reported_)[0]
    assert per_year[0] == pytest.approx(0.0, abs=1e-6)
    np.testing.assert_allclose(per_year[1:], MACK_RESERVES, atol=1.0)
    assert cl.delay_pmf_.sum() == pytest.approx(1.0)
    assert np.all(cl.delay_pmf_ >= 0)


@pytest.mark.parametrize("case", ["taylor_ashe", "simulated"])
def test_renshaw_verrall_poisson_glm_equals_chain_ladder(case: str) -> None:
    if case == "taylor_ashe":
        inc = _taylor_ashe_incremental()
    else:
        rng = np.random.default_rng(7)
        level = rng.uniform(200, 400, size=(1, 20))
        _, obs = simulate_triangle(level, _gamma_pmf(3.0, max_delay=12), 0.05, rng)
        inc = obs[0]
    cl = ChainLadder().fit(inc)
    # Renshaw & Verrall (1998), British Actuarial Journal 4(4): the Poisson GLM with row and
    # column factors reproduces the chain-ladder reserve; fitted here directly with statsmodels
    assert _statsmodels_reserve(inc) == pytest.approx(cl.reserve_[0], rel=1e-6)
    # our DelayGLM: statsmodels route and vectorised route both give the chain-ladder reserve
    for solver in ("statsmodels", "vectorised"):
        glm = DelayGLM(family="poisson", solver=solver).fit(inc)
        assert glm.reserve_[0] == pytest.approx(cl.reserve_[0], rel=1e-6)
        np.testing.assert_allclose(glm.expected_total_, cl.expected_total_, rtol=1e-6)


def test_vectorised_start_is_chain_ladder_on_staircase() -> None:
    # more ref rows than delays (T=60, D=28): chain ladder is still the Poisson MLE
    # (Renshaw & Verrall 1998), so the block updates stop after one sweep
    rng = np.random.default_rng(3)
    _, obs = simulate_triangle(rng.uniform(50, 200, (5, 60)), _gamma_pmf(5.0), 0.1, rng)
    glm = DelayGLM(family="poisson", pool_below=0, pool_fully_below=0).fit(obs)
    cl = ChainLadder().fit(obs)
    assert glm.n_iter_ == 1
    np.testing.assert_allclose(glm.reserve_, cl.reserve_, rtol=1e-9)
    np.testing.assert_allclose(glm.delay_pmf_, cl.delay_pmf_, atol=1e-12)


def test_solvers_agree_with_holes_and_weekday_effect() -> None:
    rng = np.random.default_rng(11)
    g_true = np.array([1.2, 1.1, 1.1, 1.0, 1.0, 0.4, 0.2])
    _, obs = simulate_triangle(rng.uniform(80, 200, (3, 40)), _gamma_pmf(4.0, max_delay=14),
                               0.05, rng, report_weekday_factors=g_true, first_ref_weekday=2)
    obs[0, 5, 3] = np.nan  # missing vintages
    obs[1, 20, 0] = np.nan
    obs[2, 10, 7] = np.nan
    for weekday in (False, True):
        kw = {"weekday_effect": weekday, "first_ref_weekday": 2, "pool_below": 0}
        fast = DelayGLM(**kw).fit(obs)
        ref = DelayGLM(solver="statsmodels", **kw).fit(obs)  # statsmodels GLM, one per series
        np.testing.assert_allclose(fast.base_pmf_, ref.base_pmf_, atol=1e-7)
        np.testing.assert_allclose(fast.reserve_, ref.reserve_, rtol=1e-6)
        np.testing.assert_allclose(fast.expected_total_, ref.expected_total_, rtol=1e-6)
        if weekday:
            np.testing.assert_allclose(fast.weekday_effect_, ref.weekday_effect_, atol=1e-6)


# --------------------------------------------------------------------------- simulated truth

S_SIM, T_SIM, D_SIM, PHI_SIM = 200, 60, 28, 0.1
Q_LEVELS = [0.05, 0.25, 0.5, 0.75, 0.95]


@pytest.fixture(scope="module")
def sim() -> dict:
    """200 regions, 60 ref days, D=28, known gamma delay pmf, NB2 noise, 2%/day growth."""
    rng = np.random.default_rng(20240601)
    pmf = _gamma_pmf(6.0, max_delay=D_SIM)
    level = rng.uniform(30, 300, S_SIM)[:, None] * np.exp(0.02 * np.arange(T_SIM))[None, :]
    full, obs = simulate_triangle(level, pmf[None], PHI_SIM, rng)
    nc = DelayNowcaster(model=DelayGLM(family="negbin")).fit(obs)
    q = nc.quantiles(Q_LEVELS, n_draws=500)
    return {"pmf": pmf, "full": full, "obs": obs, "nc": nc, "q": q, "final": full.sum(axis=2)}


def _coverage(q: np.ndarray, final: np.ndarray, lo: int, hi: int, rows: slice) -> float:
    inside = (q[:, rows, lo] <= final[:, rows]) & (final[:, rows] <= q[:, rows, hi])
    return float(inside.mean())


def test_simulated_truth_delay_pmf_and_dispersion(sim: dict) -> None:
    m = sim["nc"].model_
    tv = total_variation(m.delay_pmf_, sim["pmf"])  # truth: the simulating pmf
    assert tv.mean() < 0.035
    assert np.quantile(tv, 0.95) < 0.05
    assert total_variation(m.pooled_pmf_, sim["pmf"]) < 0.01
    assert set(m.pooling_) == {"own"}
    # NB2 dispersion (Pearson moment equation) recovers the simulated 0.1
    assert np.median(m.dispersion_) == pytest.approx(PHI_SIM, rel=0.1)


def test_simulated_truth_nowcast_calibration_and_accuracy(sim: dict) -> None:
    q, final, nc = sim["q"], sim["final"], sim["nc"]
    last = slice(T_SIM - 14, T_SIM)
    cov90 = _coverage(q, final, 0, 4, last)
    cov50 = _coverage(q, final, 1, 3, last)
    assert 0.80 <= cov90 <= 0.97
    assert 0.40 <= cov50 <= 0.62
    mae_median = np.abs(q[:, last, 2] - final[:, last]).mean()
    mae_reported = np.abs(nc.reported_[:, last] - final[:, last]).mean()
    assert mae_median <= 0.5 * mae_reported
    # quantiles monotone in q, >= reported; complete rows are returned as reported
    assert np.all(np.diff(q, axis=2) >= 0)
    assert np.all(q >= nc.reported_[:, :, None])
    complete = slice(0, T_SIM - D_SIM)
    np.testing.assert_array_equal(q[:, complete, 2], nc.reported_[:, complete])


def test_sample_shape_and_mean(sim: dict) -> None:
    nc = sim["nc"]
    draws = nc.sample(400)
    assert draws.shape == (400, S_SIM, T_SIM)
    assert np.all(draws >= nc.reported_[None] - 1e-9)
    last = slice(T_SIM - 14, T_SIM)
    rel = np.abs(draws.mean(axis=0)[:, last] / nc.expected_total_[:, last] - 1.0)
    assert np.median(rel) < 0.02


def test_chain_ladder_drives_the_nowcaster(sim: dict) -> None:
    nc = DelayNowcaster(model=ChainLadder()).fit(sim["obs"])
    q = nc.quantiles([0.05, 0.5, 0.95], n_draws=300)
    assert 0.80 <= _coverage(q, sim["final"], 0, 2, slice(T_SIM - 14, T_SIM)) <= 0.97


def test_weekday_effect_recovered_and_useful() -> None:
    rng = np.random.default_rng(99)
    s, n_ref = 150, 60
    pmf = _gamma_pmf(5.0, max_delay=28)
    g_true = np.array([1.2, 1.1, 1.1, 1.0, 1.0, 0.4, 0.2])
    g_true = g_true / g_true.mean()
    level = rng.uniform(50, 300, s)[:, None] * np.exp(0.01 * np.arange(n_ref))[None, :]
    full, obs = simulate_triangle(level, pmf[None], 0.05, rng,
                                  report_weekday_factors=g_true, first_ref_weekday=3)
    final = full.sum(axis=2)
    last = slice(n_ref - 14, n_ref)
    with_wk = DelayNowcaster(model=DelayGLM(weekday_effect=True, first_ref_weekday=3)).fit(obs)
    # simulated truth: report-weekday multipliers (mean 1) and the base delay pmf
    np.testing.assert_allclose(with_wk.model_.weekday_effect_.mean(axis=0), g_true, atol=0.02)
    assert total_variation(with_wk.model_.base_pmf_, pmf).mean() < 0.035
    q = with_wk.quantiles([0.05, 0.5, 0.95], n_draws=400)
    assert 0.80 <= _coverage(q, final, 0, 2, last) <= 0.97
    mae_wk = np.abs(q[:, last, 1] - final[:, last]).mean()
    assert mae_wk <= 0.5 * np.abs(with_wk.reported_[:, last] - final[:, last]).mean()
    without = DelayNowcaster(model=DelayGLM(weekday_effect=False)).fit(obs)
    q0 = without.quantiles([0.5], n_draws=400)
    assert mae_wk < np.abs(q0[:, last, 0] - final[:, last]).mean()


# --------------------------------------------------------------------------- pooling


def test_pooling_shrinks_thin_series_toward_pooled_pmf() -> None:
    rng = np.random.default_rng(8)
    n_ref = 60
    pmf_rich, pmf_thin = _gamma_pmf(6.0), _gamma_pmf(2.0)
    level = np.vstack([np.full((30, n_ref), 100.0), np.full((1, n_ref), 5.0),
                       np.full((1, n_ref), 0.3)])
    pmfs = np.vstack([np.repeat(pmf_rich[None], 30, axis=0), pmf_thin[None], pmf_thin[None]])
    _, obs = simulate_triangle(level, pmfs, 0.05, rng)
    k = 200.0
    m = DelayGLM(pool_below=1000.0, pool_fully_below=50.0, pool_strength=k).fit(obs)
    assert list(m.pooling_[:30]) == ["own"] * 30
    assert m.pooling_[30] == "shrunk" and m.pooling_[31] == "pooled"
    assert 50 <= m.n_events_[30] < 1000 and m.n_events_[31] < 50
    np.testing.assert_allclose(m.delay_pmf_[:30], m.own_pmf_[:30], atol=1e-12)
    n = m.n_events_[30]
    expected = (n * m.own_pmf_[30] + k * m.pooled_pmf_) / (n + k)
    np.testing.assert_allclose(m.delay_pmf_[30], expected, atol=1e-12)
    assert (total_variation(m.delay_pmf_[30], m.pooled_pmf_)
            < total_variation(m.own_pmf_[30], m.pooled_pmf_))
    np.testing.assert_allclose(m.delay_pmf_[31], m.pooled_pmf_, atol=1e-12)
    # the "own" pmf of a series is its single-series fit
    alone = DelayGLM(pool_below=0.0, pool_fully_below=0.0).fit(obs[30:31])
    np.testing.assert_allclose(m.own_pmf_[30], alone.delay_pmf_[0], atol=1e-8)
    # pooled pmf is dominated by the 30 rich series (simulated truth)
    assert total_variation(m.pooled_pmf_, pmf_rich) < 0.03


# --------------------------------------------------------------------------- sampler maths


def _poisson_closed_form() -> tuple[DelayNowcaster, int, float, float]:
    """A Poisson nowcast without parameter uncertainty and the negative-binomial (size, p) of
    its last row's unreported arrivals in closed form."""
    rng = np.random.default_rng(21)
    _, obs = simulate_triangle(np.full((1, 50), 15.0), _gamma_pmf(4.0, max_delay=20), 0.0, rng)
    nc = DelayNowcaster(model=DelayGLM(family="poisson"), parameter_uncertainty=False).fit(obs)
    m = nc.model_
    t = 49
    count, frac = m.observed_counts_[0, t], m.observed_fraction_[0, t]
    miss = (m.row_pmf_[0, t] * m.predict_mask_[0, t]).sum()
    rate = frac + nc.prior_shape / nc.prior_level_[0]
    size, p = count + nc.prior_shape, rate / (rate + miss)
    return nc, t, float(size), float(p)


def test_poisson_nowcast_matches_gamma_poisson_closed_form() -> None:
    # Poisson cells, no parameter uncertainty: a | data ~ Gamma(O + kappa, F + kappa / L),
    # Y | a ~ Poisson(a M)  =>  Y ~ NegBin(O + kappa, (F + kappa/L) / (F + kappa/L + M))
    # (gamma-Poisson conjugacy, standard result, from memory); reference: scipy.stats.nbinom
    nc, t, size, p = _poisson_closed_form()
    assert size * (1 - p) / p < 50  # exact gamma-Poisson branch of the sampler
    y = nc.sample(20000)[:, 0, t] - nc.reported_[0, t]
    grid = np.arange(0, int(np.quantile(y, 0.99)) + 1)
    ecdf = (y[:, None] <= grid[None, :]).mean(axis=0)
    assert np.abs(ecdf - stats.nbinom.cdf(grid, size, p)).max() < 0.015
    assert y.mean() == pytest.approx(stats.nbinom.mean(size, p), rel=0.03)
    assert nc.expected_total_[0, t] - nc.reported_[0, t] == pytest.approx(
        stats.nbinom.mean(size, p), rel=1e-9)


def test_pmf_uncertainty_matches_spread_across_replicates() -> None:
    # simulated truth: 300 replicate series with identical parameters; the spread of the
    # estimated log delay CDF across replicates should match the sandwich covariance
    # (Huber 1967 / White 1982 sandwich estimator) used for the parameter-uncertainty draws
    rng = np.random.default_rng(31)
    _, obs = simulate_triangle(np.full((300, 60), 100.0), _gamma_pmf(6.0), 0.1, rng)
    nc = DelayNowcaster(model=DelayGLM(pool_below=0, pool_fully_below=0)).fit(obs)
    empirical = np.log(np.cumsum(nc.model_.base_pmf_, axis=1)).var(axis=0)
    draws = nc.draw_delay_pmf(1000)
    predicted = np.log(np.cumsum(draws, axis=2)).var(axis=0).mean(axis=0)
    ratio = empirical[:10] / predicted[:10]
    assert np.all((ratio > 0.75) & (ratio < 1.33))
    # switching parameter uncertainty off narrows the intervals of the latest rows
    off = DelayNowcaster(model=DelayGLM(pool_below=0, pool_fully_below=0),
                         parameter_uncertainty=False).fit(obs)
    width_on = np.diff(nc.quantiles([0.05, 0.95], 400), axis=2)
    width_off = np.diff(off.quantiles([0.05, 0.95], 400), axis=2)
    assert width_on[:, -5:].mean() > width_off[:, -5:].mean()


# --------------------------------------------------------------------------- data rules


def test_negative_increments_are_clipped_for_fitting_but_reported_as_is() -> None:
    rng = np.random.default_rng(4)
    _, obs = simulate_triangle(np.full((1, 30), 80.0), _gamma_pmf(3.0, max_delay=10), 0.0, rng)
    clipped_source = obs.copy()
    obs[0, 5, 4] = -7.0  # downward revision
    clipped_source[0, 5, 4] = 0.0
    a = DelayGLM(family="poisson").fit(obs)
    b = DelayGLM(family="poisson").fit(clipped_source)
    np.testing.assert_allclose(a.delay_pmf_, b.delay_pmf_, atol=1e-12)
    assert a.reported_[0, 5] == pytest.approx(np.nansum(obs[0, 5]))
    assert a.reported_[0, 5] == pytest.approx(b.reported_[0, 5] - 7.0)
    np.testing.assert_allclose(a.expected_total_ - a.reported_, b.expected_total_ - b.reported_)


def test_holes_are_predicted_unless_reported_totals_are_given() -> None:
    rng = np.random.default_rng(6)
    full, obs = simulate_triangle(np.full((2, 30), 60.0), _gamma_pmf(3.0, max_delay=10), 0.0,
                                  rng)
    obs[0, 25, 1] = np.nan  # a missing vintage inside the observable part
    m = DelayGLM(family="poisson").fit(obs)
    future = (np.arange(30)[:, None] + np.arange(11)[None, :]) > 29
    predicted = (m.expected_ * m.predict_mask_).sum(axis=2)
    assert m.predict_mask_[0, 25, 1] and not m.predict_mask_[1, 25, 1]
    np.testing.assert_allclose(m.expected_total_, m.reported_ + predicted)
    current = np.where(future[None], 0.0, full).sum(axis=2)  # totals on the books
    m2 = DelayGLM(family="poisson").fit(obs, reported=current)
    assert not m2.predict_mask_[0, 25, 1]
    np.testing.assert_allclose(m2.reported_, current)
    np.testing.assert_allclose(
        m2.expected_total_, current + (m2.expected_ * future[None]).sum(axis=2))
    q = DelayNowcaster().fit(obs, reported=current).quantiles([0.1, 0.9], 200)
    assert np.all(q >= current[:, :, None])


def test_rows_without_observed_mass_get_prior_based_nowcast() -> None:
    rng = np.random.default_rng(12)
    pmf = _gamma_pmf(4.0, max_delay=14)
    pmf[0] = 0.0  # nothing is ever reported on the reference day itself
    pmf /= pmf.sum()
    _, obs = simulate_triangle(np.full((3, 40), 50.0), pmf, 0.0, rng)
    nc = DelayNowcaster().fit(obs)
    assert np.isnan(nc.model_.expected_total_[:, -1]).all()
    q = nc.quantiles([0.05, 0.5, 0.95], 400)
    assert np.isfinite(q).all()
    # prior centred on the recent level (about 50 per day): the 90% interval contains it
    assert np.all((q[:, -1, 0] < 50) & (q[:, -1, 2] > 50))


def test_invalid_arguments() -> None:
    tri = np.ones((2, 5, 3))
    with pytest.raises(ValueError, match="family"):
        DelayGLM(family="gaussian").fit(tri)
    with pytest.raises(ValueError, match="solver"):
        DelayGLM(solver="magic").fit(tri)
    with pytest.raises(ValueError, match="shape"):
        ChainLadder().fit(np.ones(5))
    with pytest.raises(ValueError, match="reported"):
        ChainLadder().fit(tri, reported=np.ones((3, 5)))


# --------------------------------------------------------------------------- diagnostics, sims


def test_mean_delay_by_week_tracks_drift() -> None:
    rng = np.random.default_rng(13)
    n_ref, k, horizon = 56, 29, 14
    week_means = 3.0 + 0.75 * np.arange(n_ref // 7)
    pmf_rows = np.stack([_gamma_pmf(week_means[t // 7]) for t in range(n_ref)])
    _, obs = simulate_triangle(np.full((2, n_ref), 3000.0), pmf_rows[None], 0.0, rng)
    res = mean_delay_by_week(obs, horizon=horizon)
    # simulated truth: mean of each week's pmf restricted to delays 0..horizon
    d = np.arange(horizon + 1)
    trunc = pmf_rows[::7, : horizon + 1]
    truth = (trunc * d).sum(axis=1) / trunc.sum(axis=1)
    complete_weeks = (res.week_first_row + 6 + horizon) <= n_ref - 1
    assert complete_weeks.sum() >= 5
    np.testing.assert_allclose(res.mean_delay[:, complete_weeks],
                               np.broadcast_to(truth[complete_weeks], (2, complete_weeks.sum())),
                               atol=0.05)
    assert np.isnan(res.mean_delay[:, -1]).all()  # last week: no row observed 14 days yet
    np.testing.assert_array_equal(res.week_first_row, np.arange(0, n_ref, 7))
    assert k == obs.shape[2]


def test_simulate_triangle_moments_and_mask() -> None:
    rng = np.random.default_rng(14)
    pmf = _gamma_pmf(3.0, max_delay=10)
    phi = 0.2
    full, obs = simulate_triangle(np.full((400, 30), 50.0), pmf, phi, rng)
    mu = 50.0 * pmf
    # NB2 moments: mean mu, variance mu + phi mu^2 (gamma-Poisson mixture, from memory)
    np.testing.assert_allclose(full.mean(axis=(0, 1)), mu, rtol=0.03, atol=0.01)
    var = full.var(axis=(0, 1))
    np.testing.assert_allclose(var[:6], (mu + phi * mu**2)[:6], rtol=0.1)
    future = (np.arange(30)[:, None] + np.arange(11)[None, :]) > 29
    np.testing.assert_array_equal(np.isnan(obs), np.broadcast_to(future, obs.shape))
    np.testing.assert_array_equal(obs[:, ~future], full[:, ~future])


# --------------------------------------------------------------------------- drift, tail, days


def _observed_as_of(full: np.ndarray, last_row: int) -> np.ndarray:
    """The triangle of rows 0..last_row as seen on that row's date (future cells NaN)."""
    sub = full[:, : last_row + 1].astype(float)
    n_ref, k = sub.shape[1:]
    future = (np.arange(n_ref)[:, None] + np.arange(k)[None, :]) > n_ref - 1
    return np.where(future[None], np.nan, sub)


@pytest.fixture(scope="module")
def drifting() -> dict:
    """150 regions whose delay slows from gamma mean 3 to 6 (fixed shape 2) over rows 10..45."""
    rng = np.random.default_rng(77)
    n_ref = 60
    means = 3.0 * 2.0 ** np.clip((np.arange(n_ref) - 10) / 35, 0, 1)
    pmf_rows = np.stack([_gamma_pmf(m) for m in means])
    level = rng.uniform(80, 300, (150, 1)) * np.ones((1, n_ref))
    full, obs = simulate_triangle(level, pmf_rows[None], 0.05, rng)
    return {"pmf_rows": pmf_rows, "full": full, "obs": obs, "final": full.sum(axis=2)}


def test_drifting_delay_is_recovered_and_keeps_the_nowcast_calibrated(drifting) -> None:
    obs, final, truth = drifting["obs"], drifting["final"], drifting["pmf_rows"]
    last = slice(60 - 14, 60)
    res = {}
    for drift in (False, True):
        nc = DelayNowcaster(model=DelayGLM(drift=drift, pool_below=0, pool_fully_below=0),
                            random_state=5).fit(obs)
        q = nc.quantiles([0.05, 0.5, 0.95], 400)
        res[drift] = (nc, _coverage(q, final, 0, 2, last),
                      np.median(np.log((q[:, last, 1] + 1) / (final[:, last] + 1))))
    nc = res[True][0]
    # simulated truth: today's pmf is the newest row's; the stationary fit mixes old and new
    assert total_variation(nc.delay_pmf_, truth[-1]).mean() < 0.06
    assert np.median(nc.model_.mean_delay()) == pytest.approx(truth[-1] @ np.arange(29), abs=0.3)
    assert 0.80 <= res[True][1] <= 0.97 and abs(res[True][2]) < 0.05
    assert res[False][1] < 0.6 and res[False][2] < -0.05  # too low without drift


def test_tilt_of_a_rescaled_gamma_delay() -> None:
    # A gamma density of fixed shape k rescaled from theta1 to theta2 changes by the factor
    # exp(x (1/theta1 - 1/theta2)) (ratio of gamma densities; from memory) — an exponential
    # tilt, which the drift effect models; for the discretised pmf nearly so.  Step change at
    # row 25: the oldest block's tilt relative to today's should be 1/theta2 - 1/theta1.
    rng = np.random.default_rng(3)
    n_ref, shape = 60, 2.0
    theta1, theta2 = 2.0, 3.0
    rows = np.stack([_gamma_pmf(shape * (theta1 if t < 25 else theta2), shape)
                     for t in range(n_ref)])
    _, obs = simulate_triangle(np.full((40, n_ref), 2000.0), rows[None], 0.0, rng)
    m = DelayGLM(family="poisson", drift=True, drift_sd=1.0, pool_below=0,
                 pool_fully_below=0).fit(obs)
    oldest = np.median(m.tilt_[:, 0])
    assert oldest == pytest.approx(1 / theta2 - 1 / theta1, abs=0.03)
    assert np.abs(np.median(m.tilt_[:, -2])) < 0.03  # rows 46..52: same scale as today


def test_fit_tail_recovers_a_negative_binomial_tail() -> None:
    # Simulated truth: P(delay >= 20) = 0.25, J = delay - 20 ~ NB(size 2, mean 12); 150 days of
    # history; fit_tail on the aggregate rows (before, seen, age).
    rng = np.random.default_rng(8)
    d_max, n_ref = 20, 150
    head = _gamma_pmf(4.0, max_delay=d_max - 1) * 0.75
    j = np.arange(0, 200)
    tail = stats.nbinom.pmf(j, 2, 2 / (2 + 12.0)) * 0.25  # scipy.stats.nbinom as reference
    pmf = np.concatenate([head, tail])
    pmf /= pmf.sum()
    full, obs = simulate_triangle(np.full((20, n_ref), 300.0), pmf, 0.0, rng)
    folded = fold_tail(obs, d_max)
    agg = np.nansum(folded, axis=0)
    age = n_ref - np.arange(n_ref) - d_max
    size, mean, share = fit_tail(agg[:, :-1].sum(axis=1), agg[:, -1], age)
    assert share == pytest.approx(0.25, abs=0.015)
    assert mean == pytest.approx(12.0, rel=0.1)
    assert size == pytest.approx(2.0, rel=0.35)
    g_size, _, g_share = fit_tail(agg[:, :-1].sum(axis=1), agg[:, -1], age, "geometric")
    assert g_size == 1.0 and g_share == pytest.approx(0.25, abs=0.03)
    # fold_tail: the bin holds every observed report at delay >= D; NaN for young rows
    np.testing.assert_allclose(folded[:, :-d_max, -1], np.nansum(obs[:, :-d_max, d_max:], 2))
    assert np.isnan(folded[:, -1, -1]).all()
    # the nowcast with this tail: eventual totals of the newest fortnight (simulated truth)
    m = DelayGLM(family="poisson", tail="negbin", tail_shape=(size, mean), max_delay=d_max,
                 pool_below=0, pool_fully_below=0).fit(obs[:, -60:])
    final = full[:, -60:].sum(axis=2)
    ratio = m.expected_total_[:, -14:] / final[:, -14:]
    assert np.median(ratio) == pytest.approx(1.0, abs=0.03)
    cut = DelayGLM(family="poisson", max_delay=d_max, pool_below=0,
                   pool_fully_below=0).fit(obs[:, -60:])
    assert np.median(cut.expected_total_[:, -14:] / final[:, -14:]) < 0.8  # tail dropped


def test_holidays_weekends_and_the_weekday_test() -> None:
    rng = np.random.default_rng(12)
    n_ref = 60
    g = np.array([1.4, 1.1, 1.0, 1.0, 1.0, 0.0, 0.0])  # nothing reported at weekends
    pmf = _gamma_pmf(4.0)
    # report day 44 (a Wednesday, first_ref_weekday 0) is a holiday: its reports arrive a day
    # later (simulated by moving the cells of that report day to the next)
    full, _ = simulate_triangle(np.full((30, n_ref), 150.0), pmf, 0.0, rng,
                                report_weekday_factors=g, first_ref_weekday=0)
    for t in range(n_ref):
        d = 44 - t
        if 0 <= d < 28:
            full[:, t, d + 1] += full[:, t, d]
            full[:, t, d] = 0.0
    obs = _observed_as_of(full, n_ref - 1)
    days = closed_report_days(obs, 0)
    np.testing.assert_array_equal(days, [44])  # weekends are a weekday effect, not holidays
    _, df, p = weekday_lr_test(obs, DelayGLM())
    assert df == 6 and p < 1e-6
    m = DelayGLM(weekday_effect=True, holidays=days, pool_below=0, pool_fully_below=0).fit(obs)
    np.testing.assert_allclose(m.class_effect_[:, 5:], 0.0, atol=1e-9)  # Sat, Sun, holiday
    # a triangle without weekday effects: the test does not find one (type I error 0.1 %)
    _, plain = simulate_triangle(np.full((30, n_ref), 150.0), pmf, 0.0, rng)
    assert weekday_lr_test(plain, DelayGLM())[2] > 0.01


def test_random_streams_per_series_and_repeatable_quantiles(sim: dict) -> None:
    # model protocol: quantiles() twice gives the same; a series' numbers do not depend on
    # which other series are fitted with it (pooled structure passed in, one stream each)
    obs = sim["obs"][:40]
    seeds = series_seeds(11, "cases", [f"R{i}" for i in range(40)])
    template = DelayGLM(drift=np.zeros(40, dtype=bool))
    pooled = PooledDelay.fit(obs, template)
    nc = DelayNowcaster(model=template, random_state=seeds).fit(obs, pooled=pooled)
    a = nc.quantiles([0.05, 0.5, 0.95], 200)
    np.testing.assert_array_equal(a, nc.quantiles([0.05, 0.5, 0.95], 200))
    part = DelayNowcaster(model=DelayGLM(drift=np.zeros(7, dtype=bool)),
                          random_state=seeds[10:17]).fit(obs[10:17], pooled=pooled)
    np.testing.assert_allclose(part.quantiles([0.05, 0.5, 0.95], 200), a[10:17], atol=1e-9)
    assert template.__dict__.get("delay_pmf_") is None  # the passed-in model is not fitted


def test_predictive_logpdf_matches_the_gamma_poisson_closed_form() -> None:
    # As in the sampling test above: Poisson cells, no parameter uncertainty -> the arrivals of
    # the predicted cells are NegBin(O + kappa, rate / (rate + M)) (scipy.stats.nbinom).
    nc, t, size, p = _poisson_closed_form()
    y = np.zeros((1, 50))
    for k in (0, 3, 9):
        y[0, t] = k
        lp, lo, hi = nc.predictive_logpdf(nc.model_.predict_exposure_, y)
        assert np.exp(lp[0, t]) == pytest.approx(stats.nbinom.pmf(k, size, p), rel=1e-9)
        assert hi[0, t] == pytest.approx(stats.nbinom.cdf(k, size, p), rel=1e-9)
        assert lo[0, t] == pytest.approx(stats.nbinom.cdf(k - 1, size, p), abs=1e-12)


def test_backtest_arrivals_are_what_came_in(drifting) -> None:
    full = drifting["full"][:5]
    lag, n_ref = 7, 40
    now = _observed_as_of(full[:, 10:10 + n_ref], n_ref - 1)
    then = _observed_as_of(full[:, 10 - lag:10 - lag + n_ref], n_ref - 1)
    exposure, y = backtest_arrivals(now, then, lag, None, 29)
    # row i of `then` is row i - lag of `now`; what arrived is the cells of days T..T+lag-1
    for i in range(n_ref - 29, n_ref):
        d = np.arange(29)
        came = (i + d > n_ref - 1) & (i + d <= n_ref - 1 + lag)
        np.testing.assert_array_equal(exposure[0, i] > 0, came)
        if came.any():
            np.testing.assert_allclose(y[:, i], full[:, 10 - lag + i, came].sum(axis=1))
        else:  # nothing could arrive: not scored
            assert np.isnan(y[:, i]).all()
    assert np.isnan(y[:, : n_ref - 29]).all()
