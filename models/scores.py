"""Scoring of quantile forecasts: pinball loss, WIS (natural and log scale), coverage, PIT,
bias, relative skill — numpy mathematics only.

These functions are the reference implementation; the pipeline runs the same definitions as
DuckDB SQL (:mod:`tallywave.pipeline.scores_sql`) and the tests check that both agree.

Conventions (shared by numpy and SQL):

* Quantile levels of one forecast must be the median 0.5 plus symmetric pairs
  ``(alpha/2, 1 - alpha/2)``; levels are compared with an absolute tolerance ``LEVEL_TOL``.
* Pinball loss ``rho_tau(y, q) = (1{y < q} - tau) * (q - y)``.  Bracher et al. (2021) write the
  quantile score as twice this, so ``WIS = 2 * mean(pinball over all 2K + 1 quantiles)``.
* Intervals are closed: ``l <= y <= u`` counts as covered.
* PIT and bias read the observation's position on the predictive CDF implied by the
  quantiles.  Quantile values are first sorted within each forecast (monotone rearrangement,
  so crossing quantiles are handled consistently).  Between two given quantiles the quantile
  function is linear.
* Counts (``discrete=True``): a count y has the PIT range [F(y - 1), F(y)] of a discrete
  predictive (the randomised PIT of Czado, Gneiting & Held 2009 draws uniformly in it).  From
  quantiles alone F at whole numbers is read off the interpolated CDF half-way between them:
  F(y) ~ H(y + 1/2), F(y - 1) ~ H(y - 1/2) (a continuity correction: H is then the CDF of the
  count spread uniformly over [y - 1/2, y + 1/2]), and counts are non-negative, so H(-1/2) = 0.
  For a perfect Poisson forecast this makes the PIT nearly uniform and the coverage nearly
  nominal, where closed intervals at integer quantiles over-cover (Poisson(2): 0.72 / 0.98 for
  50 % / 90 %).  Non-integer observations are scored as continuous.
* Coverage of a central interval, tie-corrected: the share of the PIT range inside
  [alpha/2, 1 - alpha/2] (the non-randomised coverage, expectation of the randomised one).
* WIS on the log scale: WIS of log(y + 1) against log(q + 1) (Bosse et al. 2023), which scores
  relative rather than absolute errors; negative values count as 0.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import NamedTuple

import numpy as np
import pandas as pd

LEVEL_TOL = 1e-9
"""Absolute tolerance when matching quantile levels (0.025 vs 1 - 0.975, etc.)."""

FORECAST_KEY: tuple[str, ...] = (
    "issued_on", "model", "region", "signal", "target_date", "horizon_days",
)
"""Columns that identify one forecast (one predictive distribution)."""

COMMON_FORECAST_KEY: tuple[str, ...] = (
    "region", "signal", "issued_on", "target_date", "horizon_days",
)
"""Columns on which two models' forecasts are matched in :func:`pairwise_relative_wis`."""


# ----------------------------------------------------------------------------------------------
# input handling
# ----------------------------------------------------------------------------------------------


def _inputs(y, q_levels, q_values) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Return y (n,), levels (k,), values (n, k) as float arrays, checking shapes."""
    y = np.atleast_1d(np.asarray(y, dtype=float))
    levels = np.atleast_1d(np.asarray(q_levels, dtype=float))
    values = np.asarray(q_values, dtype=float)
    if values.ndim == 1:
        values = values[None, :]
    if y.ndim != 1 or levels.ndim != 1 or values.ndim != 2:
        raise ValueError("expected y of shape (n,), q_levels (k,), q_values (n, k)")
    if values.shape != (y.size, levels.size):
        raise ValueError(
            f"q_values has shape {values.shape}; expected ({y.size}, {levels.size}) "
            "from y and q_levels"
        )
    return y, levels, values


class CentralIntervals(NamedTuple):
    """Column indices of the median and of each central interval's bounds, with its alpha."""

    median: int
    lower: np.ndarray
    upper: np.ndarray
    alpha: np.ndarray


