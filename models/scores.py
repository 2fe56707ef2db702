"""Scoring of quantile forecasts: pinball loss, WIS, coverage, PIT, bias, relative skill.

The numpy functions here are the reference implementation.  :func:`score_sql` returns the
DuckDB SQL that the pipeline runs on the long ``out.forecasts`` table; the tests check that
both give the same numbers.

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
"""

from __future__ import annotations

import re
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


def pit_bounds(y, q_levels, q_values, tails: str = "unknown") -> tuple[np.ndarray, np.ndarray]:
    """Range [F(y-), F(y)] of the predictive CDF at y implied by the quantiles, each (n,).

    Values are sorted per forecast; between given quantiles the quantile function is linear.
    Ties of y with quantile values give the range of tied levels.  Beyond the outermost levels
    tau_1, tau_k: ``tails="unknown"`` says only F(y) in [0, tau_1] (or [tau_k, 1]);
    ``tails="flat"`` puts that tail mass on the outermost quantile, so F(y) = 0 (or 1).
    If y equals the lowest (highest) quantile the range extends down to 0 (up to 1).
    """
    if tails not in ("unknown", "flat"):
        raise ValueError(f"tails must be 'unknown' or 'flat', not {tails!r}")
    y, levels, values = _inputs(y, q_levels, q_values)
    order = np.argsort(levels, kind="stable")
    lev = levels[order]
    val = np.sort(values[:, order], axis=1)  # monotone rearrangement
    n, k = val.shape
    yy = y[:, None]
    below = (val < yy).sum(axis=1)
    tied = (val == yy).sum(axis=1)
    rows = np.arange(n)

    # interior, no tie: y strictly between val[below-1] and val[below]
    i_lo = np.clip(below - 1, 0, k - 1)
    i_hi = np.clip(below, 0, k - 1)
    q_lo, q_hi = val[rows, i_lo], val[rows, i_hi]
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = (y - q_lo) / (q_hi - q_lo)
        interp = lev[i_lo] + (lev[i_hi] - lev[i_lo]) * frac

    # ties: tied levels are lev[below] .. lev[below + tied - 1]
    t_lo = np.where(below == 0, 0.0, lev[np.clip(below, 0, k - 1)])
    t_hi = np.where(below + tied == k, 1.0, lev[np.clip(below + tied - 1, 0, k - 1)])

    none_below = (tied == 0) & (below == 0)
    all_below = (tied == 0) & (below == k)
    if tails == "unknown":
        left = (0.0, lev[0])
        right = (lev[-1], 1.0)
    else:
        left = (0.0, 0.0)
        right = (1.0, 1.0)
    low = np.select([tied > 0, none_below, all_below], [t_lo, left[0], right[0]], interp)
    high = np.select([tied > 0, none_below, all_below], [t_hi, left[1], right[1]], interp)
    nan = ~np.isfinite(y) | ~np.isfinite(values).all(axis=1)
    low[nan] = np.nan
    high[nan] = np.nan
    return low, high


def pit_from_quantiles(
    y,
    q_levels,
    q_values,
    rng: np.random.Generator | int | None = None,
    *,
    u=None,
) -> np.ndarray:
    """Randomised PIT value F(y-) + U (F(y) - F(y-)) from the quantiles, shape (n,).

    Draws U ~ U(0, 1) from ``rng`` (a Generator or an int seed); or takes ``u`` as given; with
    neither, U = 1/2 (the mid-PIT).  Randomisation matters only on ties (e.g. a constant
    predictive) and beyond the outermost levels, where only the range is known (tails
    "unknown" in :func:`pit_bounds`); elsewhere the PIT is the interpolated F(y).
    """
    low, high = pit_bounds(y, q_levels, q_values, tails="unknown")
    if u is not None:
        uu = np.broadcast_to(np.asarray(u, dtype=float), low.shape)
    elif rng is not None:
        uu = np.random.default_rng(rng).uniform(size=low.shape)
    else:
        uu = np.full(low.shape, 0.5)
    return low + uu * (high - low)


def bias_from_quantiles(y, q_levels, q_values) -> np.ndarray:
    """Bias 1 - F(y-) - F(y) in [-1, 1]: +1 when every quantile exceeds y (overprediction).

    The integer-forecast bias of Funk et al. (2019, PLoS Comput Biol), 1 - (P(y) + P(y - 1))
    (from memory), evaluated on the quantile-interpolated CDF with flat tails (tail mass on
    the outermost quantiles, :func:`pit_bounds` with ``tails="flat"``); equals 1 - 2 F(y)
    where F is continuous at y.  The quantile adaptation is ours.
    """
    low, high = pit_bounds(y, q_levels, q_values, tails="flat")
    return 1.0 - low - high


