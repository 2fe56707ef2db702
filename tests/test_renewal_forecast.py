"""Tests of models/renewal_forecast.py: the renewal projection against closed forms and truth."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special, stats

from tallywave.models.base import SeriesRandom, series_seeds
from tallywave.models.renewal import (
    discretise_gamma_interval,
    growth_rate_from_r,
    reproduction_number_from_growth,
)
from tallywave.models.renewal_forecast import (
    RenewalForecaster,
    estimate_dispersion,
    estimate_log_r_drift,
    sample_r,
)

Q90 = [0.05, 0.95]
PMF = discretise_gamma_interval(5.0, 2.5)


def test_flat_at_r_one_with_negative_binomial_noise() -> None:
    hist = np.full((3, 40), 200.0)
    fc = RenewalForecaster(horizon=21, dispersion=10.0, random_state=4)
    fc.fit(hist, PMF, np.ones((4000, 3)))
    y = fc.sample()
    assert y.shape == (4000, 3, 21)
    np.testing.assert_allclose(fc.expected_, 200.0, rtol=1e-12)
    np.testing.assert_allclose(y.mean(axis=0), 200.0, rtol=0.02)
    # NB variance mu + mu^2/k (common practice parametrisation; numpy's gamma-Poisson mixture)
    assert y.var(axis=0).mean() == pytest.approx(200 + 200**2 / 10, rel=0.05)
    q = fc.quantiles([0.05, 0.25, 0.5, 0.75, 0.95])
    assert q.shape == (3, 21, 5) and np.all(q >= 0) and np.all(np.diff(q, axis=-1) >= 0)
    # the NB quantiles themselves (scipy.stats.nbinom, n = k, p = k / (k + mu))
    ref = stats.nbinom.ppf([0.05, 0.5, 0.95], 10.0, 10.0 / 210.0)
    np.testing.assert_allclose(q[..., [0, 2, 4]].mean(axis=(0, 1)), ref, rtol=0.03)
    # same answer on every call (generators rebuilt from random_state)
    np.testing.assert_array_equal(fc.quantiles([0.05, 0.5]), fc.quantiles([0.05, 0.5]))


def test_grows_at_wallinga_lipsitch_rate() -> None:
    r = 0.05
    big_r = reproduction_number_from_growth(r, PMF)
    # exponential history + matching R: the renewal equation continues e^{rt} exactly
    # (Wallinga & Lipsitch 2007, discrete form)
    hist = 100.0 * np.exp(r * np.arange(50))[None, :]
    fc = RenewalForecaster(horizon=14, random_state=1).fit(hist, PMF, np.full((200, 1), big_r))
    y = fc.sample()
    np.testing.assert_allclose(fc.expected_[0, 0], hist[0, -1] * np.exp(r * np.arange(1, 15)),
                               rtol=1e-10)
    assert y.mean(axis=0)[0, -1] == pytest.approx(hist[0, -1] * np.exp(r * 14), rel=0.02)
    # flat history: after the transient the growth rate converges to the W-L rate for R
    fc2 = RenewalForecaster(horizon=60).fit(np.full((1, 30), 100.0), PMF, [[1.5]])
    fc2.sample()
    mu = fc2.expected_[0, 0]
    slope = np.log(mu[-1] / mu[-8]) / 7
    assert slope == pytest.approx(float(growth_rate_from_r(1.5, PMF)), rel=0.01)


def test_drift_widens_intervals_like_an_integrated_random_walk() -> None:
    hist = np.full((2, 30), 300.0)
    r0 = np.ones((3000, 2))
    q_fixed = RenewalForecaster(horizon=28, random_state=3).fit(hist, PMF, r0).quantiles(Q90)
    q_drift = RenewalForecaster(horizon=28, log_r_sd=0.05, random_state=3).fit(
        hist, PMF, r0).quantiles(Q90)
    w_fixed = q_fixed[..., 1] - q_fixed[..., 0]
    w_drift = q_drift[..., 1] - q_drift[..., 0]
    assert np.all(w_drift[:, -1] > 2 * w_fixed[:, -1])
    assert np.all(w_drift[:, -1] > w_drift[:, 6])  # uncertainty grows with horizon
    # the random walk of log R itself: sd at day h is log_r_sd * sqrt(h) (closed form)
    fc = RenewalForecaster(horizon=28, log_r_sd=0.05, random_state=3).fit(hist, PMF, r0)
    fc.sample()
    sd = np.log(fc.r_paths_).std(axis=0)
    np.testing.assert_allclose(sd[:, [6, 27]], np.tile(0.05 * np.sqrt([7, 28]), (2, 1)), rtol=0.06)


def test_damping_relaxes_log_r_toward_zero() -> None:
    # damped trend (Gardner & McKenzie 1985): log R_{T+h} = phi^h log R_T, phi = 0.5^(1/half-life)
    hist = np.full((1, 30), 100.0)
    fc = RenewalForecaster(horizon=42, damping_days=14.0).fit(hist, PMF, [[1.6]])
    fc.sample()
    h = np.arange(1, 43)
    np.testing.assert_allclose(np.log(fc.r_paths_[0, 0]), np.log(1.6) * 0.5 ** (h / 14.0),
                               rtol=1e-12)
    # without damping the same R compounds: the projection ends far higher
    free = RenewalForecaster(horizon=42).fit(hist, PMF, [[1.6]])
    free.sample()
    assert free.expected_[0, 0, -1] > 3 * fc.expected_[0, 0, -1]


def test_damping_of_today_and_undamped_drift_closed_forms() -> None:
    # log R_{T+h} = phi^h log R_T + W_h: the mean relaxes as the damped trend (Gardner &
    # McKenzie 1985) while the random walk W keeps sd sigma sqrt(h); with damp_drift the steps
    # are damped too (an AR(1): sd sigma sqrt((1 - phi^2h) / (1 - phi^2)), closed form)
    hist = np.full((1, 30), 100.0)
    r0 = np.full((4000, 1), 1.5)
    sigma, half = 0.04, 7.0
    phi = 0.5 ** (1.0 / half)
    h = np.arange(1, 29)
    free = RenewalForecaster(horizon=28, log_r_sd=sigma, damping_days=half, random_state=2)
    free.fit(hist, PMF, r0).sample()
    log_r = np.log(free.r_paths_[:, 0])
    np.testing.assert_allclose(log_r.mean(axis=0), np.log(1.5) * phi ** h, atol=0.004)
    np.testing.assert_allclose(log_r.std(axis=0), sigma * np.sqrt(h), rtol=0.05)
    ar1 = RenewalForecaster(horizon=28, log_r_sd=sigma, damping_days=half, damp_drift=True,
                            random_state=2)
    ar1.fit(hist, PMF, r0).sample()
    sd = np.log(ar1.r_paths_[:, 0]).std(axis=0)
    np.testing.assert_allclose(sd, sigma * np.sqrt((1 - phi ** (2 * h)) / (1 - phi ** 2)),
                               rtol=0.05)
    assert sd[-1] < 0.6 * log_r.std(axis=0)[-1]  # the AR(1) caps the spread


def test_damping_spread_mixes_half_lives_closed_forms() -> None:
    # each draw's half-life is L = 7 x 2^(2(2u - 1)), u uniform (models/damping.py): log R_{T+h}
    # = phi(u)^h log R_T.  phi(u)^h is monotone in u, so the quantiles of log R_{T+h} are exact
    # (the median is the 7-day damped trend itself), and its mean is the integral of phi(u)^h
    # over u (reference: scipy.integrate.quad)
    from scipy import integrate

    from tallywave.models.damping import damping_ratios

    hist = np.full((1, 30), 100.0)
    r0, half, spread = 1.5, 7.0, 2.0
    fc = RenewalForecaster(horizon=28, damping_days=half, damping_spread=spread, random_state=5)
    fc.fit(hist, PMF, np.full((20000, 1), r0)).sample()
    log_r = np.log(fc.r_paths_[:, 0])
    for h in (7, 14, 28):
        mean = integrate.quad(lambda u, h=h: damping_ratios(half, spread, u) ** h, 0.0, 1.0)[0]
        assert log_r[:, h - 1].mean() == pytest.approx(np.log(r0) * mean, rel=0.01)
        for p in (0.05, 0.5, 0.95):  # larger u: longer half-life, higher R
            exact = np.log(r0) * damping_ratios(half, spread, p) ** h
            assert np.mean(log_r[:, h - 1] <= exact) == pytest.approx(p, abs=0.006)
    assert damping_ratios(half, spread, 0.5) == pytest.approx(0.5 ** (1 / half), rel=1e-15)
    np.testing.assert_allclose(damping_ratios(half, spread, np.array([0.0, 1.0])),
                               0.5 ** (1 / np.array([half / 4, half * 4])), rtol=1e-15)
    # spread 0 is the single half-life, draw for draw (no extra random numbers taken)
    one = RenewalForecaster(horizon=28, log_r_sd=0.03, damping_days=half, random_state=5)
    zero = RenewalForecaster(horizon=28, log_r_sd=0.03, damping_days=half, damping_spread=0.0,
                             random_state=5)
    r = np.full((200, 1), r0)
    np.testing.assert_array_equal(one.fit(hist, PMF, r).sample(), zero.fit(hist, PMF, r).sample())
    with pytest.raises(ValueError, match="spread"):
        damping_ratios(half, -1.0, 0.5)
    with pytest.raises(ValueError, match="damping_spread"):
        RenewalForecaster(damping_days=7.0, damping_spread=-1.0).fit(hist, PMF, r)


def test_depletion_reaches_the_kermack_mckendrick_final_size() -> None:
    # a small seed in a large pool: with R scaled by the share of the pool left, the cumulative
    # projection approaches the final size z = 1 + W(-R0 e^-R0) / R0 (Kermack & McKendrick
    # 1927; scipy.special.lambertw), up to the discretisation of the daily recursion
    r0, cap = 1.5, 1e6
    z = 1.0 + special.lambertw(-r0 * np.exp(-r0)).real / r0
    fc = RenewalForecaster(horizon=700).fit(np.full((1, 30), 1.0), PMF, [[r0]], capacity=[cap])
    fc.sample()
    total = fc.expected_[0, 0].sum() / cap
    assert total == pytest.approx(z, rel=0.02)  # z = 0.583 for R0 = 1.5
    assert fc.r_paths_[0, 0, -1] < 1.0  # past the peak R_t has fallen below 1


def test_per_series_streams_do_not_depend_on_the_other_series() -> None:
    rng = np.random.default_rng(5)
    hist = rng.poisson(80, (6, 40)).astype(float)
    r = rng.gamma(50, 1 / 50, (300, 6))
    seeds = series_seeds(11, "cases", [f"r{i}" for i in range(6)])
    kw = {"horizon": 14, "log_r_sd": 0.03, "dispersion": 30.0}
    full = RenewalForecaster(random_state=seeds, **kw).fit(hist, PMF, r).quantiles(Q90)
    part = RenewalForecaster(random_state=seeds[2:5], **kw).fit(hist[2:5], PMF,
                                                                 r[:, 2:5]).quantiles(Q90)
    np.testing.assert_allclose(full[2:5], part, rtol=0, atol=1e-9)


def test_estimate_dispersion_recovers_negative_binomial_size() -> None:
    # simulate-and-recover: NB(k) counts around a smooth, weekly-varying mean
    rng = np.random.default_rng(6)
    t = np.arange(120)
    mu = 150.0 * np.exp(0.01 * t) * (1 + 0.2 * np.sin(2 * np.pi * t / 60))
    for k in (5.0, 30.0):
        y = rng.poisson(rng.gamma(k, mu / k, (400, t.size)))
        est = estimate_dispersion(y, window=84)
        assert np.median(est) == pytest.approx(k, rel=0.15), (k, np.median(est))
    # Poisson counts: variance = mean, so the size runs to the upper bound
    assert np.median(estimate_dispersion(rng.poisson(mu, (50, t.size)))) > 200
    # too few counts: the others' median (or the given pool) stands in
    tiny = np.vstack([rng.poisson(rng.gamma(8.0, mu / 8.0)), np.zeros(t.size)])
    est = estimate_dispersion(tiny, pooled=12.0)
    assert est[1] == 12.0


def test_estimate_log_r_drift_recovers_random_walk_sd() -> None:
    # simulate-and-recover: a random walk of log R (sd 0.02/day) seen through estimates with
    # known noise sd 0.05 (independent for days a window apart); the noise is subtracted
    rng = np.random.default_rng(7)
    n, t, sd = 300, 120, 0.02
    log_r = np.cumsum(rng.normal(0, sd, (n, t)), axis=1)
    noisy = log_r + rng.normal(0, 0.05, (n, t))
    for robust in (True, False):
        est = estimate_log_r_drift(np.exp(noisy), np.full((n, t), 0.05), lag=7, robust=robust)
        assert est == pytest.approx(sd, rel=0.15)
    naive = estimate_log_r_drift(np.exp(noisy), None, lag=7)
    assert naive > 1.4 * sd  # without the correction the noise is taken for drift
    # one intervention (log R falls by 0.7 in a day) in every series: a jump, not a drift;
    # the robust scale barely moves, the mean square is dominated by it
    jump = noisy - 0.7 * (np.arange(t) >= 60)[None, :]
    assert estimate_log_r_drift(np.exp(jump), np.full((n, t), 0.05)) < 1.3 * sd  # 1.22
    assert estimate_log_r_drift(np.exp(jump), np.full((n, t), 0.05), robust=False) > 2 * sd
    assert estimate_log_r_drift(np.ones((2, 5)), None) == 0.08  # too short: the ceiling


def test_sample_r_matches_the_gamma_mixture() -> None:
    # reference: moments of a two-component gamma mixture (scipy.stats.gamma)
    shape = np.array([[20.0, 50.0], [80.0, 50.0]])
    scale = np.array([[0.05, 0.02], [0.0125, 0.02]])
    w = np.array([0.3, 0.7])
    draws = sample_r(shape, scale, w, 40000, SeriesRandom(3, 2))
    assert draws.shape == (40000, 2)
    m = (w[:, None] * stats.gamma.mean(shape, scale=scale)).sum(0)
    second = (w[:, None] * (stats.gamma.var(shape, scale=scale)
                            + stats.gamma.mean(shape, scale=scale) ** 2)).sum(0)
    np.testing.assert_allclose(draws.mean(0), m, rtol=0.01)
    np.testing.assert_allclose(draws.var(0), second - m**2, rtol=0.05)
    nan = sample_r(np.array([[np.nan, 2.0]]), np.array([[1.0, 1.0]]), np.ones(1), 10,
                   SeriesRandom(0, 2))
    assert np.isnan(nan[:, 0]).all() and np.isfinite(nan[:, 1]).all()


def test_input_validation() -> None:
    with pytest.raises(ValueError, match="r_samples"):
        RenewalForecaster().fit(np.ones((2, 30)), PMF, np.ones((5, 3)))
    with pytest.raises(ValueError, match="dispersion"):
        RenewalForecaster(dispersion=-1.0).fit(np.ones((1, 30)), PMF, np.ones((5, 1)))
    with pytest.raises(ValueError, match="damping"):
        RenewalForecaster(damping_days=0.0).fit(np.ones((1, 30)), PMF, np.ones((5, 1)))
    with pytest.raises(RuntimeError):
        RenewalForecaster().sample()
