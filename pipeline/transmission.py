"""Stage 5 — transmission: nowcast-corrected incidence → ``out.rt`` and ``out.growth``.

R_t is estimated with the renewal-equation method of Cori et al. (2013) over many draws of the
recent incidence taken from this run's nowcast, and the posteriors are mixed, so the last days'
intervals widen with the nowcast's uncertainty.  The growth rate comes from R_t through the
Wallinga–Lipsitch (2007) relation for the discretised generation interval; doubling time is
ln 2 / r (negative = halving time).  Mathematics: :mod:`models.renewal`.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

import duckdb
import numpy as np
import pandas as pd
from scipy import stats

from models.renewal import CoriEstimator, doubling_time, growth_rate_from_r, resolve_interval
from pipeline.clean import cleaned_blocks
from pipeline.frames import BatchFailure, Mapper, SeriesBlock, batches, serial_map
from pipeline.settings import Settings
from pipeline.store import insert_df

RT_LEVELS = [0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975]
#: Correlation of the nowcast draws across the reference dates of one draw: part of a nowcast's
#: error is shared by all recent days (the delay distribution), part is day-specific noise.
NOWCAST_DAY_CORRELATION = 0.5
RT_DRAWS = 100  # incidence draws whose posteriors are mixed


def interval_pmfs(cfg: dict[str, Any]) -> list[np.ndarray]:
    """Generation-interval pmf(s) from the settings: one, or several candidates to mix."""
    gi = cfg["generation_interval"]
    if "candidates" in gi:
        return [resolve_interval((float(m), float(s))) for m, s in gi["candidates"]]
    return [resolve_interval(gi)]


def nowcast_quantiles(con: duckdb.DuckDBPyConnection, run_id: str, signal: str,
                      block: SeriesBlock) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """This run's nowcast as arrays aligned to ``block``: levels (k,), quantiles (n, D1, k),
    reported (n, D1) and the column where the nowcast window starts in the block."""
    df = con.execute("SELECT region, ref_date, q_level, value, reported FROM out.nowcast "
                     "WHERE run_id = ? AND signal = ? ORDER BY region, ref_date, q_level",
                     [run_id, signal]).df()
    if df.empty:
        return np.array([0.5]), np.zeros((len(block.regions), 0, 1)), \
            np.zeros((len(block.regions), 0)), len(block.dates)
    levels = np.sort(df["q_level"].unique())
    dates = np.sort(df["ref_date"].unique()).astype("datetime64[D]")
    k, t = len(levels), len(dates)
    pos = {r: i for i, r in enumerate(block.regions)}
    q = np.full((len(block.regions), t, k), np.nan)
    rep = np.full((len(block.regions), t), np.nan)
    r_idx = df["region"].map(pos).to_numpy()
    ok = ~pd.isna(r_idx)
    t_idx = np.searchsorted(dates, df["ref_date"].to_numpy().astype("datetime64[D]"))
    l_idx = np.searchsorted(levels, df["q_level"].to_numpy())
    r_i = r_idx[ok].astype(int)
    q[r_i, t_idx[ok], l_idx[ok]] = df["value"].to_numpy()[ok]
    rep[r_i, t_idx[ok]] = df["reported"].to_numpy()[ok]
    start = int(np.searchsorted(block.dates, dates[0]))
    return levels, q, rep, start


def _quantile_draws(levels: np.ndarray, q: np.ndarray, u: np.ndarray) -> np.ndarray:
    """Evaluate per-cell quantile functions (linear between levels, flat tails) at u.

    q: (n, t, k) increasing in k; u: (m, n, t) in (0, 1) → (m, n, t).
    """
    k = len(levels)
    idx = np.clip(np.searchsorted(levels, u) - 1, 0, k - 2)
    lo_l, hi_l = levels[idx], levels[idx + 1]
    w = np.clip((u - lo_l) / (hi_l - lo_l), 0.0, 1.0)
    qb = np.broadcast_to(q[None], (u.shape[0],) + q.shape)
    lo = np.take_along_axis(qb, idx[..., None], axis=-1)[..., 0]
    hi = np.take_along_axis(qb, (idx + 1)[..., None], axis=-1)[..., 0]
    return lo + w * (hi - lo)


def incidence_draws(values: np.ndarray, levels: np.ndarray, q: np.ndarray, reported: np.ndarray,
                    start: int, n_draws: int, rng: np.random.Generator) -> np.ndarray:
    """Draws (n_draws, n, T) of the corrected incidence: cleaned values, with the nowcast window
    scaled by the nowcast's completion factor (eventual / reported) at correlated quantiles."""
    m = int(n_draws)
    out = np.broadcast_to(values, (m,) + values.shape).copy()
    t = q.shape[1]
    if t == 0:
        return out
    n = values.shape[0]
    z = (np.sqrt(NOWCAST_DAY_CORRELATION) * rng.standard_normal((m, n, 1))
         + np.sqrt(1 - NOWCAST_DAY_CORRELATION) * rng.standard_normal((m, n, t)))
    u = stats.norm.cdf(z)
    eventual = _quantile_draws(levels, np.nan_to_num(q), u)
    base = values[:, start:start + t]
    scaled = _complete(base[None], eventual, reported[None])
    scaled = np.where(np.isnan(q[..., 0])[None], base[None], scaled)
    out[:, :, start:start + t] = scaled
    return out


