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
* Reports later than ``max_delay`` days: with ``tail="none"`` they are outside the model (columns
  beyond it are dropped).  With ``tail="geometric"`` the last column is a "≥ D" bin holding every
  report at delay D or later known by as_of (:func:`fold_tail` builds it from a wider triangle);
  row t has seen delays D .. n_ref-1-t of it.

Model
-----
Cell counts have mean ``mu[t, d] = N_t * q_t(d)``: a row total ``N_t`` times a delay pmf ``q_t``,
log-linear in its effects (Poisson regression with row factors; the multiplicative chain-ladder
model of Lawless 1994, whose Poisson maximum-likelihood fit is the chain ladder, Renshaw &
Verrall 1998):

    q_t(d) ∝ p_d · g[c(t + d)] · exp(eta[k(t)] · d)

* ``p``: delay effects (the delay pmf of the newest reference dates);
* ``g``: report-day classes (``c`` = weekday of the report date, or "holiday" for listed closed
  report dates; Höhle & an der Heiden 2014 model report-weekday effects on the reporting hazard);
* ``eta``: a time effect on the delay (drift): an exponential tilt of the pmf, constant within
  blocks of ``segment_days`` reference dates (piecewise constant, newest block 0) and tied between
  neighbouring blocks by a Gaussian random-walk penalty of sd ``drift_sd`` (a smooth time effect
  on the delay in the spirit of van de Kassteele et al. 2019 and Günther et al. 2021; a tilt by
  exp(eta d) is exactly a change of scale for gamma-shaped delays of fixed shape);
* the "≥ D" tail bin has a geometric tail: P(delay = D + j | ≥ D) = (1 - r) r^j, so row t has
  seen the share 1 - r^(n_ref - t - D) of it (r fitted on the pooled triangle).

* ``ChainLadder``: the actuarial algorithm (volume-weighted development factors).
* ``DelayGLM``: Poisson (quasi-)ML of the log-linear model by exact block updates, vectorised
  over series (or by statsmodels, the reference route); NB2 dispersion by the Pearson moment
  equation; delay structures of sparse series are shrunk toward the one pooled over all series
  (a fit on the summed triangle, computed once and passed in as ``pooled=``).
* ``DelayNowcaster``: predictive draws / quantiles of each row's eventual total (row-level
  posterior, NB2 noise of the unreported cells, delay-pmf parameter uncertainty), one random
  stream per series; ``predictive_logpdf`` scores arrivals for back-testing.
* ``mean_delay_by_week`` (reporting drift), ``fold_tail`` and ``simulate_triangle`` (known truth
  for tests).
"""

from __future__ import annotations

import copy
import warnings
from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np
from scipy import special, stats

from tallywave.models.base import RandomState, SeriesRandom

__all__ = [
    "ChainLadder",
    "DelayGLM",
    "DelayNowcaster",
    "DriftChoice",
    "PooledDelay",
    "WeeklyDelay",
    "aggregate_triangle",
    "backtest_arrivals",
    "backtest_drift",
    "closed_report_days",
    "cumulative_to_incremental",
    "drift_segments",
    "estimate_tail_shape",
    "fit_tail",
    "fold_tail",
    "incremental_to_cumulative",
    "mean_delay_by_week",
    "report_classes",
    "simulate_triangle",
    "total_variation",
    "weekday_lr_test",
]

_FAMILIES = ("poisson", "negbin")
_TAILS = ("none", "geometric", "negbin")
_TINY = 1e-12
_LL_TOL = 1e-9  # log-likelihood gain per sweep below which the block updates stop
_GAMMA_ONLY_MEAN = 50.0  # above this predicted mean, draw a rounded gamma (no Poisson)
N_CLASSES = 8  # report-day classes: weekdays 0..6 (Monday = 0) and 7 = holiday
HOLIDAY = 7
_TAIL_MEAN_RANGE = (0.2, 400.0)  # days beyond D
_TAIL_SIZE_RANGE = (0.3, 50.0)
_MAX_ETA_STEP = 0.5  # largest Newton step of a tilt per sweep (keeps the block update stable)


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


def fold_tail(tri: np.ndarray, max_delay: int) -> np.ndarray:
    """Fold the columns at delays >= ``max_delay`` into one "≥ D" bin (last column).

    The bin holds what was known by as_of: the sum of the observed (non-NaN) cells at delays
    D and later; it is NaN for rows not yet ``max_delay`` days old.
    """
    arr = np.asarray(tri, dtype=float)
    d = int(max_delay)
    if arr.shape[-1] <= d + 1:
        return arr.copy()
    head = arr[..., :d]
    tail = arr[..., d:]
    seen = np.isfinite(tail[..., 0])
    folded = np.where(seen, np.nansum(tail, axis=-1), np.nan)
    return np.concatenate([head, folded[..., None]], axis=-1)


def aggregate_triangle(tri: np.ndarray) -> np.ndarray:
    """The signal's total triangle (1, n_ref, K): observed cells summed over series.

    A cell is observed when any series observed it.  The ML delay structure of the pooled model
    (effects shared by every series, a free level per series and row) equals the fit of this
    summed triangle when the series share their observation pattern (sums of Poisson counts with
    proportional means are Poisson with the same delay structure).
    """
    arr = np.asarray(tri, dtype=float)
    if arr.ndim == 2:
        arr = arr[None]
    seen = np.isfinite(arr).any(axis=0)
    return np.where(seen, np.nansum(arr, axis=0), np.nan)[None]


def report_classes(n_ref: int, n_delay: int, *, first_ref_weekday: int = 0,
                   weekday: bool = True, holidays: Any = (), tail: bool = False
                   ) -> np.ndarray | None:
    """Report-day class of every cell (t, d), shape (n_ref, n_delay): the weekday of the report
    date t + d (0 = Monday; 0 for every day without ``weekday``), 7 for ``holidays`` (report-day
    indices t + d, day 0 = reference row 0), -1 for a "≥ D" tail bin (it spans many report days).
    None when neither weekday nor holiday effects are asked for."""
    hol = np.asarray(list(holidays), dtype=int)
    if not weekday and hol.size == 0:
        return None
    u = np.arange(n_ref)[:, None] + np.arange(n_delay)[None, :]
    cls = (int(first_ref_weekday) + u) % 7 if weekday else np.zeros_like(u)
    cls = np.where(np.isin(u, hol), HOLIDAY, cls)
    if tail:
        cls[:, -1] = -1
    return cls.astype(np.int64)


def drift_segments(n_ref: int, segment_days: int = 7) -> np.ndarray:
    """Drift block of every reference row, counted back from the newest: the last
    ``segment_days`` rows form the last block (index n_blocks - 1), the oldest block may be
    shorter."""
    back = (n_ref - 1 - np.arange(n_ref)) // max(int(segment_days), 1)
    return (back.max() - back).astype(np.int64)


def _tail_dist(shape: tuple[float, float]) -> Any:
    """The tail J = delay - D given delay >= D: negative binomial with (size, mean)."""
    size, mean = float(shape[0]), float(shape[1])
    return stats.nbinom(size, size / (size + mean))


def _tail_cdf(j: np.ndarray, shape: tuple[float, float]) -> np.ndarray:
    """P(J <= j) of the negative-binomial tail, by the regularised incomplete beta function
    (P(J <= j) = I_p(size, j + 1), p = size / (size + mean); as scipy.stats.nbinom.cdf)."""
    size, mean = float(shape[0]), float(shape[1])
    j = np.asarray(j, dtype=float)
    out = special.betainc(size, np.maximum(j, 0.0) + 1.0, size / (size + mean))
    return np.where(j >= 0, out, 0.0)


def _tail_shares(m: np.ndarray, shape: tuple[float, float]) -> tuple[np.ndarray, np.ndarray]:
    """(seen, to come) shares of the "≥ D" bin after its first m delays were observable."""
    seen = _tail_cdf(np.asarray(m) - 1, shape)
    return seen, 1.0 - seen


@dataclass
class _Triangle:
    """A prepared triangle: clipped counts, masks, exposures and the already-reported totals."""

    counts: np.ndarray  # (S, T, K) clipped at 0, 0 where unobserved
    observed: np.ndarray  # (S, T, K) bool
    predict: np.ndarray  # (S, T, K) bool: cells whose counts the nowcast adds (partly or fully)
    reported: np.ndarray  # (S, T)
    obs_exp: np.ndarray  # (S, T, K) share of each cell's mass seen (1 / 0; tail bin 1 - r^m)
    pred_exp: np.ndarray  # (S, T, K) share still to come (1 / 0; tail bin r^m)

    @property
    def shape(self) -> tuple[int, int, int]:
        s, t, k = self.counts.shape
        return s, t, k


def _prepare(tri: np.ndarray, max_delay: int | None, reported: np.ndarray | None,
             tail_shape: tuple[float, float] | None = None) -> _Triangle:
    """Validate and split a triangle into clipped counts, observation masks and exposures.

    ``tail_shape`` not None: the last column is a "≥ D" bin whose tail J = delay - D is negative
    binomial (size, mean) (columns beyond ``max_delay`` are folded into it first)."""
    arr = np.asarray(tri, dtype=float)
    squeeze = arr.ndim == 2
    if squeeze:
        arr = arr[None]
    if arr.ndim != 3:
        raise ValueError(f"triangle must have shape (n_series, n_ref, D+1); got {arr.shape}")
    if tail_shape is not None and max_delay is not None:
        arr = fold_tail(arr, int(max_delay))
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
    obs_exp = observed.astype(float)
    pred_base = np.broadcast_to(future, arr.shape).astype(float)
    if tail_shape is not None:
        age = t - np.arange(t) - (k - 1)  # tail delays of the bin observable for each row
        seen, left = _tail_shares(age, tail_shape)
        obs_exp[:, :, -1] *= seen
        pred_base[:, :, -1] = left
    if reported is None:
        rep = np.where(observed, np.nan_to_num(arr), 0.0).sum(axis=2)
        pred_exp = np.where(holes, 1.0, pred_base)
    else:
        rep = np.asarray(reported, dtype=float)
        if squeeze and rep.ndim == 1:
            rep = rep[None]
        if rep.shape != (s, t):
            raise ValueError(f"reported must have shape {(s, t)}; got {rep.shape}")
        pred_exp = pred_base
    return _Triangle(counts, observed, pred_exp > 0, rep, obs_exp, pred_exp)


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


@dataclass
class _Design:
    """What every series of one triangle shares: report-day classes, drift blocks, delays."""

    cls: np.ndarray | None  # (T, K) class index, -1 = no class effect (tail bin)
    seg: np.ndarray | None  # (T,) drift block of each row (None: no drift anywhere)
    n_seg: int
    dvec: np.ndarray  # (K,) delay of each column, as used by the tilt
    penalty: float  # random-walk precision 1 / drift_sd^2 between neighbouring blocks

    def class_onehot(self) -> np.ndarray:
        """(T*K, N_CLASSES) indicator matrix of the classes (tail bin: a zero row)."""
        assert self.cls is not None
        return (self.cls.reshape(-1)[:, None] == np.arange(N_CLASSES)[None, :]).astype(float)

    def seg_onehot(self) -> np.ndarray:
        """(T, n_seg) indicator matrix of the drift blocks."""
        assert self.seg is not None
        return (self.seg[:, None] == np.arange(self.n_seg)[None, :]).astype(float)

    def rw_matrix(self) -> np.ndarray:
        """D'D of the first differences between neighbouring blocks, (n_seg, n_seg)."""
        diff = np.diff(np.eye(self.n_seg), axis=0)
        return diff.T @ diff


