"""Renewal-equation projection of daily incidence from samples of the current R.

Latent path ``mu_{T+h} = R_{T+h} * sum_s w_s I_{T+h-s}`` with random-walk drift on log R and
negative-binomial observation noise.  Estimation of R_t itself: :mod:`tallywave.models.renewal`.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from tallywave.models.renewal import _as_incidence, _check_q_levels, resolve_interval

__all__ = ["RenewalForecaster"]


class RenewalForecaster:
    """Project daily incidence with the renewal equation from samples of the current R.

    Latent path: mu_{T+h} = R_{T+h} * sum_s w_s I_{T+h-s}, with observed history for past days
    and earlier latent values mu for projected days; log R_{T+h} = log R_T + sum of h
    N(0, ``log_r_sd``^2) steps (``log_r_sd = 0``: R held fixed). Observations: negative binomial
    with mean mu and variance mu + mu^2 / ``dispersion`` (Poisson when ``dispersion`` is None).
    """

    def __init__(
        self,
        horizon: int = 28,
        log_r_sd: float = 0.0,
        dispersion: float | None = None,
        seed: int | None = None,
    ) -> None:
        self.horizon = horizon
        self.log_r_sd = log_r_sd
        self.dispersion = dispersion
        self.seed = seed

    def fit(self, incidence: Any, interval_pmf: Any, r_samples: Any) -> RenewalForecaster:
        """Store history (n_series, T) or draws (n_draws, n_series, T), the interval and R draws.

        ``r_samples`` is (n_draws, n_series) (e.g. :meth:`CoriEstimator.sample`); history draws
        and R draws are paired by index (either may have a single draw, which is broadcast).
        Only the last ``len(pmf) - 1`` days of history matter; missing earlier days count as 0.
        """
        if int(self.horizon) != self.horizon or self.horizon < 1:
            raise ValueError(f"horizon must be a positive integer, got {self.horizon}")
        if not self.log_r_sd >= 0.0:
            raise ValueError("log_r_sd must be >= 0")
        if self.dispersion is not None and not self.dispersion > 0.0:
            raise ValueError("dispersion must be > 0 (or None for Poisson)")
        w = resolve_interval(interval_pmf)
        hist = _as_incidence(incidence, 3, "incidence")
        r = np.asarray(r_samples, dtype=float)
        if r.ndim == 1:
            r = r[:, None]
        if r.ndim != 2 or r.shape[1] != hist.shape[1]:
            raise ValueError(
                f"r_samples must be (n_draws, n_series={hist.shape[1]}), got {np.shape(r_samples)}"
            )
        if np.any(~(r >= 0.0)):
            raise ValueError("r_samples must be non-negative and not NaN")
        if hist.shape[0] not in (1, r.shape[0]) and r.shape[0] != 1:
            raise ValueError(
                f"history has {hist.shape[0]} draws but r_samples has {r.shape[0]}; "
                "they must match or one must be 1"
            )
        lag = w.size - 1
        if hist.shape[-1] < lag:
            pad = np.zeros(hist.shape[:-1] + (lag - hist.shape[-1],))
            hist = np.concatenate([pad, hist], axis=-1)
        self.interval_ = w
        self.history_ = hist[..., hist.shape[-1] - lag :] if lag > 0 else hist[..., :0]
        self.r_samples_ = r
        self.n_draws_ = max(hist.shape[0], r.shape[0])
        self.samples_: np.ndarray | None = None
        return self

    def sample(self, seed: int | None = None) -> np.ndarray:
        """Simulate observed incidence for h = 1..horizon: (n_draws, n_series, horizon).

        Also sets ``expected_`` (latent means) and ``r_paths_`` (R per day), same shape.
        """
        if not hasattr(self, "history_"):
            raise RuntimeError("RenewalForecaster is not fitted; call fit() first")
        rng = np.random.default_rng(self.seed if seed is None else seed)
        h_max = int(self.horizon)
        n_draws = self.n_draws_
        n_series = self.r_samples_.shape[1]
        lag = self.interval_.size - 1
        buf = np.zeros((n_draws, n_series, lag + h_max))
        buf[..., :lag] = self.history_
        w_rev = self.interval_[1:][::-1]  # w_lag .. w_1, aligned with buf[t-lag .. t-1]
        log_r = np.log(np.broadcast_to(self.r_samples_, (n_draws, n_series)))
        if self.log_r_sd > 0.0:
            steps = rng.normal(0.0, self.log_r_sd, size=(n_draws, n_series, h_max))
            log_r = log_r[..., None] + np.cumsum(steps, axis=-1)
        else:
            log_r = np.broadcast_to(log_r[..., None], (n_draws, n_series, h_max))
        with np.errstate(divide="ignore"):
            r_path = np.exp(log_r)
        for h in range(h_max):  # the renewal recursion is sequential in time only
            t = lag + h
            buf[..., t] = r_path[..., h] * (buf[..., t - lag : t] @ w_rev)
        mu = buf[..., lag:]
        if self.dispersion is None or np.isinf(self.dispersion):
            obs = rng.poisson(mu).astype(float)
        else:
            k = float(self.dispersion)
            obs = rng.negative_binomial(k, k / (k + mu)).astype(float)
        self.expected_ = mu
        self.r_paths_ = np.array(r_path)
        self.samples_ = obs
        return obs

    def quantiles(self, q_levels: Sequence[float] | np.ndarray) -> np.ndarray:
        """Forecast quantiles (n_series, horizon, n_q) from the samples (drawn if needed).

        Non-negative, and monotone in q for increasing ``q_levels``.
        """
        q = _check_q_levels(q_levels)
        samples = getattr(self, "samples_", None)
        if samples is None:
            samples = self.sample()
        out = np.moveaxis(np.quantile(samples, q, axis=0), 0, -1)
        order = np.argsort(q)
        out[..., order] = np.maximum.accumulate(out[..., order], axis=-1)  # guard ties/round-off
        return np.maximum(out, 0.0)
