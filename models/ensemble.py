"""Quantile averaging (Vincentization) of forecasts from several models.

Each model's forecast is a set of quantiles per series and horizon, an array
(n_series, horizon, n_q) on a common grid of quantile levels.  Vincentization combines them
level by level (Vincent 1912; Ratcliff 1979, Psychological Bulletin): the ensemble's q-quantile
is the (weighted) mean or median across models of their q-quantiles.  Both operations are
monotone in every input, so monotone inputs give a monotone ensemble; a final running maximum
along the quantile axis removes rounding-level violations.  Missing (NaN) forecasts of a model
for some series are skipped and the remaining weights renormalised.

:func:`inverse_score_weights` turns members' past scores into weights for a weighted ensemble.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np


def _weighted_median(values: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """Weighted median along axis 0 (midpoint of lower and upper weighted medians); NaN skipped.

    With equal weights this is the ordinary median (the two middle values are averaged when the
    number of values is even).
    """
    w = np.where(np.isfinite(values), weights.reshape((-1,) + (1,) * (values.ndim - 1)), 0.0)
    order = np.argsort(np.where(np.isfinite(values), values, np.inf), axis=0)
    v = np.take_along_axis(values, order, axis=0)
    cw = np.cumsum(np.take_along_axis(w, order, axis=0), axis=0)
    total = cw[-1]
    frac = cw / np.where(total > 0, total, 1.0)
    eps = 1e-12
    lo = np.argmax(frac >= 0.5 - eps, axis=0)
    hi = np.argmax(frac > 0.5 + eps, axis=0)
    v_lo = np.take_along_axis(v, lo[None], axis=0)[0]
    v_hi = np.take_along_axis(v, hi[None], axis=0)[0]
    return np.where(total > 0, 0.5 * (v_lo + v_hi), np.nan)


def quantile_ensemble(
    forecasts: Sequence[np.ndarray],
    method: str = "median",
    weights: Sequence[float] | np.ndarray | None = None,
) -> np.ndarray:
    """Combine quantile forecasts (each (n_series, H, n_q), same levels) level by level.

    ``method``: ``"median"`` (robust to one wild model; common practice in forecast hubs) or
    ``"mean"``.  ``weights``: one non-negative weight per model (default equal).  Returns an
    array of the same shape, non-decreasing along the quantile axis; NaN where every model is
    missing.
    """
    if method not in ("median", "mean"):
        raise ValueError(f"method must be 'median' or 'mean', got {method!r}")
    if len(forecasts) == 0:
        raise ValueError("need at least one forecast to combine")
    arrays = [np.asarray(f, dtype=float) for f in forecasts]
    shape = arrays[0].shape
    for j, a in enumerate(arrays):
        if a.shape != shape:
            raise ValueError(f"forecast {j} has shape {a.shape}, expected {shape}")
    stack = np.stack(arrays)
    if weights is None:
        w = np.ones(len(arrays))
    else:
        w = np.asarray(weights, dtype=float).reshape(-1)
        if w.shape != (len(arrays),) or np.any(~np.isfinite(w)) or np.any(w < 0) or w.sum() <= 0:
            raise ValueError("weights must be one finite non-negative number per model, sum > 0")
    if method == "mean":
        wb = np.where(np.isfinite(stack), w.reshape((-1,) + (1,) * len(shape)), 0.0)
        total = wb.sum(axis=0)
        num = (wb * np.nan_to_num(stack, nan=0.0, posinf=0.0, neginf=0.0)).sum(axis=0)
        out = np.where(total > 0, num / np.where(total > 0, total, 1.0), np.nan)
    else:
        out = _weighted_median(stack, w)
    if out.ndim == 0 or out.shape[-1] == 0:
        return out
    good = np.isfinite(out).all(axis=-1, keepdims=True)
    mono = np.maximum.accumulate(np.where(good, out, -np.inf), axis=-1)
    return np.where(good, mono, out)


def inverse_score_weights(
    wis: np.ndarray, *, power: float = 1.0, min_forecasts: int = 1
) -> tuple[np.ndarray, int]:
    """Member weights from their past scores: w_m ∝ (mean WIS of m)^-power, summing to 1.

    ``wis`` (n_forecasts, n_models) holds each member's WIS on the **same** past forecasts
    (region × issue date × horizon), so a member is not rewarded for having been scored on easy
    days only.  Inverse-score weighting of quantile forecasts: Taylor & Taylor (2023, Eur J Oper
    Res) and the trained ensembles of Ray et al. (2023, Int J Forecasting) (both cited from
    memory); power 0 gives equal weights.  Rows with a missing score are
    dropped; with fewer than ``min_forecasts`` rows left (or a non-positive mean) the weights are
    equal.  Returns (weights, number of forecasts used).
    """
    w = np.asarray(wis, dtype=float)
    if w.ndim != 2 or w.shape[1] == 0:
        raise ValueError(f"wis must be (n_forecasts, n_models), got {w.shape}")
    if not power >= 0:
        raise ValueError(f"power must be >= 0, got {power}")
    rows = np.all(np.isfinite(w), axis=1)
    n = int(rows.sum())
    m = w.shape[1]
    if n < max(int(min_forecasts), 1):
        return np.full(m, 1.0 / m), n
    mean = w[rows].mean(axis=0)
    if np.any(mean <= 0):  # a perfect record: all the weight on the perfect members
        raw = (mean <= 0).astype(float)
    else:
        raw = mean ** (-float(power))
    return raw / raw.sum(), n
