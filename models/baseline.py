"""Flat (persistence) baseline forecaster, vectorised over many series.

The flat baseline is the reference model that collaborative forecast hubs score every other
model against (common practice): its median stays at the last observed level and its spread
comes from the empirical distribution of past changes, symmetrised so that the baseline has no
trend, accumulated over the horizon by sampling and truncated at zero.

Level.  Daily surveillance counts carry a strong day-of-week reporting pattern, so the last
single value is a noisy level (a Monday dip would be carried forward for four weeks).  The
default ``level="mean7"`` uses the mean of the last 7 days, which averages one full weekly cycle;
it plays the role that the last value plays for weekly data.  ``level="last"`` gives the classic
last-value version.

Spread (``level="mean7"``).  The target is a daily value, not a weekly mean, so a forecast at
horizon h is ``level + (sum of h-1 day-to-day changes of the 7-day mean) + e`` where ``e`` is a
one-step error ``y_t - mean7_{t-1}`` (it carries the daily noise and weekday effect).  Changes
and errors are drawn from the last ``window_days`` days, each with a random sign (the
symmetrisation), and every sampled path is paired with its mirror image so the sample is exactly
symmetric and the median equals the level.  With ``level="last"`` the spread is the sum of h
symmetrised day-to-day changes of the raw series.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

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


def _pack(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sort each row so its finite values come first; return (sorted rows, count of finite)."""
    finite = np.isfinite(values)
    packed = np.sort(np.where(finite, values, np.inf), axis=1)
    return np.where(np.isfinite(packed), packed, 0.0), finite.sum(axis=1)


def _draw(
    rng: np.random.Generator, packed: np.ndarray, counts: np.ndarray, size: tuple[int, ...]
) -> np.ndarray:
    """Draw from each row's finite values with a random sign; zeros where a row has none."""
    n = packed.shape[0]
    if packed.shape[1] == 0:
        return np.zeros((n, *size))
    u = rng.random((n, *size))
    idx = np.minimum((u * counts.reshape((n,) + (1,) * len(size))).astype(int), packed.shape[1] - 1)
    rows = np.arange(n).reshape((n,) + (1,) * len(size))
    vals = packed[rows, np.maximum(idx, 0)]
    signs = np.where(rng.random((n, *size)) < 0.5, -1.0, 1.0)
    has = (counts > 0).reshape((n,) + (1,) * len(size))
    return np.where(has, vals * signs, 0.0)


