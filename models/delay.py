"""Reporting-delay correction (nowcasting) on reporting triangles.

Data convention
---------------
A reporting triangle is a float array ``tri`` of shape ``(n_series, n_ref, D + 1)``:
``tri[s, t, d]`` is the number of events of series ``s`` with reference date ``t`` (rows sorted
ascending, the last row is the most recent reference date, i.e. ``as_of``) first reported at a
delay of ``d`` days.  A 2-D array ``(n_ref, D + 1)`` is read as one series.

* Cells with ``t + d > n_ref - 1`` cannot be known yet ("future" cells); their content is ignored.
* Other NaN cells ("holes", e.g. missing vintages) are treated as unobserved: they take no part in
  estimation.  Unless the caller passes the current reported totals (``reported=``), their
  expected counts are predicted and added to the nowcast like future cells; when ``reported`` is
  given, holes are assumed to be contained in it and only future cells are predicted.
* Negative increments (downward revisions) are set to 0 for all estimation (delay pmf, row
  levels, dispersion).  The already-reported part of a nowcast keeps the raw, unclipped sum of the
  observed cells (or the caller's ``reported``), so nowcast = what is on the books + predicted
  future reports.
* Reports later than ``max_delay`` days are outside the model (columns beyond it are dropped).

Model
-----
Cell counts have mean ``mu[t, d] = N_t * q_t(d)``: a row total ``N_t`` times a delay pmf ``q_t``.
Without a weekday effect ``q_t = p`` for every row (the multiplicative chain-ladder model, Lawless
1994; its Poisson maximum-likelihood fit is the chain ladder, Renshaw & Verrall 1998).  With a
report-weekday effect ``q_t(d) ∝ p_d * g[weekday(t + d)]`` (log-linear: row + delay + weekday).

* ``ChainLadder``: the actuarial algorithm (volume-weighted development factors).
* ``DelayGLM``: Poisson (quasi-)ML of the log-linear model, vectorised over series or by
  statsmodels; NB2 dispersion by the Pearson moment equation; delay pmfs of sparse series are
  shrunk toward the pmf pooled over all series.
* ``DelayNowcaster``: predictive draws / quantiles of each row's eventual total (row-level
  posterior, NB2 noise of the unreported cells, delay-pmf parameter uncertainty).
* ``mean_delay_by_week`` (reporting drift) and ``simulate_triangle`` (known truth for tests).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np

__all__ = [
    "ChainLadder",
    "DelayGLM",
    "DelayNowcaster",
    "WeeklyDelay",
    "cumulative_to_incremental",
    "incremental_to_cumulative",
    "mean_delay_by_week",
    "simulate_triangle",
    "total_variation",
]

_FAMILIES = ("poisson", "negbin")
_TINY = 1e-12
_LL_TOL = 1e-9  # log-likelihood gain per sweep below which the block updates stop
_GAMMA_ONLY_MEAN = 50.0  # above this predicted mean, draw a rounded gamma (no Poisson)


# --------------------------------------------------------------------------- helpers


def incremental_to_cumulative(tri: np.ndarray) -> np.ndarray:
    """Cumulate a triangle along the delay (last) axis; NaN propagates to later delays."""
    return np.cumsum(np.asarray(tri, dtype=float), axis=-1)


def cumulative_to_incremental(cum: np.ndarray) -> np.ndarray:
    """Difference a cumulative (actuarial) triangle along the delay (last) axis."""
    return np.diff(np.asarray(cum, dtype=float), axis=-1, prepend=0.0)


def total_variation(p: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Total-variation distance 0.5 * sum|p - q| along the last axis."""
    return 0.5 * np.abs(np.asarray(p, dtype=float) - np.asarray(q, dtype=float)).sum(axis=-1)


def _safe_div(num: np.ndarray | float, den: np.ndarray) -> np.ndarray:
    """num / den with 0 where den == 0."""
    out = np.zeros(np.broadcast(num, den).shape)
    np.divide(num, den, out=out, where=den > 0)
    return out


@dataclass
class _Triangle:
    """A prepared triangle: clipped counts, masks and the already-reported totals."""

    counts: np.ndarray  # (S, T, K) clipped at 0, 0 where unobserved
    observed: np.ndarray  # (S, T, K) bool
    predict: np.ndarray  # (S, T, K) bool: cells whose counts the nowcast adds
    reported: np.ndarray  # (S, T)

    @property
    def shape(self) -> tuple[int, int, int]:
        s, t, k = self.counts.shape
        return s, t, k


def _prepare(tri: np.ndarray, max_delay: int | None, reported: np.ndarray | None) -> _Triangle:
    """Validate and split a triangle into clipped counts and observation masks."""
    arr = np.asarray(tri, dtype=float)
    squeeze = arr.ndim == 2
    if squeeze:
        arr = arr[None]
    if arr.ndim != 3:
        raise ValueError(f"triangle must have shape (n_series, n_ref, D+1); got {arr.shape}")
    n_delay = arr.shape[2] if max_delay is None else min(int(max_delay) + 1, arr.shape[2])
    if n_delay < 1 or arr.shape[1] < 1:
        raise ValueError(f"triangle is empty: shape {arr.shape}")
    arr = arr[:, :, :n_delay]
    s, t, k = arr.shape
    future = (np.arange(t)[:, None] + np.arange(k)[None, :]) > (t - 1)
    finite = np.isfinite(arr)
    observed = finite & ~future
    holes = ~finite & ~future
    counts = np.where(observed, np.maximum(np.nan_to_num(arr), 0.0), 0.0)
    if reported is None:
        rep = np.where(observed, np.nan_to_num(arr), 0.0).sum(axis=2)
        predict = np.broadcast_to(future, arr.shape) | holes
    else:
        rep = np.asarray(reported, dtype=float)
        if squeeze and rep.ndim == 1:
            rep = rep[None]
        if rep.shape != (s, t):
            raise ValueError(f"reported must have shape {(s, t)}; got {rep.shape}")
        predict = np.broadcast_to(future, arr.shape).copy()
    return _Triangle(counts, observed, np.asarray(predict), rep)


