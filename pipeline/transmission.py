"""Stage 5 — transmission: nowcast-corrected counts → R_t by date of infection, growth rate.

Infections are back-calculated from each signal's cleaned, nowcast-completed counts through the
signal's infection-to-reference-date delay (setting ``infection_delay``), and R_t is estimated on
the infection dates with an over-dispersed renewal posterior, mixed over the nowcast's joint
draws and over candidate delays and generation intervals (:class:`~tallywave.models.infection_rt.
InfectionRt`).  ``out.rt`` and ``out.growth`` say so in ``date_basis`` (``'infection'``).  The
growth rate is the Wallinga–Lipsitch (2007) rate at the posterior median of R_t (averaged over
candidate intervals); doubling time is ln 2 / r (negative = halving time).

A weekly signal is handled in weeks: its series are weekly totals, the delay and the generation
interval are aggregated to week lags (events spread evenly over their week), the day-valued
windows (``rt_window_days``, ``rt_nowcast_days``, ``rt_history_days``) are rounded up to whole
weeks, and ``out.rt`` / ``out.growth`` rows sit on the week dates of the infection weeks (growth
stays a daily rate, doubling time in days).
"""

from __future__ import annotations

import datetime as dt
from typing import Any

import duckdb
import numpy as np
import pandas as pd

from tallywave.models.base import SeriesRandom, series_seeds
from tallywave.models.deconvolution import delay_stack
from tallywave.models.incidence import draws_from_quantiles, incidence_draws
from tallywave.models.infection_rt import InfectionRt
from tallywave.models.renewal import doubling_time, resolve_interval
from tallywave.pipeline.clean import cleaned_blocks
from tallywave.pipeline.errors import UserError
from tallywave.pipeline.frames import (
    BatchFailure,
    Mapper,
    SeriesBlock,
    batches,
    in_steps,
    serial_map,
)
from tallywave.pipeline.nowcast import nowcast_joint_draws, nowcast_quantiles
from tallywave.pipeline.settings import Settings
from tallywave.pipeline.vintages import signal_steps

RT_LEVELS = [0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975]
DATE_BASIS = "infection"  # the date R_t refers to (out.rt.date_basis)


def interval_pmfs(cfg: dict[str, Any]) -> list[np.ndarray]:
    """Generation-interval pmf(s) from the settings: one, or several candidates to mix."""
    gi = cfg["generation_interval"]
    if "candidates" in gi:
        return [resolve_interval((float(m), float(s))) for m, s in gi["candidates"]]
    return [resolve_interval(gi)]


def infection_delay(cfg: dict[str, Any], signal: str) -> dict[str, Any]:
    """The signal's infection-to-reference-date delay setting (its ``by_signal`` entry if any)."""
    spec = cfg["infection_delay"]
    by = spec.get("by_signal") or {}
    return dict(by.get(signal, {k: v for k, v in spec.items() if k != "by_signal"}))


def delay_pmfs(cfg: dict[str, Any], signal: str) -> np.ndarray:
    """The signal's delay pmf(s), (n_candidates, L+1); bad values are a one-line UserError."""
    try:
        return delay_stack(infection_delay(cfg, signal))
    except ValueError as exc:
        raise UserError(f"setting infection_delay for signal {signal!r}: {exc}") from exc


def nowcast_draws_for(con: duckdb.DuckDBPyConnection, run_id: str, signal: str,
                      block: SeriesBlock, n_draws: int, seed: int
                      ) -> tuple[np.ndarray, np.ndarray, int]:
    """Joint draws (m, n, t) of the eventual counts of the nowcast window, the reported counts
    (n, t) and the window's first column in ``block``.

    The nowcast stage's own joint draws when it ran on this connection; otherwise draws rebuilt
    from the published quantiles with days independent, one random stream per region.
    """
    rep, start = _reported(con, run_id, signal, block)
    dates = block.dates[start:start + rep.shape[1]]
    joint = _first_joint_draws(con, signal, block, dates, n_draws)
    if joint is None:
        levels, q, rep, start = nowcast_quantiles(con, run_id, signal, block)
        rnd = SeriesRandom(series_seeds(seed, signal, block.regions), len(block.regions))
        z = np.moveaxis(rnd.normal((n_draws, q.shape[1] + 1)), 0, 1)
        joint = draws_from_quantiles(levels, q, z)
        joint = np.where(np.isnan(q[..., 0])[None], np.nan, joint)
    return joint[:n_draws], rep, start


