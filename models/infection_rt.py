"""R_t by date of infection: back-calculated infections and an over-dispersed renewal posterior.

Counts are dated by an event that follows infection (symptom onset, admission, death), so a
renewal estimate on their own dates lags the true R_t by the infection-to-event delay (Gostic et
al. 2020).  :class:`InfectionRt` publishes R_t on the date of infection:

1. **Back-calculation.** Infections are recovered from the (nowcast-completed) counts by the
   Richardson–Lucy / EMS deconvolution of :mod:`tallywave.models.deconvolution` through the
   infection-to-reference-date delay pmf ``f``; ``q_s`` is the share of day-s infections whose
   counts are already in the data.
2. **Renewal posterior on a centred window.** With infections ``I`` and total infectiousness
   ``Lambda = w * I`` (Cori et al. 2013), the part of day-u infections already counted is
   Poisson with mean ``R q_u Lambda_u``; over the window W(s) this gives Cori's conjugate gamma
   posterior with ``A = sum q_u I_u`` and ``B = sum q_u Lambda_u`` — the last days, not yet
   observable, carry little information and their intervals widen.
3. **Over-dispersion.** Daily infections are negative binomial with size k (variance
   ``m + m^2/k``), estimated per series by moments from the counts' residuals; a window's
   variance-to-mean ratio ``phi = 1 + sum q^2 m^2 / (k sum q m)`` divides A and B (the
   quasi-likelihood equivalent of the NB likelihood; McCullagh & Nelder 1989, ch. 9).
4. **Mixture.** Components are every nowcast draw (its change of the counts moves the
   infections by the linearised deconvolution, :func:`~tallywave.models.deconvolution.
   response_operator`) × every candidate delay × every candidate generation interval; the
   published distribution is the gamma with the mixture's mean and variance (law of total
   variance, so the mixture is never narrower than its components on average).

Quantiles use :func:`~tallywave.models.renewal.gamma_ppf_fast`.  No random numbers are drawn.

**Weekly counts** (``step=7``): columns are weeks.  The daily delay and generation interval are
turned into week lags by :func:`~tallywave.models.deconvolution.weekly_lags` (events spread
evenly over their week), so the interval has mass at lag 0 (infections in the same week), which
the total infectiousness ``Lambda_k = sum_{j >= 0} w_j I_{k-j}`` keeps; windows count weeks, and
the growth rate comes from the daily interval (a daily rate, as for daily counts).  Under
growth, infections sit later in their week than "evenly" assumes and the week-lag renewal pulls
R towards 1 (about 1 % at a weekly growth of x1.4, 5 % at x2); the posterior is rescaled by the
factor that is exact for steady exponential growth (:func:`~tallywave.models.renewal.
weekly_r_factor`).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from scipy import special

from tallywave.models.deconvolution import (
    Deconvolution,
    delay_stack,
    response_operator,
    richardson_lucy,
    weekly_lags,
)
from tallywave.models.renewal import (
    _convolve_last,
    _interval_stack,
    gamma_ppf_fast,
    growth_rate_from_r,
    matched_gamma,
    weekly_r_factor,
)

__all__ = ["InfectionRt"]

_ALL = slice(None)
_EXCESS_FLOOR = 2.0  # our choice, set by simulation: see _week_excess
_CHI2_1_MEDIAN = 0.45493642311957283  # median of chi-square(1): scipy.stats.chi2(1).median()


def _weights(w: Sequence[float] | None, n: int, name: str) -> np.ndarray:
    """Normalised non-negative weights (equal when None)."""
    if w is None:
        return np.full(n, 1.0 / n)
    arr = np.asarray(w, dtype=float)
    if arr.shape != (n,) or np.any(~(arr >= 0.0)) or arr.sum() <= 0.0:
        raise ValueError(f"{name} must be {n} non-negative numbers, not all 0")
    return arr / arr.sum()


def _window_sum(x: np.ndarray, lo: int, hi: int) -> np.ndarray:
    """sum_{u = s-lo}^{s+hi} x_u along the last axis, the window clipped to the array."""
    n = x.shape[-1]
    cs = np.concatenate([np.zeros(x.shape[:-1] + (1,)), np.cumsum(x, axis=-1)], axis=-1)
    s = np.arange(n)
    return cs[..., np.minimum(s + hi + 1, n)] - cs[..., np.maximum(s - lo, 0)]


def _window_matrix(days: np.ndarray, out_days: np.ndarray, lo: int, hi: int) -> np.ndarray:
    """0/1 matrix (len(days), len(out_days)): 1 where day u lies in the window of day s."""
    d = out_days[None, :] - days[:, None]  # s - u
    return ((d >= -hi) & (d <= lo)).astype(float)


class InfectionRt:
    """R_t on infection dates from counts dated later; see the module docstring for the method.

    Parameters: ``window`` (days), ``align`` (``"centre"``: the window is centred on the day,
    clipped at the last day; ``"trailing"``: it ends on the day), Cori et al.'s gamma prior
    (``prior_shape``, ``prior_scale``), ``min_infections`` (no estimate where the window's
    expected *counted* infections ``B`` are fewer), ``iterations`` of the EMS deconvolution,
    ``dispersion`` (NB size k; None = estimate per series, ``inf`` = Poisson), ``recent_days``
    and ``recent_share`` (a day is flagged dependent when more than ``recent_share`` of its
    window's infections would be counted in the last ``recent_days`` days or later);
    ``keep_components`` keeps the mixture's components of the days the draws reach
    (``components_``: a list of (series, days, shape, rate, weight) per delay and interval, the
    draws on axis 1 of shape and rate; for checking the published gamma).  ``step``: days per
    column of the counts, 1 (daily) or 7 (weekly totals; ``window`` and ``recent_days`` then
    count weeks, ``delay`` and ``interval`` stay daily and are turned into week lags;
    ``growth_correction`` then rescales the posterior by
    :func:`~tallywave.models.renewal.weekly_r_factor`, the week-lag interval's pull of R towards
    1 under growth, exact for steady exponential growth; ``components_`` are not rescaled).
    """

    def __init__(self, *, window: int = 7, align: str = "centre", prior_shape: float = 1.0,
                 prior_scale: float = 5.0, min_infections: float = 12.0, iterations: int = 10,
                 dispersion: float | None = None, recent_days: int = 14,
                 recent_share: float = 0.1, keep_components: bool = False,
                 step: int = 1, growth_correction: bool = True) -> None:
        self.window = window
        self.align = align
        self.prior_shape = prior_shape
        self.prior_scale = prior_scale
        self.min_infections = min_infections
        self.iterations = iterations
        self.dispersion = dispersion
        self.recent_days = recent_days
        self.recent_share = recent_share
        self.keep_components = keep_components
        self.step = step
        self.growth_correction = growth_correction

    # -- parameters ----------------------------------------------------------------------------

    def _halves(self) -> tuple[int, int]:
        """Days of the window before (lo) and after (hi) the day it is published for."""
        w = int(self.window)
        if w != self.window or w < 1:
            raise ValueError(f"window must be a positive integer, got {self.window}")
        if self.align == "centre":
            return w // 2, w - 1 - w // 2
        if self.align == "trailing":
            return w - 1, 0
        raise ValueError(f"align must be 'centre' or 'trailing', got {self.align!r}")

    def _check(self) -> None:
        if not (self.prior_shape > 0.0 and self.prior_scale > 0.0):
            raise ValueError("prior_shape and prior_scale must be positive")
        if not self.min_infections >= 0.0:
            raise ValueError("min_infections must be >= 0")
        if self.dispersion is not None and not self.dispersion > 0.0:
            raise ValueError("dispersion (NB size k) must be positive, inf or None")
        if self.step not in (1, 7):
            raise ValueError(f"step must be 1 (daily) or 7 (weekly), got {self.step}")

    # -- fitting -------------------------------------------------------------------------------

    def fit(self, observed: Any, delay: Any, interval: Any, *, draws: Any = None,
            draws_start: int | None = None, delay_weights: Sequence[float] | None = None,
            interval_weights: Sequence[float] | None = None) -> InfectionRt:
        """Fit on counts ``observed`` (n_series, T) by reference date.

        ``delay``: infection-to-reference-date delay(s) (:func:`~tallywave.models.
        deconvolution.delay_stack` formats); ``interval``: generation interval(s) (the formats
        of :func:`~tallywave.models.renewal.resolve_interval`, or a list of candidates).
        ``draws`` (m, n_series, t): joint draws of the counts of days ``draws_start`` ..
        ``draws_start + t - 1`` (a nowcast), mixed with equal weights.  Fitted, on the
        infection days 0..T-1: ``mean_``, ``sd_``, ``shape_``, ``scale_`` (the published gamma),
        ``estimable_`` (n, T), ``dependent_`` (T,), ``dispersion_`` (n,) and ``infections_``
        (n, T), ``observability_`` (T,) of the first delay.
        """
        self._check()
        lo, hi = self._halves()
        y = np.asarray(observed, dtype=float)
        if y.ndim != 2 or y.shape[1] < 1:
            raise ValueError(f"observed must be (n_series, n_days), got shape {y.shape}")
        if not np.all(np.isfinite(y)) or np.any(y < 0.0):
            raise ValueError("observed counts must be finite and non-negative")
        fs = delay_stack(delay)
        ws = _interval_stack(interval)
        self.daily_interval_pmfs_ = ws
        if self.step != 1:
            fs, ws = weekly_lags(fs, self.step), weekly_lags(ws, self.step)
        dw = _weights(delay_weights, fs.shape[0], "delay_weights")
        iw = _weights(interval_weights, ws.shape[0], "interval_weights")
        n, n_days = y.shape
        nb = fs.shape[1] - 1
        dy, start = self._draw_changes(draws, draws_start, y)
        decs = [richardson_lucy(y, f, n_iter=int(self.iterations), n_before=nb) for f in fs]
        k_hat = self._dispersion_of(y, fs[0], n_days if start is None else start)
        if self.step != 1 and self.dispersion is None:
            # A weekly total holds the echo, within its own week, of its infections' noise (a
            # share w_0 of the infectiousness of a week's infections acts in that week): that
            # inflates its variance by about 1 / (1 - R w_0)^2, but R's ratio I / Lambda, whose
            # Lambda carries w_0 I of the week too, sees only the new noise.  At R ~ 1:
            k_hat = k_hat / (1.0 - float(np.dot(iw, ws[:, 0]))) ** 2
        self.components_: list[tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, float]] = []
        e1 = np.zeros((n, n_days))
        e2 = np.zeros((n, n_days))
        b_min = np.full((n, n_days), np.inf)
        for f, dec, w_d in zip(fs, decs, dw, strict=True):
            self._accumulate(y, f, dec, ws, iw * w_d, k_hat, lo, hi, dy, start, e1, e2, b_min)
        var = np.maximum(e2 - e1**2, 0.0)
        if self.step != 1 and self.growth_correction:
            c = np.zeros(e1.shape)
            for w_day, wgt in zip(self.daily_interval_pmfs_, iw, strict=True):
                c += wgt * weekly_r_factor(e1, w_day, self.step)
            e1, var = e1 * c, var * c**2
        shape, scale = matched_gamma(e1, var)
        first = lo + _span(ws)  # the window and the interval inside the observed days
        ok = (b_min >= self.min_infections) & np.isfinite(shape)
        ok[:, :first] = False
        self.mean_ = np.where(ok, e1, np.nan)
        self.sd_ = np.where(ok, np.sqrt(var), np.nan)
        self.shape_ = np.where(ok, shape, np.nan)
        self.scale_ = np.where(ok, scale, np.nan)
        self.estimable_ = ok
        self.dispersion_ = k_hat
        self.infections_ = decs[0].infections[:, nb:]
        self.observability_ = decs[0].observability[nb:]
        self.dependent_ = self._dependent(fs[0], n_days, lo, hi)
        self.interval_pmfs_ = ws
        self.interval_weights_ = iw
        self.n_components_ = fs.shape[0] * ws.shape[0] * (1 if dy is None else dy.shape[0])
        return self

    @staticmethod
    def _draw_changes(draws: Any, start: int | None, y: np.ndarray
                      ) -> tuple[np.ndarray | None, int | None]:
        """Validated draws as changes from the counts: (m, n, t) and the first column."""
        if draws is None:
            return None, None
        d = np.asarray(draws, dtype=float)
        n, n_days = y.shape
        if d.ndim != 3 or d.shape[1] != n or start is None:
            raise ValueError(f"draws must be (m, {n}, t) with draws_start, got {d.shape}")
        t = d.shape[2]
        if not 0 <= int(start) <= n_days - t or d.shape[0] < 1:
            raise ValueError(f"draws of {t} days cannot start at column {start} of {n_days}")
        if t == 0:
            return None, None
        if not np.all(np.isfinite(d)) or np.any(d < 0.0):
            raise ValueError("draws must be finite and non-negative")
        return d - y[None, :, int(start): int(start) + t], int(start)

    def _accumulate(self, y: np.ndarray, f: np.ndarray, dec: Deconvolution, ws: np.ndarray,
                    wk: np.ndarray,
                    k_hat: np.ndarray, lo: int, hi: int, dy: np.ndarray | None,
                    start: int | None, e1: np.ndarray, e2: np.ndarray, b_min: np.ndarray
                    ) -> None:
        """Add one delay's components (all intervals, all draws) to the mixture moments."""
        nb = dec.n_before
        q = dec.observability
        lam = dec.infections
        a_all = _window_sum(q * lam, lo, hi)[:, nb:]
        with np.errstate(invalid="ignore", divide="ignore"):
            phi = 1.0 + _window_sum(q**2 * lam**2, lo, hi)[:, nb:] / (a_all * k_hat[:, None])
        phi = np.where(np.isfinite(phi), phi, 1.0)
        a0, c0 = self.prior_shape, 1.0 / self.prior_scale
        b_all = [_window_sum(q * _convolve_last(lam, w[None, :]), lo, hi)[:, nb:] for w in ws]
        for b, wgt in zip(b_all, wk, strict=True):
            np.minimum(b_min, b, out=b_min)
            alpha, beta = a0 + a_all / phi, c0 + b / phi
            e1 += wgt * alpha / beta
            e2 += wgt * alpha * (alpha + 1.0) / beta**2
        if dy is None or start is None:
            return
        # only series with a day the draws reach that can be published need the draws
        reach = np.arange(max(0, start - f.size + 1 - hi), e1.shape[1])
        can = np.all([b[:, reach] >= self.min_infections for b in b_all], axis=0).any(axis=1)
        rows = np.flatnonzero(can & np.any(dy != 0.0, axis=(0, 2)))
        if rows.size == 0:
            return
        sub = Deconvolution(lam[rows], q, dec.fitted[rows], nb)
        tail, d_ab = self._draw_sums(y[rows], f, sub, ws, lo, hi, dy[:, rows], start)
        m = dy.shape[0]
        n_s = tail.size
        cell = np.ix_(rows, tail)
        inv_ph = 1.0 / phi[cell][:, None, :]
        alpha = d_ab[..., :n_s]
        alpha += a_all[cell][:, None, :]
        np.maximum(alpha, 0.0, out=alpha)
        alpha *= inv_ph
        alpha += a0
        for k, wgt in enumerate(wk):
            beta = d_ab[..., (k + 1) * n_s:(k + 2) * n_s]
            beta += b_all[k][cell][:, None, :]
            np.maximum(beta, 0.0, out=beta)
            beta *= inv_ph
            beta += c0
            inv_b = np.divide(1.0, beta, out=beta)
            ratio = alpha * inv_b  # component means alpha / beta
            second = (ratio + inv_b) * ratio  # alpha (alpha + 1) / beta^2
            if self.keep_components:
                self.components_.append((rows, tail, alpha.copy(), 1.0 / inv_b, wgt / m))
            # replace the single-component term of these cells by the average over the draws
            alpha0 = a0 + a_all[cell] / phi[cell]
            beta0 = c0 + b_all[k][cell] / phi[cell]
            e1[cell] += wgt * (ratio.sum(axis=1) / m - alpha0 / beta0)
            e2[cell] += wgt * (second.sum(axis=1) / m - alpha0 * (alpha0 + 1.0) / beta0**2)

    def _draw_sums(self, y: np.ndarray, f: np.ndarray, dec: Deconvolution, ws: np.ndarray,
                   lo: int, hi: int, dy: np.ndarray, start: int
                   ) -> tuple[np.ndarray, np.ndarray]:
        """Changes of A and of B (every interval) that each draw makes on the affected days.

        Returns the affected infection days ``tail`` (n_s,) and (n, m, (1 + K) n_s): first the
        change of A, then of B for each interval.  All maps are linear: the draw's change of
        the counts -> infections (the derivative of the deconvolution, per series) -> window
        sums (shared matrices).
        """
        nb = dec.n_before
        n_days = dec.fitted.shape[-1]
        t = dy.shape[2]
        longest = int(np.flatnonzero(f > 0.0)[-1])
        first_inf = max(-nb, start - longest)
        inf_days = np.arange(first_inf, n_days)
        # Counts of a day feed the infections of the days up to `longest` before it.  Where all
        # of those are already fully counted one EM step already gives the response; the
        # counts of the later days inform infections not yet fully counted, whose estimates
        # move further over the deconvolution's steps: those take all of its steps.
        q = dec.observability[nb:]
        partial = np.flatnonzero(q < 0.999)
        first_partial = int(partial[0]) if partial.size else n_days
        split = int(np.clip(first_partial, start, start + t))
        dyt = np.moveaxis(dy, 0, 1)  # (n, m, t)
        d_lam = np.zeros(dyt.shape[:2] + (inf_days.size,))
        for days, steps in ((np.arange(start, split), 1),
                            (np.arange(split, start + t), int(self.iterations))):
            if days.size:
                op = response_operator(dec, f, y, days, inf_days, steps)  # (n, t', n_inf)
                d_lam += np.matmul(dyt[..., days - start], op)
        tail = np.arange(max(0, first_inf - hi), n_days)
        q = dec.observability[inf_days + nb]
        win = _window_matrix(inf_days, tail, lo, hi) * q[:, None]  # (n_inf, n_s)
        lag = inf_days[None, :] - inf_days[:, None]  # u - v for (v, u)
        mats = [win]
        for w in ws:
            # lag 0 holds w[0]: 0 for a daily interval, transmission within the week if weekly
            conv = np.where((lag >= 0) & (lag < w.size), w[np.clip(lag, 0, w.size - 1)], 0.0)
            mats.append(conv @ win)
        return tail, d_lam @ np.concatenate(mats, axis=1)

    def _dispersion_of(self, y: np.ndarray, f: np.ndarray, end: int) -> np.ndarray:
        """NB size k of daily infections per series, from the counts of days before ``end``.

        Weekly totals ``Y_s`` (7-day sums, free of weekday effects; the counts themselves when
        they are weekly, then ``k`` is that of weekly infections) are compared with the
        log-linear interpolation of their neighbours, ``sqrt(Y_{s-7} Y_{s+7})``.  Poisson
        counting noise gives the residual a variance of 1.5 M (the neighbours add half a week's);
        NB excess of the infections of a day u adds ``c_u^2 m^2 / k``, where
        ``c_u = g_0(u) - (g_-(u) + g_+(u)) / 2`` and ``g`` are the shares of day u's counts that
        the delay puts in the week and in the weeks before and after it.  ``1/k >= 0`` makes the
        median of the squared standardised residuals 0.455, the median of a chi-square with one
        degree of freedom — robust to the few weeks of a change in transmission.  (The
        epidemic's own echo of a fluctuation in later weeks is not modelled: k errs large.)
        """
        n = y.shape[0]
        if self.dispersion is not None:
            return np.full(n, float(self.dispersion))
        p = 7 // int(self.step)  # columns per week (weekly counts: the residuals are weekly too)
        cs = np.concatenate([np.zeros((n, 1)), np.cumsum(y[:, :end], axis=1)], axis=1)
        week = cs[:, p:] - cs[:, :-p]  # totals of days s..s+6
        if week.shape[1] < 3 * p:
            return np.full(n, np.inf)
        mid = week[:, p:-p]
        pred = np.sqrt(week[:, :-2 * p] * week[:, 2 * p:])  # log-linear between the neighbours
        use = pred >= 10.0
        res2 = np.where(use, (mid - pred) ** 2, np.nan)
        scale = np.where(use, _week_excess(f, p) * (pred / float(p)) ** 2, np.nan)
        # z_s(kappa) = res2_s / (1.5 pred_s + kappa scale_s) falls with kappa and crosses the
        # target at kappa_s, so median_s z_s(kappa) = target exactly at kappa = median_s kappa_s
        with np.errstate(invalid="ignore", divide="ignore"):
            kappa_s = (res2 / _CHI2_1_MEDIAN - 1.5 * pred) / scale
        enough = use.sum(axis=1) >= 7
        kappa = np.zeros(n)
        if enough.any():
            kappa[enough] = np.nanmedian(kappa_s[enough], axis=1)
        kappa = np.maximum(kappa, 0.0)
        with np.errstate(divide="ignore"):
            return np.where(kappa > 0.0, 1.0 / kappa, np.inf)

    def _dependent(self, f: np.ndarray, n_days: int, lo: int, hi: int) -> np.ndarray:
        """Days whose window holds infections counted in the last ``recent_days`` days."""
        cdf = np.cumsum(f)
        s = np.arange(n_days)
        cut = n_days - int(self.recent_days)  # counts on days >= cut are recent
        room = cut - 1 - s  # largest delay still counted before the recent days
        late = 1.0 - np.where(room < 0, 0.0, cdf[np.clip(room, 0, f.size - 1)])
        late = np.where(room >= f.size - 1, 0.0, late)
        worst = np.array([late[max(0, d - lo): d + hi + 1].max() for d in s])
        return worst > self.recent_share

    # -- outputs -------------------------------------------------------------------------------

    def quantiles(self, q_levels: Sequence[float] | np.ndarray, days: slice = _ALL) -> np.ndarray:
        """Quantiles of the published gamma, (n_series, T, n_q) (or the ``days`` asked for);
        NaN where not estimable."""
        self._fitted()
        return gamma_ppf_fast(self.shape_[:, days], self.scale_[:, days], q_levels)

    def prob_above(self, threshold: float = 1.0, days: slice = _ALL) -> np.ndarray:
        """P(R_t > threshold) under the published gamma, (n_series, T) (or ``days``)."""
        self._fitted()
        with np.errstate(invalid="ignore"):
            return special.gammaincc(self.shape_[:, days], threshold / self.scale_[:, days])

    def growth_rate(self, r_median: np.ndarray | None = None) -> np.ndarray:
        """Daily growth rate at the posterior median of R_t: the interval-weighted average of
        the Wallinga & Lipsitch (2007) rates, one per candidate (daily) interval (same sign as
        log R, so growth > 0 exactly when P(R_t > 1) > 1/2)."""
        self._fitted()
        med = self.quantiles([0.5])[..., 0] if r_median is None else r_median
        out = np.zeros(med.shape)
        for w, wgt in zip(self.daily_interval_pmfs_, self.interval_weights_, strict=True):
            out += wgt * growth_rate_from_r(med, w)
        return out

    def _fitted(self) -> None:
        if not hasattr(self, "shape_"):
            raise RuntimeError("InfectionRt is not fitted; call fit() first")


def _week_excess(f: np.ndarray, period: int = 7) -> float:
    """sum_u c_u^2 for the weekly residual of :meth:`InfectionRt._dispersion_of`: c_u is the
    share of day u's counts in the week minus half the shares in the weeks either side
    (``period`` columns per week: 7 for daily counts, 1 for weekly ones; the floor scales with
    it)."""
    L = f.size
    u = np.arange(-L - period, 2 * period)  # infection columns (week = count columns 0..p-1)
    cdf = np.concatenate([[0.0], np.cumsum(f)])

    def share(t0: int) -> np.ndarray:  # share of column-u counts on columns t0..t0+p-1
        hi = np.clip(t0 + period - u, 0, L)
        lo = np.clip(t0 - u, 0, L)
        return cdf[hi] - cdf[lo]

    c = share(0) - 0.5 * (share(-period) + share(period))
    return max(float(np.sum(c**2)), _EXCESS_FLOOR * period / 7)


def _span(ws: np.ndarray) -> int:
    """Days back the interval reaches (its 0.99 quantile, the widest candidate)."""
    cdf = np.cumsum(ws, axis=1)
    return int(max(np.searchsorted(c, 0.99) for c in cdf))
