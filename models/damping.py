"""Damped trend for projections beyond the data: how fast today's R_t returns toward 1.

Both projections (:mod:`tallywave.models.renewal_forecast`, :mod:`tallywave.models.compartmental`)
let today's log R_t relax toward its neutral level with a half-life (damped trend, Gardner &
McKenzie 1985): on day h the departure is multiplied by ``phi**h``, ``phi = 0.5**(1/half_life)``.
No series shows in advance how long its current growth or decline will last, so a single
half-life is a guess that is too short in a sustained wave and too long after a peak.  With a
``spread`` the half-life differs between forecast draws, log-uniform over ``spread`` doublings
either side of the setting (spread 2 around 7 days: 1.75 to 28 days), so the forecast is a
mixture over persistence and its long-horizon intervals widen in the direction the series is
moving; the median half-life stays the setting.
"""

from __future__ import annotations

import numpy as np

__all__ = ["damping_ratios"]


def damping_ratios(half_life: float, spread: float, u: np.ndarray) -> np.ndarray:
    """Daily damping ratios ``0.5 ** (1 / L)`` with ``L = half_life * 2 ** (spread * (2u - 1))``
    for uniform draws ``u`` (any shape): log-uniform half-lives, ``spread`` doublings either side
    (0 = the half-life itself)."""
    if not half_life > 0.0:
        raise ValueError(f"half_life must be > 0, got {half_life}")
    if not spread >= 0.0:
        raise ValueError(f"spread must be >= 0, got {spread}")
    life = float(half_life) * 2.0 ** (float(spread) * (2.0 * np.asarray(u, dtype=float) - 1.0))
    return 0.5 ** (1.0 / life)