def _chain_ladder_factors(counts: np.ndarray, observed: np.ndarray) -> np.ndarray:
    """Volume-weighted development factors f_j = sum C[t, j+1] / sum C[t, j], shape (S, D).

    Row t enters f_j when its cells 0..j+1 are all observed (holes break the cumulative).
    No information (0 / 0) gives f_j = 1; a zero cumulative followed by reports gives inf.
    """
    cum = np.cumsum(counts, axis=2)
    prefix = np.cumprod(observed, axis=2).astype(bool)[:, :, 1:]
    num = np.where(prefix, cum[:, :, 1:], 0.0).sum(axis=1)
    den = np.where(prefix, cum[:, :, :-1], 0.0).sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        f = num / den
    f[(den <= 0) & (num <= 0)] = 1.0
    f[(den <= 0) & (num > 0)] = np.inf
    return f


def _pmf_from_factors(factors: np.ndarray) -> np.ndarray:
    """Delay pmf from development factors: P_j = 1 / prod_{k >= j} f_k, pmf = diff(P)."""
    tail = np.cumprod(factors[..., ::-1], axis=-1)[..., ::-1]
    with np.errstate(divide="ignore"):
        cdf = np.concatenate([1.0 / tail, np.ones(factors.shape[:-1] + (1,))], axis=-1)
    return np.diff(cdf, axis=-1, prepend=0.0)


def _weekday_index(n_ref: int, n_delay: int, first_ref_weekday: int) -> np.ndarray:
    """Report weekday (0 = Monday) of every cell (t, d): (first_ref_weekday + t + d) mod 7."""
    t = np.arange(n_ref)[:, None]
    d = np.arange(n_delay)[None, :]
    return (int(first_ref_weekday) + t + d) % 7


def _poisson_ml(
    counts: np.ndarray,
    observed: np.ndarray,
    weekday: np.ndarray | None,
    pmf0: np.ndarray,
    max_iter: int,
    tol: float,
) -> tuple[np.ndarray, np.ndarray | None, int]:
    """Poisson ML of mu = a_t p_d g_w by exact block updates, vectorised over series.

    Each factor group (rows, delays, weekdays) has a closed-form maximiser given the others, so
    cyclic updates climb the concave log-likelihood to the MLE.  Started from the chain ladder,
    a full triangle without weekday effect is already at the optimum (Renshaw & Verrall 1998).
    A series stops when its pmf/multipliers move less than ``tol`` or (weekday model) a sweep
    gains less than 1e-9 log-likelihood units: thin series can have an MLE at infinity in some
    direction (e.g. a weekday seen at one delay only) where parameters drift without improving
    the fit.  Converged series leave the working set every 10 sweeps.
    Returns (pmf (S, K) summing to 1, weekday multipliers (S, 7) with mean 1 or None, sweeps).
    """
    s, t, k = counts.shape
    p_out = np.array(pmf0, dtype=float)
    g_out = None if weekday is None else np.ones((s, 7))
    wk = None if weekday is None else np.broadcast_to(weekday, (t, k))
    idx = np.arange(s)
    sweeps = 0
    while idx.size and sweeps < max_iter:
        x = counts[idx]
        obs = observed[idx].astype(float)
        n = idx.size
        row_tot, col_tot = x.sum(axis=2), x.sum(axis=1)
        p = p_out[idx]
        g = None
        if wk is not None:
            flat = (np.arange(n)[:, None, None] * 7 + wk[None]).ravel()
            wk_tot = np.bincount(flat, weights=x.ravel(), minlength=7 * n).reshape(n, 7)
            g = g_out[idx]  # type: ignore[index]
            cell = (np.arange(n)[:, None, None], wk[None])
        log_x = np.where(x > 0, x, 1.0)
        ll_old = np.full(n, -np.inf)
        done = np.zeros(n, dtype=bool)
        for _ in range(min(10, max_iter - sweeps)):
            sweeps += 1
            w = obs if g is None else obs * g[cell]
            a = _safe_div(row_tot, np.einsum("stk,sk->st", w, p))
            p_new = _safe_div(col_tot, np.einsum("stk,st->sk", w, a))
            p_new = _safe_div(p_new, p_new.sum(axis=1, keepdims=True))
            delta = np.abs(p_new - p).max(axis=1, initial=0.0)
            p = p_new
            if g is not None:
                base = obs * a[:, :, None] * p[:, None, :]
                den = np.bincount(flat, weights=base.ravel(), minlength=7 * n).reshape(n, 7)
                g_new = _safe_div(wk_tot, den)
                g_new = _safe_div(g_new, g_new.mean(axis=1, keepdims=True))
                delta = np.maximum(delta, np.abs(g_new - g).max(axis=1, initial=0.0) / 7.0)
                g = g_new
                mu = obs * a[:, :, None] * p[:, None, :] * g[cell]
                ll = (x * np.log(np.where(mu > 0, mu, log_x)) - mu).sum(axis=(1, 2))
                done = (delta < tol) | (ll - ll_old <= _LL_TOL)
                ll_old = ll
            else:
                done = delta < tol
            if done.all():
                break
        p_out[idx] = p
        if g is not None:
            g_out[idx] = g  # type: ignore[index]
        idx = idx[~done]
    return p_out, g_out, sweeps


def _pearson_nb_dispersion(
    counts: np.ndarray, mu: np.ndarray, observed: np.ndarray, n_params: int, floor: float
) -> np.ndarray:
    """NB2 dispersion phi (Var = mu + phi mu^2) solving the Pearson moment equation per series.

    Solves sum (y - mu)^2 / (mu (1 + phi mu)) = n_obs - n_params by Newton from the floor (the
    left side is convex and decreasing in phi, so Newton rises monotonically to the root); phi is
    floored at ``floor``.
    """
    use = observed & np.isfinite(mu) & (mu > 0)
    m = np.where(use, mu, 0.0)
    r2 = np.where(use, (counts - m) ** 2 / np.where(use, m, 1.0), 0.0)
    df = np.maximum(use.sum(axis=(1, 2)) - n_params, 1)
    phi = np.full(counts.shape[0], float(floor))
    for _ in range(100):
        den = 1.0 + phi[:, None, None] * m
        h = (r2 / den).sum(axis=(1, 2)) - df
        dh = -(r2 * m / den**2).sum(axis=(1, 2))
        step = np.where((h > 0) & (dh < 0), -h / np.where(dh < 0, dh, -1.0), 0.0)
        phi = phi + step
        if np.all(step <= 1e-10 * np.maximum(phi, 1e-8)):
            break
    return np.maximum(phi, floor)


