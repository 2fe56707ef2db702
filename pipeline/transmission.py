"""Stage 5 — transmission: nowcast-corrected incidence → ``out.rt`` and ``out.growth``.

R_t is estimated with the renewal-equation method of Cori et al. (2013) over many draws of the
recent incidence taken from this run's nowcast, and the posteriors are mixed, so the last days'
intervals widen with the nowcast's uncertainty.  The growth rate comes from R_t through the
Wallinga–Lipsitch (2007) relation for the discretised generation interval; doubling time is
ln 2 / r (negative = halving time).  Mathematics: :mod:`tallywave.models.renewal`.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

import duckdb
import numpy as np
import pandas as pd

from tallywave.models.base import SeriesRandom, series_seeds
from tallywave.models.incidence import draws_from_quantiles, incidence_draws
from tallywave.models.renewal import (
    CoriEstimator,
    doubling_time,
    growth_rate_from_r,
    resolve_interval,
)
from tallywave.pipeline.clean import cleaned_blocks
from tallywave.pipeline.frames import BatchFailure, Mapper, SeriesBlock, batches, serial_map
from tallywave.pipeline.nowcast import nowcast_joint_draws, nowcast_quantiles
from tallywave.pipeline.settings import Settings
from tallywave.pipeline.store import insert_df

RT_LEVELS = [0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975]
RT_DRAWS = 100  # incidence draws whose posteriors are mixed


def interval_pmfs(cfg: dict[str, Any]) -> list[np.ndarray]:
    """Generation-interval pmf(s) from the settings: one, or several candidates to mix."""
    gi = cfg["generation_interval"]
    if "candidates" in gi:
        return [resolve_interval((float(m), float(s))) for m, s in gi["candidates"]]
    return [resolve_interval(gi)]


def nowcast_draws_for(con: duckdb.DuckDBPyConnection, run_id: str, signal: str,
                     block: SeriesBlock, n_draws: int, seed: int
                     ) -> tuple[np.ndarray, np.ndarray, int]:
    """Joint draws (m, n, t) of the eventual counts of the nowcast window, the reported counts
    (n, t) and the window's first column in ``block``.

    The nowcast stage's own joint draws when it ran on this connection; otherwise draws rebuilt
    from the published quantiles with days independent, one random stream per region.
    """
    levels, q, rep, start = nowcast_quantiles(con, run_id, signal, block)
    dates = block.dates[start:start + q.shape[1]]
    joint = nowcast_joint_draws(con, signal, block, dates)
    if joint is None:
        rnd = SeriesRandom(series_seeds(seed, signal, block.regions), len(block.regions))
        z = np.moveaxis(rnd.normal((n_draws, q.shape[1] + 1)), 0, 1)
        joint = draws_from_quantiles(levels, q, z)
        joint = np.where(np.isnan(q[..., 0])[None], np.nan, joint)
    return joint[:n_draws], rep, start


def rt_span(cfg: dict[str, Any]) -> int:
    """Days before a published day that its R_t depends on: the window, then the interval."""
    return int(cfg["rt_window_days"]) + max(len(p) for p in interval_pmfs(cfg))


def history_cut(t0: int, start: int, cfg: dict[str, Any]) -> int:
    """First day of the series the estimates of days ``t0``.. depend on (0 = the whole series).

    R_t at day t uses the incidence of its window and, through Lambda, the interval's span
    before it, so older days cannot change a published value: dropping them gives the same
    numbers for a fraction of the work (series are years long, ``rt_history_days`` is months).
    The nowcast window (from ``start``) is always kept.
    """
    return max(0, min(t0 - rt_span(cfg), start))


def history_days(settings: Settings) -> int:
    """Days of cleaned series (ending on as_of) that every signal's published R_t depends on."""
    need = 0
    for signal in ["", *settings.per_signal]:
        cfg = settings.for_signal(signal)
        need = max(need, int(cfg["rt_history_days"]) + rt_span(cfg),
                   int(cfg["max_delay_days"]) + 1)
    return need