def _reported(con: duckdb.DuckDBPyConnection, run_id: str, signal: str, block: SeriesBlock
              ) -> tuple[np.ndarray, int]:
    """The reported counts of this run's nowcast window, (n, t) aligned to ``block.regions``
    (NaN where a region has none), and the window's first column in ``block``: the part of
    :func:`~tallywave.pipeline.nowcast.nowcast_quantiles` the joint draws need (one level's
    rows, not nine)."""
    con.register("_rt_regions", pd.DataFrame({"region": block.regions.astype(str),
                                              "r": np.arange(len(block.regions))}))
    try:
        got = con.execute(
            "SELECT g.r, n.ref_date, n.reported FROM out.nowcast n JOIN _rt_regions g "
            "USING (region) WHERE n.run_id = ? AND n.signal = ? AND n.q_level = 0.5",
            [run_id, signal]).fetchnumpy()
    finally:
        con.unregister("_rt_regions")
    n_reg = len(block.regions)
    if len(got["r"]) == 0:
        return np.zeros((n_reg, 0)), len(block.dates)
    ref = np.asarray(got["ref_date"]).astype("datetime64[D]")
    dates = np.unique(ref)
    rep = np.full((n_reg, len(dates)), np.nan)
    rep[np.asarray(got["r"], dtype=np.int64), np.searchsorted(dates, ref)] = \
        _floats(got["reported"])
    inside = dates >= block.dates[0]  # a series shorter than the window: only its own dates
    if not inside.any():
        return np.zeros((n_reg, 0)), len(block.dates)
    return rep[:, inside], int(np.searchsorted(block.dates, dates[inside][0]))


def _first_joint_draws(con: duckdb.DuckDBPyConnection, signal: str, block: SeriesBlock,
                       dates: np.ndarray, n_draws: int) -> np.ndarray | None:
    """The first ``n_draws`` of the nowcast's joint draws, (m, n, t) aligned to ``block`` and
    ``dates`` (NaN where a region has none); None when there are none for the signal.

    Same result as :func:`~tallywave.pipeline.nowcast.nowcast_joint_draws` followed by
    ``[:n_draws]``, but DuckDB keeps only the draws asked for and turns dates and regions into
    positions: at 3,000 regions the full read is most of the stage's time.
    """
    exists = con.execute("SELECT count(*) FROM duckdb_tables() WHERE temporary "
                         "AND table_name = 'nowcast_draws'").fetchall()[0][0]
    if not exists or len(dates) == 0 or n_draws < 1:
        return nowcast_joint_draws(con, signal, block, dates) if exists else None
    con.register("_rt_regions", pd.DataFrame({"region": block.regions.astype(str),
                                              "r": np.arange(len(block.regions))}))
    try:
        got = con.execute(
            "SELECT g.r, datediff('day', ?::DATE, n.ref_date) // ? AS t, n.draw, n.value "
            "FROM nowcast_draws n JOIN _rt_regions g USING (region) "
            "WHERE n.signal = ? AND n.draw < ? AND n.ref_date BETWEEN ?::DATE AND ?::DATE",
            [_day(dates[0]), int(block.step), signal, int(n_draws), _day(dates[0]),
             _day(dates[-1])]
        ).fetchnumpy()
    finally:
        con.unregister("_rt_regions")
    if len(got["r"]) == 0:
        return nowcast_joint_draws(con, signal, block, dates)
    draw = np.asarray(got["draw"], dtype=np.int64)
    out = np.full((int(draw.max()) + 1, len(block.regions), len(dates)), np.nan)
    out[draw, np.asarray(got["r"], dtype=np.int64), np.asarray(got["t"], dtype=np.int64)] = \
        _floats(got["value"])
    return out


def _floats(a: Any) -> np.ndarray:
    """A fetched numeric column as floats, NULL as NaN."""
    return np.ma.filled(np.ma.asarray(a, dtype=float), np.nan)


