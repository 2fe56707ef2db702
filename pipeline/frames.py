"""Shape long tables into the dense arrays the models work on, and back.

Stages read long tables (region, signal, ref_date, value) and the models want one array per
signal, ``(n_regions, n_days)``.  These helpers do that reshaping once, vectorised, so every stage
shares one definition of "the series of a signal".
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, TypeVar

import numpy as np
import pandas as pd

T = TypeVar("T")
R = TypeVar("R")

#: ``mapper(fn, items)`` runs ``fn`` on each item and returns the results in order.  Stages fan
#: per-region work out through it: the default runs in-process, the Prefect flows pass a mapper
#: that submits tasks to their task runner (threads or Dask).
Mapper = Callable[[Callable[[T], R], Sequence[T]], list[R]]


@dataclass
class BatchFailure:
    """Stands in for the result of a batch that raised: its regions are skipped and recorded."""

    message: str


def serial_map(fn: Callable[[T], R], items: Sequence[T]) -> list[R | BatchFailure]:
    """The default mapper: an in-process loop; a batch that raises becomes a BatchFailure."""
    out: list[R | BatchFailure] = []
    for x in items:
        try:
            out.append(fn(x))
        except Exception as exc:  # noqa: BLE001 - a bad batch is recorded as skipped
            out.append(BatchFailure(f"{type(exc).__name__}: {exc}"))
    return out


#: Days between two reference dates of a weekly signal (``core.signals.frequency = 'weekly'``).
WEEK = 7


@dataclass
class SeriesBlock:
    """One signal's series for many regions on a common date axis (daily, or weekly: ``step``
    = 7 days between two dates, each date the last day of its week)."""

    signal: str
    regions: np.ndarray  # (n,) region names
    dates: np.ndarray  # (T,) datetime64[D], ``step`` days apart
    values: np.ndarray  # (n, T) float, NaN where no value is known
    step: int = 1  # days between two dates: 1 (daily signal) or 7 (weekly signal)

    def take(self, idx: np.ndarray | slice) -> SeriesBlock:
        """A block with a subset of regions (for batching)."""
        return SeriesBlock(self.signal, self.regions[idx], self.dates, self.values[idx],
                           self.step)

    def long(self, value_name: str = "value", values: np.ndarray | None = None) -> pd.DataFrame:
        """Back to a long table (region, signal, ref_date, value_name)."""
        v = self.values if values is None else values
        n, t = v.shape
        return pd.DataFrame({
            "region": np.repeat(self.regions, t),
            "signal": self.signal,
            "ref_date": np.tile(self.dates, n).astype("datetime64[D]"),
            value_name: v.reshape(-1),
        })


def to_blocks(df: pd.DataFrame, *, value: str = "value", end: dt.date | None = None,
              start: dt.date | None = None, steps: dict[str, int] | None = None
              ) -> dict[str, SeriesBlock]:
    """Pivot a long table into one :class:`SeriesBlock` per signal (dates contiguous; a signal
    with ``steps[signal] = 7`` on a weekly axis aligned to its first date)."""
    out: dict[str, SeriesBlock] = {}
    if df.empty:
        return out
    for signal, g in df.groupby("signal", sort=True):
        step = int((steps or {}).get(str(signal), 1))
        d = g["ref_date"].to_numpy().astype("datetime64[D]")
        lo = np.datetime64(start, "D") if start is not None else d.min()
        hi = np.datetime64(end, "D") if end is not None else d.max()
        if step > 1:
            lo, hi = week_axis_bounds(d, lo, hi, step)
        keep = (d >= lo) & (d <= hi)
        regions, r_idx = np.unique(g["region"].to_numpy()[keep].astype(str), return_inverse=True)
        t_idx = ((d[keep] - lo).astype(int)) // step
        dates = np.arange(lo, hi + np.timedelta64(1, "D"), step, dtype="datetime64[D]")
        vals = np.full((len(regions), len(dates)), np.nan)
        vals[r_idx, t_idx] = g[value].to_numpy(dtype=float)[keep]
        out[str(signal)] = SeriesBlock(str(signal), regions, dates, vals, step)
    return out


def week_axis_bounds(dates: np.ndarray, lo: Any, hi: Any, step: int
                     ) -> tuple[np.datetime64, np.datetime64]:
    """First and last date of a ``step``-day axis through ``dates`` (all on one weekday) that
    lies within [lo, hi]: the bounds move inward to the nearest date of the axis."""
    d = np.asarray(dates, dtype="datetime64[D]").astype(np.int64)
    lo_i = int(np.asarray(lo, dtype="datetime64[D]").astype(np.int64))
    hi_i = int(np.asarray(hi, dtype="datetime64[D]").astype(np.int64))
    anchor = int(d[0]) if d.size else lo_i
    if d.size and np.any((d - anchor) % step):
        raise ValueError(f"dates of a {step}-day series fall on different weekdays")
    lo_i += (anchor - lo_i) % step
    hi_i -= (hi_i - anchor) % step
    both = np.array([lo_i, hi_i], dtype=np.int64).astype("datetime64[D]")
    return both[0], both[1]


def in_steps(days: float, step: int, minimum: int = 1) -> int:
    """A span given in days as a whole number of ``step``-day steps (rounded up), at least
    ``minimum``; daily (step 1) spans are returned as they are."""
    if step <= 1:
        return int(days)
    return max(int(minimum), int(-(-int(days) // step)))


def batches(n: int, size: int) -> list[slice]:
    """Contiguous slices of ``size`` regions (the unit of fan-out)."""
    size = max(1, int(size))
    return [slice(i, min(i + size, n)) for i in range(0, n, size)]