def central_intervals(q_levels: Sequence[float] | np.ndarray) -> CentralIntervals:
    """Pair quantile levels into the median and central intervals; ValueError names a bad level.

    Levels must lie in (0, 1), be distinct, include 0.5 and come in pairs tau, 1 - tau.
    """
    levels = np.atleast_1d(np.asarray(q_levels, dtype=float))
    if levels.ndim != 1 or levels.size == 0:
        raise ValueError("q_levels must be a non-empty 1-D sequence")
    for tau in levels:
        if not (np.isfinite(tau) and 0.0 < tau < 1.0):
            raise ValueError(f"quantile level {tau!r} is outside (0, 1)")
    order = np.argsort(levels, kind="stable")
    srt = levels[order]
    dup = np.nonzero(np.diff(srt) <= LEVEL_TOL)[0]
    if dup.size:
        raise ValueError(f"quantile level {srt[dup[0]]!r} appears more than once")
    is_median = np.abs(levels - 0.5) <= LEVEL_TOL
    if not is_median.any():
        raise ValueError("quantile levels lack the median 0.5")
    median = int(np.nonzero(is_median)[0][0])
    lower = [int(i) for i in order if levels[i] < 0.5 - LEVEL_TOL]
    upper: list[int] = []
    for i in lower:
        partner = np.nonzero(np.abs(levels - (1.0 - levels[i])) <= LEVEL_TOL)[0]
        if partner.size == 0:
            raise ValueError(
                f"quantile level {levels[i]!r} has no symmetric partner {1.0 - levels[i]:.12g}"
            )
        upper.append(int(partner[0]))
    paired = set(lower) | set(upper) | {median}
    for i in order:
        if int(i) not in paired:
            raise ValueError(
                f"quantile level {levels[i]!r} has no symmetric partner {1.0 - levels[i]:.12g}"
            )
    lower_idx = np.asarray(lower, dtype=int)
    return CentralIntervals(
        median=median,
        lower=lower_idx,
        upper=np.asarray(upper, dtype=int),
        alpha=2.0 * levels[lower_idx],
    )


# ----------------------------------------------------------------------------------------------
# proper scores
# ----------------------------------------------------------------------------------------------


def quantile_score(y, q_levels, q_values) -> np.ndarray:
    """Pinball loss (1{y < q} - tau)(q - y) for every forecast and level, shape (n, k).

    Bracher et al. (2021) define the quantile score as twice this quantity.
    """
    y, levels, values = _inputs(y, q_levels, q_values)
    diff = values - y[:, None]
    return ((y[:, None] < values).astype(float) - levels[None, :]) * diff


class WISParts(NamedTuple):
    """Weighted interval score and its additive parts (each shape (n,))."""

    wis: np.ndarray
    dispersion: np.ndarray
    overprediction: np.ndarray
    underprediction: np.ndarray


def weighted_interval_score(y, q_levels, q_values) -> WISParts:
    """Weighted interval score from the median and central intervals (Bracher et al. 2021).

    WIS = (w0 |y - m| + sum_k w_k IS_alpha_k) / (K + 1/2), w0 = 1/2, w_k = alpha_k / 2, with
    IS_alpha = (u - l) + (2/alpha)(l - y)+ + (2/alpha)(y - u)+.  Parts: dispersion = weighted
    widths; overprediction = terms where y falls below the median or an interval (incl. the
    median term when m > y); underprediction = likewise above.  Parts sum to ``wis``.
    """
    y, levels, values = _inputs(y, q_levels, q_values)
    ci = central_intervals(levels)
    k = ci.alpha.size
    m = values[:, ci.median]
    lo = values[:, ci.lower]
    up = values[:, ci.upper]
    w = ci.alpha / 2.0
    yy = y[:, None]
    norm = k + 0.5
    dispersion = (w * (up - lo)).sum(axis=1) / norm
    # w_k * 2/alpha_k = 1, so the penalty terms carry weight one.
    over = (0.5 * np.maximum(m - y, 0.0) + np.maximum(lo - yy, 0.0).sum(axis=1)) / norm
    under = (0.5 * np.maximum(y - m, 0.0) + np.maximum(yy - up, 0.0).sum(axis=1)) / norm
    return WISParts(dispersion + over + under, dispersion, over, under)


