"""Flat (persistence) baseline forecaster, vectorised over many series.

The flat baseline is the yardstick collaborative forecast hubs score every other model against
(common practice): its median stays at the recent level and its spread comes from the series' own
past changes, symmetrised so that the baseline has no trend, truncated at zero.  It is never a
member of an ensemble (it is what ensembles are compared with).

Level.  Daily surveillance counts carry a day-of-week pattern, so the last single value is a
noisy level; ``level="mean7"`` (default) uses the mean of the last 7 days, ``level="last"`` the
last value.

Spread: the **observed h-step-ahead changes**.  For every horizon h the model collects, over the
last ``window_days`` target days j, the change from the level known h days earlier to the value
at j, ``e_h(j) = y_j - L_{j-h}`` (``scale="absolute"``) or ``log((y_j + 1) / (L_{j-h} + 1))``
(``scale="relative"``, default: changes scale with the level, so a change seen at 40 cases/day
is applied in proportion at 400).  The sample {e_h, -e_h} is symmetric, so the forecast
quantiles ``L_T (+) quantile(±e_h)`` have the level as their median, and their spread grows with
h as the series' real h-day changes do.  (The older practice of summing independently resampled
one-day changes grows the spread like sqrt(h) and misses the persistence of trends: its 90 %
interval covered 0 % at 28 days under 2 %/day growth.)  Quantiles are read off the empirical
distribution directly: no sampling, so the forecast is deterministic.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from tallywave.models.base import QuantileForecast, RandomState

DEFAULT_QUANTILES: tuple[float, ...] = (0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975)


def _trailing_mean(y: np.ndarray, width: int) -> np.ndarray:
    """Mean of y[t-width+1 .. t] along the last axis (NaN if any value in it is missing)."""
    out = np.full(y.shape, np.nan)
    if y.shape[-1] < width:
        return out
    pad = np.zeros(y.shape[:-1] + (1,))
    total = np.cumsum(np.concatenate([pad, np.nan_to_num(y, nan=0.0)], axis=-1), axis=-1)
    gaps = np.cumsum(np.concatenate([pad, np.isnan(y).astype(float)], axis=-1), axis=-1)
    sums = total[..., width:] - total[..., :-width]
    missing = gaps[..., width:] - gaps[..., :-width]
    out[..., width - 1 :] = np.where(missing > 0, np.nan, sums / width)
    return out


def _symmetric_quantiles(e: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Quantiles (numpy's linear method) of {e, -e} along the last axis, NaN skipped; 0 where a
    row has no finite value (no observed change: no spread).  Vectorised (numpy's nanquantile
    works row by row)."""
    sym = np.concatenate([e, -e], axis=-1)
    srt = np.sort(np.where(np.isfinite(sym), sym, np.inf), axis=-1)
    n = np.isfinite(srt).sum(axis=-1)  # (..., )
    pos = (np.maximum(n, 1) - 1)[..., None] * q  # (..., k)
    lo = np.floor(pos).astype(int)
    hi = np.minimum(lo + 1, np.maximum(n - 1, 0)[..., None])
    frac = pos - lo
    a = np.take_along_axis(srt, lo, axis=-1)
    b = np.take_along_axis(srt, hi, axis=-1)
    with np.errstate(invalid="ignore"):  # rows without any value: inf - inf, replaced below
        out = a + frac * (b - a)
    return np.where(n[..., None] > 0, out, 0.0)