def _posteriors(est: CoriEstimator, draws: np.ndarray, interval: Any
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Quantiles, P(R > 1) and mean of the (mixture) posterior of every day of ``draws``."""
    est.fit_draws(draws, interval)
    # a mixture of posteriors can round to 1 + 1e-16: keep the probability in [0, 1]
    return est.quantiles(RT_LEVELS), np.clip(est.prob_above(1.0), 0.0, 1.0), est.mean_


def _estimate_block(args: tuple) -> dict[str, Any]:
    """Rt, P(R>1) and growth for one batch of regions (pure; runs inside a task).

    The incidence draws differ only from the nowcast window (column ``start``) on, so days
    before it have the same posterior in every draw: they are estimated once from the cleaned
    series, and the mixture over draws is fitted only on the days from ``start`` (with the
    history their windows and intervals reach back to).  Same numbers, less work.
    """
    values, eventual, rep, start, cfg = args
    pmfs = interval_pmfs(cfg)
    interval = pmfs if len(pmfs) > 1 else pmfs[0]
    mean, sd = float(cfg["rt_prior_mean"]), float(cfg["rt_prior_sd"])
    est = CoriEstimator(window=int(cfg["rt_window_days"]), prior_shape=(mean / sd) ** 2,
                        prior_scale=sd ** 2 / mean, min_infections=float(cfg["rt_min_infections"]))
    values = np.nan_to_num(values)
    n, n_days = values.shape
    start = min(max(int(start), 0), n_days)
    qs = np.full((n, n_days, len(RT_LEVELS)), np.nan)
    p_grow = np.full((n, n_days), np.nan)
    r_mean = np.full((n, n_days), np.nan)
    if start > 0:  # before the nowcast window: one posterior per day
        sl = slice(0, start)
        qs[:, sl], p_grow[:, sl], r_mean[:, sl] = _posteriors(est, values[None, :, sl], interval)
    if start < n_days:  # the nowcast window: the mixture over incidence draws
        draws = incidence_draws(values, eventual, rep, start)
        c = max(0, start - rt_span(cfg))
        got = _posteriors(est, draws[..., c:], interval)
        sl = slice(start, n_days)
        qs[:, sl], p_grow[:, sl], r_mean[:, sl] = (a[:, start - c:] for a in got)
    growth = growth_rate_from_r(r_mean, pmfs[0])
    return {"q": qs, "mean": r_mean, "p": p_grow, "growth": growth,
            "doubling": doubling_time(growth)}


def transmission(con: duckdb.DuckDBPyConnection, as_of: dt.date, settings: Settings, *,
                 run_id: str, mapper: Mapper = serial_map) -> dict[str, Any]:
    """Estimate R_t and growth for every region × signal with enough counts."""
    lines: list[str] = []
    skipped: list[str] = []
    n_rows = 0
    since = as_of - dt.timedelta(days=history_days(settings) - 1)
    blocks = cleaned_blocks(con, run_id, adjusted=bool(settings.get("use_weekday_adjusted")),
                            since=since)
    for signal, block in blocks.items():
        cfg = settings.for_signal(signal)
        eventual, rep, start = nowcast_draws_for(con, run_id, signal, block, RT_DRAWS,
                                                 int(cfg["seed"]))
        parts = batches(len(block.regions), int(cfg["batch_regions"]))
        keep_days = int(cfg["rt_history_days"])
        t0 = max(0, len(block.dates) - keep_days)
        dates = block.dates[t0:]
        cut = history_cut(t0, start, cfg)
        jobs = [(block.values[s, cut:], eventual[:, s], rep[s], start - cut, cfg)
                for s in parts]
        results = mapper(_estimate_block, jobs)
        t0 -= cut  # column of the first published day in the (shortened) results
        n_nc = int(cfg["rt_nowcast_days"])
        window = int(cfg["rt_window_days"])
        # a day depends on the nowcast when its window reaches into the last n_nc days
        dependent = dates > (np.datetime64(as_of, "D") - np.timedelta64(n_nc + window - 1, "D"))
        n_est = 0
        for part, res in zip(parts, results, strict=True):
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