class FlatBaseline:
    """Flat baseline: median = recent level, spread = symmetrised past changes, truncated at 0.

    ``window_days``: how many recent days of changes form the empirical distribution.
    ``level``: ``"mean7"`` (default, mean of the last 7 days) or ``"last"`` (last value).
    ``n_samples``: sampled paths per series (half of them mirror images of the others).
    """

    def __init__(
        self,
        *,
        window_days: int = 56,
        level: str = "mean7",
        n_samples: int = 2000,
        q_levels: Sequence[float] = DEFAULT_QUANTILES,
        seed: int | None = None,
    ) -> None:
        """Store settings (scikit-learn style; validated in ``fit``)."""
        self.window_days = window_days
        self.level = level
        self.n_samples = n_samples
        self.q_levels = q_levels
        self.seed = seed

    def fit(self, y: np.ndarray) -> FlatBaseline:
        """Learn level and change distributions from y (n_series, T) or (T,); NaN = missing.

        Negative and non-finite values are treated as missing.  A series with no recent value
        gets a NaN level (its quantiles are NaN); one with no usable changes gets zero spread.
        """
        if self.level not in ("mean7", "last"):
            raise ValueError(f"level must be 'mean7' or 'last', got {self.level!r}")
        window = int(self.window_days)
        if window < 2:
            raise ValueError(f"window_days must be >= 2, got {self.window_days}")
        arr = np.atleast_2d(np.asarray(y, dtype=float))
        if arr.ndim != 2:
            raise ValueError(f"y must be 1-D or 2-D (n_series, T), got shape {arr.shape}")
        arr = np.where(np.isfinite(arr) & (arr >= 0), arr, np.nan)
        n_days = arr.shape[1]
        if self.level == "mean7":
            tail = arr[:, -7:]
            ok = np.isfinite(tail).any(axis=1)
            level = np.where(ok, np.nanmean(np.where(ok[:, None], tail, 0.0), axis=1), np.nan)
            m7 = _trailing_mean(arr, 7)
            changes = np.diff(m7, axis=1)[:, -window:]
            errors = (arr[:, 1:] - m7[:, :-1])[:, -window:]
        else:
            idx = np.where(np.isfinite(arr), np.arange(n_days)[None, :], -1).max(axis=1)
            level = np.where(idx >= 0, arr[np.arange(arr.shape[0]), np.maximum(idx, 0)], np.nan)
            changes = np.diff(arr, axis=1)[:, -window:]
            errors = np.full((arr.shape[0], 0), np.nan)
        self.level_ = level
        self.changes_, self.n_changes_ = _pack(changes)
        self.errors_, self.n_errors_ = _pack(errors)
        self.n_series_ = arr.shape[0]
        return self

    def _sample_rows(
        self, rows: slice, horizon: int, n_half: int, gen: np.random.Generator
    ) -> np.ndarray:
        """Sampled values (n_rows, 2 * n_half, horizon) for a block of series."""
        if self.level == "mean7":
            steps = _draw(gen, self.changes_[rows], self.n_changes_[rows], (n_half, horizon))
            steps[:, :, 0] = 0.0  # horizon 1 carries no change of level, only the one-step error
            noise = _draw(gen, self.errors_[rows], self.n_errors_[rows], (n_half, horizon))
            dev = np.cumsum(steps, axis=2) + noise
        else:
            dev = _draw(gen, self.changes_[rows], self.n_changes_[rows], (n_half, horizon))
            dev = np.cumsum(dev, axis=2)
        dev = np.concatenate([dev, -dev], axis=1)  # exact symmetry: median = level
        return np.maximum(self.level_[rows, None, None] + dev, 0.0)

    def _prepare(
        self, horizon: int, n_samples: int | None, rng: np.random.Generator | None
    ) -> tuple[int, int, np.random.Generator]:
        if not hasattr(self, "level_"):
            raise RuntimeError("call fit() before forecasting")
        horizon = int(horizon)
        if horizon < 1:
            raise ValueError(f"horizon must be >= 1, got {horizon}")
        n_half = max(1, int(self.n_samples if n_samples is None else n_samples) // 2)
        return horizon, n_half, (rng if rng is not None else np.random.default_rng(self.seed))

    def sample(
        self,
        horizon: int = 28,
        n_samples: int | None = None,
        rng: np.random.Generator | None = None,
    ) -> np.ndarray:
        """Sampled future values (n_series, n_samples, horizon), truncated at zero."""
        horizon, n_half, gen = self._prepare(horizon, n_samples, rng)
        return self._sample_rows(slice(None), horizon, n_half, gen)

    def quantiles(
        self,
        horizon: int = 28,
        q_levels: Sequence[float] | None = None,
        rng: np.random.Generator | None = None,
    ) -> np.ndarray:
        """Forecast quantiles (n_series, horizon, n_q) for days 1..horizon: monotone, >= 0."""
        q = np.asarray(self.q_levels if q_levels is None else q_levels, dtype=float)
        if q.ndim != 1 or np.any((q < 0) | (q > 1)):
            raise ValueError("q_levels must be a 1-D sequence of probabilities in [0, 1]")
        horizon, n_half, gen = self._prepare(horizon, None, rng)
        out = np.empty((self.n_series_, horizon, q.size))
        chunk = max(1, 4_000_000 // (2 * n_half * horizon))  # bounds memory
        for lo in range(0, self.n_series_, chunk):
            rows = slice(lo, lo + chunk)
            draws = self._sample_rows(rows, horizon, n_half, gen)
            out[rows] = np.moveaxis(np.quantile(draws, q, axis=1), 0, -1)
        good = np.isfinite(out).all(axis=-1, keepdims=True)
        out = np.maximum(out, 0.0)
        return np.where(good, np.maximum.accumulate(np.where(good, out, 0.0), axis=-1), np.nan)