def _complete(base: np.ndarray, eventual: np.ndarray, reported: np.ndarray) -> np.ndarray:
    """Apply the nowcast to a cleaned value: scale by eventual / reported where something was
    reported, else add the expected unreported part; never negative."""
    rep = np.nan_to_num(reported)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(rep > 0, base * eventual / np.where(rep > 0, rep, 1.0),
                       base + np.maximum(eventual - rep, 0.0))
    return np.maximum(np.nan_to_num(out), 0.0)


def median_corrected(values: np.ndarray, levels: np.ndarray, q: np.ndarray, reported: np.ndarray,
                     start: int) -> np.ndarray:
    """The corrected series at the nowcast median (point estimate used by the forecasters)."""
    out = values.copy()
    t = q.shape[1]
    if t == 0:
        return out
    med = q[..., int(np.argmin(np.abs(levels - 0.5)))]
    base = values[:, start:start + t]
    out[:, start:start + t] = np.where(np.isnan(med), base, _complete(base, med, reported))
    return out


def _estimate_block(args: tuple) -> dict[str, Any]:
    """Rt, P(R>1) and growth for one batch of regions (pure; runs inside a task)."""
    values, levels, q, rep, start, cfg, seed = args
    rng = np.random.default_rng(seed)
    pmfs = interval_pmfs(cfg)
    mean, sd = float(cfg["rt_prior_mean"]), float(cfg["rt_prior_sd"])
    est = CoriEstimator(window=int(cfg["rt_window_days"]), prior_shape=(mean / sd) ** 2,
                        prior_scale=sd ** 2 / mean, min_infections=float(cfg["rt_min_infections"]))
    values = np.nan_to_num(values)
    draws = incidence_draws(values, levels, q, rep, start, RT_DRAWS, rng)
    est.fit_draws(draws, pmfs if len(pmfs) > 1 else pmfs[0])
    qs = est.quantiles(RT_LEVELS)
    # a mixture of posteriors can round to 1 + 1e-16: keep the probability in [0, 1]
    p_grow = np.clip(est.prob_above(1.0), 0.0, 1.0)
    r_mean = est.mean_
    growth = growth_rate_from_r(r_mean, pmfs[0])
    return {"q": qs, "mean": r_mean, "p": p_grow, "growth": growth,
            "doubling": doubling_time(growth)}


def transmission(con: duckdb.DuckDBPyConnection, as_of: dt.date, settings: Settings, *,
                 run_id: str, mapper: Mapper = serial_map) -> dict[str, Any]:
    """Estimate R_t and growth for every region × signal with enough counts."""
    lines, n_rows, skipped = [], 0, []
    blocks = cleaned_blocks(con, run_id, adjusted=bool(settings.get("use_weekday_adjusted")))
    for signal, block in blocks.items():
        cfg = settings.for_signal(signal)
        levels, q, rep, start = nowcast_quantiles(con, run_id, signal, block)
        parts = batches(len(block.regions), int(cfg["batch_regions"]))
        jobs = [(block.values[s], levels, q[s], rep[s], start, cfg, int(cfg["seed"]) + i)
                for i, s in enumerate(parts)]
        results = mapper(_estimate_block, jobs)
        keep_days = int(cfg["rt_history_days"])
        t0 = max(0, len(block.dates) - keep_days)
        dates = block.dates[t0:]
        n_nc = int(cfg["rt_nowcast_days"])
        window = int(cfg["rt_window_days"])
        # a day depends on the nowcast when its window reaches into the last n_nc days
        dependent = dates > (np.datetime64(as_of, "D") - np.timedelta64(n_nc + window - 1, "D"))
        n_est = 0
        for part, res in zip(parts, results):
            regions = block.regions[part]
            if isinstance(res, BatchFailure):
                skipped.extend(f"{signal}/{r}: {res.message[:200]}" for r in regions)
                continue
            qs, mean = res["q"][:, t0:], res["mean"][:, t0:]
            ok = np.isfinite(mean)
            n_est += int(ok.any(axis=1).sum())
            k = qs.shape[2]
            rr, tt = np.nonzero(ok)
            rt = pd.DataFrame({
                "run_id": run_id, "region": np.repeat(regions[rr], k), "signal": signal,
                "ref_date": np.repeat(dates[tt], k), "q_level": np.tile(RT_LEVELS, len(rr)),
                "value": qs[rr, tt].reshape(-1), "mean": np.repeat(mean[rr, tt], k),
                "nowcast_dependent": np.repeat(dependent[tt], k)})
            n_rows += insert_df(con, "out.rt", rt)
            insert_df(con, "out.growth", pd.DataFrame({
                "run_id": run_id, "region": regions[rr], "signal": signal,
                "ref_date": dates[tt], "growth_rate": res["growth"][:, t0:][rr, tt],
                "doubling_days": res["doubling"][:, t0:][rr, tt],
                "p_growing": res["p"][:, t0:][rr, tt], "rt_mean": mean[rr, tt],
                "nowcast_dependent": dependent[tt]}))
        lines.append(f"{signal}: {n_est}/{len(block.regions)} regions estimable")
    out = {"line": "; ".join(lines) or "no signals", "rows": n_rows}
    if skipped:
        out["skipped"] = skipped
    return out