# --------------------------------------------------------------------------- models


class _TriangleModel:
    """Shared fitted state: expected cells, completed totals and reserves from pmf + weights."""

    def _finalise(
        self,
        tri: _Triangle,
        pmf: np.ndarray,
        weights: np.ndarray | None,
        n_params: int,
        dispersion_floor: float,
        estimate_dispersion: bool,
    ) -> None:
        """Row totals by Poisson ML given the delay pmf; derived attributes; Pearson dispersion."""
        w = np.broadcast_to(pmf[:, None, :], tri.counts.shape)
        if weights is not None:
            w = w * weights
        row_pmf = _safe_div(w, w.sum(axis=2, keepdims=True))
        frac_obs = (row_pmf * tri.observed).sum(axis=2)
        row_obs = tri.counts.sum(axis=2)
        with np.errstate(divide="ignore", invalid="ignore"):
            total = np.where(frac_obs > 0, row_obs / np.where(frac_obs > 0, frac_obs, 1.0), np.nan)
        expected = total[:, :, None] * row_pmf
        missing = (expected * tri.predict).sum(axis=2)
        self.observed_mask_ = tri.observed
        self.predict_mask_ = tri.predict
        self.observed_counts_ = row_obs
        self.observed_fraction_ = frac_obs
        self.row_pmf_ = row_pmf
        self.report_weights_ = weights
        self.expected_ = expected
        self.reported_ = tri.reported
        self.expected_total_ = tri.reported + missing
        self.reserve_ = np.nansum(missing, axis=1)
        if estimate_dispersion:
            self.dispersion_ = _pearson_nb_dispersion(
                tri.counts, expected, tri.observed, n_params, dispersion_floor
            )
        else:
            self.dispersion_ = np.zeros(tri.shape[0])


class ChainLadder(_TriangleModel):
    """Actuarial chain ladder (volume-weighted development factors), vectorised over series.

    Fits the multiplicative reporting-delay model (Lawless 1994) by the classical chain-ladder
    algorithm; works on incremental reporting triangles (use ``cumulative_to_incremental`` for a
    cumulative actuarial triangle).
    """

    def __init__(self, *, max_delay: int | None = 28, dispersion_floor: float = 1e-3) -> None:
        self.max_delay = max_delay
        self.dispersion_floor = dispersion_floor

    def fit(self, tri: np.ndarray, reported: np.ndarray | None = None) -> ChainLadder:
        """Estimate development factors, delay pmf, completed row totals and the reserve.

        Attributes: ``factors_`` (S, D), ``delay_pmf_`` (S, D+1), ``expected_total_`` (S, n_ref),
        ``reserve_`` (S,), ``reported_``, ``expected_`` (fitted cell means) and ``dispersion_``
        (NB2 Pearson estimate of the cells around the fit, used by ``DelayNowcaster``).
        Rows with holes get their total by Poisson ML given the pmf (= chain ladder without holes).
        """
        t = _prepare(tri, self.max_delay, reported)
        self.factors_ = _chain_ladder_factors(t.counts, t.observed)
        self.delay_pmf_ = _pmf_from_factors(self.factors_)
        self.base_pmf_ = self.delay_pmf_
        self.pool_weight_ = np.ones(t.shape[0])
        self.pooling_ = np.full(t.shape[0], "own", dtype=object)
        self._finalise(t, self.delay_pmf_, None, t.shape[1] + t.shape[2] - 1,
                       self.dispersion_floor, True)
        return self


