"""The protocol every model in :mod:`tallywave.models` follows, and what it shares.

* **Estimators** (scikit-learn style): every parameter is a keyword argument of ``__init__``,
  stored unchanged under its own name, including ``random_state``; ``fit(...)`` learns from data,
  sets fitted attributes ending in ``_`` and returns ``self``; it never mutates an estimator or
  array passed in.  A model that draws random numbers builds its generators afresh from
  ``random_state`` on every call, so calling ``forecast`` / ``quantiles`` twice gives the same
  answer, whatever was called in between.
* **Results** (statsmodels style): ``forecast(...)`` returns a :class:`QuantileForecast` with fixed
  axes ``values[series, horizon, level]`` — the same shape and names for every model, so stages and
  ensembles never need to know which model made it.
* **Random streams**: one independent stream per series (:func:`series_seeds` derives it from the
  run's seed, the signal and the region *name*), so the numbers a region gets do not depend on
  which other regions share its batch, on the batch size, or on the runner (threads, processes,
  Dask).  A model given a plain integer derives one stream per series position from it.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

#: What ``random_state`` may be: an int (one stream per series position is derived from it), a
#: SeedSequence, or one seed / SeedSequence per series (from :func:`series_seeds`).
RandomState = int | np.random.SeedSequence | Sequence[int | np.random.SeedSequence] | None


def stable_key(text: str) -> int:
    """A 64-bit integer from a string that is the same in every process and on every machine
    (Python's own ``hash`` of a string is salted per process)."""
    return int.from_bytes(hashlib.blake2b(text.encode("utf-8"), digest_size=8).digest(), "little")


def series_seeds(seed: int, signal: str, regions: Sequence[str] | np.ndarray
                 ) -> list[np.random.SeedSequence]:
    """One SeedSequence per region for (seed, signal, region): independent, reproducible streams
    that depend only on those three, never on batching or parallelism."""
    sig = stable_key(str(signal))
    return [np.random.SeedSequence(entropy=int(seed), spawn_key=(sig, stable_key(str(r))))
            for r in regions]


def _as_seed_sequences(random_state: RandomState, n_series: int) -> list[np.random.SeedSequence]:
    if random_state is None:
        random_state = 0
    if isinstance(random_state, (int, np.integer)):
        return [np.random.SeedSequence(entropy=int(random_state), spawn_key=(i,))
                for i in range(n_series)]
    if isinstance(random_state, np.random.SeedSequence):
        return [np.random.SeedSequence(entropy=random_state.entropy,
                                       spawn_key=(*random_state.spawn_key, i))
                for i in range(n_series)]
    states = list(random_state)
    if len(states) != n_series:
        raise ValueError(f"random_state has {len(states)} seeds for {n_series} series")
    return [s if isinstance(s, np.random.SeedSequence) else np.random.SeedSequence(int(s))
            for s in states]


class SeriesRandom:
    """Independent random generators, one per series, built afresh from ``random_state``.

    Each method draws for every series at once and returns the series on the **first** axis:
    ``normal((m, t))`` → ``(n_series, m, t)``; parameter arrays have the series on their first
    axis.  ``select(idx)`` gives the streams of a subset of series.
    """

    def __init__(self, random_state: RandomState, n_series: int) -> None:
        self.n_series = int(n_series)
        self._seqs = _as_seed_sequences(random_state, self.n_series)
        self.gens = [np.random.default_rng(s) for s in self._seqs]

    def select(self, idx: np.ndarray | Sequence[int]) -> SeriesRandom:
        """The streams of the series at positions ``idx`` (continuing their current state)."""
        out = SeriesRandom.__new__(SeriesRandom)
        pos = np.arange(self.n_series)[np.asarray(idx)]
        out.n_series = len(pos)
        out._seqs = [self._seqs[i] for i in pos]
        out.gens = [self.gens[i] for i in pos]
        return out

    def _each(self, fn: Callable[[np.random.Generator, int], np.ndarray]) -> np.ndarray:
        if self.n_series == 0:
            probe = fn(np.random.default_rng(0), -1)
            return np.zeros((0, *np.shape(probe)))
        return np.stack([np.asarray(fn(g, i)) for i, g in enumerate(self.gens)])

    def normal(self, size: tuple[int, ...]) -> np.ndarray:
        """Standard normal draws, ``(n_series, *size)``."""
        return self._each(lambda g, _i: g.standard_normal(size))

    def uniform(self, size: tuple[int, ...]) -> np.ndarray:
        """Uniform(0, 1) draws, ``(n_series, *size)``."""
        return self._each(lambda g, _i: g.random(size))

    def integers(self, high: int, size: tuple[int, ...]) -> np.ndarray:
        """Integers in [0, high), ``(n_series, *size)``."""
        return self._each(lambda g, _i: g.integers(0, high, size))

    def poisson(self, lam: np.ndarray) -> np.ndarray:
        """Poisson draws with means ``lam`` (series first)."""
        lam = np.asarray(lam, dtype=float)
        return self._each(lambda g, i: g.poisson(lam[max(i, 0)])).astype(float)

    def gamma(self, shape: np.ndarray, scale: np.ndarray) -> np.ndarray:
        """Gamma draws (series first; shape and scale broadcast per series)."""
        a = np.asarray(shape, dtype=float)
        b = np.broadcast_to(np.asarray(scale, dtype=float), a.shape)
        return self._each(lambda g, i: g.gamma(a[max(i, 0)], b[max(i, 0)]))

    def negative_binomial(self, mean: np.ndarray, size: np.ndarray | float) -> np.ndarray:
        """Negative-binomial counts with the given means and size (dispersion) k, series first:
        variance = mean + mean² / k.  Drawn as a gamma–Poisson mixture."""
        mu = np.asarray(mean, dtype=float)
        k = np.broadcast_to(np.asarray(size, dtype=float), mu.shape)

        def one(g: np.random.Generator, i: int) -> np.ndarray:
            m, kk = mu[max(i, 0)], k[max(i, 0)]
            lam = g.gamma(kk, np.where(kk > 0, m / np.maximum(kk, 1e-300), 0.0))
            return g.poisson(np.maximum(lam, 0.0))

        return self._each(one).astype(float)


@dataclass(frozen=True)
class QuantileForecast:
    """Quantiles of a forecast (or nowcast) with fixed axes: ``values[series, horizon, level]``.

    ``horizon`` holds the step of each column (1..H days or weeks ahead for forecasts; offsets
    ≤ 0 from the as-of date for nowcasts).  ``values`` are non-decreasing along the level axis.
    """

    values: np.ndarray
    levels: np.ndarray
    horizon: np.ndarray
    series: np.ndarray | None = None
    model: str = ""

    def __post_init__(self) -> None:
        v = np.asarray(self.values, dtype=float)
        lv = np.asarray(self.levels, dtype=float)
        if v.ndim != 3 or v.shape[2] != lv.size or v.shape[1] != len(self.horizon):
            raise ValueError(f"values {v.shape} do not match (series, {len(self.horizon)} "
                             f"horizons, {lv.size} levels)")
        if np.any(np.diff(lv) <= 0):
            raise ValueError("levels must be strictly increasing")
        object.__setattr__(self, "values", v)
        object.__setattr__(self, "levels", lv)
        object.__setattr__(self, "horizon", np.asarray(self.horizon))

    @classmethod
    def from_samples(cls, samples: np.ndarray, levels: Sequence[float] | np.ndarray,
                     horizon: np.ndarray | None = None, *, series: np.ndarray | None = None,
                     model: str = "", floor: float | None = 0.0) -> QuantileForecast:
        """Empirical quantiles of draws ``samples[series, horizon, draw]``."""
        lv = np.sort(np.asarray(levels, dtype=float))
        s = np.asarray(samples, dtype=float)
        q = np.moveaxis(np.quantile(s, lv, axis=2), 0, -1)
        q = np.maximum.accumulate(q, axis=-1)
        if floor is not None:
            q = np.maximum(q, floor)
        h = np.arange(1, s.shape[1] + 1) if horizon is None else horizon
        return cls(q, lv, h, series, model)

    @property
    def n_series(self) -> int:
        """Number of series (first axis)."""
        return int(self.values.shape[0])

    def at(self, level: float) -> np.ndarray:
        """The ``(series, horizon)`` values at one level (linear between stored levels)."""
        lv = self.levels
        if level <= lv[0]:
            return self.values[..., 0]
        if level >= lv[-1]:
            return self.values[..., -1]
        j = int(np.searchsorted(lv, level) - 1)
        w = (level - lv[j]) / (lv[j + 1] - lv[j])
        return self.values[..., j] + w * (self.values[..., j + 1] - self.values[..., j])

    def median(self) -> np.ndarray:
        """The ``(series, horizon)`` medians."""
        return self.at(0.5)

    def interval(self, coverage: float) -> tuple[np.ndarray, np.ndarray]:
        """Central interval bounds for e.g. ``coverage = 0.9``."""
        a = (1.0 - coverage) / 2.0
        return self.at(a), self.at(1.0 - a)

    def take(self, idx: Any) -> QuantileForecast:
        """The forecasts of a subset of series."""
        ser = None if self.series is None else np.asarray(self.series)[idx]
        return QuantileForecast(self.values[idx], self.levels, self.horizon, ser, self.model)

    def to_frame(self) -> pd.DataFrame:
        """Long table: series, horizon, q_level, value (one row per cell)."""
        n, h, k = self.values.shape
        ser = np.arange(n) if self.series is None else np.asarray(self.series)
        return pd.DataFrame({
            "series": np.repeat(ser, h * k),
            "horizon": np.tile(np.repeat(self.horizon, k), n),
            "q_level": np.tile(self.levels, n * h),
            "value": self.values.reshape(-1),
        })