def _class_factor(g: np.ndarray, cls: np.ndarray) -> np.ndarray:
    """g[s, cls[t, d]] with 1 where cls = -1: (S, T, K)."""
    ext = np.concatenate([g, np.ones((g.shape[0], 1))], axis=1)
    return ext[:, np.where(cls >= 0, cls, N_CLASSES)]


def _tilt(eta: np.ndarray, seg: np.ndarray, dvec: np.ndarray) -> np.ndarray:
    """exp(eta[s, seg[t]] * d): (S, T, K) (exponentials per block, gathered over rows)."""
    return np.exp(eta[:, :, None] * dvec[None, None, :])[:, seg, :]


def _normalise_classes(g: np.ndarray, present: np.ndarray) -> np.ndarray:
    """Scale class effects so their mean over the weekday classes present is 1."""
    week = present[:N_CLASSES - 1]
    mean = g[:, : N_CLASSES - 1][:, week].mean(axis=1, keepdims=True) if week.any() else \
        np.ones((g.shape[0], 1))
    return _safe_div(g, mean)


def _loglik(x: np.ndarray, mu: np.ndarray) -> np.ndarray:
    """Poisson log-likelihood kernel sum(x log mu - mu) per series (0 log 0 = 0)."""
    safe = np.where(mu > 0, mu, 1.0)
    return (x * np.log(safe) - mu).sum(axis=(1, 2))


class _WorkSet:
    """Block-update state of the series still being fitted by :func:`_poisson_ml`."""

    def __init__(self, x: np.ndarray, e: np.ndarray, design: _Design, p: np.ndarray,
                 g: np.ndarray | None, eta: np.ndarray | None, drift: np.ndarray) -> None:
        n, t, k = x.shape
        self.x, self.e, self.design = x, e, design
        self.p, self.g, self.eta = p, g, eta
        self.drift = drift if eta is not None else np.zeros(n, dtype=bool)
        self.row_tot, self.col_tot = x.sum(axis=2), x.sum(axis=1)
        self.oh = None if g is None else design.class_onehot()
        self.present = None if self.oh is None else self.oh.sum(axis=0) > 0
        self.cls_tot = None if self.oh is None else x.reshape(n, t * k) @ self.oh
        self.seg_oh = None if eta is None else design.seg_onehot()
        self.rw = None if eta is None else design.rw_matrix() * design.penalty
        self.xd_row = None if eta is None else (x * design.dvec).sum(axis=2)
        flat = x.reshape(-1)
        self.pos = np.flatnonzero(flat > 0)  # positive cells: the only ones in sum x log mu
        self.xpos = flat[self.pos]
        self.pos_series = self.pos // (t * k)
        self.ll_old = np.full(n, -np.inf)

    def factors(self) -> tuple[np.ndarray, np.ndarray]:
        """(exposure × tilt, exposure × tilt × class effect), each (n, T, K)."""
        d = self.design
        et = self.e if self.eta is None else self.e * _tilt(self.eta, d.seg, d.dvec)  # type: ignore
        other = et if self.g is None else et * _class_factor(self.g, d.cls)  # type: ignore
        return et, other

    def rows(self, other: np.ndarray) -> np.ndarray:
        """Row levels a_t given everything else (closed form)."""
        return _safe_div(self.row_tot, np.einsum("ntk,nk->nt", other, self.p))

    def update_p(self, other: np.ndarray) -> np.ndarray:
        """Delay effects given rows (closed form); returns the largest change per series."""
        a = self.rows(other)
        p_new = _safe_div(self.col_tot, np.einsum("ntk,nt->nk", other, a))
        p_new = _safe_div(p_new, p_new.sum(axis=1, keepdims=True))
        delta = np.abs(p_new - self.p).max(axis=1, initial=0.0)
        self.p = p_new
        return delta

    def update_classes(self, et: np.ndarray, other: np.ndarray) -> np.ndarray:
        """Report-day class effects given the rest (closed form, weekday mean 1)."""
        assert self.oh is not None and self.cls_tot is not None and self.present is not None
        n, t, k = et.shape
        a = self.rows(other)
        base = et * a[:, :, None] * self.p[:, None, :]
        den = base.reshape(n, t * k) @ self.oh
        g_new = _normalise_classes(_safe_div(self.cls_tot, den), self.present)
        delta = np.abs(g_new - self.g).max(axis=1, initial=0.0) / 7.0
        self.g = g_new
        return delta

    def update_tilts(self, other: np.ndarray) -> np.ndarray:
        """One penalised Newton step of the drifting series' tilts on the row-profiled
        (multinomial) likelihood, then centring (the common shift moves into p)."""
        assert self.seg_oh is not None and self.rw is not None and self.eta is not None
        d = self.design
        dv = d.dvec
        mu = other * self.p[:, None, :]
        tot = mu.sum(axis=2)
        m1 = _safe_div((mu * dv).sum(axis=2), tot)
        m2 = _safe_div((mu * dv**2).sum(axis=2), tot)
        score = (self.xd_row - self.row_tot * m1) @ self.seg_oh
        info = (self.row_tot * np.maximum(m2 - m1 * m1, 0.0)) @ self.seg_oh
        eye = np.eye(d.n_seg)[None]
        hess = self.rw[None] + info[:, :, None] * eye + 1e-9 * eye
        rhs = score - self.eta @ self.rw
        step = np.linalg.solve(hess, rhs[:, :, None])[:, :, 0]
        step = np.clip(step, -_MAX_ETA_STEP, _MAX_ETA_STEP)
        step[~self.drift] = 0.0
        eta = self.eta + step
        wts = info + 1e-12
        centre = np.where(self.drift, (eta * wts).sum(axis=1) / wts.sum(axis=1), 0.0)
        self.eta = eta - centre[:, None]
        p = self.p * np.exp(centre[:, None] * dv[None, :])
        self.p = _safe_div(p, p.sum(axis=1, keepdims=True))
        return np.abs(step).max(axis=1, initial=0.0)

    def loglik(self, other: np.ndarray) -> np.ndarray:
        """Penalised Poisson log-likelihood with rows at their optimum, per series."""
        full = other * self.p[:, None, :]
        fsum = full.sum(axis=2)
        a = _safe_div(self.row_tot, fsum)
        ll = (self.row_tot * np.log(np.where(a > 0, a, 1.0))).sum(axis=1) - self.row_tot.sum(1)
        lf = np.log(np.maximum(full.reshape(-1)[self.pos], 1e-300)) * self.xpos
        ll += np.bincount(self.pos_series, weights=lf, minlength=self.x.shape[0])
        if self.eta is not None and self.rw is not None:
            ll -= 0.5 * np.einsum("ni,ij,nj->n", self.eta, self.rw, self.eta)
        return ll

    def sweep(self, tol: float) -> np.ndarray:
        """One cycle of block updates; returns which series have converged."""
        et, other = self.factors()
        delta = self.update_p(other)
        if self.g is not None:
            delta = np.maximum(delta, self.update_classes(et, other))
            et, other = self.factors()
        if self.eta is not None and self.drift.any():
            delta = np.maximum(delta, self.update_tilts(other))
            et, other = self.factors()
        ll = self.loglik(other)
        done = (delta < tol) | (ll - self.ll_old <= _LL_TOL + 1e-12 * np.abs(ll))
        self.ll_old = ll
        return done


def _store(which: np.ndarray, idx: np.ndarray, ws: _WorkSet, p_out: np.ndarray,
           g_out: np.ndarray | None, eta_out: np.ndarray | None) -> None:
    """Copy the working values of the series ``which`` (positions in the working set) out."""
    if not which.any():
        return
    p_out[idx[which]] = ws.p[which]
    if g_out is not None and ws.g is not None:
        g_out[idx[which]] = ws.g[which]
    if eta_out is not None and ws.eta is not None:
        eta_out[idx[which]] = ws.eta[which]