class DelayGLM(_TriangleModel):
    """Log-linear count model for triangle cells: ref-date + delay (+ report-weekday) factors.

    Poisson ML of the mean structure (the over-dispersed Poisson model of Renshaw & Verrall 1998,
    whose fit without weekday effect reproduces the chain ladder); ``family="negbin"`` adds NB2
    cell noise with dispersion from the Pearson moment equation per series (floored).  Sparse
    series have their delay pmf shrunk towards the pmf pooled over all series.
    """

    def __init__(
        self,
        *,
        family: str = "negbin",
        weekday_effect: bool = False,
        first_ref_weekday: int = 0,
        max_delay: int | None = 28,
        solver: str = "auto",
        pool_below: float = 1000.0,
        pool_fully_below: float = 50.0,
        pool_strength: float = 200.0,
        dispersion_floor: float = 1e-3,
        max_iter: int = 500,
        tol: float = 1e-10,
    ) -> None:
        self.family = family
        self.weekday_effect = weekday_effect
        self.first_ref_weekday = first_ref_weekday
        self.max_delay = max_delay
        self.solver = solver
        self.pool_below = pool_below
        self.pool_fully_below = pool_fully_below
        self.pool_strength = pool_strength
        self.dispersion_floor = dispersion_floor
        self.max_iter = max_iter
        self.tol = tol

    def fit(self, tri: np.ndarray, reported: np.ndarray | None = None) -> DelayGLM:
        """Fit per-series log-linear models, pool sparse series, predict the unobserved cells.

        ``solver``: "vectorised" (exact block-update Poisson ML for all series at once, started at
        the chain ladder; "auto") or "statsmodels" (one ``sm.GLM`` Poisson fit per series).
        Pooling: n_i = clipped observed events of series i; n_i >= pool_below -> "own" pmf;
        pool_fully_below <= n_i < pool_below -> "shrunk" to (n_i p_i + k p_pool) / (n_i + k)
        with k = pool_strength (weekday multipliers mixed the same way); below -> "pooled".
        The pooled pmf is the ML fit with delay (and weekday) effects shared by all series.

        Attributes: ``delay_pmf_`` (S, D+1; with weekday effect the average over the 7
        reference weekdays of the row pmf), ``base_pmf_`` (normalised delay effects after
        pooling), ``own_pmf_``, ``pooled_pmf_`` (D+1,), ``pooling_`` / ``pool_weight_`` /
        ``n_events_`` (S,), ``weekday_effect_`` (S, 7; report weekday 0 = Monday, mean 1, or
        None), ``expected_`` (S, n_ref, D+1 fitted cell means), ``reported_``,
        ``expected_total_``, ``reserve_``, ``dispersion_`` (NB2 phi; 0 for Poisson), ``n_iter_``.
        """
        if self.family not in _FAMILIES:
            raise ValueError(f"family must be one of {_FAMILIES}; got {self.family!r}")
        if self.solver not in ("auto", "vectorised", "statsmodels"):
            raise ValueError(f"solver must be auto|vectorised|statsmodels; got {self.solver!r}")
        t = _prepare(tri, self.max_delay, reported)
        s, n_ref, k = t.shape
        wk = _weekday_index(n_ref, k, self.first_ref_weekday) if self.weekday_effect else None
        if self.solver == "statsmodels":
            p_own, g_own = _fit_statsmodels(t.counts, t.observed, wk)
            self.n_iter_ = 0
        else:
            p0 = _pmf_from_factors(_chain_ladder_factors(t.counts, t.observed))
            p_own, g_own, self.n_iter_ = _poisson_ml(
                t.counts, t.observed, wk, p0, self.max_iter, self.tol
            )
        # pooled fit: all series stacked as rows of one triangle (shared delay/weekday effects)
        stacked = t.counts.reshape(1, s * n_ref, k)
        stacked_obs = t.observed.reshape(1, s * n_ref, k)
        p0 = _pmf_from_factors(_chain_ladder_factors(stacked, stacked_obs))
        wk_stacked = None if wk is None else np.tile(wk, (s, 1))
        p_pool, g_pool, _ = _poisson_ml(stacked, stacked_obs, wk_stacked, p0, self.max_iter,
                                        self.tol)
        n_events = t.counts.sum(axis=(1, 2))
        weight = np.where(n_events >= self.pool_below, 1.0,
                          n_events / (n_events + self.pool_strength))
        weight = np.where(n_events < self.pool_fully_below, 0.0, weight)
        self.pooling_ = np.where(weight >= 1.0, "own", np.where(weight > 0.0, "shrunk", "pooled"))
        self.pooling_ = self.pooling_.astype(object)
        self.pool_weight_ = weight
        self.n_events_ = n_events
        self.own_pmf_ = p_own
        self.pooled_pmf_ = p_pool[0]
        pmf = weight[:, None] * p_own + (1.0 - weight[:, None]) * p_pool
        self.base_pmf_ = pmf
        weights: np.ndarray | None = None
        self.weekday_effect_: np.ndarray | None = None
        if g_own is not None:
            assert g_pool is not None and wk is not None
            g = weight[:, None] * g_own + (1.0 - weight[:, None]) * g_pool
            g = _safe_div(g, g.mean(axis=1, keepdims=True))
            self.weekday_effect_ = g
            weights = g[np.arange(s)[:, None, None], wk[None]]
            # average over the 7 reference weekdays of the row-wise delay pmf
            week = pmf[:, None, :] * weights[:, :7] if n_ref >= 7 else None
            if week is not None:
                self.delay_pmf_ = _safe_div(week, week.sum(axis=2, keepdims=True)).mean(axis=1)
            else:
                self.delay_pmf_ = pmf
        else:
            self.delay_pmf_ = pmf
        n_params = n_ref + k - 1 + (6 if self.weekday_effect else 0)
        self.report_weekday_ = wk
        self._finalise(t, pmf, weights, n_params, self.dispersion_floor,
                       self.family == "negbin")
        return self


def _fit_statsmodels(
    counts: np.ndarray, observed: np.ndarray, weekday: np.ndarray | None
) -> tuple[np.ndarray, np.ndarray | None]:
    """Per-series statsmodels Poisson GLM with row, delay (and report-weekday) dummies.

    Rows, delays or weekdays without any reported event have ML effect -inf (probability 0); they
    are left out of the design and get pmf 0 / multiplier 0.
    """
    import statsmodels.api as sm

    s, _, k = counts.shape
    pmf = np.zeros((s, k))
    g_all = np.zeros((s, 7)) if weekday is not None else None
    for i in range(s):  # one GLM per series (the reference route; the fast route is vectorised)
        y_cells = counts[i]
        rows = y_cells.sum(axis=1) > 0
        cols = y_cells.sum(axis=0) > 0
        use = observed[i] & rows[:, None] & cols[None, :]
        if not use.any():  # no events: nothing to estimate (pmf and multipliers stay 0)
            continue
        blocks = []
        tt, dd = np.nonzero(use)
        row_levels = np.flatnonzero(rows)
        col_levels = np.flatnonzero(cols)
        blocks.append((tt[:, None] == row_levels[None, :]).astype(float))
        blocks.append((dd[:, None] == col_levels[None, 1:]).astype(float))
        if weekday is not None:
            ww = weekday[tt, dd]
            wk_present = np.flatnonzero(np.bincount(ww, weights=y_cells[use], minlength=7) > 0)
            keep = np.isin(ww, wk_present)
            blocks = [b[keep] for b in blocks]
            tt, dd, ww = tt[keep], dd[keep], ww[keep]
            blocks.append((ww[:, None] == wk_present[None, 1:]).astype(float))
        design = np.hstack(blocks)
        y = y_cells[tt, dd]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = sm.GLM(y, design, family=sm.families.Poisson()).fit(
                tol=1e-10, tol_criterion="params", maxiter=300)
        params = np.asarray(res.params)
        n_rows = row_levels.size
        beta = np.zeros(col_levels.size)
        beta[1:] = params[n_rows:n_rows + col_levels.size - 1]
        eb = np.exp(beta - beta.max())
        pmf[i, col_levels] = eb / eb.sum()
        if weekday is not None:
            gamma = np.zeros(wk_present.size)
            gamma[1:] = params[n_rows + col_levels.size - 1:]
            g = np.zeros(7)
            g[wk_present] = np.exp(gamma - gamma.max())
            g_all[i] = g / g.mean()  # type: ignore[index]
    return pmf, g_all


