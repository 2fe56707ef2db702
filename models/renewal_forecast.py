"""Renewal-equation projection of daily incidence from samples of the current R.

Latent path ``mu_{T+h} = R_{T+h} * sum_s w_s I_{T+h-s}`` with observed history for past days and
earlier latent values for projected days.  What moves R beyond the data, and why (each piece was
measured on simulated outbreaks, ``benchmarks/forecast_eval.py``):

* **drift**: log R follows a random walk with sd ``log_r_sd`` per day.  Its effect on incidence
  compounds (the log of incidence integrates log R), so the spread of a 28-day projection grows
  like h^1.5; ``log_r_sd`` should be estimated from the series' own history of R
  (:func:`estimate_log_r_drift`) rather than typed in.
* **damping**: today's log R relaxes toward 0 (R toward 1) with half-life ``damping_days``
  (damped trend, Gardner & McKenzie 1985; with a ``damping_spread`` each draw has its own
  half-life, :mod:`tallywave.models.damping`): an error in today's R then stops compounding after a
  few generations instead of growing without bound.  ``None`` switches it off.  The drift's
  steps are changes still to come, so they accumulate undamped (``damp_drift=False``, default):
  damping them too (``damp_drift=True``, an AR(1) on log R) caps the spread of R at
  ``log_r_sd / sqrt(1 - phi^2)`` however far ahead, and the 28-day intervals were too narrow
  (measured: cases 90 % coverage 0.64 with a 7-day half-life, 0.75 with undamped steps).
* **depletion**: with a ``capacity`` per series (the number of further counts that would use up
  the susceptible pool: susceptibles × the signal's ascertainment), R is scaled by the share of
  that pool still left, so a projection cannot outrun the population.
* **observation noise**: negative binomial with mean mu and variance mu + mu^2 / ``dispersion``
  (a number or one per series; :func:`estimate_dispersion` estimates it from the recent series),
  added once on top of the latent path (the latent path itself carries no count noise).

Weekly totals are projected day by day and summed back into weeks: :func:`weeks_to_days`
spreads each week evenly over its days (on which a trailing 7-day R_t estimate is exactly the
renewal of week lags, :func:`~tallywave.models.deconvolution.weekly_lags`), and
:func:`days_to_weeks` sums the projected days; :func:`one_week_ahead_expected` gives the
one-week-ahead renewal predictions whose errors set a weekly series' count noise.

Estimation of R_t itself: :mod:`tallywave.models.renewal`.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from tallywave.models.base import QuantileForecast, RandomState, SeriesRandom
from tallywave.models.damping import damping_ratios
from tallywave.models.deconvolution import weekly_lags
from tallywave.models.renewal import (
    CoriEstimator,
    _as_incidence,
    _check_q_levels,
    resolve_interval,
)

__all__ = ["RenewalForecaster", "days_to_weeks", "estimate_dispersion", "estimate_log_r_drift",
           "one_step_expected", "one_week_ahead_expected", "sample_r", "weeks_to_days"]

#: Bounds of an estimated negative-binomial size (below 1 a daily count is wilder than a
#: geometric one; above 1e4 it is Poisson for any count seen in practice).
DISPERSION_BOUNDS = (1.0, 1e4)


def estimate_dispersion(y: np.ndarray, window: int = 42, skip_last: int = 3,
                        pooled: float | None = None, expected: np.ndarray | None = None,
                        pool_mask: np.ndarray | None = None) -> np.ndarray:
    """Negative-binomial size k per series (n_series, T) from the recent days: moments of the
    residuals around an expected value, Var = m + m^2 / k.

    ``expected`` (n_series, T): e.g. one-step-ahead renewal predictions, whose errors are what a
    projection meets on its first day (NaN where unknown).  Without it, a centred 7-day mean:
    it includes the day itself, which removes (1/7) of the day's own noise from the residual, so
    the residual variance is scaled back by 7/6.  Only the last ``window`` days before the last
    ``skip_last`` are used.  Series with too little information get ``pooled`` (or the median of
    the others; of those where ``pool_mask`` is true, e.g. not aggregates of the others).
    Clipped to :data:`DISPERSION_BOUNDS`.
    """
    arr = np.atleast_2d(np.asarray(y, dtype=float))
    n, t = arr.shape
    k_out = np.full(n, np.nan)
    if expected is not None:
        mu = np.atleast_2d(np.asarray(expected, dtype=float))
        sl = slice(max(t - skip_last - window, 0), t - skip_last)
        yy, mm = arr[:, sl], mu[:, sl]
        ok = np.isfinite(yy) & np.isfinite(mm) & (mm > 0)
        excess = np.where(ok, (yy - mm) ** 2 - mm, 0.0).sum(axis=1)
        m2 = np.where(ok, mm ** 2, 0.0).sum(axis=1)
        enough = (np.where(ok, mm, 0.0).sum(axis=1) >= 5.0 * ok.sum(axis=1) / 7.0) & \
            (ok.sum(axis=1) >= 7)
        with np.errstate(divide="ignore", invalid="ignore"):
            k_out = np.where(enough, np.where(excess > 0, m2 / excess, DISPERSION_BOUNDS[1]),
                             np.nan)
    elif t >= 7 + skip_last:
        x = np.nan_to_num(arr)
        c = np.cumsum(np.concatenate([np.zeros((n, 1)), x], axis=1), axis=1)
        m = (c[:, 7:] - c[:, :-7]) / 7.0  # mean of days j..j+6, centred on j+3
        centre = np.arange(3, t - 3)
        keep = centre[(centre >= t - skip_last - window) & (centre < t - skip_last)]
        if keep.size >= 7:
            yy = x[:, keep]
            mm = m[:, keep - 3]
            excess = ((yy - mm) ** 2).sum(axis=1) * 7.0 / 6.0 - mm.sum(axis=1)
            m2 = (mm ** 2).sum(axis=1)
            with np.errstate(divide="ignore", invalid="ignore"):
                k_out = np.where(excess > 0, m2 / excess, DISPERSION_BOUNDS[1])
            k_out = np.where(mm.sum(axis=1) >= 5.0 * keep.size / 7.0, k_out, np.nan)
    fallback = pooled
    if fallback is None:
        pool = k_out if pool_mask is None else k_out[np.asarray(pool_mask, dtype=bool)]
        fallback = float(np.nanmedian(pool)) if np.isfinite(pool).any() else 20.0
    k_out = np.where(np.isfinite(k_out), k_out, fallback)
    return np.clip(k_out, *DISPERSION_BOUNDS)


def one_step_expected(y: np.ndarray, interval_pmf: Any, window: int = 7) -> np.ndarray:
    """One-day-ahead renewal predictions (n_series, T): R estimated up to day t - 1 (Cori et
    al. 2013 posterior mean, flat-ish prior) times the infectiousness of day t; NaN where R
    cannot be estimated.  Their errors are what a projection meets on its first day."""
    arr = np.nan_to_num(np.atleast_2d(np.asarray(y, dtype=float)))
    est = CoriEstimator(window=int(window), prior_shape=1.0, prior_scale=5.0,
                        min_infections=0.0).fit(arr, interval_pmf)
    mu = np.full(arr.shape, np.nan)
    mu[:, 1:] = est.mean_[:, :-1] * est.infectiousness_[:, 1:]
    return mu


def weeks_to_days(x: np.ndarray, step: int = 7) -> np.ndarray:
    """Weekly totals (..., W) spread evenly over their days (..., step W): each week's total /
    ``step`` on each of its days, the last day of the last week last."""
    arr = np.asarray(x, dtype=float)
    return np.repeat(arr / step, step, axis=-1)


def days_to_weeks(x: np.ndarray, step: int = 7) -> np.ndarray:
    """Daily values (..., step W) summed into consecutive weeks (..., W) (day 0 opens a week)."""
    arr = np.asarray(x, dtype=float)
    n_weeks = arr.shape[-1] // step
    return arr[..., : n_weeks * step].reshape(arr.shape[:-1] + (n_weeks, step)).sum(axis=-1)


def one_week_ahead_expected(y: np.ndarray, interval_pmf: Any, step: int = 7,
                            prior_shape: float = 1.0, prior_scale: float = 5.0) -> np.ndarray:
    """One-week-ahead renewal predictions of weekly totals (n_series, W); NaN where unknown.

    With week lags ``W_j`` of the daily interval (events spread evenly over their week, so
    ``W_0 > 0``: infections within the same week), R of week k is Cori et al.'s (2013)
    posterior mean ``(a + y_k) / (1/b + Lambda_k)``, ``Lambda_k = sum_{j>=0} W_j y_{k-j}``; the
    week-lag renewal ``y = R (W_0 y + sum_{j>=1} W_j y_{k+1-j})`` then predicts week k + 1 as
    ``R_k sum_{j>=1} W_j y_{k+1-j} / (1 - R_k W_0)`` (``R_k W_0`` capped at 0.9) from weeks up
    to k only.
    """
    arr = np.nan_to_num(np.atleast_2d(np.asarray(y, dtype=float)))
    big_w = weekly_lags(resolve_interval(interval_pmf), step)
    n, t = arr.shape
    j = np.arange(1, big_w.size)
    ahead = np.zeros((n, t))  # sum_{j>=1} W_j y_{k-j}: what earlier weeks bring to week k
    for lag, wj in zip(j, big_w[1:], strict=True):
        ahead[:, lag:] += wj * arr[:, : t - lag]
    lam = ahead + big_w[0] * arr
    r = (prior_shape + arr) / (1.0 / prior_scale + lam)
    out = np.full((n, t), np.nan)
    rw = np.minimum(r[:, :-1] * big_w[0], 0.9)
    out[:, 1:] = np.where(lam[:, :-1] > 0, r[:, :-1] * ahead[:, 1:] / (1.0 - rw), np.nan)
    return out


def estimate_log_r_drift(r_mean: np.ndarray, log_sd: np.ndarray | None = None, lag: int = 7,
                         bounds: tuple[float, float] = (0.005, 0.08),
                         max_log_sd: float = 0.3, robust: bool = True) -> float:
    """Random-walk sd per day of log R from a history of R estimates (n_series, T).

    Uses changes of log R over ``lag`` days (the estimator's window, so the two estimates share
    no data): E[change^2] = lag × sd^2 + the estimation variance of both ends, which ``log_sd``
    (the posterior sd of log R per cell, e.g. (q95 - q05) / (2 × 1.645 × mean)) lets us remove.
    Cells estimated more loosely than ``max_log_sd`` are left out.  ``robust``: the spread of the
    changes from their median absolute value, so the few large steps of an intervention (a jump,
    not a drift) do not set the day-to-day drift of every projection.  Pooled over every series
    (so a region with a short history borrows from the others), clipped to ``bounds``; the upper
    bound is also the answer when fewer than 10 changes are usable.
    """
    r = np.asarray(r_mean, dtype=float)
    if r.ndim != 2 or r.shape[1] <= lag:
        return float(bounds[1])
    with np.errstate(divide="ignore", invalid="ignore"):
        d = np.log(r[:, lag:]) - np.log(r[:, :-lag])
    if log_sd is None:
        noise = np.zeros_like(d)
    else:
        sd = np.asarray(log_sd, dtype=float)
        sd = np.where(sd <= max_log_sd, sd, np.nan)
        noise = sd[:, lag:] ** 2 + sd[:, :-lag] ** 2
    ok = np.isfinite(d) & np.isfinite(noise)
    if ok.sum() < 10:
        return float(bounds[1])
    if robust:  # scale from the median absolute change (normal consistency 1.4826)
        total = (1.4826 * float(np.median(np.abs(d[ok])))) ** 2
    else:
        total = float((d[ok] ** 2).mean())
    var = (total - float(np.median(noise[ok]) if robust else noise[ok].mean())) / lag
    return float(np.clip(np.sqrt(max(var, 0.0)), *bounds))


def sample_r(shape: np.ndarray, scale: np.ndarray, weights: np.ndarray, n_draws: int,
             rnd: SeriesRandom) -> np.ndarray:
    """Draws (n_draws, n_series) of R from a gamma-mixture posterior of one day.

    ``shape`` / ``scale``: (n_components, n_series) (e.g. a fitted Cori estimator's ``shape_`` /
    ``scale_`` at the last day); ``weights``: (n_components,).  One random stream per series, so
    a series' draws do not depend on the others.  NaN where a series has no posterior.
    """
    a = np.atleast_2d(np.asarray(shape, dtype=float))
    th = np.atleast_2d(np.asarray(scale, dtype=float))
    w = np.asarray(weights, dtype=float)
    cum = np.cumsum(w / w.sum())
    u = rnd.uniform((int(n_draws),))  # (n_series, n_draws)
    comp = np.minimum(np.searchsorted(cum, u), a.shape[0] - 1)
    cols = np.arange(a.shape[1])[:, None]
    valid = np.all(np.isfinite(a), axis=0)
    a_s = np.where(valid[:, None], a[comp, cols], 1.0)
    th_s = np.where(valid[:, None], th[comp, cols], 1.0)
    out = rnd.gamma(a_s, th_s)
    out[~valid] = np.nan
    return out.T


class RenewalForecaster:
    """Project daily incidence with the renewal equation from samples of the current R.

    Parameters: ``horizon`` (days), ``log_r_sd`` (random-walk sd of log R per day),
    ``damping_days`` (half-life of today's log R toward 0, None = none), ``damp_drift`` (damp
    the random walk's steps too: an AR(1) on log R), ``damping_spread`` (doublings either side
    of ``damping_days`` over which each draw's half-life is log-uniform, :mod:`~tallywave.models.
    damping`; 0 = one half-life), ``dispersion`` (negative-binomial size, a
    number or None for Poisson; ``fit`` may override it per series), ``random_state``.
    """

    def __init__(
        self,
        *,
        horizon: int = 28,
        log_r_sd: float = 0.0,
        damping_days: float | None = None,
        damp_drift: bool = False,
        damping_spread: float = 0.0,
        dispersion: float | None = None,
        random_state: RandomState = None,
    ) -> None:
        self.horizon = horizon
        self.log_r_sd = log_r_sd
        self.damping_days = damping_days
        self.damp_drift = damp_drift
        self.damping_spread = damping_spread
        self.dispersion = dispersion
        self.random_state = random_state

    def fit(self, incidence: Any, interval_pmf: Any, r_samples: Any, *,
            dispersion: Any = None, capacity: Any = None) -> RenewalForecaster:
        """Store history (n_series, T) or draws (n_draws, n_series, T), the interval, R draws.

        ``r_samples`` is (n_draws, n_series); history draws and R draws are paired by index
        (either may have a single draw, which is broadcast).  ``dispersion``: per-series sizes
        (n_series,) overriding the constructor's; ``capacity``: per-series counts that would use
        up the susceptible pool (NaN / None = no depletion).  Only the last ``len(pmf) - 1`` days
        of history matter; missing earlier days count as 0.
        """
        if int(self.horizon) != self.horizon or self.horizon < 1:
            raise ValueError(f"horizon must be a positive integer, got {self.horizon}")
        if not self.log_r_sd >= 0.0:
            raise ValueError("log_r_sd must be >= 0")
        if self.damping_days is not None and not self.damping_days > 0.0:
            raise ValueError("damping_days must be > 0 (or None)")
        if not self.damping_spread >= 0.0:
            raise ValueError("damping_spread must be >= 0")
        w = resolve_interval(interval_pmf)
        hist = _as_incidence(incidence, 3, "incidence")
        r = np.asarray(r_samples, dtype=float)
        if r.ndim == 1:
            r = r[:, None]
        n_series = hist.shape[1]
        if r.ndim != 2 or r.shape[1] != n_series:
            raise ValueError(
                f"r_samples must be (n_draws, n_series={n_series}), got {np.shape(r_samples)}"
            )
        if np.any(~(r >= 0.0)):
            raise ValueError("r_samples must be non-negative and not NaN")
        if hist.shape[0] not in (1, r.shape[0]) and r.shape[0] != 1:
            raise ValueError(
                f"history has {hist.shape[0]} draws but r_samples has {r.shape[0]}; "
                "they must match or one must be 1"
            )
        k = self.dispersion if dispersion is None else dispersion
        if k is None:
            disp = np.full(n_series, np.inf)
        else:
            disp = np.broadcast_to(np.asarray(k, dtype=float), (n_series,)).copy()
            if np.any(~(disp > 0.0)):
                raise ValueError("dispersion must be > 0 (or None for Poisson)")
        cap = np.full(n_series, np.nan) if capacity is None else \
            np.broadcast_to(np.asarray(capacity, dtype=float), (n_series,)).copy()
        lag = w.size - 1
        if hist.shape[-1] < lag:
            pad = np.zeros(hist.shape[:-1] + (lag - hist.shape[-1],))
            hist = np.concatenate([pad, hist], axis=-1)
        self.interval_ = w
        self.history_ = hist[..., hist.shape[-1] - lag :] if lag > 0 else hist[..., :0]
        self.r_samples_ = r
        self.n_draws_ = max(hist.shape[0], r.shape[0])
        self.dispersion_ = disp
        self.capacity_ = cap
        return self

    def _r_paths(self, rnd: SeriesRandom) -> np.ndarray:
        """log R per draw, series and day (n_draws, n_series, horizon): today's log R damped by
        phi^h plus the drift's random walk (its steps damped too with ``damp_drift``)."""
        h_max, n_draws = int(self.horizon), self.n_draws_
        n_series = self.r_samples_.shape[1]
        with np.errstate(divide="ignore"):
            log_r0 = np.log(np.broadcast_to(self.r_samples_, (n_draws, n_series)))
        steps = np.zeros((n_draws, n_series, h_max))
        if self.log_r_sd > 0.0:
            steps = np.moveaxis(rnd.normal((n_draws, h_max)), 0, 1) * float(self.log_r_sd)
        # daily damping ratio, one per draw and series (a mixture over half-lives with a spread)
        phi = np.full((n_draws, n_series),
                      1.0 if self.damping_days is None else 0.5 ** (1.0 / float(self.damping_days)))
        if self.damping_days is not None and self.damping_spread > 0.0:
            phi = damping_ratios(float(self.damping_days), float(self.damping_spread),
                                 np.moveaxis(rnd.uniform((n_draws,)), 0, 1))
        if not self.damp_drift:
            return (log_r0[..., None] * phi[..., None] ** np.arange(1, h_max + 1)
                    + np.cumsum(steps, axis=-1))
        out = np.empty((n_draws, n_series, h_max))
        cur = log_r0
        for h in range(h_max):  # AR(1) on log R (a random walk when phi = 1)
            cur = phi * cur + steps[..., h]
            out[..., h] = cur
        return out

    def sample(self) -> np.ndarray:
        """Simulate observed incidence for h = 1..horizon: (n_draws, n_series, horizon).

        Also sets ``expected_`` (latent means) and ``r_paths_`` (R per day, after depletion),
        same shape.  Rebuilt from ``random_state`` on every call.
        """
        if not hasattr(self, "history_"):
            raise RuntimeError("RenewalForecaster is not fitted; call fit() first")
        h_max = int(self.horizon)
        n_draws = self.n_draws_
        n_series = self.r_samples_.shape[1]
        rnd = SeriesRandom(self.random_state, n_series)
        lag = self.interval_.size - 1
        buf = np.zeros((n_draws, n_series, lag + h_max))
        buf[..., :lag] = self.history_
        w_rev = self.interval_[1:][::-1]  # w_lag .. w_1, aligned with buf[t-lag .. t-1]
        with np.errstate(over="ignore"):
            r_path = np.exp(self._r_paths(rnd))
        cap = self.capacity_
        deplete = np.isfinite(cap) & (cap > 0)
        used = np.zeros((n_draws, n_series))
        for h in range(h_max):  # the renewal recursion is sequential in time only
            t = lag + h
            r_h = r_path[..., h]
            if deplete.any():
                left = np.clip(1.0 - used / np.where(deplete, cap, 1.0), 0.0, 1.0)
                r_h = np.where(deplete[None], r_h * left, r_h)
                r_path[..., h] = r_h
            buf[..., t] = r_h * np.einsum("dsl,l->ds", buf[..., t - lag : t], w_rev)
            used += buf[..., t]
        mu = np.nan_to_num(buf[..., lag:], nan=0.0, posinf=1e12)
        mu = np.minimum(mu, 1e12)
        k = self.dispersion_
        obs = np.moveaxis(rnd.negative_binomial(np.moveaxis(mu, 1, 0),
                                                np.where(np.isinf(k), 1e12, k)[:, None, None]),
                          0, 1)
        self.expected_ = mu
        self.r_paths_ = r_path
        return obs

    def forecast(self, levels: Sequence[float] | np.ndarray) -> QuantileForecast:
        """Forecast quantiles for days 1..horizon (series × horizon × level), >= 0, monotone."""
        q = _check_q_levels(levels)
        order = np.argsort(q)
        samples = self.sample()
        out = np.moveaxis(np.quantile(samples, q[order], axis=0), 0, -1)
        out = np.maximum(np.maximum.accumulate(out, axis=-1), 0.0)
        return QuantileForecast(out, q[order], np.arange(1, int(self.horizon) + 1),
                                model="renewal")

    def quantiles(self, q_levels: Sequence[float] | np.ndarray) -> np.ndarray:
        """Forecast quantiles as an array (n_series, horizon, n_q) in the order of ``q_levels``."""
        q = _check_q_levels(q_levels)
        fc = self.forecast(q)
        out = np.empty_like(fc.values)
        out[..., np.argsort(q)] = fc.values
        return out
