"""Gamma distributions discretised to whole days — the one place the project does it.

Two discretisations, for two different questions:

* :func:`gamma_delay_pmf` — a **delay** (infection → report, onset → death, …) measured in whole
  days: ``pmf[d] = P(d <= X < d + 1)`` for ``X ~ Gamma(mean, sd)``, on ``d = 0..max_days``,
  truncated and renormalised.  Used by the compartmental model's observation kernels and by the
  outbreak simulator.
* :func:`discretise_gamma_interval` — a **generation / serial interval** for the renewal equation,
  which needs ``w[0] = 0`` and the exact mean: Cori et al. (2013, Web Appendix 11).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import special, stats

__all__ = ["discretise_gamma_interval", "gamma_delay_pmf"]


def gamma_delay_pmf(mean: float, sd: float, max_days: int | None = None,
                    tail: float = 1e-3) -> np.ndarray:
    """Gamma delay in whole days: ``pmf[d] = P(d <= X < d+1)``, d = 0..max_days, renormalised.

    ``max_days`` defaults to the ceiling of the ``1 - tail`` quantile, so less than ``tail`` of
    the mass is cut before renormalising.
    """
    if not (mean > 0 and sd > 0 and math.isfinite(mean) and math.isfinite(sd)):
        raise ValueError(f"delay mean and sd must be positive and finite, got {mean}, {sd}")
    shape = (mean / sd) ** 2
    scale = sd**2 / mean
    if max_days is None:
        max_days = math.ceil(stats.gamma.ppf(1.0 - tail, shape, scale=scale))
    max_days = max(int(max_days), 0)
    cdf = stats.gamma.cdf(np.arange(max_days + 2, dtype=float), shape, scale=scale)
    pmf = np.diff(cdf)
    total = pmf.sum()
    if not total > 0:
        pmf = np.zeros(max_days + 1)
        pmf[min(round(mean), max_days)] = 1.0
        return pmf
    return pmf / total


def discretise_gamma_interval(
    mean: float, sd: float, max_days: int | None = None, tail_prob: float = 1e-3
) -> np.ndarray:
    """Discretise a one-day-shifted gamma interval into a daily pmf w[0..max_days], w[0] = 0.

    Cori et al. (2013, Web Appendix 11): the interval is 1 + X with X ~ Gamma (mean ``mean - 1``,
    sd ``sd``). With infection times spread uniformly within their days, the day difference k
    has probability ``w_k = E[max(0, 1 - |k - (1 + X)|)]`` (triangular kernel), which in terms
    of the gamma CDFs F_a (shape a, scale b) and F_{a+1} is, with j = k - 1 and F(x < 0) = 0,

        w_k = (j+1) F_a(j+1) - 2 j F_a(j) + (j-1) F_a(j-1)
              + a b [2 F_{a+1}(j) - F_{a+1}(j-1) - F_{a+1}(j+1)].

    Because the triangular weights interpolate linearly, the untruncated pmf has mean exactly
    ``mean`` and variance ``sd**2`` plus at most 1/4 (about 1/6 for smooth densities). The pmf is
    truncated at day ``max_days`` (default: ceil of the ``1 - tail_prob`` quantile of 1 + X) and
    renormalised to sum to 1.
    """
    mean = float(mean)
    sd = float(sd)
    if not np.isfinite(mean) or not np.isfinite(sd) or mean <= 1.0 or sd <= 0.0:
        raise ValueError(
            f"interval needs finite mean > 1 day and sd > 0 (got mean={mean}, sd={sd}); "
            "the Cori discretisation shifts the gamma by one day"
        )
    shape = ((mean - 1.0) / sd) ** 2
    scale = sd**2 / (mean - 1.0)
    if max_days is None:
        if not 0.0 < tail_prob < 1.0:
            raise ValueError(f"tail_prob must lie in (0, 1), got {tail_prob}")
        max_days = int(np.ceil(1.0 + stats.gamma.ppf(1.0 - tail_prob, shape, scale=scale)))
    max_days = int(max_days)
    if max_days < 1:
        raise ValueError(f"max_days must be >= 1, got {max_days}")
    j = np.arange(0, max_days + 1, dtype=float) - 1.0  # j = k - 1 for k = 0..max_days

    def cdf(a: float, x: np.ndarray) -> np.ndarray:
        return np.where(x > 0.0, special.gammainc(a, np.maximum(x, 0.0) / scale), 0.0)

    w = (
        (j + 1.0) * cdf(shape, j + 1.0)
        - 2.0 * j * cdf(shape, j)
        + (j - 1.0) * cdf(shape, j - 1.0)
        + shape
        * scale
        * (2.0 * cdf(shape + 1.0, j) - cdf(shape + 1.0, j - 1.0) - cdf(shape + 1.0, j + 1.0))
    )
    w = np.maximum(w, 0.0)  # cancellation can leave -1e-17 in the far tail
    w[0] = 0.0
    total = w.sum()
    if total <= 0.0:
        raise ValueError(f"max_days={max_days} leaves no interval mass")
    return w / total