def interval_coverage(y, q_levels, q_values, width: float) -> np.ndarray:
    """Whether y lies in the closed central interval of the given width (e.g. 0.5, 0.9).

    Uses the quantiles at levels (1 - width)/2 and (1 + width)/2 as given (no sorting).
    """
    y, levels, values = _inputs(y, q_levels, q_values)
    if not 0.0 < width < 1.0:
        raise ValueError(f"interval width {width!r} is outside (0, 1)")
    cols = []
    for tau in ((1.0 - width) / 2.0, (1.0 + width) / 2.0):
        hit = np.nonzero(np.abs(levels - tau) <= LEVEL_TOL)[0]
        if hit.size == 0:
            raise ValueError(
                f"central {width:g} interval needs quantile level {tau:.12g}, not in q_levels"
            )
        cols.append(int(hit[0]))
    return (values[:, cols[0]] <= y) & (y <= values[:, cols[1]])


# ----------------------------------------------------------------------------------------------
# PIT and bias
# ----------------------------------------------------------------------------------------------

COUNT_LOWER = -0.5
"""Where the interpolated CDF of a count reaches 0 (continuity correction: counts >= 0)."""


def _sorted(q_levels, q_values) -> tuple[np.ndarray, np.ndarray]:
    levels = np.atleast_1d(np.asarray(q_levels, dtype=float))
    values = np.asarray(q_values, dtype=float)
    if values.ndim == 1:
        values = values[None, :]
    order = np.argsort(levels, kind="stable")
    return levels[order], np.sort(values[:, order], axis=1)  # monotone rearrangement


def cdf_bounds(x, q_levels, q_values, tails: str = "unknown", lower: float | None = None
               ) -> tuple[np.ndarray, np.ndarray]:
    """Range [H(x-), H(x)] of the predictive CDF interpolated from the quantiles, at one x per
    forecast, each (n,).

    Between quantiles H is linear; at a value shared by several levels (a tie) the range spans
    the tied levels.  Below the lowest level tau_1: ``tails="unknown"`` gives [0, tau_1] (and a
    tie at the lowest value extends down to 0), ``"flat"`` gives 0; with a ``lower`` support bound
    H is instead linear from (lower, 0) to (q_1, tau_1) and 0 below it.  Above the highest level:
    [tau_K, 1] (``"unknown"``) or 1 (``"flat"``).
    """
    if tails not in ("unknown", "flat"):
        raise ValueError(f"tails must be 'unknown' or 'flat', not {tails!r}")
    lev, val = _sorted(q_levels, q_values)
    x = np.atleast_1d(np.asarray(x, dtype=float))
    n, k = val.shape
    xx = x[:, None]
    below = (val < xx).sum(axis=1)
    tied = (val == xx).sum(axis=1)
    rows = np.arange(n)
    i_lo = np.clip(below - 1, 0, k - 1)
    i_hi = np.clip(below, 0, k - 1)
    q_lo, q_hi = val[rows, i_lo], val[rows, i_hi]
    with np.errstate(invalid="ignore", divide="ignore"):
        interp = lev[i_lo] + (lev[i_hi] - lev[i_lo]) * (x - q_lo) / (q_hi - q_lo)
    qmin = val[:, 0]
    supported = np.zeros(n, dtype=bool) if lower is None else qmin > lower
    first_low = np.where(supported, lev[0], 0.0)  # H(q_1-) with a support bound, else 0
    t_lo = np.where(below == 0, first_low, lev[np.clip(below, 0, k - 1)])
    t_hi = np.where(below + tied == k, 1.0, lev[np.clip(below + tied - 1, 0, k - 1)])
    none_below = (tied == 0) & (below == 0)
    all_below = (tied == 0) & (below == k)
    if lower is not None:
        with np.errstate(invalid="ignore", divide="ignore"):
            ramp = np.where(supported & (x >= lower), lev[0] * (x - lower) / (qmin - lower), 0.0)
        left_lo = left_hi = ramp
    elif tails == "unknown":
        left_lo, left_hi = np.zeros(n), np.full(n, lev[0])
    else:
        left_lo = left_hi = np.zeros(n)
    right = (lev[-1], 1.0) if tails == "unknown" else (1.0, 1.0)
    low = np.select([tied > 0, none_below, all_below], [t_lo, left_lo, right[0]], interp)
    high = np.select([tied > 0, none_below, all_below], [t_hi, left_hi, right[1]], interp)
    bad = ~np.isfinite(x) | ~np.isfinite(val).all(axis=1)
    low[bad] = np.nan
    high[bad] = np.nan
    return low, high