def _poisson_ml(
    counts: np.ndarray,
    exposure: np.ndarray,
    design: _Design,
    drift: np.ndarray,
    pmf0: np.ndarray,
    max_iter: int,
    tol: float,
) -> tuple[np.ndarray, np.ndarray | None, np.ndarray | None, int]:
    """Poisson ML of mu = a_t p_d g_c exp(eta_k d) e_td by block updates, vectorised over series.

    Rows, delays and classes have closed-form maximisers given the rest (cyclic updates climb the
    concave log-likelihood); the tilts ``eta`` of series with ``drift`` take a Newton step of the
    row-profiled (multinomial) log-likelihood with the random-walk penalty, then are centred (a
    common shift of the tilts moves into p), which keeps p and eta nearly orthogonal.  Started
    from the chain ladder, a full triangle without class or drift effects is already at the optimum
    (Renshaw & Verrall 1998).  A series stops when its parameters move less than ``tol`` or a
    sweep gains less than ~1e-9 log-likelihood units (relative 1e-12): thin series can have an
    MLE at infinity in some direction where parameters drift without improving the fit, and
    partly seen tail bins make the updates converge only linearly.
    Converged series leave the working set every 10 sweeps.  ``exposure`` e (S, T, K): seen share
    of each cell (0 unobserved).  Returns (p (S, K) summing to 1 in the centred gauge, class
    effects (S, 8) or None, tilts (S, n_seg) or None, sweeps).
    """
    s = counts.shape[0]
    p_out = np.array(pmf0, dtype=float)
    g_out = None if design.cls is None else np.ones((s, N_CLASSES))
    eta_out = None if design.seg is None else np.zeros((s, design.n_seg))
    idx = np.arange(s)
    sweeps = 0
    while idx.size and sweeps < max_iter:
        ws = _WorkSet(counts[idx], exposure[idx], design, p_out[idx],
                      None if g_out is None else g_out[idx],
                      None if eta_out is None else eta_out[idx], drift[idx])
        done = np.zeros(idx.size, dtype=bool)
        for _ in range(min(10, max_iter - sweeps)):
            sweeps += 1
            now = ws.sweep(tol) & ~done
            # a series keeps the values of the sweep where it converged, whatever its batch
            # neighbours still do (so results never depend on which series share a batch)
            _store(now, idx, ws, p_out, g_out, eta_out)
            done |= now
            if done.all():
                break
        _store(~done, idx, ws, p_out, g_out, eta_out)
        idx = idx[~done]
    return p_out, g_out, eta_out, sweeps


def _pearson_nb_dispersion(
    counts: np.ndarray, mu: np.ndarray, observed: np.ndarray, n_params: int | np.ndarray,
    floor: float
) -> np.ndarray:
    """NB2 dispersion phi (Var = mu + phi mu^2) solving the Pearson moment equation per series.

    Solves sum (y - mu)^2 / (mu (1 + phi mu)) = n_obs - n_params by Newton from the floor (the
    left side is convex and decreasing in phi, so Newton rises monotonically to the root); phi is
    floored at ``floor``.  Works on the used cells only (flattened, sums by series).
    """
    s = counts.shape[0]
    use = observed & np.isfinite(mu) & (mu > 0)
    sid, cell = np.nonzero(use.reshape(s, -1))
    m = mu.reshape(s, -1)[sid, cell]
    r2 = (counts.reshape(s, -1)[sid, cell] - m) ** 2 / m
    df = np.maximum(np.bincount(sid, minlength=s) - n_params, 1)
    phi = np.full(s, float(floor))
    for _ in range(100):
        den = 1.0 + phi[sid] * m
        a = r2 / den
        h = np.bincount(sid, weights=a, minlength=s) - df
        dh = -np.bincount(sid, weights=a * m / den, minlength=s)
        step = np.where((h > 0) & (dh < 0), -h / np.where(dh < 0, dh, -1.0), 0.0)
        phi = phi + step
        if np.all(step <= 1e-10 * np.maximum(phi, 1e-8)):
            break
    return np.maximum(phi, floor)


# --------------------------------------------------------------------------- models


class _TriangleModel:
    """Shared fitted state: expected cells, completed totals and reserves from pmf + weights."""

    tail_shape_: tuple[float, float] | None = None
    delay_pmf_: np.ndarray
    base_pmf_: np.ndarray

    def _finalise(
        self,
        tri: _Triangle,
        pmf: np.ndarray,
        weights: np.ndarray | None,
        n_params: int | np.ndarray,
        dispersion_floor: float,
        estimate_dispersion: bool,
    ) -> None:
        """Row totals by Poisson ML given the delay pmf; derived attributes; Pearson dispersion."""
        w = np.broadcast_to(pmf[:, None, :], tri.counts.shape)
        if weights is not None:
            w = w * weights
        row_pmf = _safe_div(w, w.sum(axis=2, keepdims=True))
        frac_obs = (row_pmf * tri.obs_exp).sum(axis=2)
        row_obs = tri.counts.sum(axis=2)
        with np.errstate(divide="ignore", invalid="ignore"):
            total = np.where(frac_obs > 0, row_obs / np.where(frac_obs > 0, frac_obs, 1.0), np.nan)
        expected = total[:, :, None] * row_pmf
        missing = (expected * tri.pred_exp).sum(axis=2)
        self.observed_mask_ = tri.observed
        self.predict_mask_ = tri.predict
        self.observed_exposure_ = tri.obs_exp
        self.predict_exposure_ = tri.pred_exp
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
                tri.counts, expected * tri.obs_exp, tri.obs_exp > 0, n_params, dispersion_floor
            )
        else:
            self.dispersion_ = np.zeros(tri.shape[0])

    def mean_delay(self, pmf: np.ndarray | None = None) -> np.ndarray:
        """Mean delay (days) of delay pmfs (default ``delay_pmf_``); a "≥ D" tail bin counts as
        D + the tail's mean."""
        p = np.asarray(self.delay_pmf_ if pmf is None else pmf, dtype=float)
        d = np.arange(p.shape[-1], dtype=float)
        if self.tail_shape_ is not None:
            d[-1] += float(self.tail_shape_[1])
        return (p * d).sum(axis=-1)

    def delay_quantile(self, q: float, pmf: np.ndarray | None = None) -> np.ndarray:
        """The ``q`` quantile (whole days) of delay pmfs, continuing into the tail."""
        p = np.atleast_2d(np.asarray(self.delay_pmf_ if pmf is None else pmf, dtype=float))
        k = p.shape[-1]
        cdf = np.cumsum(p, axis=-1)
        out = (cdf < q - 1e-12).sum(axis=-1).astype(float)
        if self.tail_shape_ is not None:
            before = cdf[..., -2] if k > 1 else np.zeros(p.shape[:-1])
            need = np.clip(_safe_div(q - before, p[..., -1]), 0.0, 1.0 - 1e-12)
            j = _tail_dist(self.tail_shape_).ppf(need)
            out = np.where(out >= k - 1, (k - 1) + np.maximum(j, 0.0), out)
        return out


class ChainLadder(_TriangleModel):
    """Actuarial chain ladder (volume-weighted development factors), vectorised over series.

    Fits the multiplicative reporting-delay model (Lawless 1994) by the classical chain-ladder
    algorithm; works on incremental reporting triangles (use ``cumulative_to_incremental`` for a
    cumulative actuarial triangle).
    """

    def __init__(self, *, max_delay: int | None = 28, dispersion_floor: float = 1e-3) -> None:
        self.max_delay = max_delay
        self.dispersion_floor = dispersion_floor

    def fit(self, tri: np.ndarray, reported: np.ndarray | None = None, *,
            pooled: Any = None) -> ChainLadder:
        """Estimate development factors, delay pmf, completed row totals and the reserve.

        Attributes: ``factors_`` (S, D), ``delay_pmf_`` (S, D+1), ``expected_total_`` (S, n_ref),
        ``reserve_`` (S,), ``reported_``, ``expected_`` (fitted cell means) and ``dispersion_``
        (NB2 Pearson estimate of the cells around the fit, used by ``DelayNowcaster``).
        Rows with holes get their total by Poisson ML given the pmf (= chain ladder without holes).
        ``pooled`` is accepted for a common interface and ignored.
        """
        t = _prepare(tri, self.max_delay, reported)
        self.factors_ = _chain_ladder_factors(t.counts, t.observed)
        self.delay_pmf_ = _pmf_from_factors(self.factors_)
        self.base_pmf_ = self.delay_pmf_
        self.pool_weight_ = np.ones(t.shape[0])
        self.pooling_ = np.full(t.shape[0], "own", dtype=object)
        self.drift_ = np.zeros(t.shape[0], dtype=bool)
        self.design_ = _Design(None, None, 0, np.arange(t.shape[2], dtype=float), 0.0)
        self._finalise(t, self.delay_pmf_, None, t.shape[1] + t.shape[2] - 1,
                       self.dispersion_floor, True)
        return self


class PooledDelay(NamedTuple):
    """The delay structure pooled over every series of a signal, fitted once (on the summed
    triangle) and handed to the per-batch fits: one fit without and one with drift."""

    stationary: DelayGLM
    drifting: DelayGLM | None

    @classmethod
    def fit(cls, tri: np.ndarray, template: DelayGLM, *, with_drift: bool = True
            ) -> PooledDelay:
        """Fit ``template``'s settings (no pooling) on the aggregate of ``tri``."""
        agg = aggregate_triangle(tri)
        base = {**template.get_params(), "pool_below": 0.0, "pool_fully_below": 0.0}
        stat = DelayGLM(**{**base, "drift": False}).fit(agg, pooled=False)
        drift = DelayGLM(**{**base, "drift": True}).fit(agg, pooled=False) if with_drift \
            else None
        return cls(stat, drift)