def _day(d: Any) -> dt.date:
    """A numpy day as a Python date (for DuckDB parameters)."""
    return np.asarray(d, dtype="datetime64[D]").astype(dt.date).item()


def rt_span(cfg: dict[str, Any]) -> int:
    """Days before a day that a renewal estimate on that day's own dates depends on (the window,
    then the interval) — the forecasts' R_t on reference dates."""
    return int(cfg["rt_window_days"]) + max(len(p) for p in interval_pmfs(cfg))


def history_days(settings: Settings) -> int:
    """Days of cleaned series (ending on as_of) every signal's published R_t depends on: the
    published days, the window and interval before them, the longest delay, a week to spare."""
    need = 0
    for signal in ["", *settings.per_signal, *_by_signal_names(settings)]:
        cfg = settings.for_signal(signal)
        need = max(need, int(cfg["rt_history_days"]) + rt_span(cfg)
                   + delay_pmfs(cfg, signal).shape[1] + 7, int(cfg["max_delay_days"]) + 1)
    return need


def _by_signal_names(settings: Settings) -> list[str]:
    """Signal names that have their own delay under ``infection_delay.by_signal``."""
    names: set[str] = set()
    for cfg in [settings.base, *settings.per_signal.values()]:
        names |= set((cfg.get("infection_delay") or {}).get("by_signal") or {})
    return sorted(names)


def estimator(cfg: dict[str, Any], step: int = 1) -> InfectionRt:
    """The R_t estimator configured from one signal's settings (``step`` 7: a weekly signal,
    its windows in whole weeks)."""
    mean, sd = float(cfg["rt_prior_mean"]), float(cfg["rt_prior_sd"])
    return InfectionRt(window=in_steps(int(cfg["rt_window_days"]), step),
                       align=str(cfg["rt_window_align"]),
                       prior_shape=(mean / sd) ** 2, prior_scale=sd ** 2 / mean,
                       min_infections=float(cfg["rt_min_infections"]),
                       iterations=int(cfg["rt_deconvolution_iterations"]),
                       recent_days=in_steps(int(cfg["rt_nowcast_days"]), step), step=step)


def _estimate_block(args: tuple) -> dict[str, Any]:
    """R_t by infection date, P(R > 1) and growth for one batch of regions (pure; in a task).

    The counts are the cleaned series with the nowcast window completed by the mean of the
    joint draws; each draw's change of that window is one mixture component.
    """
    values, eventual, rep, start, delays, cfg, t0, step = args
    values = np.nan_to_num(values)
    pmfs = interval_pmfs(cfg)
    draws = None
    if eventual.shape[0] and eventual.shape[2]:
        t = eventual.shape[2]
        draws = incidence_draws(values[:, start:start + t], eventual, rep, 0)
        values = values.copy()
        values[:, start:start + t] = draws.mean(axis=0)
    est = estimator(cfg, step).fit(values, delays, pmfs if len(pmfs) > 1 else pmfs[0],
                             draws=draws, draws_start=start)
    days = slice(t0, None)  # only the published days
    qs = est.quantiles(RT_LEVELS, days)
    growth = est.growth_rate(qs[..., RT_LEVELS.index(0.5)])
    return {"q": qs, "mean": est.mean_[:, days], "p": np.clip(est.prob_above(1.0, days), 0, 1),
            "growth": growth, "doubling": doubling_time(growth),
            "dependent": est.dependent_[days]}


