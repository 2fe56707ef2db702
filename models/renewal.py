"""Renewal-equation mathematics: time-varying reproduction number and growth rate.

Contents
--------
* Interval handling: :func:`discretise_gamma_interval` (Cori et al. 2013, Web Appendix 11),
  :func:`resolve_interval` (pmf / ``(mean, sd)`` / settings mapping -> validated pmf) and
  :func:`total_infectiousness` (``Lambda_t = sum_s w_s I_{t-s}``).
* :class:`CoriEstimator`: conjugate gamma posterior for R_t over a sliding window (Cori et al.
  2013, Am J Epidemiol 178:1505), vectorised over series and days, with mixtures over incidence
  draws (nowcast uncertainty) and over candidate intervals (interval uncertainty).
* Growth: :func:`growth_rate_from_r` / :func:`reproduction_number_from_growth` (Wallinga &
  Lipsitch 2007, Proc R Soc B 274:599, discrete-interval form), :func:`doubling_time`,
  :func:`log_linear_growth` (rolling least-squares slope of log incidence).
* The renewal-equation *projection* lives in :mod:`tallywave.models.renewal_forecast`.

Array convention: time is always the last axis; series (regions) come before it; draws or
mixture components, when present, come first.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from scipy import interpolate, signal, special

from tallywave.models.deconvolution import weekly_lags
from tallywave.models.distributions import discretise_gamma_interval

__all__ = [
    "CoriEstimator",
    "discretise_gamma_interval",
    "doubling_time",
    "growth_rate_from_r",
    "log_linear_growth",
    "reproduction_number_from_growth",
    "resolve_interval",
    "total_infectiousness",
    "weekly_r_factor",
]

_BLOCK_ELEMENTS = 2_000_000  # working-set size (elements) for blocked mixture computations


# ---------------------------------------------------------------------------------------------
# Interval distributions
# ---------------------------------------------------------------------------------------------


def _validate_pmf(pmf: Any) -> np.ndarray:
    """Check an explicit daily pmf (non-negative, finite, w[0] == 0) and normalise it."""
    w = np.asarray(pmf, dtype=float)
    if w.ndim != 1 or w.size < 2:
        raise ValueError(f"interval pmf must be 1-D with at least 2 entries, got shape {w.shape}")
    if not np.all(np.isfinite(w)) or np.any(w < 0.0):
        raise ValueError("interval pmf entries must be finite and non-negative")
    if w[0] != 0.0:
        raise ValueError(f"interval pmf must have w[0] = 0 (same-day transmission), got {w[0]}")
    total = w.sum()
    if total <= 0.0:
        raise ValueError("interval pmf sums to 0")
    return w / total


def resolve_interval(interval: Any) -> np.ndarray:
    """Turn one interval specification into a validated daily pmf (w[0] = 0, sums to 1).

    Accepted: a 1-D pmf (list/array, w[0] must be 0); a tuple ``(mean, sd)``; a mapping with
    ``mean`` and ``sd`` (optionally ``max_days``) or with ``pmf`` (the settings-file format).
    """
    if isinstance(interval, Mapping):
        if "pmf" in interval:
            return _validate_pmf(interval["pmf"])
        if "mean" in interval and "sd" in interval:
            return discretise_gamma_interval(
                interval["mean"], interval["sd"], interval.get("max_days")
            )
        raise ValueError("interval mapping needs keys 'mean' and 'sd', or 'pmf'")
    if isinstance(interval, tuple) and len(interval) == 2 and all(np.ndim(v) == 0 for v in interval):
        return discretise_gamma_interval(interval[0], interval[1])
    return _validate_pmf(interval)


def _interval_stack(interval: Any) -> np.ndarray:
    """One or several interval specifications -> (n_intervals, L) zero-padded pmf stack.

    A 1-D array/list of numbers, a ``(mean, sd)`` tuple or a mapping is one interval; a 2-D
    array is one pmf per row; a list of tuples / mappings / pmfs is several candidates.
    """
    if isinstance(interval, Mapping) or (
        isinstance(interval, tuple) and len(interval) == 2 and all(np.ndim(v) == 0 for v in interval)
    ):
        return resolve_interval(interval)[None, :]
    if isinstance(interval, np.ndarray):
        if interval.ndim == 1:
            return _validate_pmf(interval)[None, :]
        if interval.ndim == 2:
            pmfs = [_validate_pmf(row) for row in interval]
        else:
            raise ValueError(f"interval array must be 1-D or 2-D, got shape {interval.shape}")
    elif isinstance(interval, Sequence) and len(interval) > 0:
        if all(np.ndim(x) == 0 for x in interval):  # a plain list of numbers = one pmf
            return _validate_pmf(interval)[None, :]
        pmfs = [resolve_interval(x) for x in interval]
    else:
        raise ValueError("interval must be a pmf, a (mean, sd) tuple, a mapping or a list")
    length = max(p.size for p in pmfs)
    stack = np.zeros((len(pmfs), length))
    for i, p in enumerate(pmfs):
        stack[i, : p.size] = p
    return stack


def total_infectiousness(incidence: np.ndarray, interval_pmf: Any) -> np.ndarray:
    """Lambda_t = sum_{s>=1} w_s I_{t-s} along the last axis (Cori et al. 2013), one FFT convolution.

    Days before the start of the series count as zero incidence. Same shape as ``incidence``.
    """
    w = resolve_interval(interval_pmf)
    incidence = np.asarray(incidence, dtype=float)
    return _convolve_last(incidence, w.reshape((1,) * (incidence.ndim - 1) + (-1,)))


def _convolve_last(x: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Causal convolution of x with w along the last axis, truncated to x's length (w broadcasts)."""
    n = x.shape[-1]
    out = signal.fftconvolve(x, w, axes=-1)[..., :n]
    np.maximum(out, 0.0, out=out)  # FFT round-off leaves tiny negatives where the true value is 0
    return out