class DelayGLM(_TriangleModel):
    """Log-linear count model for triangle cells: row + delay (+ report-day class, + drift) effects.

    Poisson ML of the mean structure (the over-dispersed Poisson model of Renshaw & Verrall 1998,
    whose fit without class or drift effects reproduces the chain ladder); ``family="negbin"``
    adds NB2 cell noise with dispersion from the Pearson moment equation per series (floored).
    Sparse series have their delay structure shrunk towards the one pooled over all series.

    ``weekday_effect`` / ``holidays``: report-day classes (report weekday; report-day indices t + d
    of holidays, day 0 = reference row 0).  ``drift``: bool or one bool per series — the delay may
    change over reference time (tilt per block of ``segment_days`` rows, random walk with sd
    ``drift_sd`` per block).  ``tail="negbin"`` / ``"geometric"``: the last column is the "≥ D"
    bin; the tail J = delay - D is negative binomial with ``tail_shape`` = (size, mean), or
    geometric (size 1), estimated on the triangle's aggregate when None.
    """

    def __init__(
        self,
        *,
        family: str = "negbin",
        weekday_effect: bool = False,
        first_ref_weekday: int = 0,
        holidays: Any = (),
        drift: Any = False,
        drift_sd: float = 0.05,
        segment_days: int = 7,
        tail: str = "none",
        tail_shape: tuple[float, float] | None = None,
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
        self.holidays = holidays
        self.drift = drift
        self.drift_sd = drift_sd
        self.segment_days = segment_days
        self.tail = tail
        self.tail_shape = tail_shape
        self.max_delay = max_delay
        self.solver = solver
        self.pool_below = pool_below
        self.pool_fully_below = pool_fully_below
        self.pool_strength = pool_strength
        self.dispersion_floor = dispersion_floor
        self.max_iter = max_iter
        self.tol = tol

    def get_params(self) -> dict[str, Any]:
        """The constructor's keyword parameters (scikit-learn style)."""
        return {k: getattr(self, k) for k in (
            "family", "weekday_effect", "first_ref_weekday", "holidays", "drift", "drift_sd",
            "segment_days", "tail", "tail_shape", "max_delay", "solver", "pool_below",
            "pool_fully_below", "pool_strength", "dispersion_floor", "max_iter", "tol")}

    def _check(self) -> None:
        if self.family not in _FAMILIES:
            raise ValueError(f"family must be one of {_FAMILIES}; got {self.family!r}")
        if self.solver not in ("auto", "vectorised", "statsmodels"):
            raise ValueError(f"solver must be auto|vectorised|statsmodels; got {self.solver!r}")
        if self.tail not in _TAILS:
            raise ValueError(f"tail must be one of {_TAILS}; got {self.tail!r}")

    def _design(self, n_ref: int, k: int, any_drift: bool) -> _Design:
        cls = report_classes(n_ref, k, first_ref_weekday=self.first_ref_weekday,
                             weekday=bool(self.weekday_effect), holidays=self.holidays,
                             tail=self.tail != "none")
        seg = drift_segments(n_ref, self.segment_days) if any_drift else None
        n_seg = 0 if seg is None else int(seg.max()) + 1
        sd = max(float(self.drift_sd), 1e-6)
        dvec = np.arange(k, dtype=float)
        if self.tail != "none":
            dvec[-1] = 0.0  # the tilt reshapes delays < D; the tail's share is not extrapolated
        return _Design(cls, seg, n_seg, dvec, 1.0 / sd**2)

    def _own_fit(self, t: _Triangle, design: _Design, drift: np.ndarray
                 ) -> tuple[np.ndarray, np.ndarray | None, np.ndarray | None]:
        """Per-series ML: (p in the current gauge, class effects, tilts in the current gauge)."""
        if self.solver == "statsmodels":
            if design.seg is not None or self.tail != "none":
                raise ValueError("the statsmodels solver fits neither drift nor a tail bin")
            wk = None if design.cls is None else design.cls
            p, g = _fit_statsmodels(t.counts, t.observed, wk)
            self.n_iter_ = 0
            return p, g, None
        p0 = _pmf_from_factors(_chain_ladder_factors(t.counts, t.observed))
        p0 = np.where(np.isfinite(p0) & (p0 >= 0), p0, 0.0)
        bad = p0.sum(axis=1) <= 0
        p0[bad] = 1.0 / p0.shape[1]
        p0 = _safe_div(p0, p0.sum(axis=1, keepdims=True))
        p, g, eta, self.n_iter_ = _poisson_ml(t.counts, t.obs_exp, design, drift, p0,
                                              self.max_iter, self.tol)
        if eta is not None:  # current gauge: the newest block has tilt 0, p is today's pmf
            last = eta[:, -1].copy()
            eta = eta - last[:, None]
            p = p * np.exp(last[:, None] * design.dvec[None, :])
            p = _safe_div(p, p.sum(axis=1, keepdims=True))
        return p, g, eta

    def _own_fit_some(self, t: _Triangle, design: _Design, drift: np.ndarray,
                      fit: np.ndarray, pool: PooledDelay | None
                      ) -> tuple[np.ndarray, np.ndarray | None, np.ndarray | None]:
        """Own fits of the series marked ``fit``; the fully pooled ones (weight 0, their own fit
        never used) get the pooled effects instead of a fit of a few events."""
        if pool is None or fit.all():
            return self._own_fit(t, design, drift)
        s, _, k = t.shape
        src = pool.stationary
        p = np.broadcast_to(src.base_pmf_[0], (s, k)).copy()
        g = None if src.class_effect_ is None else np.broadcast_to(
            src.class_effect_[0], (s, N_CLASSES)).copy()
        eta = None if design.seg is None else np.zeros((s, design.n_seg))
        if fit.any():
            sub = _Triangle(*(np.asarray(a)[fit] for a in (
                t.counts, t.observed, t.predict, t.reported, t.obs_exp, t.pred_exp)))
            p_f, g_f, eta_f = self._own_fit(sub, design, drift[fit])
            p[fit] = p_f
            if g is not None and g_f is not None:
                g[fit] = g_f
            if eta is not None and eta_f is not None:
                eta[fit] = eta_f
        else:
            self.n_iter_ = 0
        return p, g, eta

    def _tail_shape(self, tri: np.ndarray) -> tuple[float, float] | None:
        """The tail's (size, mean): given, or ML on the aggregate triangle."""
        if self.tail == "none":
            return None
        if self.tail_shape is not None:
            return (float(self.tail_shape[0]), float(self.tail_shape[1]))
        return estimate_tail_shape(tri, self)

    def fit(self, tri: np.ndarray, reported: np.ndarray | None = None, *,
            pooled: PooledDelay | bool | None = None) -> DelayGLM:
        """Fit per-series log-linear models, shrink sparse series toward the pooled structure,
        predict the unobserved cells.

        ``pooled``: a :class:`PooledDelay` computed once over all series of the signal (so the
        result of a series does not depend on which series share its batch); None fits it here
        on this triangle's aggregate; False fits no pooled model (every series on its own).
        ``solver``: "vectorised" (exact block-update Poisson ML for all series at once, started at
        the chain ladder; "auto") or "statsmodels" (one ``sm.GLM`` Poisson fit per series; no
        drift, no tail).  Pooling: n_i = clipped observed events of series i; n_i >= pool_below ->
        "own"; pool_fully_below <= n_i < pool_below -> "shrunk" to (n_i p_i + k p_pool) / (n_i + k)
        with k = pool_strength (class effects and tilts mixed the same way); below -> "pooled".

        Attributes: ``delay_pmf_`` (S, D+1; today's pmf, with class effects averaged over the
        newest 7 reference rows), ``base_pmf_`` (today's delay effects after pooling),
        ``own_pmf_``, ``pooled_pmf_`` (D+1,), ``pooling_`` / ``pool_weight_`` / ``n_events_``
        (S,), ``weekday_effect_`` (S, 7; report weekday 0 = Monday, mean 1, or None),
        ``class_effect_`` (S, 8: weekdays + holiday, or None), ``drift_`` (S,) bool, ``tilt_``
        (S, n_blocks; 0 for the newest block, or None), ``tail_shape_``, ``expected_``
        (S, n_ref, D+1 fitted cell means), ``reported_``, ``expected_total_``, ``reserve_``,
        ``dispersion_`` (NB2 phi; 0 for Poisson), ``n_iter_``.
        """
        self._check()
        r = self._tail_shape(tri)
        self.tail_shape_ = r
        t = _prepare(tri, self.max_delay, reported, r)
        s, n_ref, k = t.shape
        drift = np.broadcast_to(np.asarray(self.drift, dtype=bool), (s,)).copy()
        # drift blocks are part of the design whenever drift is asked for per series (an
        # array) or for all: the same design for every batch of a signal
        design = self._design(n_ref, k, np.ndim(self.drift) > 0 or bool(self.drift))
        n_events = t.counts.sum(axis=(1, 2))
        if pooled is False:
            weight = np.ones(s)
            pool = None
        else:
            if pooled is None or pooled is True:
                template = DelayGLM(**{**self.get_params(), "tail_shape": r})
                pool = PooledDelay.fit(np.where(t.observed, t.counts, np.nan), template,
                                       with_drift=bool(drift.any())) if s else None
            else:
                pool = pooled
            weight = np.where(n_events >= self.pool_below, 1.0,
                              n_events / (n_events + self.pool_strength))
            weight = np.where(n_events < self.pool_fully_below, 0.0, weight)
        p_own, g_own, eta_own = self._own_fit_some(t, design, drift, weight > 0, pool)
        self.pool_weight_ = weight
        self.n_events_ = n_events
        self.pooling_ = np.where(weight >= 1.0, "own",
                                 np.where(weight > 0.0, "shrunk", "pooled")).astype(object)
        self.own_pmf_ = p_own
        self.drift_ = drift
        self.design_ = design
        pmf, g, eta = self._mix(p_own, g_own, eta_own, pool, weight, drift, design)
        self.pooled_pmf_ = (pool.stationary.base_pmf_[0] if pool is not None
                            else np.full(k, np.nan))
        self.pooled_cov_ = None
        if pool is not None and np.any(weight < 1):
            covs = [_log_pmf_covariance(m, m.dispersion_)[0] for m in
                    (pool.stationary, pool.drifting or pool.stationary)]
            pick = drift.astype(int) if pool.drifting is not None else np.zeros(s, dtype=int)
            self.pooled_cov_ = np.stack(covs)[pick]
        self.base_pmf_ = pmf
        self.class_effect_ = g
        self.weekday_effect_ = None if g is None else g[:, :7]
        self.tilt_ = eta
        weights = self._row_weights(g, eta, design)
        self.delay_pmf_ = self._today_pmf(pmf, weights)
        n_params = np.full(s, n_ref + k - 1)
        if g is not None:
            n_params += int((design.class_onehot().sum(axis=0) > 0).sum()) - 1
        if eta is not None:
            n_params += drift * (design.n_seg - 1)
        self._finalise(t, pmf, weights, n_params, self.dispersion_floor,
                       self.family == "negbin")
        return self

    @staticmethod
    def _mix(p_own: np.ndarray, g_own: np.ndarray | None, eta_own: np.ndarray | None,
             pool: PooledDelay | None, weight: np.ndarray, drift: np.ndarray, design: _Design
             ) -> tuple[np.ndarray, np.ndarray | None, np.ndarray | None]:
        """Shrink own effects toward the pooled ones (drifting series toward the pooled drift
        fit, the others toward the pooled stationary fit)."""
        if pool is None:
            return p_own, g_own, eta_own
        w = weight[:, None]
        sources = [pool.stationary, pool.drifting if pool.drifting is not None
                   else pool.stationary]
        pick = drift.astype(int) if pool.drifting is not None else np.zeros_like(drift, int)

        def pooled(attr: str, width: int) -> np.ndarray:
            rows = []
            for src in sources:
                v = getattr(src, attr)
                rows.append(np.zeros(width) if v is None else np.asarray(v)[0])
            return np.stack(rows)[pick]

        pmf = w * p_own + (1.0 - w) * pooled("base_pmf_", p_own.shape[1])
        g = None
        if g_own is not None:
            g = w * g_own + (1.0 - w) * pooled("class_effect_", N_CLASSES)
            assert design.cls is not None
            g = _normalise_classes(g, design.class_onehot().sum(axis=0) > 0)
        eta = eta_own
        if eta_own is not None:
            pool_eta = pooled("tilt_", eta_own.shape[1])
            eta = np.where(drift[:, None], w * eta_own + (1.0 - w) * pool_eta, 0.0)
        return pmf, g, eta

    @staticmethod
    def _row_weights(g: np.ndarray | None, eta: np.ndarray | None, design: _Design
                     ) -> np.ndarray | None:
        """Multipliers of the base pmf in each cell: class effect × tilt, (S, T, K) or None."""
        weights = None
        if g is not None:
            assert design.cls is not None
            weights = _class_factor(g, design.cls)
        if eta is not None and design.seg is not None and np.any(eta != 0):
            tilt = _tilt(eta, design.seg, design.dvec)
            weights = tilt if weights is None else weights * tilt
        return weights

    @staticmethod
    def _today_pmf(pmf: np.ndarray, weights: np.ndarray | None) -> np.ndarray:
        """Today's delay pmf: the row pmf averaged over the newest 7 reference rows."""
        if weights is None:
            return pmf
        newest = weights[:, -7:] * pmf[:, None, :]
        return _safe_div(newest, newest.sum(axis=2, keepdims=True)).mean(axis=1)


def fit_tail(before: np.ndarray, seen: np.ndarray, age: np.ndarray, kind: str = "negbin"
             ) -> tuple[float, float, float]:
    """ML of the delay tail beyond D from reference dates old enough to have entered it.

    Row t has ``before`` reports at delays < D and ``seen`` reports at delays D .. D + age - 1
    (age >= 1).  With P(delay >= D) = pi and the tail J = delay - D negative binomial
    (size, mean) (size 1: geometric), the row's total given before + seen is profiled out and
    seen | before + seen ~ Binomial(before + seen, pi F(age-1) / (1 - pi + pi F(age-1))) with F
    the tail's CDF — the row-profiled likelihood of the log-linear model's tail cells.  The
    shape is identified by how much more of the tail older rows have seen, so a history longer
    than the tail helps.  Nelder-Mead on logit pi, log mean, log size.  Returns
    (size, mean, pi); (1, 0.2, 0) when nothing was seen.
    """
    from scipy import optimize

    b = np.asarray(before, dtype=float).ravel()
    y = np.asarray(seen, dtype=float).ravel()
    m = np.asarray(age, dtype=float).ravel()
    ok = np.isfinite(b) & np.isfinite(y) & (m >= 1) & (b + y > 0)
    b, y, m = np.maximum(b[ok], 0.0), np.maximum(y[ok], 0.0), m[ok]
    lo_m, hi_m = _TAIL_MEAN_RANGE
    lo_s, hi_s = _TAIL_SIZE_RANGE
    if y.sum() <= 0:
        return (1.0, lo_m, 0.0)
    n = b + y
    geometric = kind == "geometric"

    def unpack(z: np.ndarray) -> tuple[float, float, float]:
        pi = float(special.expit(z[0]))
        mean = float(np.clip(np.exp(np.clip(z[1], -30.0, 30.0)), lo_m, hi_m))
        size = 1.0 if geometric else float(np.clip(np.exp(np.clip(z[2], -30.0, 30.0)), lo_s, hi_s))
        return size, mean, pi

    def negll(z: np.ndarray) -> float:
        size, mean, pi = unpack(z)
        f = _tail_cdf(m - 1, (size, mean))
        q = np.clip(pi * f / (1.0 - pi + pi * f), 1e-300, 1.0 - 1e-15)
        return -float((y * np.log(q) + (n - y) * np.log1p(-q)).sum())

    share = y.sum() / n.sum()
    starts = [np.array([special.logit(min(max(2 * share, 1e-4), 0.9)), np.log(mu), 0.0])
              for mu in (3.0, 15.0, 60.0)]
    best = None
    for z0 in starts:
        res = optimize.minimize(negll, z0[:2] if geometric else z0, method="Nelder-Mead",
                                options={"xatol": 1e-4, "fatol": 1e-8, "maxiter": 2000})
        if best is None or res.fun < best.fun:
            best = res
    assert best is not None
    return unpack(best.x)


def estimate_tail_shape(tri: np.ndarray, template: DelayGLM) -> tuple[float, float]:
    """The tail shape (size, mean) from a triangle's own rows (:func:`fit_tail` on its
    aggregate: reports at delays < D, the "≥ D" bin, and how many of its delays each row saw)."""
    agg = aggregate_triangle(tri)
    folded = agg if template.max_delay is None else fold_tail(agg, int(template.max_delay))
    _, n_ref, k = folded.shape
    before = folded[0, :, :-1].sum(axis=1)
    age = n_ref - np.arange(n_ref) - (k - 1)
    size, mean, _ = fit_tail(before, folded[0, :, -1], age, template.tail)
    return (size, mean)


def _fit_statsmodels(
    counts: np.ndarray, observed: np.ndarray, classes: np.ndarray | None
) -> tuple[np.ndarray, np.ndarray | None]:
    """Per-series statsmodels Poisson GLM with row, delay (and report-day class) dummies.

    Rows, delays or classes without any reported event have ML effect -inf (probability 0); they
    are left out of the design and get pmf 0 / multiplier 0.
    """
    import statsmodels.api as sm

    s, _, k = counts.shape
    pmf = np.zeros((s, k))
    g_all = np.zeros((s, N_CLASSES)) if classes is not None else None
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
        if classes is not None:
            ww = classes[tt, dd]
            wk_present = np.flatnonzero(np.bincount(ww, weights=y_cells[use],
                                                    minlength=N_CLASSES) > 0)
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
        if classes is not None:
            gamma = np.zeros(wk_present.size)
            gamma[1:] = params[n_rows + col_levels.size - 1:]
            g = np.zeros(N_CLASSES)
            g[wk_present] = np.exp(gamma - gamma.max())
            g_all[i] = g / g[:7].mean()  # type: ignore[index]
    return pmf, g_all


# --------------------------------------------------------------------------- covariance


def _structured_zdz(c: np.ndarray, design: _Design, oh3: np.ndarray | None,
                    seg_oh: np.ndarray | None) -> np.ndarray:
    """sum_t Z_t' diag(c_t) Z_t, shape (S, P, P), for cell weights c (S, T, K) and the design
    Z = [delay indicators | class indicators | d × block indicators]."""
    s, _, k = c.shape
    nc = 0 if oh3 is None else N_CLASSES
    ns = 0 if seg_oh is None else design.n_seg
    p = k + nc + ns
    out = np.zeros((s, p, p))
    ik = np.arange(k)
    out[:, ik, ik] = c.sum(axis=1)
    d = design.dvec
    if oh3 is not None:
        bc = np.einsum("stk,tkj->skj", c, oh3)  # (S, K, classes)
        out[:, :k, k:k + nc] = bc
        out[:, k:k + nc, :k] = np.swapaxes(bc, 1, 2)
        ic = np.arange(k, k + nc)
        out[:, ic, ic] = bc.sum(axis=1)
    if seg_oh is not None:
        cs = np.einsum("stk,tj->skj", c, seg_oh)  # (S, K, blocks)
        be = cs * d[None, :, None]
        out[:, :k, k + nc:] = be
        out[:, k + nc:, :k] = np.swapaxes(be, 1, 2)
        ie = np.arange(k + nc, p)
        out[:, ie, ie] = (cs * (d**2)[None, :, None]).sum(axis=1)
        if oh3 is not None:
            ce = np.einsum("stj,tm->sjm", np.einsum("stk,tkj->stj", c * d, oh3), seg_oh)
            out[:, k:k + nc, k + nc:] = ce
            out[:, k + nc:, k:k + nc] = np.swapaxes(ce, 1, 2)
    return out


def _ext(a: np.ndarray, design: _Design, oh3: np.ndarray | None,
         seg_oh: np.ndarray | None) -> np.ndarray:
    """Z_t' a_t for every row: (S, T, P)."""
    parts = [a]
    if oh3 is not None:
        parts.append(np.einsum("stk,tkj->stj", a, oh3))
    if seg_oh is not None:
        parts.append((a * design.dvec).sum(axis=2)[:, :, None] * seg_oh[None])
    return np.concatenate(parts, axis=2) if len(parts) > 1 else a


def _log_pmf_covariance(model: Any, dispersion: np.ndarray) -> np.ndarray:
    """Asymptotic covariance (S, K, K) of today's log delay effects (pmf = exp(beta) / sum).

    Row levels are profiled out (each row is then multinomial over its observed cells); the
    mean is the Poisson (quasi-)likelihood estimate, so a sandwich is used:
    C = H^-1 (J + P) H^-1 with H = I + P, I = sum_t Z'(diag mu - mu mu'/m)Z, J = Var(score)
    under NB2 cell variance mu (1 + phi mu), P the random-walk precision of the tilts (so C is
    the posterior covariance H^-1 when J = I).  Z: delay, report-day class and (drifting series)
    d × block indicators; gauge directions are removed by fixing one delay, one class and the
    newest block's tilt (today's log pmf is then beta itself).  Shrunk/pooled series:
    w^2 C_own + (1 - w)^2 C_pooled, C_pooled from the pooled fit (between-series differences
    are not represented).
    """
    design: _Design = model.design_
    obs = model.observed_exposure_
    mu = np.nan_to_num(model.expected_) * obs
    s, t, k = mu.shape
    if s == 0:
        return np.zeros((0, k, k))
    phi = np.asarray(dispersion, dtype=float)[:, None, None]
    var = mu * (1.0 + phi * mu)
    drift = np.asarray(getattr(model, "drift_", np.zeros(s, dtype=bool)), dtype=bool)
    use_cls = getattr(model, "class_effect_", None) is not None and design.cls is not None
    use_seg = design.seg is not None
    oh3 = None
    if use_cls:
        assert design.cls is not None
        oh3 = design.class_onehot().reshape(t, k, N_CLASSES)
    seg_oh = design.seg_onehot() if use_seg else None
    nc = N_CLASSES if use_cls else 0
    p_dim = k + nc + (design.n_seg if use_seg else 0)
    counts = getattr(model, "observed_counts_", None)
    cov = np.zeros((s, k, k))
    step = max(1, int(2_000_000 // max(t * p_dim * max(k, p_dim), 1)))
    for start in range(0, s, step):
        sl = slice(start, min(start + step, s))
        m_, v_ = mu[sl], var[sl]
        inv_m = _safe_div(1.0, m_.sum(axis=2))
        pi = m_ * inv_m[:, :, None]
        e_mu = _ext(m_, design, oh3, seg_oh)
        e_var = _ext(v_, design, oh3, seg_oh)
        e_pi = _ext(pi, design, oh3, seg_oh)
        info = _structured_zdz(m_, design, oh3, seg_oh) - np.swapaxes(
            e_mu * inv_m[:, :, None], 1, 2) @ e_mu
        cross = np.swapaxes(e_pi, 1, 2) @ e_var
        meat = (_structured_zdz(v_, design, oh3, seg_oh) - cross - np.swapaxes(cross, 1, 2)
                + np.swapaxes(e_pi * v_.sum(axis=2)[:, :, None], 1, 2) @ e_pi)
        pen = np.zeros_like(info)
        if use_seg:
            es = slice(k + nc, p_dim)
            pen[:, es, es] = design.rw_matrix()[None] * design.penalty
        fixed = _gauge_fixed(info, m_, k, nc, use_seg, drift[sl], design,
                             None if counts is None else counts[sl])
        hess = info + pen
        for arr in (hess, meat, pen):
            arr[fixed[:, :, None] | fixed[:, None, :]] = 0.0
        diag = np.arange(p_dim)
        hess[:, diag, diag] += fixed
        hinv = np.linalg.pinv(hess, rcond=1e-10, hermitian=True)  # leftover null directions
        # (e.g. a class seen at one delay only) get no variance instead of breaking the inverse
        c_full = hinv @ (meat + pen) @ hinv
        c_full[fixed[:, :, None] | fixed[:, None, :]] = 0.0
        cov[sl] = c_full[:, :k, :k]
    cov = 0.5 * (cov + np.swapaxes(cov, 1, 2))
    w = np.asarray(getattr(model, "pool_weight_", np.ones(s)), dtype=float)
    pool = getattr(model, "pooled_cov_", None)
    if pool is not None and np.any(w < 1):
        cov = w[:, None, None] ** 2 * cov + (1.0 - w[:, None, None]) ** 2 * pool
    return cov


def _gauge_fixed(info: np.ndarray, mu: np.ndarray, k: int, nc: int, use_seg: bool,
                 drift: np.ndarray, design: _Design, counts: np.ndarray | None) -> np.ndarray:
    """Parameters held fixed for the covariance, (S, P) bool: those without information, one
    reference delay (the largest expected), one reference class (the largest) and the newest
    block's tilt (all tilts of series without drift)."""
    s, p_dim, _ = info.shape
    diag = np.diagonal(info, axis1=1, axis2=2)
    fixed = ~(diag > 1e-12 * np.maximum(diag.max(axis=1, keepdims=True), 1e-300))
    rows = np.arange(s)
    fixed[rows, np.argmax(np.where(fixed[:, :k], -np.inf, diag[:, :k]), axis=1)] = True
    if nc:
        cd = np.where(fixed[:, k:k + nc], -np.inf, diag[:, k:k + nc])
        fixed[rows, k + np.argmax(cd, axis=1)] = True
    if use_seg:
        fixed[:, p_dim - 1] = True
        fixed[~drift, k + nc:] = True
    return fixed


def _cov_root(cov: np.ndarray, pmf: np.ndarray) -> np.ndarray:
    """Cholesky root of a log-pmf covariance made definite by adding its gauge directions.

    The added directions (a common shift over delays with pmf > 0; delays with pmf 0) do not
    change the renormalised pmf, so draws from the root have the right law for the pmf.
    """
    live = pmf > 0
    ones = live / np.sqrt(np.maximum(live.sum(axis=1, keepdims=True), 1))
    k = pmf.shape[1]
    scale = np.maximum(np.trace(cov, axis1=1, axis2=2) / k, 1e-300)[:, None, None]
    definite = cov + ones[:, :, None] * ones[:, None, :] * scale + np.eye(k) * 1e-9 * scale
    definite[:, np.arange(k), np.arange(k)] += ~live * scale[:, :, 0]
    return np.linalg.cholesky(definite)


# --------------------------------------------------------------------------- nowcaster


class DelayNowcaster:
    """Predictive distribution of the eventual total per (series, ref row) from a delay model.

    For each incomplete row the not-yet-reported count Y is drawn as follows.
    1. Parameter uncertainty (``parameter_uncertainty=True``): today's log delay effects beta are
       drawn from their asymptotic normal law (sandwich covariance, see
       ``_log_pmf_covariance``; mean-corrected so E[p*] = p) and exp(beta) is renormalised.
       One draw per (draw, series) is shared by all its rows, so the completion factors of
       neighbouring rows move together.  Report-day class effects and the tilts of older blocks
       stay at their estimates.
    2. Row level: with observed pmf mass F and clipped observed count O, the row total a has
       the Gamma(O / v + kappa, F / v + kappa / L) posterior of a Gamma(kappa, kappa / L) prior
       (kappa = ``prior_shape``, default 1: exponential, weak) centred on the series' recent
       level L = sum O / sum F over the last ``prior_window`` rows (ML of a constant level);
       v = 1 + phi * O * sum_obs q^2 / F^2 inflates the Poisson variance of O for NB2 cells
       (v = 1 for Poisson).  The prior matters only when O and F are small; rows with F = 0
       (e.g. nothing reported on a closed report day) get a prior-only, wide nowcast.
    3. Y given a has mean a M (M = pmf mass still to come) and NB2 variance
       a M + phi a^2 sum_pred q^2; Y is drawn from the negative binomial (Poisson if the variance
       equals the mean) matching the mean and variance of this mixture.
    The nowcast is reported + Y.  Means above 50 are drawn as a rounded gamma with the same
    mean and variance (faster than gamma-Poisson, indistinguishable at that size).

    Randomness: one stream per series from ``random_state`` (an int, or one seed per series such
    as :func:`tallywave.models.base.series_seeds`), rebuilt on every call, so ``sample`` and
    ``quantiles`` give the same answer however often they are called.  ``window``: only the
    newest ``window`` rows are drawn (older rows are returned at their posterior mean).
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
        window: int | None = None,
        random_state: RandomState = 0,
    ) -> None:
        self.model = model
        self.family = family
        self.parameter_uncertainty = parameter_uncertainty
        self.prior_shape = prior_shape
        self.prior_window = prior_window
        self.chunk_elements = chunk_elements
        self.window = window
        self.random_state = random_state

    def fit(self, tri: np.ndarray, reported: np.ndarray | None = None, *,
            pooled: PooledDelay | bool | None = None) -> DelayNowcaster:
        """Fit a copy of the delay model (default ``DelayGLM()``; the one passed in is left
        untouched) and prepare sampling.

        ``expected_total_`` is reported + the posterior mean of the unreported part at the fitted
        pmf (equal to the model's ML completion up to the weak prior); ``prior_level_`` (S,),
        ``log_pmf_cov_`` (S, D+1, D+1) and ``incomplete_rows_`` are kept for sampling.
        """
        model = copy.deepcopy(self.model) if self.model is not None else DelayGLM()
        model.fit(tri, reported=reported, pooled=pooled)
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
        k = model.base_pmf_.shape[1]
        if self.parameter_uncertainty:
            self.log_pmf_cov_ = _log_pmf_covariance(model, self.dispersion_)
            self._cov_root = _cov_root(self.log_pmf_cov_, model.base_pmf_)
        else:
            self.log_pmf_cov_ = np.zeros((model.base_pmf_.shape[0], k, k))
            self._cov_root = self.log_pmf_cov_
        n_ref = model.reported_.shape[1]
        rows = np.flatnonzero((model.predict_exposure_ > 0).any(axis=(0, 2)))
        if self.window is not None:
            rows = rows[rows >= n_ref - int(self.window)]
        self.incomplete_rows_ = rows
        window = slice(max(0, n_ref - int(self.prior_window)), None)
        self.prior_level_ = _safe_div(model.observed_counts_[:, window].sum(axis=1),
                                      model.observed_fraction_[:, window].sum(axis=1))
        self.expected_total_ = self._posterior_mean_total()
        return self

    def _posterior(self, sl: slice | np.ndarray, rowp: np.ndarray, exposure: np.ndarray
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Row-level posterior mean and variance of a, and the mass M of ``exposure`` cells,
        at the fitted row pmf ``rowp`` (s, T, K): each (s, T)."""
        m = self.model_
        frac_obs = m.observed_fraction_[sl]
        sq_obs = (rowp**2 * m.observed_exposure_[sl] ** 2).sum(axis=2)
        count = m.observed_counts_[sl]
        phi = self.dispersion_[sl][:, None]
        v = 1.0 + phi * count * sq_obs / np.maximum(frac_obs, _TINY) ** 2
        rate0 = self.prior_shape / np.maximum(self.prior_level_[sl], 1e-9)[:, None]
        den = frac_obs + v * rate0
        mean_a = (count + self.prior_shape * v) / den
        var_a = mean_a * v / den
        return mean_a, var_a, (rowp * exposure).sum(axis=2)

    def _posterior_mean_total(self) -> np.ndarray:
        """Reported + posterior mean of the predicted part at the fitted pmf, (S, n_ref)."""
        m = self.model_
        mean_a, _, frac_pred = self._posterior(slice(None), m.row_pmf_, m.predict_exposure_)
        return self.reported_ + mean_a * frac_pred

    def predictive_logpdf(self, exposure: np.ndarray, y: np.ndarray
                          ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Log predictive probability of ``y`` (S, T) counts arriving in the cells weighted by
        ``exposure`` (S, T, K) (e.g. the reports of the next days), at the fitted pmf: the
        negative binomial matching the mean and variance of the row-posterior mixture.
        Returns (log pmf, P(Y < y), P(Y <= y)); NaN where no mass arrives (back-testing)."""
        m = self.model_
        rowp = m.row_pmf_
        mean_a, var_a, mass = self._posterior(slice(None), rowp, exposure)
        sq = (rowp**2 * exposure**2).sum(axis=2)
        phi = self.dispersion_[:, None]
        mean = mean_a * mass
        excess = phi * (mean_a**2 + var_a) * sq + var_a * mass**2
        yy = np.maximum(np.round(np.asarray(y, dtype=float)), 0.0)
        ok = (mass > 0) & np.isfinite(mean) & (mean > 0)
        size = np.where(excess > 1e-12 * np.maximum(mean, 1e-300),
                        mean**2 / np.maximum(excess, 1e-300), np.inf)
        out = np.full(mean.shape, np.nan)
        lo = np.full(mean.shape, np.nan)
        hi = np.full(mean.shape, np.nan)
        nb = ok & np.isfinite(size)
        pois = ok & ~np.isfinite(size)
        if nb.any():
            n_, p_ = size[nb], size[nb] / (size[nb] + mean[nb])
            out[nb] = stats.nbinom.logpmf(yy[nb], n_, p_)
            lo[nb] = stats.nbinom.cdf(yy[nb] - 1, n_, p_)
            hi[nb] = stats.nbinom.cdf(yy[nb], n_, p_)
        if pois.any():
            out[pois] = stats.poisson.logpmf(yy[pois], mean[pois])
            lo[pois] = stats.poisson.cdf(yy[pois] - 1, mean[pois])
            hi[pois] = stats.poisson.cdf(yy[pois], mean[pois])
        return out, lo, hi

    def _chunk(self, n_draws: int) -> int:
        """Series per chunk so that draws x series x (D+1) stays below ``chunk_elements``."""
        k = self.model_.expected_.shape[2]
        per = max(n_draws * max(k, self.incomplete_rows_.size, 1), 1)
        return max(1, int(self.chunk_elements // per))

    def _pmf_draws(self, sl: slice, n_draws: int, gens: SeriesRandom) -> np.ndarray:
        """Base delay pmf draws (s, K, n_draws): p * exp(N(-diag(C)/2, C)) renormalised.

        The shift -diag(C)/2 keeps E[p*_d] = p_d before renormalisation (lognormal mean).
        """
        p = self.model_.base_pmf_[sl]
        if not self.parameter_uncertainty or p.shape[1] < 2:
            return p[:, :, None]
        z = gens.normal((p.shape[1], n_draws))
        delta = self._cov_root[sl] @ z
        delta -= 0.5 * np.diagonal(self.log_pmf_cov_[sl], axis1=1, axis2=2)[:, :, None]
        with np.errstate(over="ignore"):  # no reporting history at all: a useless, inf draw
            pmf = np.exp(delta, out=delta)
        pmf *= p[:, :, None]
        with np.errstate(invalid="ignore", divide="ignore"):  # an all-zero pmf stays NaN
            pmf /= pmf.sum(axis=1, keepdims=True)
        return pmf

    def draw_delay_pmf(self, n_draws: int) -> np.ndarray:
        """Draws of today's delay pmf used for parameter uncertainty, (n_draws, S, D+1)."""
        gens = SeriesRandom(self.random_state, self.reported_.shape[0])
        return np.moveaxis(self._pmf_draws(slice(None), n_draws, gens), 2, 0)

    def _draw_missing(self, sl: slice, n_draws: int, gens: SeriesRandom) -> np.ndarray:
        """Draws of the not-yet-reported counts of the incomplete rows: (s, n_rows, n_draws)."""
        m = self.model_
        rows = self.incomplete_rows_
        r = rows.size
        obs = m.observed_exposure_[sl][:, rows]
        pred = m.predict_exposure_[sl][:, rows]
        count = m.observed_counts_[sl][:, rows][:, :, None]
        phi = self.dispersion_[sl][:, None, None]
        pmf = self._pmf_draws(sl, n_draws, gens)  # (s, k, b) or (s, k, 1)
        # sums of the row pmf over observed / predicted cells (and of its square): batched matmul
        if m.report_weights_ is None:
            w = None
            lin = np.concatenate([obs, pred], axis=1)
            quad = np.concatenate([obs * obs, pred * pred], axis=1)
        else:
            w = m.report_weights_[sl][:, rows]
            lin = np.concatenate([w * obs, w * pred, w], axis=1)
            quad = np.concatenate([(w * obs) ** 2, (w * pred) ** 2], axis=1)
        m1 = _blocked_matmul(lin, pmf)  # (s, 2r or 3r, b)
        m2 = _blocked_matmul(quad, pmf * pmf)
        frac_obs, frac_pred = m1[:, :r], m1[:, r:2 * r]
        sq_obs, sq_pred = m2[:, :r], m2[:, r:]
        if w is not None:  # row-normalise the weighted pmf
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
        for i, g in enumerate(gens.gens):  # one stream per series
            y[i] = _nb_draw(g, mean_y[i], excess[i])
        return y

    def sample(self, n_draws: int = 500) -> np.ndarray:
        """Joint draws of eventual totals, shape (n_draws, n_series, n_ref); sampled in chunks.

        Draws share a delay-pmf perturbation across the rows of a series, so sums over rows
        (e.g. weekly totals) carry the parameter correlation.
        """
        s, n_ref = self.reported_.shape
        rows = self.incomplete_rows_
        base = self.reported_.astype(float)
        if self.window is not None:
            old = np.arange(n_ref) < n_ref - int(self.window)
            base = np.where(old[None, :], self.expected_total_, base)
        out = np.broadcast_to(base[None], (n_draws, s, n_ref)).copy()
        if rows.size == 0:
            return out
        gens = SeriesRandom(self.random_state, s)
        step = self._chunk(n_draws)
        for start in range(0, s, step):
            sl = slice(start, min(start + step, s))
            y = np.moveaxis(self._draw_missing(sl, n_draws, gens.select(np.arange(s)[sl])), 2, 0)
            out[:, sl, rows[0]:rows[-1] + 1] += _spread(y, rows)
        return out

    def quantiles(self, q_levels: np.ndarray | list[float], n_draws: int = 500) -> np.ndarray:
        """Predictive quantiles of eventual totals, shape (n_series, n_ref, n_q).

        Monotone in q (sample quantiles of the predicted part) and >= reported (predicted
        counts are >= 0); complete rows return the reported value.
        """
        q = np.asarray(q_levels, dtype=float).ravel()
        if np.any((q < 0) | (q > 1)):
            raise ValueError("q_levels must lie in [0, 1]")
        s, n_ref = self.reported_.shape
        base = self.reported_.astype(float)
        if self.window is not None:
            old = np.arange(n_ref) < n_ref - int(self.window)
            base = np.where(old[None, :], self.expected_total_, base)
        out = np.repeat(base[:, :, None], q.size, axis=2)
        rows = self.incomplete_rows_
        if rows.size == 0:
            return out
        gens = SeriesRandom(self.random_state, s)
        step = self._chunk(n_draws)
        for start in range(0, s, step):
            sl = slice(start, min(start + step, s))
            y = self._draw_missing(sl, n_draws, gens.select(np.arange(s)[sl]))
            y.sort(axis=2)
            qy = _sorted_quantiles(y, q)  # (s, n_rows, n_q)
            out[sl, rows[0]:rows[-1] + 1] += _spread(qy, rows, axis=1)
        return out


def _nb_draw(g: np.random.Generator, mean: np.ndarray, excess: np.ndarray) -> np.ndarray:
    """Counts with the given means and excess variance (Var - mean), drawn from one generator:
    a rounded gamma for means >= 50, a gamma-Poisson mixture (Poisson without excess) below."""
    y = np.zeros(mean.shape)
    big = mean >= _GAMMA_ONLY_MEAN
    if big.any():
        mb, eb = mean[big], excess[big]
        y[big] = np.rint(g.gamma(mb * mb / (mb + eb), (mb + eb) / mb))
    small = ~big & (mean > 0)
    if small.any():  # NB as a gamma-Poisson mixture (Poisson when there is no excess)
        ms, es = mean[small], excess[small]
        pos = es > 0
        size = np.divide(ms * ms, es, out=np.ones_like(es), where=pos)
        scale = np.divide(es, ms, out=np.zeros_like(es), where=pos)
        lam = g.gamma(size, scale)
        np.copyto(lam, ms, where=~pos)
        y[small] = g.poisson(lam)
    return y


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


# --------------------------------------------------------------------------- model choice


def closed_report_days(tri: np.ndarray, first_ref_weekday: int = 0, *,
                       min_typical: float = 10.0) -> np.ndarray:
    """Report days (indices t + d, day 0 = reference row 0) on which nothing at all was reported
    although that weekday usually brings at least ``min_typical`` reports: irregular closures
    such as holidays (a weekday that is always closed is a report-weekday effect instead).

    Only report days whose cells at delays 0 .. D-1 all lie in the window are judged.
    """
    arr = np.asarray(tri, dtype=float)
    if arr.ndim == 2:
        arr = arr[None]
    _, n_ref, k = arr.shape
    cells = np.nansum(np.maximum(arr[:, :, : max(k - 1, 1)], 0.0), axis=0)
    u = np.arange(n_ref)[:, None] + np.arange(cells.shape[1])[None, :]
    seen = np.isfinite(arr[:, :, : cells.shape[1]]).any(axis=0)
    keep = (u < n_ref) & seen
    per_day = np.bincount(u[keep], weights=cells[keep], minlength=n_ref)[:n_ref]
    weekday = (int(first_ref_weekday) + np.arange(n_ref)) % 7
    full = np.arange(n_ref) >= cells.shape[1] - 1  # every delay < D of the day is in the window
    out = []
    for day in np.flatnonzero((per_day == 0) & full):
        week = (weekday == weekday[day]) & full
        same = week & (per_day > 0)
        if same.sum() >= max(1, week.sum() // 2) and np.median(per_day[same]) >= min_typical:
            out.append(int(day))
    return np.asarray(out, dtype=np.int64)


def weekday_lr_test(tri: np.ndarray, template: DelayGLM) -> tuple[float, int, float]:
    """Quasi-likelihood ratio test of report-weekday effects on the aggregate triangle.

    Stationary Poisson fits with and without weekday classes (holiday classes in both);
    statistic = deviance difference / Pearson dispersion of the larger model, compared with
    chi-square on (weekday classes seen - 1) degrees of freedom (McCullagh & Nelder 1989, the
    scaled deviance of quasi-likelihood models).  Returns (statistic, df, p-value).
    """
    agg = aggregate_triangle(tri)
    base = {**template.get_params(), "drift": False, "family": "poisson", "pool_below": 0.0,
            "pool_fully_below": 0.0, "tol": 1e-8}
    full = DelayGLM(**{**base, "weekday_effect": True}).fit(agg, pooled=False)
    small = DelayGLM(**{**base, "weekday_effect": False}).fit(agg, pooled=False)
    x = full.observed_counts_  # same data in both fits

    def ll(m: DelayGLM) -> float:
        mu = np.nan_to_num(m.expected_) * m.observed_exposure_
        cells = np.where(m.observed_mask_, mu, 0.0)
        obs = _cells_of(agg, m)
        return float(_loglik(obs, cells)[0])

    stat_dev = 2.0 * (ll(full) - ll(small))
    mu = np.nan_to_num(full.expected_) * full.observed_exposure_
    obs = _cells_of(agg, full)
    use = full.observed_mask_ & (mu > 0)
    pearson = float((((obs - mu) ** 2) / np.where(use, mu, 1.0))[use].sum())
    assert full.design_.cls is not None
    wk_cls = full.design_.cls[(full.design_.cls >= 0) & (full.design_.cls < 7)]
    df = max(int(np.unique(wk_cls).size) - 1, 1)
    n_par = x.shape[1] + mu.shape[2] - 1 + df
    phi = max(pearson / max(int(use.sum()) - n_par, 1), 1.0)
    stat = max(stat_dev / phi, 0.0)
    return stat, df, float(stats.chi2.sf(stat, df))


def _cells_of(tri: np.ndarray, model: DelayGLM) -> np.ndarray:
    """The clipped observed cells a model was fitted to (tail folded as in the model)."""
    t = _prepare(tri, model.max_delay, None, model.tail_shape_)
    return t.counts


def backtest_arrivals(tri_now: np.ndarray, tri_then: np.ndarray, lag: int,
                      tail_shape: tuple[float, float] | None, window: int
                      ) -> tuple[np.ndarray, np.ndarray]:
    """What arrived in the last ``lag`` days for the newest ``window`` rows of an earlier
    triangle: (exposure (S, T, K) of those cells in ``tri_then``'s frame, counts y (S, T)).

    ``tri_then`` is the triangle as of ``lag`` days earlier (same n_ref, rows shifted: its row i
    is row i - lag of ``tri_now``).  Cells at delays < D with T-1 < i + d <= T-1+lag arrived;
    of a "≥ D" tail bin the share P(m' <= J < m' + lag) arrived (m' = delays of it seen then).
    Rows outside the window, older than ``tri_now``'s first row, or with holes score nothing.
    """
    now = np.asarray(tri_now, dtype=float)
    then = np.asarray(tri_then, dtype=float)
    s, n_ref, k = then.shape
    i = np.arange(n_ref)[:, None]
    d = np.arange(k)[None, :]
    tail = tail_shape is not None
    last = k - 1 if tail else k
    arrive = (i + d > n_ref - 1) & (i + d <= n_ref - 1 + lag) & (d < last)
    rows = (np.arange(n_ref) >= lag) & (np.arange(n_ref) >= n_ref - window)
    exposure = np.where(arrive & rows[:, None], 1.0, 0.0)
    exposure = np.broadcast_to(exposure, (s, n_ref, k)).copy()
    shifted = np.full_like(then, np.nan)
    shifted[:, lag:] = now[:, : n_ref - lag]
    got = np.where(exposure > 0, shifted, 0.0)
    y = np.where(np.isnan(got), np.nan, np.maximum(got, 0.0)).sum(axis=2)
    if tail:
        m_then = n_ref - np.arange(n_ref) - (k - 1)
        _, left_then = _tail_shares(m_then, tail_shape)  # type: ignore[arg-type]
        _, left_now = _tail_shares(m_then + lag, tail_shape)  # type: ignore[arg-type]
        share = np.where(rows & (m_then + lag >= 1), left_then - left_now, 0.0)
        exposure[:, :, -1] = share[None, :]
        tail_now = shifted[:, :, -1]
        tail_then = np.where(np.isfinite(then[:, :, -1]) & (m_then >= 1)[None, :],
                             then[:, :, -1], 0.0)
        inc = np.where(share[None, :] > 0, np.maximum(tail_now - tail_then, 0.0), 0.0)
        y = y + inc
    y = np.where(exposure.sum(axis=2) > 0, y, np.nan)
    return exposure, y


class DriftChoice(NamedTuple):
    """Back-test of the stationary and the drifting delay model per series."""

    gain: np.ndarray  # (S,) log predictive score drifting - stationary (sum over rows)
    miss90: np.ndarray  # (S, 2) share of rows outside the 90 % predictive, per candidate
    n_rows: np.ndarray  # (S,) rows scored
    pool_weight: np.ndarray  # (S,)


def backtest_drift(tri_then: np.ndarray, reported_then: np.ndarray | None,
                   exposure: np.ndarray, y: np.ndarray, template: DelayGLM,
                   pooled: PooledDelay | None, family: str | None = None) -> DriftChoice:
    """Fit both candidates (no drift / drift) on the earlier triangle and score the counts that
    have arrived since with each one's predictive distribution (log score; the better model
    would have nowcast the recent past better)."""
    scores = []
    miss = []
    weight = None
    for drift in (False, True):
        nc = DelayNowcaster(model=DelayGLM(**{**template.get_params(), "drift": drift}),
                            family=family, parameter_uncertainty=False)
        nc.fit(tri_then, reported=reported_then, pooled=pooled if pooled is not None else None)
        lp, lo, hi = nc.predictive_logpdf(exposure, y)
        scores.append(np.nansum(lp, axis=1))
        mid = 0.5 * (lo + hi)
        out = np.where(np.isfinite(lp), (mid < 0.05) | (mid > 0.95), False)
        miss.append(_safe_div(out.sum(axis=1).astype(float), np.isfinite(lp).sum(axis=1)))
        weight = nc.model_.pool_weight_
    n_rows = np.isfinite(y).sum(axis=1) if y.ndim == 2 else np.zeros(0)
    assert weight is not None
    return DriftChoice(scores[1] - scores[0], np.stack(miss, axis=1), n_rows, weight)