def pit_bounds(y, q_levels, q_values, tails: str = "unknown", *, discrete: bool = False,
               lower: float | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Range [F(y-), F(y)] of the predictive CDF at y implied by the quantiles, each (n,).

    Values are sorted per forecast; between given quantiles the quantile function is linear.
    Ties of y with quantile values give the range of tied levels.  Beyond the outermost levels
    tau_1, tau_k: ``tails="unknown"`` says only F(y) in [0, tau_1] (or [tau_k, 1]);
    ``tails="flat"`` puts that tail mass on the outermost quantile, so F(y) = 0 (or 1).
    If y equals the lowest (highest) quantile the range extends down to 0 (up to 1).
    ``discrete``: a whole-number y is a count with range [H(y - 1/2), H(y + 1/2)] (see the
    module notes; ``lower`` defaults to :data:`COUNT_LOWER` then).
    """
    y, levels, values = _inputs(y, q_levels, q_values)
    if not discrete:
        return cdf_bounds(y, levels, values, tails, lower)
    low_bound = COUNT_LOWER if lower is None else lower
    count = np.isfinite(y) & (y == np.round(y))
    lo_c, _ = cdf_bounds(y - 0.5, levels, values, tails, low_bound)
    _, hi_c = cdf_bounds(y + 0.5, levels, values, tails, low_bound)
    lo_x, hi_x = cdf_bounds(y, levels, values, tails, low_bound)
    return np.where(count, lo_c, lo_x), np.where(count, hi_c, hi_x)


def pit_from_quantiles(
    y,
    q_levels,
    q_values,
    rng: np.random.Generator | int | None = None,
    *,
    u=None,
    discrete: bool = False,
) -> np.ndarray:
    """Randomised PIT value F(y-) + U (F(y) - F(y-)) from the quantiles, shape (n,).

    Draws U ~ U(0, 1) from ``rng`` (a Generator or an int seed); or takes ``u`` as given; with
    neither, U = 1/2 (the mid-PIT).  Randomisation matters on ties (e.g. a constant predictive),
    beyond the outermost levels, where only the range is known (tails "unknown" in
    :func:`pit_bounds`), and for counts (``discrete``: the range [F(y - 1), F(y)]).
    """
    low, high = pit_bounds(y, q_levels, q_values, tails="unknown", discrete=discrete)
    if u is not None:
        uu = np.broadcast_to(np.asarray(u, dtype=float), low.shape)
    elif rng is not None:
        uu = np.random.default_rng(rng).uniform(size=low.shape)
    else:
        uu = np.full(low.shape, 0.5)
    return low + uu * (high - low)


def randomised_pit(cdf_before, cdf_at, u) -> np.ndarray:
    """Randomised PIT of a discrete predictive with known CDF: F(y - 1) + U (F(y) - F(y - 1))
    (Czado, Gneiting & Held 2009); uniform when the forecast is the truth's distribution."""
    lo = np.asarray(cdf_before, dtype=float)
    return lo + np.asarray(u, dtype=float) * (np.asarray(cdf_at, dtype=float) - lo)


def pit_histogram(low, high, bins: int = 10) -> np.ndarray:
    """Non-randomised PIT histogram (Czado, Gneiting & Held 2009): the mean over forecasts of
    the uniform distribution on each PIT range [low, high], as bin probabilities (sum 1).
    Flat (1/bins each) for calibrated forecasts; no random numbers involved."""
    lo = np.asarray(low, dtype=float).ravel()
    hi = np.asarray(high, dtype=float).ravel()
    ok = np.isfinite(lo) & np.isfinite(hi)
    lo, hi = lo[ok], hi[ok]
    edges = np.linspace(0.0, 1.0, bins + 1)
    width = hi - lo
    point = width <= 0
    over = np.clip(np.minimum(edges[1:][None, :], hi[:, None])
                   - np.maximum(edges[:-1][None, :], lo[:, None]), 0.0, None)
    share = np.where(point[:, None], 0.0, over / np.where(point, 1.0, width)[:, None])
    idx = np.clip((lo[point] * bins).astype(int), 0, bins - 1)
    share[np.flatnonzero(point), idx] = 1.0
    return share.mean(axis=0) if len(lo) else np.full(bins, np.nan)


def coverage_fraction(low, high, width: float) -> np.ndarray:
    """Tie-corrected coverage of the central ``width`` interval: the share of each PIT range
    [low, high] inside [alpha/2, 1 - alpha/2] (a point range counts 1 inside, closed).  Its mean
    is the nominal width for calibrated forecasts, also for counts with tied quantiles."""
    if not 0.0 < width < 1.0:
        raise ValueError(f"interval width {width!r} is outside (0, 1)")
    a = (1.0 - width) / 2.0
    lo = np.asarray(low, dtype=float)
    hi = np.asarray(high, dtype=float)
    span = hi - lo
    with np.errstate(invalid="ignore", divide="ignore"):
        inside = np.clip(np.minimum(hi, 1.0 - a) - np.maximum(lo, a), 0.0, None) / span
    point = ((lo >= a) & (lo <= 1.0 - a)).astype(float)
    out = np.where(span > 0, inside, point)
    return np.where(np.isfinite(lo) & np.isfinite(hi), out, np.nan)


def bias_from_quantiles(y, q_levels, q_values, *, discrete: bool = False) -> np.ndarray:
    """Bias 1 - F(y-) - F(y) in [-1, 1]: +1 when every quantile exceeds y (overprediction).

    The integer-forecast bias of Funk et al. (2019, PLoS Comput Biol), 1 - (P(y) + P(y - 1))
    (from memory), evaluated on the quantile-interpolated CDF with flat tails (tail mass on
    the outermost quantiles, :func:`pit_bounds` with ``tails="flat"``); equals 1 - 2 F(y)
    where F is continuous at y.  The quantile adaptation is ours; ``discrete`` reads F(y - 1)
    and F(y) for counts as in :func:`pit_bounds`.
    """
    low, high = pit_bounds(y, q_levels, q_values, tails="flat", discrete=discrete)
    return 1.0 - low - high


def log_wis(y, q_levels, q_values) -> np.ndarray:
    """WIS on the log scale: of log(y + 1) against log(q + 1), negatives counted as 0
    (Bosse et al. 2023, scoring epidemiological forecasts on transformed scales)."""
    y, levels, values = _inputs(y, q_levels, q_values)
    return weighted_interval_score(np.log1p(np.maximum(y, 0.0)), levels,
                                   np.log1p(np.maximum(values, 0.0))).wis


# ----------------------------------------------------------------------------------------------
# relative skill
# ----------------------------------------------------------------------------------------------


def pairwise_relative_wis(
    df: pd.DataFrame,
    baseline: str = "baseline",
    by: Sequence[str] = ("signal", "horizon_days"),
    column: str = "wis",
) -> pd.DataFrame:
    """Relative WIS per model via pairwise comparison on common forecasts (Cramer et al. 2022).

    theta_ij = mean WIS of i / mean WIS of j over forecasts both made (same region, signal,
    issued_on, target_date, horizon_days), used when both means are > 0; theta_i = geometric
    mean of theta_ij over those j (including j = i, theta_ii = 1); rel_wis = theta_i /
    theta_baseline (exactly 1 for the baseline).  The ``out.accuracy`` view computes the same
    numbers in SQL (:mod:`tallywave.pipeline.accuracy`; a test checks they agree).
    ``column``: the score compared (``wis`` or ``wis_log``).  Returns one row per (by...,
    model) with n_forecasts, mean_wis, n_compared, theta, rel_wis; rel_wis is NaN when the
    baseline is absent from a group or has no comparison.
    """
    by = list(by)
    need = ["model", *COMMON_FORECAST_KEY, column, *by]
    missing = [c for c in dict.fromkeys(need) if c not in df.columns]
    if missing:
        raise ValueError(f"pairwise_relative_wis: missing column(s) {missing}")
    key = list(dict.fromkeys([*by, *COMMON_FORECAST_KEY]))
    dup = df.duplicated([*key, "model"])
    if dup.any():
        row = df.loc[dup].iloc[0]
        raise ValueError(
            "pairwise_relative_wis: more than one WIS for model "
            f"{row['model']!r} on forecast {tuple(row[key])}"
        )
    out = []
    groups = df.groupby(by, sort=True, dropna=False) if by else [((), df)]
    for gkey, g in groups:
        gkey = gkey if isinstance(gkey, tuple) else (gkey,)
        mcode, models = pd.factorize(g["model"], sort=True)
        rcode = g.groupby(key, sort=False, dropna=False).ngroup().to_numpy()
        n_rows, n_mod = int(rcode.max()) + 1, len(models)
        w = np.zeros((n_rows, n_mod))
        avail = np.zeros((n_rows, n_mod))
        w[rcode, mcode] = g[column].to_numpy(dtype=float)
        avail[rcode, mcode] = 1.0
        # s[i, j] = total WIS of model i on forecasts that model j also made
        s = w.T @ avail
        common = (avail.T @ avail) > 0
        ok = common & (s > 0) & (s.T > 0)  # both means positive (0 / 0 and x / 0 left out)
        with np.errstate(divide="ignore", invalid="ignore"):
            log_theta = np.where(ok, np.log(np.where(ok, s, 1.0)) - np.log(np.where(ok, s.T,
                                                                                      1.0)), 0.0)
        n_cmp = ok.sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            theta = np.exp(log_theta.sum(axis=1) / n_cmp)
        theta = np.where(n_cmp > 0, theta, np.nan)
        base = np.nonzero(models == baseline)[0]
        with np.errstate(invalid="ignore", divide="ignore"):
            rel = theta / theta[base[0]] if base.size else np.full(n_mod, np.nan)
        if base.size and np.isfinite(theta[base[0]]):
            rel[base[0]] = 1.0
        n_fc = avail.sum(axis=0)
        res = pd.DataFrame({
            "model": np.asarray(models),
            "n_forecasts": n_fc.astype(int),
            "mean_wis": w.sum(axis=0) / n_fc,
            "n_compared": n_cmp,
            "theta": theta,
            "rel_wis": rel,
        })
        for name, value in zip(by, gkey, strict=True):
            res[name] = value
        out.append(res)
    cols = [*by, "model", "n_forecasts", "mean_wis", "n_compared", "theta", "rel_wis"]
    if not out:
        return pd.DataFrame(columns=cols)
    return pd.concat(out, ignore_index=True)[cols]
