"""Back-calculation of infections from counts dated later: Richardson–Lucy / EMS deconvolution.

A count dated on day t (symptom onset, admission, death, ...) comes from an infection on day
t - d, d drawn from the signal's infection-to-reference-date delay pmf ``f``.  Expected counts
are the convolution ``mu_t = sum_d f_d lambda_{t-d}`` of the infection curve ``lambda``.

* :func:`delay_pmf` / :func:`delay_stack` turn settings (``{mean, sd}``, ``{pmf = [...]}``,
  ``{candidates = [[mean, sd], ...]}``) into daily pmfs (``f[0]`` may be > 0: same-day events).
* :func:`observability` ``q_s``: the share of day-s infections whose counts fall inside the
  observed days (right truncation: infections of the last days are not yet observable).
* :func:`richardson_lucy`: the EM algorithm for Poisson deconvolution (Richardson 1972, Lucy
  1974; for epidemics Becker, Watson & Carlin 1991 and Goldstein et al. 2009), each step
  followed by a light [1, 2, 1]/4 smoothing as in the EMS variant of Becker et al. (1991), a
  fixed number of steps, vectorised over series.  The update divides by ``q_s`` (Goldstein et
  al. 2009), so the estimates of partly observed days stay unbiased while their information,
  carried by ``q_s``, shrinks.
* :func:`allocation_operator` / :func:`response_operator`: the linear response of one EM step /
  of the whole deconvolution to a change of the counts of some days (how a nowcast draw moves
  the back-calculated infections, without a new deconvolution per draw).

Array convention: time is the last axis; infections carry ``n_before`` extra days before the
first count (infections whose counts fall partly before the series).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import fft, special, stats

__all__ = [
    "Deconvolution",
    "allocation_operator",
    "delay_pmf",
    "delay_stack",
    "observability",
    "response_operator",
    "richardson_lucy",
    "rounded_gamma_pmf",
    "weekly_lags",
]


def _check_delay_pmf(pmf: Any) -> np.ndarray:
    """An explicit delay pmf: 1-D, finite, non-negative, positive sum; normalised."""
    f = np.asarray(pmf, dtype=float)
    if f.ndim != 1 or f.size < 1:
        raise ValueError(f"delay pmf must be a 1-D list of probabilities, got shape {f.shape}")
    if not np.all(np.isfinite(f)) or np.any(f < 0.0) or f.sum() <= 0.0:
        raise ValueError("delay pmf entries must be finite, non-negative and not all 0")
    return f / f.sum()


def rounded_gamma_pmf(mean: float, sd: float, tail: float = 1e-3) -> np.ndarray:
    """Gamma delay (mean, sd in days) rounded to whole days: ``f[d] = P(d - 1/2 <= X < d + 1/2)``.

    Rounding (rather than flooring) keeps the mean: the pmf's mean is ``mean`` up to the
    truncation at the ``1 - tail`` quantile and a rounding error of order ``1/(24 mean)``.
    """
    mean, sd = float(mean), float(sd)
    if not (np.isfinite(mean) and np.isfinite(sd) and mean > 0.0 and sd > 0.0):
        raise ValueError(f"delay mean and sd must be positive and finite, got {mean}, {sd}")
    shape, scale = (mean / sd) ** 2, sd**2 / mean
    top = int(np.ceil(stats.gamma.ppf(1.0 - tail, shape, scale=scale) + 0.5))
    edges = np.arange(top + 2) - 0.5
    cdf = special.gammainc(shape, np.maximum(edges, 0.0) / scale)
    return _check_delay_pmf(np.diff(cdf))


def delay_pmf(spec: Any) -> np.ndarray:
    """One infection-to-reference-date delay as a daily pmf (index = days, ``f[0]`` allowed).

    ``spec``: a mapping ``{mean, sd}`` (a gamma rounded to whole days,
    :func:`rounded_gamma_pmf`) or ``{pmf = [...]}``, a ``(mean, sd)`` pair, or a plain list of
    probabilities.
    """
    if isinstance(spec, Mapping):
        if "pmf" in spec:
            return _check_delay_pmf(spec["pmf"])
        if "mean" in spec and "sd" in spec:
            return rounded_gamma_pmf(spec["mean"], spec["sd"])
        raise ValueError("delay mapping needs keys 'mean' and 'sd', or 'pmf'")
    if isinstance(spec, tuple) and len(spec) == 2 and all(np.ndim(v) == 0 for v in spec):
        return rounded_gamma_pmf(spec[0], spec[1])
    return _check_delay_pmf(spec)


def delay_stack(spec: Any) -> np.ndarray:
    """One delay, ``{candidates = [[mean, sd], ...]}`` or a 2-D array of pmfs (one per row) ->
    (n_candidates, L+1), zero-padded."""
    if isinstance(spec, np.ndarray) and spec.ndim == 2:
        pmfs = [_check_delay_pmf(row) for row in spec]
    elif isinstance(spec, Mapping) and "candidates" in spec:
        cands = spec["candidates"]
        if not isinstance(cands, Sequence) or len(cands) == 0:
            raise ValueError("delay candidates must be a non-empty list of [mean, sd] pairs")
        pmfs = [delay_pmf(tuple(c) if isinstance(c, Sequence) else c) for c in cands]
    else:
        pmfs = [delay_pmf(spec)]
    out = np.zeros((len(pmfs), max(p.size for p in pmfs)))
    for i, p in enumerate(pmfs):
        out[i, : p.size] = p
    return out


def weekly_lags(pmfs: Any, step: int = 7) -> np.ndarray:
    """Daily lag pmf(s) (..., L+1) between two events -> lags in whole weeks (..., J+1).

    The earlier event's day is taken uniform over its week (``step`` days), so week lag j has
    ``P(j) = (1/step) sum_a sum_s p(s) [floor((a + s) / step) = j]``, a in 0..step-1: the
    exact weekly lag when events are spread evenly over the week (a steady epidemic); under
    growth (decline) the earlier event sits later (earlier) in its week than assumed.  Used for
    the generation interval and the infection-to-reference-date delay of weekly signals; a
    generation interval gets ``P(0) > 0`` (transmission within the week).
    """
    p = np.asarray(pmfs, dtype=float)
    step = int(step)
    if step < 1:
        raise ValueError(f"step must be a positive number of days, got {step}")
    n_lag = p.shape[-1]
    out = np.zeros(p.shape[:-1] + ((n_lag - 1 + step - 1) // step + 1,))
    s = np.arange(n_lag)
    for a in range(step):
        np.add.at(np.moveaxis(out, -1, 0), (a + s) // step, np.moveaxis(p, -1, 0) / step)
    return out


def observability(pmf: np.ndarray, n_days: int, n_before: int) -> np.ndarray:
    """q_s = P(a day-s infection's count falls on an observed day 0..n_days-1), for
    s = -n_before .. n_days-1 (shape (n_before + n_days,))."""
    f = np.asarray(pmf, dtype=float)
    cdf = np.concatenate([[0.0], np.cumsum(f)])
    s = np.arange(-n_before, n_days)
    hi = np.clip(n_days - 1 - s, -1, f.size - 1)  # largest delay still observed
    lo = np.clip(-s, 0, f.size)  # smallest delay landing on day >= 0
    return np.clip(cdf[hi + 1] - cdf[np.minimum(lo, hi + 1)], 0.0, 1.0)


@dataclass
class Deconvolution:
    """Result of :func:`richardson_lucy`: infections (..., n_before + T) on days
    -n_before..T-1, their observability q (n_before + T,), the fitted expected counts (..., T)."""

    infections: np.ndarray
    observability: np.ndarray
    fitted: np.ndarray
    n_before: int


class _Convolver:
    """Convolution with a fixed pmf along the last axis by real FFT (shared across series)."""

    def __init__(self, pmf: np.ndarray, n_days: int, n_before: int) -> None:
        self.f = pmf
        self.n_days = n_days
        self.n_before = n_before
        self.n = fft.next_fast_len(n_days + n_before + pmf.size, real=True)
        self.f_hat = fft.rfft(pmf, self.n)
        k = np.arange(self.f_hat.size)
        self.back_hat = np.conj(self.f_hat) * np.exp(-2j * np.pi * k * n_before / self.n)

    def expected(self, lam: np.ndarray) -> np.ndarray:
        """mu_t = sum_d f_d lam_{t-d} for t = 0..T-1 (lam indexed from day -n_before)."""
        full = fft.irfft(fft.rfft(lam, self.n, axis=-1) * self.f_hat, self.n, axis=-1)
        return full[..., self.n_before : self.n_before + self.n_days]

    def back(self, ratio: np.ndarray) -> np.ndarray:
        """b_s = sum_t f_{t-s} ratio_t for s = -n_before..T-1 (the EM back-projection)."""
        # ratio_t sits at position n_before + t of a zero-padded line: rfft pads the end, and a
        # shift by n_before is a phase factor
        full = fft.irfft(fft.rfft(ratio, self.n, axis=-1) * self.back_hat, self.n, axis=-1)
        return full[..., : self.n_before + self.n_days]


def _smooth121(x: np.ndarray) -> np.ndarray:
    """[1, 2, 1]/4 smoothing along the last axis (the EMS step); the first and last days are
    left as they are, so a trend runs on to the ends instead of being pulled back by them."""
    out = x.copy()
    out[..., 1:-1] = 0.25 * (x[..., :-2] + x[..., 2:]) + 0.5 * x[..., 1:-1]
    return out


def richardson_lucy(observed: Any, pmf: Any, *, n_iter: int = 20, smooth: bool = True,
                    n_before: int | None = None, q_floor: float = 0.02,
                    start: np.ndarray | None = None) -> Deconvolution:
    """Back-calculate infections from counts (..., T) through the delay ``pmf``.

    EM for Poisson counts with mean ``mu = f * lambda`` (Richardson 1972; Lucy 1974; Becker,
    Watson & Carlin 1991): ``lambda_s <- lambda_s / q_s * sum_t f_{t-s} y_t / mu_t``, then (if
    ``smooth``) the EMS [1, 2, 1]/4 smoothing.  Starts from the counts moved back by the mean
    delay (or from ``start``, infections on days -n_before..T-1).  Days with ``q_s < q_floor`` carry almost no information and are not updated by the
    EM step (only smoothed).  A fixed ``n_iter`` keeps results independent of batching.
    """
    y = np.asarray(observed, dtype=float)
    f = delay_pmf(pmf)
    if y.ndim < 1 or y.shape[-1] < 1:
        raise ValueError("observed must have at least one day on its last axis")
    if not np.all(np.isfinite(y)) or np.any(y < 0.0):
        raise ValueError("observed counts must be finite and non-negative")
    if int(n_iter) != n_iter or n_iter < 0:
        raise ValueError(f"n_iter must be a non-negative integer, got {n_iter}")
    n_days = y.shape[-1]
    L = f.size - 1
    nb = L if n_before is None else int(n_before)
    q = observability(f, n_days, nb)
    conv = _Convolver(f, n_days, nb)
    lam = _initial_guess(y, f, nb) if start is None else np.array(start, dtype=float)
    upd = (q >= q_floor) & (q > 0.0)
    inv_q = np.where(upd, 1.0 / np.where(upd, q, 1.0), 0.0)
    for _ in range(int(n_iter)):
        mu = conv.expected(lam)
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.where(mu > 0.0, y / mu, 0.0)
        corr = conv.back(ratio) * inv_q
        lam = np.where(upd, lam * np.maximum(corr, 0.0), lam)
        if smooth:
            lam = _smooth121(lam)
    mu = np.maximum(conv.expected(lam), 0.0)
    return Deconvolution(infections=lam, observability=q, fitted=mu, n_before=nb)


def _initial_guess(y: np.ndarray, f: np.ndarray, n_before: int) -> np.ndarray:
    """Counts moved back by the rounded mean delay, as a start for the EM iterations.

    Days inside the series take the centred 7-day average; beyond its ends the level is carried
    on along the log-linear trend of the nearest 14 days (so the last, barely observed days
    start near a continuation of the epidemic's course rather than a flat line); kept > 0.
    """
    n_days = y.shape[-1]
    shift = round(float(np.dot(np.arange(f.size), f)))
    k = min(7, n_days)
    cs = np.cumsum(np.concatenate([np.zeros(y.shape[:-1] + (1,)), y], axis=-1), axis=-1)
    idx = np.arange(n_days)
    lo = np.clip(idx - k // 2, 0, n_days - k)
    avg = (cs[..., lo + k] - cs[..., lo]) / k
    level = np.maximum(avg.mean(axis=-1, keepdims=True), 1e-12)
    s = np.arange(-n_before, n_days) + shift  # the count day each infection day is read from
    lam = avg[..., np.clip(s, 0, n_days - 1)]
    m = min(14, n_days)
    if m >= 7:
        tt = np.arange(m) - (m - 1) / 2.0
        for ends, sel in ((slice(n_days - m, n_days), s > n_days - 1 - k // 2),
                          (slice(0, m), s < k // 2)):
            ly = np.log(y[..., ends] + 0.5)
            slope = np.clip((ly * tt).sum(axis=-1, keepdims=True) / (tt**2).sum(), -0.3, 0.3)
            mid = ends.start + (m - 1) / 2.0
            fit = np.exp(ly.mean(axis=-1, keepdims=True) + slope * (s[sel] - mid)) - 0.5
            lam[..., sel] = np.maximum(fit, 0.0)
    return np.maximum(lam, 1e-3 * level)


def allocation_operator(deconv: Deconvolution, pmf: Any, obs_days: np.ndarray,
                        inf_days: np.ndarray, q_floor: float = 0.02) -> np.ndarray:
    """Linear response of the infections to changes of some days' counts: (..., t_obs, n_inf).

    One EM step from the fitted solution allocates an extra count on day t to infection days s
    in proportion to ``lambda_s f_{t-s} / mu_t``, divided by ``q_s`` like the EM update:
    ``d lambda_s = lambda_s / q_s * sum_t f_{t-s} d y_t / mu_t``.  ``obs_days`` are count days
    (0..T-1), ``inf_days`` infection days (-n_before..T-1); days with ``q_s < q_floor`` are not
    updated (as in :func:`richardson_lucy`).
    """
    f = delay_pmf(pmf)
    nb = deconv.n_before
    lag = obs_days[:, None] - inf_days[None, :]  # t - s
    ok = (lag >= 0) & (lag < f.size)
    g = np.where(ok, f[np.clip(lag, 0, f.size - 1)], 0.0)  # (t_obs, n_inf), shared
    q = deconv.observability[inf_days + nb]
    lam = deconv.infections[..., inf_days + nb]
    mu = deconv.fitted[..., obs_days]
    upd = (q >= q_floor) & (q > 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        inv_mu = np.where(mu > 0.0, 1.0 / mu, 0.0)
        scale = np.where(upd, lam / np.where(upd, q, 1.0), 0.0)
    return inv_mu[..., :, None] * g * scale[..., None, :]


def response_operator(deconv: Deconvolution, pmf: Any, observed: Any, obs_days: np.ndarray,
                      inf_days: np.ndarray, n_steps: int, q_floor: float = 0.02
                      ) -> np.ndarray:
    """Linear response of the back-calculated infections to the counts of ``obs_days``:
    (..., t_obs, n_inf), the derivative of ``n_steps`` EMS steps taken at the fitted solution.

    One step maps a change of the infections and counts to
    ``d lambda' = S[c d lambda + lambda/q * back(d y / mu - y conv(d lambda) / mu^2)]`` (the
    derivative of the EM update, ``c = back(y/mu)/q``; S the [1, 2, 1]/4 smoothing); pushing
    each day's unit change through ``n_steps`` steps gives the operator.  With one step it is
    :func:`allocation_operator` smoothed; with as many steps as the deconvolution itself it
    reproduces what a new deconvolution of a changed series would give (tested against
    refits).  ``inf_days`` must be a run of days ending on the last day; changes of days before
    it are taken as 0.
    """
    f = delay_pmf(pmf)
    y = np.asarray(observed, dtype=float)
    nb = deconv.n_before
    n_days = deconv.fitted.shape[-1]
    if inf_days.size == 0 or inf_days[-1] != n_days - 1 or np.any(np.diff(inf_days) != 1):
        raise ValueError("inf_days must be consecutive days ending on the last day")
    o_days = np.arange(max(int(inf_days[0]), 0), n_days)
    lag = o_days[None, :] - inf_days[:, None]  # t - s
    g = np.where((lag >= 0) & (lag < f.size), f[np.clip(lag, 0, f.size - 1)], 0.0)
    q_all = deconv.observability
    upd = (q_all >= q_floor) & (q_all > 0.0)
    inv_q_all = np.where(upd, 1.0 / np.where(upd, q_all, 1.0), 0.0)
    mu_all = deconv.fitted
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(mu_all > 0.0, y / mu_all, 0.0)
        inv_mu_all = np.where(mu_all > 0.0, 1.0 / mu_all, 0.0)
    c = (_Convolver(f, n_days, nb).back(ratio) * inv_q_all)[..., inf_days + nb]
    c = np.where(upd[inf_days + nb], c, 1.0)
    gain = deconv.infections[..., inf_days + nb] * inv_q_all[inf_days + nb]
    inv_mu = inv_mu_all[..., o_days]
    curv = (y * inv_mu_all**2)[..., o_days]
    lead = y.shape[:-1]
    n_obs, n_inf, n_o = obs_days.size, inf_days.size, o_days.size
    # the kick d y / mu of each unit change, projected back: constant over the steps
    idx = obs_days - o_days[0]
    back_kick = inv_mu[..., idx][..., :, None] * g.T[idx] * gain[..., None, :]
    x = np.zeros(lead + (n_obs, n_inf))
    d_em = np.empty_like(x)
    open_left = inf_days[0] > -nb  # the run starts inside the series: zero beyond its start
    for _ in range(int(n_steps)):
        cv = (x.reshape(-1, n_inf) @ g).reshape(lead + (n_obs, n_o))
        cv *= curv[..., None, :]
        back = (cv.reshape(-1, n_o) @ g.T).reshape(lead + (n_obs, n_inf))
        back *= gain[..., None, :]
        np.multiply(x, c[..., None, :], out=d_em)
        d_em += back_kick
        d_em -= back
        # [1, 2, 1]/4 smoothing; the last day kept, the first one zero-padded inside the series
        x[..., 1:-1] = d_em[..., 1:-1]
        x[..., 1:-1] *= 0.5
        x[..., 1:-1] += 0.25 * (d_em[..., :-2] + d_em[..., 2:])
        x[..., -1] = d_em[..., -1]
        x[..., 0] = (0.5 * d_em[..., 0] + 0.25 * d_em[..., 1]) if open_left and n_inf > 1 \
            else d_em[..., 0]
    return x
