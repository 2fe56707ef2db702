"""Bottom-up reconciliation of quantile forecasts over a region hierarchy.

A parent region's series is the sum of its leaf regions' series, so its forecast can be built
from theirs (bottom-up reconciliation; probabilistic form as in Ben Taieb, Taylor & Hyndman
2021, JASA, where leaf forecasts are joined by a copula — cited from memory).  Here the joining
is done on the quantiles, with one documented dependence assumption: the leaves' forecast
errors have the same pairwise correlation ``rho``.

At every quantile level tau the leaves' deviations from their medians,
``d_i(tau) = q_i(tau) - m_i``, are combined as the deviations of correlated normal variables::

    q_sum(tau) = sum_i m_i + sign(T) * sqrt(rho * T**2 + (1 - rho) * S),
    T = sum_i d_i(tau),  S = sum_i d_i(tau)**2.

* For normal leaves N(m_i, s_i^2) with pairwise correlation rho this is exact: d_i = z s_i,
  and rho T^2 + (1 - rho) S = z^2 (sum_i s_i^2 + rho sum_{i != j} s_i s_j) = z^2 Var(sum).
* With rho = 1 it is exact for **any** leaves: q_sum = sum_i q_i(tau), the quantile of a
  comonotone sum (the widest the sum can be at that level; Dhaene et al. 2002, from memory).
* With rho = 0 (independent leaves) it is the normal approximation of the sum's spread, applied
  on each side of the median separately, so skewed leaves keep a skewed sum.

The median of the sum is always the sum of the leaves' medians (so the parent's point forecast
is exactly the sum of its children's medians), every quantile lies between the sum of medians
and the comonotone sum (so quantiles are >= 0 when the leaves' are), and quantiles stay
monotone in tau (all d_i(tau) share the sign of tau - 1/2 and grow with |tau - 1/2|).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np


def median_index(levels: Sequence[float] | np.ndarray) -> int:
    """Position of the 0.5 level in a quantile grid (ValueError if it is missing)."""
    lv = np.asarray(levels, dtype=float)
    hit = np.flatnonzero(np.abs(lv - 0.5) < 1e-9)
    if hit.size != 1:
        raise ValueError("the quantile levels must include the median (0.5) once")
    return int(hit[0])


def bottom_up_quantiles(leaf_q: np.ndarray, levels: Sequence[float] | np.ndarray,
                        rho: float) -> np.ndarray:
    """Quantiles of the sum of ``n`` leaves from theirs: ``leaf_q`` (n, ..., k) at ``levels``
    (k, sorted, including 0.5) → (..., k).  ``rho`` in [0, 1]: the leaves' pairwise error
    correlation (module notes).  NaN if any leaf value is NaN."""
    q = np.asarray(leaf_q, dtype=float)
    if q.ndim < 2 or q.shape[-1] != len(levels):
        raise ValueError(f"leaf_q must be (n_leaves, ..., {len(levels)}), got {q.shape}")
    if not 0.0 <= float(rho) <= 1.0:
        raise ValueError(f"rho must lie in [0, 1], got {rho}")
    mid = median_index(levels)
    m = q[..., mid:mid + 1]
    d = q - m
    total = d.sum(axis=0)
    square = (d * d).sum(axis=0)
    spread = np.sqrt(np.maximum(float(rho) * total * total + (1.0 - float(rho)) * square, 0.0))
    out = m.sum(axis=0) + np.sign(total) * spread
    return np.maximum.accumulate(out, axis=-1) if out.shape[-1] > 1 else out


def bottom_up_matrix(q: np.ndarray, members: list[np.ndarray], levels: Sequence[float],
                     rho: float) -> np.ndarray:
    """Bottom-up quantiles of several parents at once: ``q`` (n_regions, H, k), ``members[p]``
    the row positions of parent p's leaves → (n_parents, H, k)."""
    h, k = q.shape[1], q.shape[2]
    out = np.full((len(members), h, k), np.nan)
    for p, rows in enumerate(members):
        if len(rows):
            out[p] = bottom_up_quantiles(q[np.asarray(rows)], levels, rho)
    return out