# --------------------------------------------------------------------------- nowcaster


def _ext(a: np.ndarray, onehot: np.ndarray | None) -> np.ndarray:
    """Z_t^T a_t for every row: delay part a, plus report-weekday sums when modelled."""
    if onehot is None:
        return a
    return np.concatenate([a, np.einsum("stk,tkw->stw", a, onehot)], axis=2)


def _zdz(c: np.ndarray, onehot: np.ndarray | None) -> np.ndarray:
    """sum_t Z_t^T diag(c_t) Z_t, shape (S, P, P), for cell weights c (S, T, K)."""
    s, _, k = c.shape
    diag_d = c.sum(axis=1)
    if onehot is None:
        out = np.zeros((s, k, k))
        out[:, np.arange(k), np.arange(k)] = diag_d
        return out
    cross = np.einsum("stk,tkw->skw", c, onehot)
    out = np.zeros((s, k + 7, k + 7))
    out[:, np.arange(k), np.arange(k)] = diag_d
    out[:, np.arange(k, k + 7), np.arange(k, k + 7)] = cross.sum(axis=1)
    out[:, :k, k:] = cross
    out[:, k:, :k] = np.swapaxes(cross, 1, 2)
    return out


def _gauge(info: np.ndarray, blocks: list[slice]) -> np.ndarray:
    """Orthonormal basis (as N N^T) of the known null space of a profile information matrix.

    Per parameter block (delays; weekdays): unit vectors of parameters without information
    (zero diagonal) and the normalised all-ones vector over the others (a common shift of the
    block is absorbed by the row levels or by the other block).
    """
    diag = np.diagonal(info, axis1=-2, axis2=-1)
    nnt = np.zeros(info.shape)
    idx = np.arange(info.shape[-1])
    for b in blocks:
        live = diag[..., b] > 0
        ones = live / np.sqrt(np.maximum(live.sum(axis=-1, keepdims=True), 1))
        nnt[..., b, b] += ones[..., :, None] * ones[..., None, :]
        dead = np.zeros(diag.shape, dtype=bool)
        dead[..., b] = ~live
        nnt[..., idx, idx] += dead
    return nnt


def _pinv_gauge(info: np.ndarray, blocks: list[slice]) -> np.ndarray:
    """Pseudo-inverse of an information matrix whose null space is the known gauge N:
    (I + N N^T)^-1 - N N^T (exact when N is orthonormal and spans the null space)."""
    nnt = _gauge(info, blocks)
    return np.linalg.inv(info + nnt) - nnt


def _cov_root(cov: np.ndarray, pmf: np.ndarray) -> np.ndarray:
    """Cholesky root of a log-pmf covariance made definite by adding its gauge directions.

    The added directions (a common shift over delays with pmf > 0; delays with pmf 0) do not
    change the renormalised pmf, so draws from the root have the right law for the pmf.
    """
    live = pmf > 0
    ones = live / np.sqrt(np.maximum(live.sum(axis=1, keepdims=True), 1))
    k = pmf.shape[1]
    scale = np.maximum(np.trace(cov, axis1=1, axis2=2) / k, 1e-300)[:, None, None]
    definite = cov + ones[:, :, None] * ones[:, None, :] * scale + np.eye(k) * 1e-12 * scale
    definite[:, np.arange(k), np.arange(k)] += ~live * scale[:, :, 0]
    return np.linalg.cholesky(definite)


def _log_pmf_covariance(model: Any, dispersion: np.ndarray) -> np.ndarray:
    """Asymptotic covariance (S, K, K) of the log delay effects beta (pmf = exp(beta) / sum).

    Row levels are profiled out (each row is then multinomial over its observed cells); the
    mean is the Poisson (quasi-)likelihood estimate, so the sandwich I^+ J I^+ is used with
    I = sum_t Z'(diag mu - mu mu'/m)Z and J = Var(score) under NB2 cell variance mu (1 + phi mu)
    (Z: delay and report-weekday indicators; ^+ drops the gauge directions).
    Shrunk/pooled series: w^2 C_own + (1 - w)^2 C_pooled, C_pooled from the summed I and J
    (the pooled pmf is treated as estimated; between-series bias is not represented).
    """
    obs = model.observed_mask_
    mu = np.where(obs, np.nan_to_num(model.expected_), 0.0)
    s, _, k = mu.shape
    phi = np.asarray(dispersion, dtype=float)[:, None, None]
    var = mu * (1.0 + phi * mu)
    wk = getattr(model, "report_weekday_", None)
    onehot = None if wk is None else (wk[:, :, None] == np.arange(7)).astype(float)
    blocks = [slice(0, k)] if onehot is None else [slice(0, k), slice(k, k + 7)]
    inv_m = _safe_div(1.0, mu.sum(axis=2))
    pi = mu * inv_m[:, :, None]
    e_mu, e_var, e_pi = _ext(mu, onehot), _ext(var, onehot), _ext(pi, onehot)
    info = _zdz(mu, onehot) - np.swapaxes(e_mu * inv_m[:, :, None], 1, 2) @ e_mu
    cross = np.swapaxes(e_pi, 1, 2) @ e_var
    meat = (_zdz(var, onehot) - cross - np.swapaxes(cross, 1, 2)
            + np.swapaxes(e_pi * var.sum(axis=2)[:, :, None], 1, 2) @ e_pi)
    inv = _pinv_gauge(info, blocks)
    cov_own = (inv @ meat @ inv)[:, :k, :k]
    inv_pool = _pinv_gauge(info.sum(axis=0), blocks)
    cov_pool = (inv_pool @ meat.sum(axis=0) @ inv_pool)[:k, :k]
    w = np.asarray(getattr(model, "pool_weight_", np.ones(s)), dtype=float)[:, None, None]
    cov = w**2 * cov_own + (1.0 - w) ** 2 * cov_pool[None]
    return 0.5 * (cov + np.swapaxes(cov, 1, 2))