def _as_incidence(incidence: Any, ndim: int, name: str) -> np.ndarray:
    """Validate counts (finite, >= 0) and promote to ``ndim`` dimensions (time last)."""
    x = np.asarray(incidence, dtype=float)
    if x.ndim > ndim or x.ndim < 1:
        raise ValueError(f"{name} must have 1 to {ndim} dimensions, got shape {x.shape}")
    if x.shape[-1] < 1:
        raise ValueError(f"{name} has no days")
    if not np.all(np.isfinite(x)) or (x.size and x.min() < 0.0):
        raise ValueError(f"{name} must be finite and non-negative")
    return x.reshape((1,) * (ndim - x.ndim) + x.shape)


def _check_q_levels(q_levels: Any) -> np.ndarray:
    q = np.atleast_1d(np.asarray(q_levels, dtype=float))
    if q.ndim != 1 or np.any(~(q > 0.0)) or np.any(~(q < 1.0)):
        raise ValueError("q_levels must be a 1-D list of probabilities strictly inside (0, 1)")
    return q


# ---------------------------------------------------------------------------------------------
# Mixtures of gamma distributions
# ---------------------------------------------------------------------------------------------


def _gamma_ppf(shape: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Unit-scale gamma quantiles for a flat array of shapes: (N,) -> (N, Q), NaN passes through.

    The inverse incomplete gamma function is costly, and posterior shapes a + sum I repeat
    heavily when counts are integers, so it is evaluated once per distinct shape.
    """
    out = np.full((shape.size, q.size), np.nan)
    valid = np.flatnonzero(np.isfinite(shape))
    if valid.size == 0:
        return out
    uniq, inverse = np.unique(shape[valid], return_inverse=True)
    if uniq.size < 0.5 * valid.size:
        out[valid] = special.gammaincinv(uniq[:, None], q)[inverse]
    else:
        out[valid] = special.gammaincinv(shape[valid][:, None], q)
    return out


def _gamma_mixture_ppf(
    shape: np.ndarray, scale: np.ndarray, weights: np.ndarray, q: np.ndarray, tol: float = 1e-10
) -> np.ndarray:
    """Quantiles of sum_c weights_c Gamma(shape_c, scale_c) for each cell; (C, N) -> (N, Q).

    Safeguarded Newton on the mixture CDF, started at the moment-matched gamma and bracketed by
    Cantelli's inequality (m - sd sqrt((1-q)/q) <= x_q <= m + sd sqrt(q/(1-q))); a step that
    leaves the bracket is replaced by bisection. Cells with any NaN component give NaN.
    """
    n_comp, n_cells = shape.shape
    out = np.full((n_cells, q.size), np.nan)
    valid = np.all(np.isfinite(shape) & np.isfinite(scale), axis=0)
    idx_valid = np.flatnonzero(valid)
    if idx_valid.size == 0:
        return out
    w = weights[:, None, None]
    block = max(1, _BLOCK_ELEMENTS // (n_comp * q.size))
    rq_lo = np.sqrt((1.0 - q) / q)
    rq_hi = np.sqrt(q / (1.0 - q))
    for start in range(0, idx_valid.size, block):
        cells = idx_valid[start : start + block]
        a = shape[:, cells, None]
        th = scale[:, cells, None]
        mean_c = a * th
        m = np.sum(w * mean_c, axis=0)  # (n, 1)
        var = np.sum(w * (mean_c * th + mean_c**2), axis=0) - m**2
        var = np.maximum(var, 1e-300)
        sd = np.sqrt(var)
        lo = np.maximum(m - sd * rq_lo, 0.0)
        hi = m + sd * rq_hi
        x = special.gammaincinv(m**2 / var, q) * (var / m)
        x = np.clip(x, lo, hi)
        lgam = special.gammaln(a)
        for _ in range(100):
            z = x[None] / th
            f = np.sum(w * special.gammainc(a, z), axis=0) - q
            dens = np.sum(w * np.exp(special.xlogy(a - 1.0, z) - z - lgam) / th, axis=0)
            lo = np.where(f < 0.0, x, lo)
            hi = np.where(f > 0.0, x, hi)
            with np.errstate(divide="ignore", invalid="ignore"):
                x_new = x - f / dens
            outside = ~((x_new >= lo) & (x_new <= hi))
            x_new = np.where(outside, 0.5 * (lo + hi), x_new)
            x_new = np.where(f == 0.0, x, x_new)
            done = np.abs(x_new - x) <= tol * np.maximum(x, 1e-12)
            x = x_new
            if done.all():
                break
        out[cells] = x
    return out


_PPF_GRID = 4097  # points of the u = 1/sqrt(shape) grid on [0, 1] of the fast gamma quantiles
_PPF_TABLES: dict[float, np.ndarray] = {}


def _ppf_table(q: float) -> np.ndarray:
    """gammaincinv(a, q) / a on the uniform grid u = 1/sqrt(a) in [0, 1] (u = 0: the limit 1)."""
    key = float(q)
    table = _PPF_TABLES.get(key)
    if table is None:
        u = np.linspace(0.0, 1.0, _PPF_GRID)
        a = 1.0 / np.maximum(u[1:], 1e-300) ** 2
        table = np.concatenate([[1.0], special.gammaincinv(a, key) / a])
        _PPF_TABLES[key] = table
    return table


def gamma_ppf_fast(shape: np.ndarray, scale: np.ndarray, q_levels: Any) -> np.ndarray:
    """Gamma quantiles for many cells: (...) shapes and scales -> (..., n_q); NaN passes through.

    ``x_q / mean`` is a smooth function of ``u = 1/sqrt(shape)`` (Wilson & Hilferty 1931 give
    its leading terms), so for shape >= 1 it is read from a table on a uniform grid of 4,097
    points by linear interpolation (relative error below 1e-6; tested against scipy); smaller
    shapes use the exact inverse (``scipy.special.gammaincinv``).  The result is a view of a
    level-major array, so ``out[..., j]`` is contiguous.
    """
    q = _check_q_levels(q_levels)
    a = np.asarray(shape, dtype=float).reshape(-1)
    th = np.broadcast_to(np.asarray(scale, dtype=float), np.shape(shape)).reshape(-1)
    vals = np.full((q.size, a.size), np.nan)
    ok = np.isfinite(a) & (a > 0.0) & np.isfinite(th)
    big = ok & (a >= 1.0)
    all_big = bool(big.all())
    pos = slice(None) if all_big else np.flatnonzero(big)
    a_b = a[pos]
    u = (_PPF_GRID - 1) / np.sqrt(a_b)
    i = np.minimum(u.astype(np.int64), _PPF_GRID - 2)
    frac = u - i
    mean = a_b * th[pos]
    for j, level in enumerate(q):
        tab = _ppf_table(level)
        v = np.take(tab, i)
        v += frac * (np.take(tab, i + 1) - v)
        v *= mean
        vals[j, pos] = v
    small = np.flatnonzero(ok & ~big)
    if small.size:
        vals[:, small] = (special.gammaincinv(a[small, None], q) * th[small, None]).T
    return np.moveaxis(vals.reshape((q.size,) + np.shape(shape)), 0, -1)


def matched_gamma(mean: np.ndarray, var: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Shape and scale of the gamma with the given mean and variance (moment matching)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        shape = mean**2 / var
        scale = var / mean
    bad = ~(np.isfinite(shape) & np.isfinite(scale) & (shape > 0.0))
    return np.where(bad, np.nan, shape), np.where(bad, np.nan, scale)


# ---------------------------------------------------------------------------------------------
# Cori et al. (2013) estimator
# ---------------------------------------------------------------------------------------------


class CoriEstimator:
    """Sliding-window Bayesian estimate of R_t under the renewal equation (Cori et al. 2013).

    With I_t ~ Poisson(R Lambda_t) for the ``window`` days ending at t and a Gamma(shape
    ``prior_shape``, scale ``prior_scale``) prior (default mean 5, sd 5 as in Cori et al.), the
    posterior of R is Gamma with shape = a + sum I and scale = 1 / (1/b + sum Lambda) over the
    window. The estimate at t is NaN (i) when the window would reach day 0 (t < window), since
    day 0 has no observed infectors; and (ii) when the expected infections of the window,
    sum Lambda, fall below ``min_infections``. The default 12 is our choice. It is guided by
    the advice in Cori et al. (2013), as we recall it, to use windows holding enough incident
    cases for a posterior coefficient of variation 1/sqrt(a + sum I) of at most 0.3
    (1/0.3**2 ~ 11.1, i.e. about a dozen cases). We apply the threshold to the expected count
    sum Lambda, which does not depend on the window's own counts, rather than to sum I; where
    R is near 1 the two agree.

    ``fit`` takes one incidence array and returns per-cell gamma posteriors. ``fit_draws`` takes
    incidence draws (e.g. from a nowcast) and/or several candidate intervals and keeps an
    equally weighted (or ``interval_weights``-weighted) mixture of the per-draw posteriors.
    """

    def __init__(
        self,
        window: int = 7,
        prior_shape: float = 1.0,
        prior_scale: float = 5.0,
        min_infections: float = 12.0,
    ) -> None:
        self.window = window
        self.prior_shape = prior_shape
        self.prior_scale = prior_scale
        self.min_infections = min_infections

    # -- fitting -------------------------------------------------------------------------------

    def fit(self, incidence: Any, interval_pmf: Any) -> CoriEstimator:
        """Fit posteriors for incidence of shape (n_series, T) or (T,) (treated as one series).

        With a single interval, ``shape_``, ``scale_`` are (n_series, T). A list of candidate
        intervals makes a mixture (see :meth:`fit_draws`).
        """
        x = _as_incidence(incidence, 2, "incidence")
        return self._fit(x[None], interval_pmf, None)

    def fit_draws(
        self,
        incidence_draws: Any,
        interval_pmf: Any,
        interval_weights: Sequence[float] | None = None,
    ) -> CoriEstimator:
        """Fit a mixture posterior over incidence draws (n_draws, n_series, T) and intervals.

        Components are every (draw, interval) pair; draws are weighted equally and intervals by
        ``interval_weights`` (default equal). Fitted: ``shape_``, ``scale_`` of shape
        (n_components, n_series, T) (or (n_series, T) when there is a single component),
        ``weights_`` (n_components,), ``mean_``, ``sd_``, ``estimable_`` (n_series, T) and
        ``infectiousness_`` (Lambda, same leading shape as ``shape_``). A cell is NaN if any
        component is not estimable there.
        """
        draws = _as_incidence(incidence_draws, 3, "incidence_draws")
        return self._fit(draws, interval_pmf, interval_weights)

    def _fit(
        self, draws: np.ndarray, interval_pmf: Any, interval_weights: Sequence[float] | None
    ) -> CoriEstimator:
        """Shared fitting core on validated draws (n_draws, n_series, T)."""
        window = self._check_params()
        wstack = _interval_stack(interval_pmf)
        n_draws, n_series, n_days = draws.shape
        n_int = wstack.shape[0]
        if interval_weights is None:
            iw = np.full(n_int, 1.0 / n_int)
        else:
            iw = np.asarray(interval_weights, dtype=float)
            if iw.shape != (n_int,) or np.any(~(iw >= 0.0)) or iw.sum() <= 0.0:
                raise ValueError(f"interval_weights must be {n_int} non-negative numbers")
            iw = iw / iw.sum()

        # Lambda for every (draw, interval): one broadcast FFT convolution.
        lam = _convolve_last(draws[:, None], wstack[None, :, None, :])  # (D, K, S, T)
        lam = lam.reshape(n_draws * n_int, n_series, n_days)
        sum_i = _window_sums(draws, window)  # the same for every interval
        if n_int > 1:
            sum_i = np.repeat(sum_i, n_int, axis=0)
        sum_lam = _window_sums(lam, window)
        not_ok = sum_lam < self.min_infections
        not_ok[..., :window] = True
        missing = np.any(not_ok, axis=0) if not_ok.shape[0] > 1 else not_ok[0]
        # posterior shape a + sum I and scale 1 / (1/b + sum Lambda), computed in place
        shape = np.add(sum_i, self.prior_shape, out=sum_i)
        scale = np.add(sum_lam, 1.0 / self.prior_scale, out=sum_lam)
        np.divide(1.0, scale, out=scale)
        np.copyto(shape, np.nan, where=missing)
        np.copyto(scale, np.nan, where=missing)

        weights = (np.full(n_draws, 1.0 / n_draws)[:, None] * iw[None, :]).reshape(-1)
        self.n_components_ = n_draws * n_int
        self.weights_ = weights
        self.estimable_ = ~missing
        if self.n_components_ == 1:
            self.shape_ = shape[0]
            self.scale_ = scale[0]
            self.infectiousness_ = lam[0]
            self.mean_ = self.shape_ * self.scale_
            self.sd_ = np.sqrt(self.shape_) * self.scale_
        else:
            mean_c = shape * scale
            mean = np.tensordot(weights, mean_c, axes=1)
            second = np.tensordot(weights, mean_c * scale + mean_c**2, axes=1)
            self.shape_ = shape
            self.scale_ = scale
            self.infectiousness_ = lam
            self.mean_ = mean
            self.sd_ = np.sqrt(np.maximum(second - mean**2, 0.0))
        self.interval_pmfs_ = wstack
        return self

    def _check_params(self) -> int:
        """Validate the constructor parameters; return the window as an int."""
        if int(self.window) != self.window or self.window < 1:
            raise ValueError(f"window must be a positive integer, got {self.window}")
        if not (self.prior_shape > 0.0 and self.prior_scale > 0.0):
            raise ValueError("prior_shape and prior_scale must be positive")
        if not self.min_infections >= 0.0:
            raise ValueError("min_infections must be >= 0")
        return int(self.window)

    def _components(self) -> tuple[np.ndarray, np.ndarray]:
        """Posterior shape and scale as (n_components, n_series, T)."""
        if not hasattr(self, "shape_"):
            raise RuntimeError("CoriEstimator is not fitted; call fit() or fit_draws() first")
        if self.n_components_ == 1:
            return self.shape_[None], self.scale_[None]
        return self.shape_, self.scale_

    # -- outputs -------------------------------------------------------------------------------

    def quantiles(
        self,
        q_levels: Sequence[float] | np.ndarray,
        method: str = "invert",
        n_per_component: int = 200,
        seed: int | None = None,
    ) -> np.ndarray:
        """Posterior quantiles of R_t, shape (n_series, T, n_q); NaN where not estimable.

        A single posterior uses the gamma inverse CDF directly. A mixture uses ``method``:
        ``"invert"`` solves mixture CDF = q numerically (exact to ~1e-10 relative);
        ``"sample"`` draws ``n_per_component`` values per component and takes empirical
        quantiles (Monte Carlo; seeded by ``seed``).
        """
        q = _check_q_levels(q_levels)
        shape, scale = self._components()
        if self.n_components_ == 1:
            unit = _gamma_ppf(shape[0].reshape(-1), q).reshape(shape[0].shape + (q.size,))
            return unit * scale[0][..., None]
        if method not in ("invert", "sample"):
            raise ValueError(f"method must be 'invert' or 'sample', got {method!r}")
        n_comp, n_series, n_days = shape.shape
        flat_shape = shape.reshape(n_comp, -1)
        flat_scale = scale.reshape(n_comp, -1)
        # cells where every component is the same gamma up to 1e-9 relative (days a nowcast no
        # longer revises; FFT round-off aside) need no mixture computation
        same = np.all(
            (np.abs(flat_shape - flat_shape[0]) <= 1e-9 * np.abs(flat_shape[0]))
            & (np.abs(flat_scale - flat_scale[0]) <= 1e-9 * np.abs(flat_scale[0])),
            axis=0,
        )
        out = _gamma_ppf(flat_shape[0], q) * flat_scale[0][:, None]
        mixed = np.flatnonzero(~same & np.all(np.isfinite(flat_shape), axis=0))
        if mixed.size:
            a, th = flat_shape[:, mixed], flat_scale[:, mixed]
            if method == "invert":
                out[mixed] = _gamma_mixture_ppf(a, th, self.weights_, q)
            else:
                out[mixed] = self._sampled_quantiles(a, th, q, n_per_component, seed)
        return out.reshape(n_series, n_days, q.size)

    def _sampled_quantiles(
        self, shape: np.ndarray, scale: np.ndarray, q: np.ndarray, k: int, seed: int | None
    ) -> np.ndarray:
        rng = np.random.default_rng(seed)
        n_comp, n_cells = shape.shape
        n_samp = int(k) * n_comp
        comp = rng.choice(n_comp, size=n_samp, p=self.weights_)
        valid = np.all(np.isfinite(shape), axis=0)
        a = np.where(valid, shape, 1.0)
        th = np.where(valid, scale, 1.0)
        out = np.empty((n_cells, q.size))
        block = max(1, _BLOCK_ELEMENTS // n_samp)
        for start in range(0, n_cells, block):
            sl = slice(start, start + block)
            draws = rng.gamma(a[comp, sl], th[comp, sl])
            out[sl] = np.quantile(draws, q, axis=0).T
        out[~valid] = np.nan
        return out

    def prob_above(self, threshold: float = 1.0) -> np.ndarray:
        """Posterior probability P(R_t > threshold), shape (n_series, T); NaN where not estimable."""
        shape, scale = self._components()
        sf = special.gammaincc(shape, threshold / scale)
        return np.tensordot(self.weights_, sf, axes=1)

    def sample(self, n_draws: int, day: int = -1, seed: int | None = None) -> np.ndarray:
        """Draws of R on one day (default the last) from the (mixture) posterior: (n_draws, n_series).

        Meant as the ``r_samples`` input of :class:`RenewalForecaster`. NaN for series whose
        estimate that day is not available.
        """
        rng = np.random.default_rng(seed)
        shape, scale = self._components()
        a = shape[:, :, day]
        th = scale[:, :, day]
        valid = np.all(np.isfinite(a), axis=0)
        comp = rng.choice(self.n_components_, size=(int(n_draws), a.shape[1]), p=self.weights_)
        cols = np.arange(a.shape[1])[None, :]
        a_s = np.where(valid, a[comp, cols], 1.0)
        th_s = np.where(valid, th[comp, cols], 1.0)
        out = rng.gamma(a_s, th_s)
        out[:, ~valid] = np.nan
        return out


def _window_sums(x: np.ndarray, window: int) -> np.ndarray:
    """Trailing sums over ``window`` days (fewer at the start) along the last axis, by cumsum."""
    cs = np.cumsum(x, axis=-1)
    if window >= x.shape[-1]:
        return cs
    out = np.empty_like(cs)
    out[..., :window] = cs[..., :window]
    np.subtract(cs[..., window:], cs[..., :-window], out=out[..., window:])
    return out


# ---------------------------------------------------------------------------------------------
# Growth rate (Wallinga & Lipsitch 2007) and doubling time
# ---------------------------------------------------------------------------------------------


def reproduction_number_from_growth(r: Any, interval_pmf: Any) -> np.ndarray:
    """R = 1 / sum_s w_s exp(-r s): Wallinga & Lipsitch (2007) for a discrete interval pmf."""
    w = resolve_interval(interval_pmf)
    s = np.flatnonzero(w)
    r = np.asarray(r, dtype=float)
    log_m = special.logsumexp(np.log(w[s]) - r[..., None] * s, axis=-1)
    return np.exp(-log_m)


def growth_rate_from_r(
    reproduction_number: Any, interval_pmf: Any, tol: float = 1e-12, max_iter: int = 100
) -> np.ndarray:
    """Daily exponential growth rate r solving 1/R = sum_s w_s exp(-r s) (Wallinga & Lipsitch 2007).

    Vectorised safeguarded Newton on f(r) = log sum_s w_s e^{-r s} + log R, which is convex and
    decreasing; the root is bracketed by log(R)/s_max and log(R)/s_min (s_min, s_max the shortest
    and longest days with w_s > 0). The equation is solved once per interval on a grid of 8,193
    values of log R in [-6, 6] and evaluated by cubic Hermite interpolation with the exact
    derivative dr/dlogR = 1 / (tilted mean delay) (error ~1e-13); R outside the grid is solved
    directly. R = 0 gives -inf;
    NaN or negative R gives NaN.
    """
    w = resolve_interval(interval_pmf)
    s_idx = np.flatnonzero(w)
    s = s_idx.astype(float)
    log_w = np.log(w[s_idx])
    rr = np.asarray(reproduction_number, dtype=float)
    out = np.full(rr.shape, np.nan)
    flat = rr.reshape(-1)
    res = out.reshape(-1)
    res[flat == 0.0] = -np.inf
    res[flat == np.inf] = np.inf
    idx = np.flatnonzero(np.isfinite(flat) & (flat > 0.0))
    if idx.size == 0:
        return out
    y = np.log(flat[idx])
    spline = _growth_spline(w)
    inside = (y >= -_GROWTH_LOG_R) & (y <= _GROWTH_LOG_R)
    res[idx[inside]] = spline(y[inside])
    if not inside.all():
        res[idx[~inside]] = _growth_newton(y[~inside], s, log_w, tol, max_iter)[0]
    return out


_GROWTH_GRID = 8193  # points of the log R grid of the growth-rate spline
_GROWTH_LOG_R = 6.0  # the grid spans log R in [-6, 6] (R from 0.0025 to 403)
_GROWTH_SPLINES: dict[bytes, interpolate.CubicHermiteSpline] = {}


def _growth_spline(w: np.ndarray) -> interpolate.CubicHermiteSpline:
    """r(log R) for one interval pmf on a fixed grid, by cubic Hermite interpolation with the
    exact derivative dr/dlogR = 1 / (tilted mean delay); computed once per pmf."""
    key = w.tobytes()
    spline = _GROWTH_SPLINES.get(key)
    if spline is None:
        s_idx = np.flatnonzero(w)
        y_grid = np.linspace(-_GROWTH_LOG_R, _GROWTH_LOG_R, _GROWTH_GRID)
        r_grid, tilted = _growth_newton(y_grid, s_idx.astype(float), np.log(w[s_idx]), 1e-13,
                                        200)
        spline = interpolate.CubicHermiteSpline(y_grid, r_grid, 1.0 / tilted)
        if len(_GROWTH_SPLINES) > 64:
            _GROWTH_SPLINES.clear()
        _GROWTH_SPLINES[key] = spline
    return spline


def _growth_newton(
    y: np.ndarray, s: np.ndarray, log_w: np.ndarray, tol: float, max_iter: int
) -> tuple[np.ndarray, np.ndarray]:
    """Solve log sum_s exp(log_w_s - r s) + y = 0 for r; returns r and the tilted mean delay."""
    r_all = np.empty_like(y)
    tilted_all = np.empty_like(y)
    mean_s = float(np.dot(np.exp(log_w), s))
    block = max(1, _BLOCK_ELEMENTS // s.size)
    for start in range(0, y.size, block):
        yb = y[start : start + block]
        lo = np.minimum(yb / s[0], yb / s[-1])
        hi = np.maximum(yb / s[0], yb / s[-1])
        r = np.clip(yb / mean_s, lo, hi)
        for _ in range(max_iter):
            z = log_w[None, :] - r[:, None] * s[None, :]
            zmax = z.max(axis=1, keepdims=True)
            e = np.exp(z - zmax)
            tot = e.sum(axis=1)
            f = zmax[:, 0] + np.log(tot) + yb
            tilted = (e @ s) / tot  # -df/dr: the exponentially tilted mean delay
            lo = np.where(f > 0.0, r, lo)  # f decreasing: f > 0 means the root lies to the right
            hi = np.where(f < 0.0, r, hi)
            r_new = r + f / tilted
            outside = ~((r_new >= lo) & (r_new <= hi))
            r_new = np.where(outside, 0.5 * (lo + hi), r_new)
            done = np.abs(r_new - r) <= tol * (1.0 + np.abs(r))
            r = r_new
            if done.all():
                break
        z = log_w[None, :] - r[:, None] * s[None, :]
        e = np.exp(z - z.max(axis=1, keepdims=True))
        r_all[start : start + block] = r
        tilted_all[start : start + block] = (e @ s) / e.sum(axis=1)
    return r_all, tilted_all


_WEEKLY_MAPS: dict[tuple[bytes, int], tuple[np.ndarray, np.ndarray]] = {}


def weekly_r_factor(r_weekly: Any, interval_pmf: Any, step: int = 7) -> np.ndarray:
    """Factor taking R estimated from weekly totals with the week-lag interval
    (:func:`~tallywave.models.deconvolution.weekly_lags`, events spread evenly over the week)
    to the R of the daily interval, exact under steady exponential growth.

    Under growth at daily rate r the week-lag renewal gives ``1 / sum_j W_j e^{-7 r j}`` where
    the daily one gives ``1 / sum_s w_s e^{-r s}`` (Wallinga & Lipsitch 2007): infections sit
    later in their week than "evenly" assumes, so the weekly R is pulled towards 1.  Both are
    tabulated on a grid of weekly growth rates (-3..3) and matched; 1 at R = 1; the factor is
    held constant beyond the grid.
    """
    w = resolve_interval(interval_pmf)
    key = (w.tobytes(), int(step))
    grid = _WEEKLY_MAPS.get(key)
    if grid is None:
        rho = np.linspace(-3.0, 3.0, 1201)  # weekly log growth
        big_w = weekly_lags(w, step)
        j = np.arange(big_w.size)
        log_hat = -special.logsumexp(np.log(np.maximum(big_w, 1e-300))[None, :]
                                     - rho[:, None] * j[None, :], axis=1)
        log_true = np.log(reproduction_number_from_growth(rho / step, w))
        grid = (log_hat, log_true - log_hat)
        if len(_WEEKLY_MAPS) > 64:
            _WEEKLY_MAPS.clear()
        _WEEKLY_MAPS[key] = grid
    r = np.asarray(r_weekly, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.exp(np.interp(np.log(r), grid[0], grid[1]))
    return np.where(np.isfinite(r) & (r > 0.0), out, 1.0)


def doubling_time(growth_rate: Any) -> np.ndarray:
    """ln 2 / r in days. Sign convention: positive = doubling time (growing), negative = minus the
    halving time (declining); r = 0 gives +inf, NaN stays NaN."""
    r = np.asarray(growth_rate, dtype=float)
    with np.errstate(divide="ignore"):
        out = np.where(r == 0.0, np.inf, np.log(2.0) / np.where(r == 0.0, 1.0, r))
    return out


def log_linear_growth(incidence: Any, window: int = 7, offset: float = 0.5) -> np.ndarray:
    """Rolling least-squares slope of log(I + offset) over the ``window`` days ending at t.

    A model-free growth rate (per day) to set beside the renewal-based one. Same shape as
    ``incidence`` (time last); NaN for the first ``window - 1`` days. Vectorised by cumulative
    sums of y and t*y: slope = sum (t - tbar) y / sum (t - tbar)^2 over the window.
    """
    window = int(window)
    if window < 2:
        raise ValueError(f"window must be >= 2 days, got {window}")
    x = np.asarray(incidence, dtype=float)
    if x.ndim < 1 or not np.all(np.isfinite(x)) or (x.size and x.min() < 0.0):
        raise ValueError("incidence must be finite and non-negative with time on the last axis")
    n = x.shape[-1]
    y = np.log(x + offset)
    t = np.arange(n, dtype=float)
    cy = np.cumsum(y, axis=-1)
    cty = np.cumsum(t * y, axis=-1)
    out = np.full(x.shape, np.nan)
    if n < window:
        return out
    sum_y = cy[..., window - 1 :].copy()
    sum_ty = cty[..., window - 1 :].copy()
    sum_y[..., 1:] -= cy[..., : n - window]
    sum_ty[..., 1:] -= cty[..., : n - window]
    t_bar = np.arange(window - 1, n, dtype=float) - (window - 1) / 2.0
    sxx = window * (window**2 - 1) / 12.0
    out[..., window - 1 :] = (sum_ty - t_bar * sum_y) / sxx
    return out


# ---------------------------------------------------------------------------------------------
# Renewal projection
# ---------------------------------------------------------------------------------------------