class FlatBaseline:
    """Flat baseline: median = recent level, spread = symmetrised observed h-step changes.

    ``window_days``: target days whose h-step changes form each horizon's distribution.
    ``level``: ``"mean7"`` (mean of the last 7 days) or ``"last"``.
    ``scale``: ``"relative"`` (log-ratio changes) or ``"absolute"`` (differences).
    ``random_state``: accepted for the common model protocol; the forecast uses no randomness.
    """

    def __init__(
        self,
        *,
        window_days: int = 56,
        level: str = "mean7",
        scale: str = "relative",
        random_state: RandomState = None,
    ) -> None:
        """Store settings (scikit-learn style; validated in ``fit``)."""
        self.window_days = window_days
        self.level = level
        self.scale = scale
        self.random_state = random_state

    def history_days(self, horizon: int) -> int:
        """Days of history the forecast for ``horizon`` days reads (older days change nothing)."""
        return int(self.window_days) + int(horizon) + 7

    def fit(self, y: np.ndarray) -> FlatBaseline:
        """Keep the level and the (cleaned) series y (n_series, T) or (T,); NaN = missing.

        Negative and non-finite values are treated as missing.  A series with no recent value
        gets a NaN level (its quantiles are NaN).
        """
        if self.level not in ("mean7", "last"):
            raise ValueError(f"level must be 'mean7' or 'last', got {self.level!r}")
        if self.scale not in ("relative", "absolute"):
            raise ValueError(f"scale must be 'relative' or 'absolute', got {self.scale!r}")
        if int(self.window_days) < 2:
            raise ValueError(f"window_days must be >= 2, got {self.window_days}")
        arr = np.atleast_2d(np.asarray(y, dtype=float))
        if arr.ndim != 2:
            raise ValueError(f"y must be 1-D or 2-D (n_series, T), got shape {arr.shape}")
        arr = np.where(np.isfinite(arr) & (arr >= 0), arr, np.nan)
        if self.level == "mean7":
            lev = _trailing_mean(arr, 7)
            tail = arr[:, -7:]
            ok = np.isfinite(tail).any(axis=1)
            with np.errstate(invalid="ignore"):
                last = np.where(ok, np.nanmean(np.where(ok[:, None], tail, 0.0), axis=1), np.nan)
        else:
            lev = arr.copy()
            idx = np.where(np.isfinite(arr), np.arange(arr.shape[1])[None, :], -1).max(axis=1)
            last = np.where(idx >= 0, arr[np.arange(arr.shape[0]), np.maximum(idx, 0)], np.nan)
        self.y_ = arr
        self.levels_path_ = lev
        self.level_ = last
        self.n_series_ = arr.shape[0]
        return self

    def changes(self, horizon: int) -> np.ndarray:
        """Observed h-step changes (n_series, horizon, window_days) on the model's scale."""
        if not hasattr(self, "y_"):
            raise RuntimeError("call fit() before forecasting")
        y, lev = self.y_, self.levels_path_
        n, t = y.shape
        w = int(self.window_days)
        out = np.full((n, int(horizon), w), np.nan)
        for h in range(1, int(horizon) + 1):
            j = np.arange(t - w, t)
            ok = j - h >= 0
            jj, ii = j[ok], j[ok] - h
            if self.scale == "relative":
                val = np.log1p(y[:, jj]) - np.log1p(lev[:, ii])
            else:
                val = y[:, jj] - lev[:, ii]
            out[:, h - 1, np.flatnonzero(ok)] = val
        return out

    def forecast(self, horizon: int = 28,
                 levels: Sequence[float] | np.ndarray = DEFAULT_QUANTILES) -> QuantileForecast:
        """Quantiles for days 1..horizon: median = level, monotone, >= 0 (NaN without a level)."""
        horizon = int(horizon)
        if horizon < 1:
            raise ValueError(f"horizon must be >= 1, got {horizon}")
        q = np.asarray(levels, dtype=float)
        if q.ndim != 1 or np.any((q <= 0) | (q >= 1)) or np.any(np.diff(q) <= 0):
            raise ValueError("levels must be increasing probabilities in (0, 1)")
        e = self.changes(horizon)
        dev = _symmetric_quantiles(e, q)  # (n, H, k)
        lev = self.level_[:, None, None]
        if self.scale == "relative":
            vals = (lev + 1.0) * np.exp(dev) - 1.0
        else:
            vals = lev + dev
        vals = np.maximum.accumulate(np.maximum(vals, 0.0), axis=-1)
        vals = np.where(np.isfinite(lev), vals, np.nan)
        return QuantileForecast(vals, q, np.arange(1, horizon + 1), model="baseline")

    def quantiles(self, horizon: int = 28,
                  q_levels: Sequence[float] | np.ndarray = DEFAULT_QUANTILES) -> np.ndarray:
        """Forecast quantiles as an array (n_series, horizon, n_q) (see :meth:`forecast`)."""
        return self.forecast(horizon, q_levels).values