class DelayNowcaster:
    """Predictive distribution of the eventual total per (series, ref row) from a delay model.

    For each incomplete row the not-yet-reported count Y is drawn as follows.
    1. Parameter uncertainty (``parameter_uncertainty=True``): the log delay effects beta of the
       base pmf are drawn from their asymptotic normal law (sandwich covariance, see
       ``_log_pmf_covariance``; mean-corrected so E[p*] = p) and exp(beta) is renormalised.
       One draw per (draw, series) is shared by all its rows, so the completion factors of
       neighbouring rows move together.  Report-weekday multipliers stay at their estimates.
    2. Row level: with observed pmf mass F and clipped observed count O, the row total a has
       the Gamma(O / v + kappa, F / v + kappa / L) posterior of a Gamma(kappa, kappa / L) prior
       (kappa = ``prior_shape``, default 1: exponential, weak) centred on the series' recent
       level L = sum O / sum F over the last ``prior_window`` rows (ML of a constant level);
       v = 1 + phi * O * sum_obs q^2 / F^2 inflates the Poisson variance of O for NB2 cells
       (v = 1 for Poisson).  The prior matters only when O and F are small; rows with F = 0
       (e.g. no same-day reports) get a prior-only, wide nowcast.
    3. Y given a has mean a M (M = pmf mass of the predicted cells) and NB2 variance
       a M + phi a^2 sum_pred q^2; Y is drawn from the negative binomial (Poisson if the variance
       equals the mean) matching the mean and variance of this mixture.
    The nowcast is reported + Y.  Means above 50 are drawn as a rounded gamma with the same
    mean and variance (faster than gamma-Poisson, indistinguishable at that size).
    """

    def __init__(
        self,
        *,
        model: Any | None = None,
        family: str | None = None,
        parameter_uncertainty: bool = True,
        prior_shape: float = 1.0,
        prior_window: int = 14,
        chunk_elements: int = 1_000_000,
    ) -> None:
        self.model = model
        self.family = family
        self.parameter_uncertainty = parameter_uncertainty
        self.prior_shape = prior_shape
        self.prior_window = prior_window
        self.chunk_elements = chunk_elements

    def fit(self, tri: np.ndarray, reported: np.ndarray | None = None) -> DelayNowcaster:
        """Fit the delay model (default ``DelayGLM()``, fitted in place) and prepare sampling.

        ``expected_total_`` is reported + the posterior mean of the unreported part at the fitted
        pmf (equal to the model's ML completion up to the weak prior); ``prior_level_`` (S,),
        ``log_pmf_cov_`` (S, D+1, D+1) and ``incomplete_rows_`` are kept for sampling.
        """
        model = self.model if self.model is not None else DelayGLM()
        model.fit(tri, reported=reported)
        family = self.family or getattr(model, "family", "negbin")
        if family not in _FAMILIES:
            raise ValueError(f"family must be one of {_FAMILIES}; got {family!r}")
        self.model_ = model
        self.family_ = family
        self.reported_ = model.reported_
        self.delay_pmf_ = model.delay_pmf_
        self.pooling_ = model.pooling_
        self.dispersion_ = (np.asarray(model.dispersion_, dtype=float) if family == "negbin"
                            else np.zeros(model.reported_.shape[0]))
        self.log_pmf_cov_ = _log_pmf_covariance(model, self.dispersion_)
        self._cov_root = _cov_root(self.log_pmf_cov_, model.base_pmf_)
        self.incomplete_rows_ = np.flatnonzero(model.predict_mask_.any(axis=(0, 2)))
        window = slice(max(0, model.reported_.shape[1] - int(self.prior_window)), None)
        self.prior_level_ = _safe_div(model.observed_counts_[:, window].sum(axis=1),
                                      model.observed_fraction_[:, window].sum(axis=1))
        self.expected_total_ = self._posterior_mean_total()
        return self

    def _posterior_mean_total(self) -> np.ndarray:
        """Reported + posterior mean of the predicted part at the fitted pmf, (S, n_ref)."""
        m = self.model_
        frac_obs = m.observed_fraction_
        rowp = m.row_pmf_
        frac_pred = (rowp * m.predict_mask_).sum(axis=2)
        sq_obs = (rowp**2 * m.observed_mask_).sum(axis=2)
        count = m.observed_counts_
        phi = self.dispersion_[:, None]
        v = 1.0 + phi * count * sq_obs / np.maximum(frac_obs, _TINY) ** 2
        rate0 = self.prior_shape / np.maximum(self.prior_level_, 1e-9)[:, None]
        mean_a = (count + self.prior_shape * v) / (frac_obs + v * rate0)
        return self.reported_ + mean_a * frac_pred

    def _chunk(self, n_draws: int) -> int:
        """Series per chunk so that draws x series x (D+1) stays below ``chunk_elements``."""
        k = self.model_.expected_.shape[2]
        per = max(n_draws * max(k, self.incomplete_rows_.size, 1), 1)
        return max(1, int(self.chunk_elements // per))

    def _pmf_draws(self, sl: slice, n_draws: int, rng: np.random.Generator) -> np.ndarray:
        """Base delay pmf draws (s, K, n_draws): p * exp(N(-diag(C)/2, C)) renormalised.

        The shift -diag(C)/2 keeps E[p*_d] = p_d before renormalisation (lognormal mean).
        """
        p = self.model_.base_pmf_[sl]
        if not self.parameter_uncertainty or p.shape[1] < 2:
            return p[:, :, None]
        z = rng.standard_normal((p.shape[0], p.shape[1], n_draws))
        delta = self._cov_root[sl] @ z
        delta -= 0.5 * np.diagonal(self.log_pmf_cov_[sl], axis1=1, axis2=2)[:, :, None]
        pmf = np.exp(delta, out=delta)
        pmf *= p[:, :, None]
        with np.errstate(invalid="ignore", divide="ignore"):  # an all-zero pmf stays NaN
            pmf /= pmf.sum(axis=1, keepdims=True)
        return pmf

    def draw_delay_pmf(self, n_draws: int, rng: np.random.Generator | None = None) -> np.ndarray:
        """Draws of the base delay pmf used for parameter uncertainty, (n_draws, S, D+1)."""
        rng = np.random.default_rng() if rng is None else rng
        return np.moveaxis(self._pmf_draws(slice(None), n_draws, rng), 2, 0)

    def _draw_missing(self, sl: slice, n_draws: int, rng: np.random.Generator) -> np.ndarray:
        """Draws of the not-yet-reported counts of the incomplete rows: (s, n_rows, n_draws)."""
        m = self.model_
        rows = self.incomplete_rows_
        r = rows.size
        obs = m.observed_mask_[sl][:, rows]
        pred = m.predict_mask_[sl][:, rows]
        count = m.observed_counts_[sl][:, rows][:, :, None]
        phi = self.dispersion_[sl][:, None, None]
        pmf = self._pmf_draws(sl, n_draws, rng)  # (s, k, b) or (s, k, 1)
        # sums of the row pmf over observed / predicted cells (and of its square): batched matmul
        if m.report_weights_ is None:
            w = None
            lin = np.concatenate([obs, pred], axis=1).astype(float)
            quad = lin
        else:
            w = m.report_weights_[sl][:, rows]
            lin = np.concatenate([w * obs, w * pred, w], axis=1)
            quad = np.concatenate([w**2 * obs, w**2 * pred], axis=1)
        m1 = _blocked_matmul(lin, pmf)  # (s, 2r or 3r, b)
        m2 = _blocked_matmul(quad, pmf * pmf)
        frac_obs, frac_pred = m1[:, :r], m1[:, r:2 * r]
        sq_obs, sq_pred = m2[:, :r], m2[:, r:]
        if w is not None:  # row-normalise the weekday-weighted pmf
            inv = _safe_div(1.0, m1[:, 2 * r:])
            frac_obs *= inv
            frac_pred *= inv
            inv *= inv
            sq_obs *= inv
            sq_pred *= inv
        f_obs = np.maximum(frac_obs, _TINY)
        # v: NB2 inflation of Var(O).  Posterior a ~ Gamma(O / v + kappa, F / v + kappa / level)
        # has mean (O + kappa v) / (F + v kappa / level) and variance mean * v / (same).
        v = sq_obs
        v *= phi * count
        v /= f_obs
        v /= f_obs
        v += 1.0
        rate0 = self.prior_shape / np.maximum(self.prior_level_[sl], 1e-9)[:, None, None]
        den = v * rate0
        den += frac_obs
        mean_a = v * self.prior_shape
        mean_a += count
        mean_a /= den
        var_a = mean_a * v
        var_a /= den
        mean_y = mean_a * frac_pred
        # excess of Var(Y) over its mean: phi E[a^2] sum_pred q^2 + M^2 Var(a)
        excess = mean_a * mean_a
        excess += var_a
        excess *= sq_pred
        excess *= phi
        var_a *= frac_pred
        var_a *= frac_pred
        excess += var_a
        shape = mean_y.shape[:2] + (n_draws,)  # (s, r, b) also without pmf draws
        mean_y = np.broadcast_to(mean_y, shape)
        excess = np.broadcast_to(excess, shape)
        y = np.zeros(shape)
        # large means: rounded gamma with the mixture's mean and variance (saves the Poisson step)
        big = mean_y >= _GAMMA_ONLY_MEAN
        if big.any():
            mb, eb = mean_y[big], excess[big]
            y[big] = np.rint(rng.gamma(mb * mb / (mb + eb), (mb + eb) / mb))
        small = ~big & (mean_y > 0)
        if small.any():  # NB as a gamma-Poisson mixture (Poisson when there is no excess)
            ms, es = mean_y[small], excess[small]
            pos = es > 0
            size = np.divide(ms * ms, es, out=np.ones_like(es), where=pos)
            scale = np.divide(es, ms, out=np.zeros_like(es), where=pos)
            lam = rng.gamma(size, scale)
            np.copyto(lam, ms, where=~pos)
            y[small] = rng.poisson(lam)
        return y

    def sample(self, n_draws: int = 500, rng: np.random.Generator | None = None) -> np.ndarray:
        """Joint draws of eventual totals, shape (n_draws, n_series, n_ref); sampled in chunks.

        Draws share a delay-pmf perturbation across the rows of a series, so sums over rows
        (e.g. weekly totals) carry the parameter correlation.
        """
        rng = np.random.default_rng() if rng is None else rng
        s, n_ref = self.reported_.shape
        out = np.broadcast_to(self.reported_[None], (n_draws, s, n_ref)).copy()
        rows = self.incomplete_rows_
        if rows.size == 0:
            return out
        step = self._chunk(n_draws)
        for start in range(0, s, step):
            sl = slice(start, min(start + step, s))
            y = np.moveaxis(self._draw_missing(sl, n_draws, rng), 2, 0)
            out[:, sl, rows[0]:rows[-1] + 1] += _spread(y, rows)
        return out

    def quantiles(
        self,
        q_levels: np.ndarray | list[float],
        n_draws: int = 500,
        rng: np.random.Generator | None = None,
    ) -> np.ndarray:
        """Predictive quantiles of eventual totals, shape (n_series, n_ref, n_q).

        Monotone in q (sample quantiles of the predicted part) and >= reported (predicted
        counts are >= 0); complete rows return the reported value.
        """
        rng = np.random.default_rng() if rng is None else rng
        q = np.asarray(q_levels, dtype=float).ravel()
        if np.any((q < 0) | (q > 1)):
            raise ValueError("q_levels must lie in [0, 1]")
        s = self.reported_.shape[0]
        out = np.repeat(self.reported_[:, :, None], q.size, axis=2).astype(float)
        rows = self.incomplete_rows_
        if rows.size == 0:
            return out
        step = self._chunk(n_draws)
        for start in range(0, s, step):
            sl = slice(start, min(start + step, s))
            y = self._draw_missing(sl, n_draws, rng)
            y.sort(axis=2)
            qy = _sorted_quantiles(y, q)  # (s, n_rows, n_q)
            out[sl, rows[0]:rows[-1] + 1] += _spread(qy, rows, axis=1)
        return out


def _blocked_matmul(a: np.ndarray, b: np.ndarray, block: int = 28) -> np.ndarray:
    """Batched a @ b computed in blocks of ``block`` rows of a.

    Small products stay below OpenBLAS's multithreading threshold; on a busy machine the
    threaded path was measured 5-50x slower for these shapes.
    """
    out = np.empty(a.shape[:-1] + b.shape[-1:])
    for start in range(0, a.shape[-2], block):
        rows = slice(start, start + block)
        out[..., rows, :] = np.ascontiguousarray(a[..., rows, :]) @ b
    return out


def _sorted_quantiles(sorted_draws: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Linear-interpolation sample quantiles (numpy's default) of draws sorted on the last axis."""
    n = sorted_draws.shape[-1]
    pos = q * (n - 1)
    lo = np.floor(pos).astype(int)
    hi = np.minimum(lo + 1, n - 1)
    frac = pos - lo
    a = sorted_draws[..., lo]
    b = sorted_draws[..., hi]
    return a + (b - a) * frac


def _spread(values: np.ndarray, rows: np.ndarray, axis: int = -1) -> np.ndarray:
    """Place values indexed by ``rows`` into a zero array covering rows[0]..rows[-1]."""
    if rows.size == rows[-1] - rows[0] + 1:
        return values
    shape = list(values.shape)
    shape[axis] = rows[-1] - rows[0] + 1
    out = np.zeros(shape)
    idx = [slice(None)] * len(shape)
    idx[axis] = rows - rows[0]
    out[tuple(idx)] = values
    return out


# --------------------------------------------------------------------------- diagnostics, sims


class WeeklyDelay(NamedTuple):
    """Mean reporting delay per (series, ref-week) with the events it rests on."""

    mean_delay: np.ndarray  # (S, n_weeks), NaN where fewer than min_events
    n_events: np.ndarray  # (S, n_weeks)
    week_first_row: np.ndarray  # (n_weeks,) first ref row of each week


def mean_delay_by_week(
    tri: np.ndarray,
    *,
    horizon: int | None = None,
    week_length: int = 7,
    min_events: float = 1.0,
) -> WeeklyDelay:
    """Mean reporting delay per ref-week over rows observed at least ``horizon`` days.

    Only rows whose cells 0..horizon are all observed enter (default horizon = D: complete rows),
    and delays beyond ``horizon`` are ignored, so every week's value is the mean of the same
    truncated delay distribution and drifts are comparable.  Weeks are blocks of ``week_length``
    rows starting at row 0; negative increments are clipped to 0.
    """
    arr = np.asarray(tri, dtype=float)
    if arr.ndim == 2:
        arr = arr[None]
    _, n_ref, k = arr.shape
    h = k - 1 if horizon is None else min(int(horizon), k - 1)
    cells = arr[:, :, : h + 1]
    ok = np.isfinite(cells).all(axis=2) & ((np.arange(n_ref) + h) <= n_ref - 1)[None, :]
    x = np.where(ok[:, :, None], np.maximum(np.nan_to_num(cells), 0.0), 0.0)
    starts = np.arange(0, n_ref, week_length)
    n = np.add.reduceat(x.sum(axis=2), starts, axis=1)
    s1 = np.add.reduceat((x * np.arange(h + 1)).sum(axis=2), starts, axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean = np.where(n >= min_events, s1 / np.where(n > 0, n, 1.0), np.nan)
    return WeeklyDelay(mean, n, starts)


def simulate_triangle(
    expected: np.ndarray,
    delay_pmf: np.ndarray,
    dispersion: float | np.ndarray = 0.0,
    rng: np.random.Generator | None = None,
    *,
    report_weekday_factors: np.ndarray | None = None,
    first_ref_weekday: int = 0,
) -> tuple[np.ndarray, np.ndarray]:
    """Simulate a reporting triangle with known truth; returns (full, observed-with-NaN).

    Cell means are expected[s, t] * q_t(d), q_t = delay_pmf (shape (S|1, D+1), or
    (S|1, n_ref, D+1) for a drifting pmf), optionally multiplied by report-weekday factors and
    renormalised per row.  Counts are Poisson (dispersion 0) or NB2 gamma-Poisson mixtures with
    Var = mu + dispersion * mu^2.  Cells with t + d > n_ref - 1 are NaN in the observed copy.
    """
    rng = np.random.default_rng() if rng is None else rng
    e = np.atleast_2d(np.asarray(expected, dtype=float))
    s, n_ref = e.shape
    pmf = np.asarray(delay_pmf, dtype=float)
    if pmf.ndim == 1:
        pmf = pmf[None]
    if pmf.ndim == 2:
        pmf = pmf[:, None, :]
    k = pmf.shape[-1]
    q = np.broadcast_to(pmf, (s, n_ref, k)).astype(float)
    if report_weekday_factors is not None:
        g = np.asarray(report_weekday_factors, dtype=float)
        q = q * g[_weekday_index(n_ref, k, first_ref_weekday)][None]
    q = _safe_div(q, q.sum(axis=2, keepdims=True))
    mu = e[:, :, None] * q
    phi = np.broadcast_to(np.asarray(dispersion, dtype=float), (s,))[:, None, None]
    if np.any(phi > 0):
        shape = np.where(phi > 0, 1.0 / np.where(phi > 0, phi, 1.0), 1.0)
        lam = np.where(phi > 0, mu * rng.gamma(np.broadcast_to(shape, mu.shape),
                                               np.broadcast_to(1.0 / shape, mu.shape)), mu)
    else:
        lam = mu
    full = rng.poisson(lam).astype(float)
    future = (np.arange(n_ref)[:, None] + np.arange(k)[None, :]) > (n_ref - 1)
    observed = np.where(future[None], np.nan, full)
    return full, observed
