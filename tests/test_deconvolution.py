"""Tests for models/deconvolution.py: closed forms, reference libraries, finite differences."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize, stats

from tallywave.models.deconvolution import (
    Deconvolution,
    _Convolver,
    _smooth121,
    allocation_operator,
    delay_pmf,
    delay_stack,
    observability,
    response_operator,
    richardson_lucy,
    rounded_gamma_pmf,
)


def _convolve(lam: np.ndarray, f: np.ndarray, n_days: int, n_before: int) -> np.ndarray:
    """Reference: expected counts by numpy.convolve (mu_t = sum_d f_d lam_{t-d})."""
    return np.convolve(lam, f)[n_before: n_before + n_days]


# ---------------------------------------------------------------------------------------------
# Delays and observability
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("mean,sd", [(3.1, 1.3), (7.0, 2.8), (18.0, 6.6)])
def test_rounded_gamma_keeps_mean_and_matches_scipy(mean: float, sd: float) -> None:
    f = rounded_gamma_pmf(mean, sd)
    d = np.arange(f.size)
    # reference: scipy.stats.gamma cdf at d +- 1/2 (rounding to whole days), renormalised
    g = stats.gamma((mean / sd) ** 2, scale=sd**2 / mean)
    ref = g.cdf(d + 0.5) - g.cdf(np.maximum(d - 0.5, 0.0))
    np.testing.assert_allclose(f, ref / ref.sum(), atol=1e-12)
    # rounding keeps the mean (error ~1/(24 mean), derived here) up to the truncation at the
    # 0.999 quantile (the tail beyond it holds ~0.1% of the mass); sd within 3%
    assert np.dot(d, f) == pytest.approx(mean, rel=2e-3)
    assert np.sqrt(np.dot(d**2, f) - np.dot(d, f) ** 2) == pytest.approx(sd, rel=0.03)


def test_delay_specs_and_validation() -> None:
    np.testing.assert_allclose(delay_pmf({"pmf": [1, 2, 1]}), [0.25, 0.5, 0.25])
    np.testing.assert_allclose(delay_pmf((5.0, 2.0)), rounded_gamma_pmf(5.0, 2.0))
    stack = delay_stack({"candidates": [[3.0, 1.0], [6.0, 2.0]]})
    assert stack.shape[0] == 2 and np.allclose(stack.sum(axis=1), 1.0)
    np.testing.assert_allclose(stack[0, : rounded_gamma_pmf(3.0, 1.0).size],
                               rounded_gamma_pmf(3.0, 1.0))
    for bad in ({"pmf": [0.5, -0.1]}, {"pmf": [0, 0]}, {"mean": 0.0, "sd": 1.0}, {"sd": 1.0}):
        with pytest.raises(ValueError):
            delay_pmf(bad)


def test_observability_is_the_share_counted_inside_the_days() -> None:
    f = np.array([0.1, 0.2, 0.4, 0.3])
    n_days, nb = 6, 3
    q = observability(f, n_days, nb)
    # direct count: infection day s, delay d lands on s + d, counted when 0 <= s + d <= 5
    ref = [sum(f[d] for d in range(4) if 0 <= s + d <= n_days - 1) for s in range(-nb, n_days)]
    np.testing.assert_allclose(q, ref, atol=1e-15)
    assert q[nb] == 1.0 and q[-1] == pytest.approx(0.1)


def test_fft_convolutions_match_numpy() -> None:
    f = rounded_gamma_pmf(5.0, 2.5)
    n_days, nb = 40, f.size - 1
    rng = np.random.default_rng(1)
    lam = rng.uniform(1.0, 50.0, size=(3, nb + n_days))
    conv = _Convolver(f, n_days, nb)
    ref = np.stack([_convolve(row, f, n_days, nb) for row in lam])
    np.testing.assert_allclose(conv.expected(lam), ref, rtol=1e-12, atol=1e-10)
    # the back-projection is the transpose: <conv(lam), r> = <lam, back(r)>
    r = rng.uniform(size=(3, n_days))
    np.testing.assert_allclose((conv.expected(lam) * r).sum(axis=1),
                               (lam * conv.back(r)).sum(axis=1), rtol=1e-12)


# ---------------------------------------------------------------------------------------------
# Richardson-Lucy / EMS
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("r", [0.1, -0.06, 0.0])
def test_back_calculation_of_exponential_growth_wallinga_lipsitch(r: float) -> None:
    # Wallinga & Lipsitch (2007, Proc R Soc B 274:599): infections growing as e^{rt} give
    # counts delayed by f growing at the same rate, scaled by M(-r) = sum_d f_d e^{-rd} (the
    # delay's moment generating function at -r).  Back-calculation must invert this.
    f = rounded_gamma_pmf(5.0, 2.5)
    t = np.arange(150)
    m_gen = np.sum(f * np.exp(-r * np.arange(f.size)))
    y = 1000.0 * np.exp(r * t) * m_gen
    dec = richardson_lucy(y, f, n_iter=60)
    ratio = dec.infections[dec.n_before:] / (1000.0 * np.exp(r * t))
    interior = slice(20, 130)
    # EMS: each step is followed by [1,2,1]/4 smoothing, which multiplies e^{rt} by
    # cosh(r/2)^2 (derived here), so that is the fixed point's constant factor; R estimates
    # (ratios of sums) do not see a constant factor
    np.testing.assert_allclose(ratio[interior], np.cosh(r / 2) ** 2, rtol=2e-3)
    # the plain Richardson-Lucy step (no smoothing) keeps the expected counts on the data
    plain = richardson_lucy(y, f, n_iter=60, smooth=False)
    np.testing.assert_allclose(plain.fitted[interior], y[interior], rtol=5e-3)
    # the default 10 steps are within 1.5% of the fixed point in the interior
    ten = richardson_lucy(y, f, n_iter=10)
    np.testing.assert_allclose(ten.infections[dec.n_before:][interior] / ratio[interior] /
                               (1000.0 * np.exp(r * t[interior])), 1.0, rtol=0.015)


def test_unsmoothed_em_converges_to_the_nonnegative_least_squares_solution() -> None:
    # On exact data the Poisson likelihood (Richardson 1972; Lucy 1974) and least squares share
    # their optimum.  With no infections before day 0 (n_before = 0) and f[0] > 0 the system is
    # triangular and invertible, so both recover the infections; reference:
    # scipy.optimize.nnls of the same convolution system.
    f = np.array([0.1, 0.3, 0.4, 0.2])
    n_days = 30
    s = np.arange(n_days)
    truth = 50.0 + 40.0 * np.exp(-0.5 * ((s - 12) / 4.0) ** 2)
    y = _convolve(truth, f, n_days, 0)
    mat = np.stack([_convolve(np.eye(n_days)[i], f, n_days, 0) for i in range(n_days)], axis=1)
    ref, _ = optimize.nnls(mat, y)
    np.testing.assert_allclose(ref, truth, rtol=1e-6)
    dec = richardson_lucy(y, f, n_iter=3000, smooth=False, n_before=0, q_floor=0.0)
    np.testing.assert_allclose(dec.fitted, y, rtol=1e-4)
    full = observability(f, n_days, 0) > 0.999  # the last days converge slowest
    np.testing.assert_allclose(dec.infections[full], ref[full], rtol=0.01)


def test_em_preserves_the_observed_total() -> None:
    # each EM step keeps sum_s q_s lambda_s = sum_t y_t (a property of the update; derived here)
    rng = np.random.default_rng(4)
    f = rounded_gamma_pmf(7.0, 2.8)
    y = rng.poisson(80.0, size=(5, 90)).astype(float)
    dec = richardson_lucy(y, f, n_iter=25, smooth=False, q_floor=0.0)
    np.testing.assert_allclose((dec.infections * dec.observability).sum(axis=1), y.sum(axis=1),
                               rtol=1e-6)
    assert dec.infections.shape == (5, f.size - 1 + 90)
    assert np.all(dec.infections >= 0.0)


def test_allocation_operator_is_the_derivative_of_one_em_step() -> None:
    # d lambda_s / d y_t of one EM step at fixed lambda, checked by finite differences
    f = rounded_gamma_pmf(4.0, 2.0)
    rng = np.random.default_rng(2)
    n_days = 50
    y = rng.poisson(100.0, size=(2, n_days)).astype(float)
    dec = richardson_lucy(y, f, n_iter=15)
    nb = dec.n_before
    conv = _Convolver(f, n_days, nb)
    q = dec.observability

    def em_step(yy: np.ndarray) -> np.ndarray:  # days with q < 0.02 are not updated
        with np.errstate(divide="ignore", invalid="ignore"):
            corr = conv.back(np.where(dec.fitted > 0, yy / dec.fitted, 0.0)) / q
        return np.where(q >= 0.02, dec.infections * corr, dec.infections)

    obs_days = np.arange(40, 50)
    inf_days = np.arange(25, 50)
    op = allocation_operator(dec, f, obs_days, inf_days)
    assert op.shape == (2, 10, 25)
    h = 1e-3
    for k, t in enumerate(obs_days):
        bump = y.copy()
        bump[:, t] += h
        num = (em_step(bump) - em_step(y))[:, inf_days + nb] / h
        np.testing.assert_allclose(op[:, k, :], num, rtol=1e-5, atol=1e-7)
    assert isinstance(dec, Deconvolution)


def test_response_operator_is_the_derivative_of_the_deconvolution() -> None:
    # the derivative of n EMS steps started at the (converged) solution, by finite differences
    # of richardson_lucy itself; one step is the one-step allocation, smoothed
    f = rounded_gamma_pmf(5.0, 2.5)
    rng = np.random.default_rng(6)
    n_days = 60
    y = rng.poisson(200.0 * np.exp(0.02 * np.arange(n_days)), size=(2, n_days)).astype(float)
    dec = richardson_lucy(y, f, n_iter=400)
    nb = dec.n_before
    inf_days = np.arange(-nb, n_days)
    obs_days = np.arange(45, 60)
    one = response_operator(dec, f, y, obs_days, inf_days, 1)
    alloc = allocation_operator(dec, f, obs_days, inf_days)
    np.testing.assert_allclose(one, _smooth121(alloc), rtol=1e-9, atol=1e-12)
    op = response_operator(dec, f, y, obs_days, inf_days, 10)
    h = 1e-4
    for k, t in enumerate(obs_days):
        bump = y.copy()
        bump[:, t] += h
        moved = richardson_lucy(bump, f, n_iter=10, start=dec.infections).infections
        again = richardson_lucy(y, f, n_iter=10, start=dec.infections).infections
        num = (moved - again) / h
        np.testing.assert_allclose(op[:, k], num, rtol=2e-3, atol=2e-4 * np.abs(num).max())
    with pytest.raises(ValueError, match="consecutive"):
        response_operator(dec, f, y, obs_days, np.arange(0, 50), 3)


def test_input_validation() -> None:
    f = rounded_gamma_pmf(3.0, 1.0)
    with pytest.raises(ValueError, match="non-negative"):
        richardson_lucy(np.array([1.0, -1.0, 2.0]), f)
    with pytest.raises(ValueError, match="n_iter"):
        richardson_lucy(np.ones(5), f, n_iter=-1)
    zero = richardson_lucy(np.zeros((2, 20)), f)
    assert np.all(np.isfinite(zero.infections)) and np.all(zero.fitted < 1e-6)