def transmission(con: duckdb.DuckDBPyConnection, as_of: dt.date, settings: Settings, *,
                 run_id: str, mapper: Mapper = serial_map) -> dict[str, Any]:
    """Estimate R_t (by date of infection) and growth for every region × signal."""
    lines: list[str] = []
    skipped: list[str] = []
    n_rows = 0
    since = as_of - dt.timedelta(days=history_days(settings) - 1)
    adjusted = bool(settings.get("use_weekday_adjusted"))
    blocks = cleaned_blocks(con, run_id, adjusted=adjusted, since=since)
    weekly = sorted(set(signal_steps(con)) & set(blocks))
    if weekly:  # whole weeks, and four more for the published weeks rounded up and the lags
        blocks.update(cleaned_blocks(con, run_id, adjusted=adjusted, signals=weekly,
                                     since=since - dt.timedelta(days=28)))
    for signal, block in blocks.items():
        cfg = settings.for_signal(signal)
        delays = delay_pmfs(cfg, signal)
        eventual, rep, start = nowcast_draws_for(con, run_id, signal, block,
                                                 int(cfg["rt_draws"]), int(cfg["seed"]))
        parts = batches(len(block.regions), int(cfg["batch_regions"]))
        published = in_steps(int(cfg["rt_history_days"]), block.step)
        t0 = max(0, len(block.dates) - published)  # first published day (week)
        jobs = [(block.values[s], eventual[:, s], rep[s], start, delays, cfg, t0, block.step)
                for s in parts]
        results = mapper(_estimate_block, jobs)
        good: list[tuple[slice, dict[str, np.ndarray]]] = []
        for part, res in zip(parts, results, strict=True):
            if isinstance(res, BatchFailure):
                skipped.extend(f"{signal}/{r}: {res.message[:200]}" for r in block.regions[part])
            else:
                good.append((part, res))
        n_est = 0
        if good:
            keep = np.concatenate([np.arange(len(block.regions))[p] for p, _ in good])
            cut = {k: np.concatenate([r[k] for _, r in good]) for k in good[0][1]
                   if k != "dependent"}
            cut["dependent"] = good[0][1]["dependent"]
            n_est = int(np.isfinite(cut["mean"]).any(axis=1).sum())
            n_rows += _write(con, run_id, signal, block.regions[keep], block.dates[t0:], cut,
                             block.step)
        lines.append(f"{signal}: {n_est}/{len(block.regions)} regions estimable")
    out = {"line": "; ".join(lines) or "no signals", "rows": n_rows}
    if skipped:
        out["skipped"] = skipped
    return out


def _write(con: duckdb.DuckDBPyConnection, run_id: str, signal: str, regions: np.ndarray,
           dates: np.ndarray, res: dict[str, np.ndarray], step: int = 1) -> int:
    """Insert one signal's estimable cells into out.rt (long quantile form) and out.growth.

    Rows go in wide (one per region × day, one column per level) and DuckDB unnests the levels:
    building the long table in pandas costs several times more at 9 levels × millions of cells.
    """
    rr, tt = np.nonzero(np.isfinite(res["mean"]))
    if rr.size == 0:
        return 0
    wide = pd.DataFrame({"r": rr.astype(np.int32), "t": tt.astype(np.int32),
                         "mean": res["mean"][rr, tt], "dep": res["dependent"][tt],
                         "growth": res["growth"][rr, tt], "doubling": res["doubling"][rr, tt],
                         "p": res["p"][rr, tt]})
    qs = res["q"][rr, tt]
    for j in range(len(RT_LEVELS)):
        wide[f"q{j}"] = qs[:, j]
    names = pd.DataFrame({"r": np.arange(len(regions), dtype=np.int32),
                          "region": regions.astype(str)})
    levels = "[" + ", ".join(repr(float(x)) for x in RT_LEVELS) + "]"
    values = "[" + ", ".join(f"w.q{j}" for j in range(len(RT_LEVELS))) + "]"
    first = _day(dates[0])
    con.register("_rt_wide", wide)
    con.register("_rt_names", names)
    try:
        con.execute(
            "INSERT INTO out.rt (run_id, region, signal, ref_date, q_level, value, mean, "
            "nowcast_dependent, date_basis) "
            f"SELECT ?, g.region, ?, ?::DATE + w.t * ?, unnest({levels}), unnest({values}), "
            "w.mean, w.dep, ? FROM _rt_wide w JOIN _rt_names g USING (r)",
            [run_id, signal, first, int(step), DATE_BASIS])
        con.execute(
            "INSERT INTO out.growth (run_id, region, signal, ref_date, growth_rate, "
            "doubling_days, p_growing, rt_mean, nowcast_dependent, date_basis) "
            "SELECT ?, g.region, ?, ?::DATE + w.t * ?, w.growth, w.doubling, w.p, w.mean, w.dep, "
            "? FROM _rt_wide w JOIN _rt_names g USING (r)",
            [run_id, signal, first, int(step), DATE_BASIS])
    finally:
        con.unregister("_rt_wide")
        con.unregister("_rt_names")
    return int(rr.size) * len(RT_LEVELS)
