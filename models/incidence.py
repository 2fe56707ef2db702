"""Nowcast-corrected incidence: apply a nowcast of eventual counts to a cleaned series.

The nowcast stage estimates the *eventual* count of each recent reference date; the later stages
want the cleaned series with its recent days completed.  :func:`complete_counts` does that for one
value (scale the cleaned value by eventual / reported, or add the expected unreported part when
nothing was reported yet), :func:`incidence_draws` for joint draws of the whole nowcast window, and
:func:`median_corrected` for the point estimate.  :func:`quantile_draws` turns stored quantiles
back into draws when joint draws are not available.
"""

from __future__ import annotations

import numpy as np
from scipy import special


def quantile_draws(levels: np.ndarray, q: np.ndarray, u: np.ndarray) -> np.ndarray:
    """Evaluate per-cell quantile functions (linear between levels, flat tails) at ``u``.

    q: (n, t, k) non-decreasing in k; u: (m, n, t) in (0, 1) → (m, n, t).
    """
    k = len(levels)
    idx = np.clip(np.searchsorted(levels, u) - 1, 0, k - 2)
    lo_l, hi_l = levels[idx], levels[idx + 1]
    w = np.clip((u - lo_l) / (hi_l - lo_l), 0.0, 1.0)
    flat = np.ascontiguousarray(q).reshape(-1)
    pos = (np.arange(q.shape[0] * q.shape[1]) * k).reshape(q.shape[:2])[None] + idx
    lo, hi = flat[pos], flat[pos + 1]
    return lo + w * (hi - lo)


def draws_from_quantiles(levels: np.ndarray, q: np.ndarray, u_normal: np.ndarray,
                         day_correlation: float = 0.0) -> np.ndarray:
    """Draws (m, n, t) of eventual counts from stored quantiles (n, t, k), for when the nowcast's
    joint draws are not available.  ``u_normal`` holds standard normal draws (m, n, t + 1): the
    last column is the part shared by all days of a draw, weighted by ``day_correlation``."""
    rho = float(day_correlation)
    z = np.sqrt(rho) * u_normal[..., -1:] + np.sqrt(1.0 - rho) * u_normal[..., :-1]
    return quantile_draws(levels, np.nan_to_num(q), special.ndtr(z))


def complete_counts(base: np.ndarray, eventual: np.ndarray, reported: np.ndarray) -> np.ndarray:
    """Apply a nowcast to cleaned values: scale by eventual / reported where something was
    reported, else add the expected unreported part; never negative."""
    rep = np.nan_to_num(reported)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(rep > 0, base * eventual / np.where(rep > 0, rep, 1.0),
                       base + np.maximum(eventual - rep, 0.0))
    return np.maximum(np.nan_to_num(out), 0.0)


def incidence_draws(values: np.ndarray, eventual: np.ndarray, reported: np.ndarray,
                    start: int) -> np.ndarray:
    """Draws (m, n, T) of the corrected series: the cleaned ``values`` (n, T) with the nowcast
    window (columns ``start``..``start + t``) completed by each joint draw ``eventual`` (m, n, t).
    Cells whose eventual draw is NaN (no nowcast) keep the cleaned value."""
    m = eventual.shape[0]
    out = np.broadcast_to(values, (m, *values.shape)).copy()
    t = eventual.shape[2]
    if t == 0 or m == 0:
        return out
    base = values[:, start:start + t]
    scaled = complete_counts(base[None], np.nan_to_num(eventual), reported[None])
    scaled = np.where(np.isnan(eventual), base[None], scaled)
    out[:, :, start:start + t] = scaled
    return out


def median_corrected(values: np.ndarray, levels: np.ndarray, q: np.ndarray, reported: np.ndarray,
                     start: int) -> np.ndarray:
    """The corrected series (n, T) at the nowcast median (the forecasters' point estimate)."""
    out = values.copy()
    t = q.shape[1]
    if t == 0:
        return out
    med = q[..., int(np.argmin(np.abs(levels - 0.5)))]
    base = values[:, start:start + t]
    out[:, start:start + t] = np.where(np.isnan(med), base, complete_counts(base, med, reported))
    return out