# ----------------------------------------------------------------------------------------------
# relative skill
# ----------------------------------------------------------------------------------------------


def pairwise_relative_wis(
    df: pd.DataFrame,
    baseline: str = "baseline",
    by: Sequence[str] = ("signal", "horizon_days"),
) -> pd.DataFrame:
    """Relative WIS per model via pairwise comparison on common forecasts (Cramer et al. 2022).

    theta_ij = mean WIS of i / mean WIS of j over forecasts both made (same region, signal,
    issued_on, target_date, horizon_days); theta_i = geometric mean of theta_ij over all models
    j (theta_ii = 1) with at least one common forecast; rel_wis = theta_i / theta_baseline.
    Returns one row per (by..., model) with n_forecasts, mean_wis, n_compared, theta, rel_wis;
    rel_wis is NaN when the baseline is absent from a group.
    """
    by = list(by)
    need = ["model", *COMMON_FORECAST_KEY, "wis", *by]
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
        w[rcode, mcode] = g["wis"].to_numpy(dtype=float)
        avail[rcode, mcode] = 1.0
        # s[i, j] = total WIS of model i on forecasts that model j also made
        s = w.T @ avail
        common = (avail.T @ avail) > 0
        with np.errstate(divide="ignore", invalid="ignore"):
            log_theta = np.log(s) - np.log(s.T)  # mean ratio = sum ratio on common forecasts
        ok = common & ~np.isnan(log_theta)  # 0/0 (both perfect) is left out
        log_theta = np.where(ok, log_theta, 0.0)
        n_cmp = ok.sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            theta = np.exp(log_theta.sum(axis=1) / n_cmp)
        theta = np.where(n_cmp > 0, theta, np.nan)
        base = np.nonzero(models == baseline)[0]
        with np.errstate(invalid="ignore", divide="ignore"):
            rel = theta / theta[base[0]] if base.size else np.full(n_mod, np.nan)
        if base.size:
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


# ----------------------------------------------------------------------------------------------
# SQL
# ----------------------------------------------------------------------------------------------

_IDENT = re.compile(r'^(?:[A-Za-z_][A-Za-z0-9_]*|"[^"]+")(?:\.(?:[A-Za-z_][A-Za-z0-9_]*|"[^"]+"))*$')


def _check_ident(name: str, what: str) -> str:
    if not _IDENT.match(name):
        raise ValueError(f"{what} {name!r} is not a (qualified) table or column name")
    return name


def pit_uniform_sql(seed: int = 0, alias: str = "") -> str:
    """SQL expression for the per-forecast pseudo-uniform U in [0, 1] used by the SQL PIT.

    A hash of the forecast key and ``seed``: deterministic, independent of row order/threads.
    """
    p = f"{_check_ident(alias, 'alias')}." if alias else ""
    cols = ", ".join(f"{p}{c}" for c in FORECAST_KEY)
    return f"(hash({cols}, {int(seed)})::DOUBLE / 18446744073709551616.0)"


def score_sql(
    forecast_table: str = "out.forecasts",
    truth_table: str = "truth",
    *,
    randomise_pit: bool = True,
    pit_seed: int = 0,
    extra_truth_columns: Sequence[str] = (),
) -> str:
    """DuckDB SQL scoring every forecast in a long quantile table against a truth table.

    Input: ``forecast_table`` with FORECAST_KEY + (q_level, value); ``truth_table`` with
    (region, signal, target_date, truth, *extra_truth_columns), one row per key.  Output one
    row per forecast: truth, n_levels, levels_ok, wis, dispersion, overprediction,
    underprediction, abs_error, covered_50, covered_90, pit_low, pit_high, pit, bias — the
    same numbers as the numpy functions (``pit`` with U from :func:`pit_uniform_sql`, or 1/2
    when ``randomise_pit`` is false).  Rows with ``levels_ok = false`` (levels not the median
    plus symmetric pairs, or duplicated rows) must not be used.
    """
    ft = _check_ident(forecast_table, "forecast table")
    tt = _check_ident(truth_table, "truth table")
    extra = [_check_ident(c, "truth column") for c in extra_truth_columns]
    key = ", ".join(FORECAST_KEY)
    key_f = ", ".join(f"f.{c}" for c in FORECAST_KEY)
    extra_j = "".join(f", t.{c}" for c in extra)
    extra_a = "".join(f",\n        any_value({c}) AS {c}" for c in extra)
    extra_s = "".join(f", {c}" for c in extra)
    eps = repr(LEVEL_TOL)
    u = pit_uniform_sql(pit_seed) if randomise_pit else "0.5"
    return f"""
WITH j AS (
    SELECT {key_f},
           CAST(f.q_level AS DOUBLE) AS tau,
           CAST(f.value AS DOUBLE) AS q,
           CAST(t.truth AS DOUBLE) AS y{extra_j}
    FROM {ft} AS f
    JOIN {tt} AS t
      ON f.region = t.region AND f.signal = t.signal AND f.target_date = t.target_date
    WHERE isfinite(CAST(f.value AS DOUBLE)) AND isfinite(CAST(f.q_level AS DOUBLE))
      AND isfinite(CAST(t.truth AS DOUBLE))
),
a AS (
    SELECT {key},
        any_value(y) AS truth{extra_a},
        count(*) AS n_levels,
        -- WIS = 2 * mean pinball loss over the 2K + 1 quantiles (Bracher et al. 2021)
        2 * avg((CASE WHEN y < q THEN 1.0 ELSE 0.0 END - tau) * (q - y)) AS wis,
        2 * avg(CASE WHEN tau < 0.5 - {eps} THEN -tau * q
                     WHEN tau > 0.5 + {eps} THEN (1 - tau) * q
                     ELSE 0.0 END) AS dispersion,
        2 * avg(CASE WHEN tau < 0.5 - {eps} THEN greatest(q - y, 0.0)
                     WHEN tau > 0.5 + {eps} THEN 0.0
                     ELSE 0.5 * greatest(q - y, 0.0) END) AS overprediction,
        2 * avg(CASE WHEN tau > 0.5 + {eps} THEN greatest(y - q, 0.0)
                     WHEN tau < 0.5 - {eps} THEN 0.0
                     ELSE 0.5 * greatest(y - q, 0.0) END) AS underprediction,
        max(q) FILTER (WHERE abs(tau - 0.5) <= {eps}) AS q50,
        max(q) FILTER (WHERE abs(tau - 0.25) <= {eps}) AS q25,
        max(q) FILTER (WHERE abs(tau - 0.75) <= {eps}) AS q75,
        max(q) FILTER (WHERE abs(tau - 0.05) <= {eps}) AS q05,
        max(q) FILTER (WHERE abs(tau - 0.95) <= {eps}) AS q95,
        count(*) FILTER (WHERE q < y) AS n_below,
        count(*) FILTER (WHERE q = y) AS n_tied,
        max(q) FILTER (WHERE q < y) AS q_below,
        min(q) FILTER (WHERE q > y) AS q_above,
        list_sort(list(tau)) AS taus
    FROM j
    GROUP BY {key}
),
p AS (
    SELECT *,
        -- levels = median + symmetric pairs: sorted levels strictly increasing, inside (0, 1),
        -- odd in number and taus[i] + taus[n + 1 - i] = 1 (so the middle one is 0.5)
        (n_levels % 2 = 1 AND taus[1] > 0 AND taus[n_levels] < 1
         AND coalesce(list_bool_and([taus[i + 1] - taus[i] > {eps}
                                     for i in range(1, n_levels)]), true)
         AND list_bool_and([abs(taus[i] + taus[n_levels + 1 - i] - 1) <= {eps}
                            for i in range(1, n_levels + 1)])) AS levels_ok,
        CASE WHEN n_tied > 0 THEN (CASE WHEN n_below = 0 THEN 0.0 ELSE taus[n_below + 1] END)
             WHEN n_below = 0 THEN 0.0
             WHEN n_below = n_levels THEN taus[n_levels]
             ELSE taus[n_below] + (taus[n_below + 1] - taus[n_below])
                  * (truth - q_below) / (q_above - q_below)
        END AS pit_low,
        CASE WHEN n_tied > 0 THEN (CASE WHEN n_below + n_tied = n_levels THEN 1.0
                                        ELSE taus[n_below + n_tied] END)
             WHEN n_below = 0 THEN taus[1]
             WHEN n_below = n_levels THEN 1.0
             ELSE taus[n_below] + (taus[n_below + 1] - taus[n_below])
                  * (truth - q_below) / (q_above - q_below)
        END AS pit_high
    FROM a
)
SELECT {key}, truth{extra_s}, n_levels, levels_ok,
    wis, dispersion, overprediction, underprediction,
    abs(q50 - truth) AS abs_error,
    (q25 <= truth AND truth <= q75) AS covered_50,
    (q05 <= truth AND truth <= q95) AS covered_90,
    pit_low, pit_high,
    pit_low + {u} * (pit_high - pit_low) AS pit,
    CASE WHEN n_tied = 0 AND n_below = 0 THEN 1.0
         WHEN n_tied = 0 AND n_below = n_levels THEN -1.0
         ELSE 1.0 - pit_low - pit_high END AS bias
FROM p
"""
