"""Stage 4 — nowcast: vintages → reporting triangle → delay model → eventual counts with intervals.

Reads ``core.observations`` (only vintages with ``as_of <= as_of``) and writes ``out.delay_pmf``,
``out.delay_drift``, ``out.delay_model`` (per region × signal: which delay model, today's and
earlier mean delay, tail, back-test), ``out.delay_signal`` (per signal: weekday test, holidays,
tail, settle horizon), ``out.nowcast`` and one ``out.fits`` row per region × signal (model
``nowcast``).  Mathematics: :mod:`tallywave.models.delay`.

Per signal, computed once over all its regions before batching (so ``batch_regions`` never
changes a result): closed report days (listed holidays and detected closures), the report-weekday
test, the geometric tail of the "≥ D" bin, the pooled delay fits (without and with drift, now and
``nowcast_backtest_days`` earlier) and the signal's own back-test.  Per region (in batches): the
back-test of both candidates — each region keeps the drifting-delay model when it would have
nowcast the last days better by ``nowcast_drift_margin`` log-score units — then the fit and the
predictive draws, from one random stream per region (``series_seeds``).
"""

from __future__ import annotations

import datetime as dt
import json
from dataclasses import dataclass
from typing import Any

import duckdb
import numpy as np
import pandas as pd

from tallywave.models.base import series_seeds
from tallywave.models.delay import (
    ChainLadder,
    DelayGLM,
    DelayNowcaster,
    PooledDelay,
    aggregate_triangle,
    backtest_arrivals,
    backtest_drift,
    closed_report_days,
    estimate_tail_shape,
    fit_tail,
    mean_delay_by_week,
    weekday_lr_test,
)
from tallywave.pipeline.frames import (
    BatchFailure,
    Mapper,
    SeriesBlock,
    batches,
    in_steps,
    serial_map,
)
from tallywave.pipeline.settings import Settings
from tallywave.pipeline.store import insert_df
from tallywave.pipeline.vintages import signal_steps, vintages_as_of

NOWCAST_LEVELS = [0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975]
#: Weekday effects are kept for a signal when the quasi-likelihood ratio test rejects "no
#: weekday effect" at this level (a strict level: the effects cost 6 parameters per region).
WEEKDAY_TEST_LEVEL = 0.001
#: How far back (days) the report compares a region's mean delay with today's.
DRIFT_LOOKBACK_DAYS = 28
#: Settle horizon written per signal: this quantile of the pooled delay distribution.
SETTLE_QUANTILE = 0.99

#: Joint predictive draws of the eventual counts of the nowcast window, handed to the R_t and
#: forecast stages of the same run (a connection-scoped temporary table: large, and only
#: meaningful inside the run; ``out.nowcast`` holds the published quantiles).
DRAWS_DDL = ("CREATE OR REPLACE TEMP TABLE nowcast_draws (region VARCHAR, signal VARCHAR, "
             "ref_date DATE, draw INTEGER, value DOUBLE)")


@dataclass
class Triangle:
    """Reporting triangle of one signal: ``cells[s, t, d]`` = events of ref date t reported at
    delay d (NaN where not observable on as_of or before the first snapshot); with ``tail`` the
    last column holds every report at delay >= D known on as_of (the "≥ D" bin)."""

    signal: str
    regions: np.ndarray
    dates: np.ndarray  # (n_ref,) datetime64[D]
    cells: np.ndarray  # (n_regions, n_ref, D+1)
    latest: np.ndarray  # (n_regions, n_ref) value known on as_of (all delays, incl. > D)
    tail: bool = False
    step: int = 1  # days between two rows (and two delays): 7 for a weekly signal

    def take(self, idx: Any) -> Triangle:
        """The triangle of a subset of regions."""
        return Triangle(self.signal, self.regions[idx], self.dates, self.cells[idx],
                        self.latest[idx], self.tail, self.step)

    def aligned(self, regions: np.ndarray) -> Triangle:
        """The same triangle with rows for ``regions`` (NaN cells, 0 reported where absent)."""
        pos = {r: i for i, r in enumerate(self.regions)}
        idx = np.array([pos.get(r, -1) for r in regions], dtype=np.int64)
        cells = np.full((len(regions),) + self.cells.shape[1:], np.nan)
        latest = np.zeros((len(regions), self.latest.shape[1]))
        ok = idx >= 0
        cells[ok] = self.cells[idx[ok]]
        latest[ok] = self.latest[idx[ok]]
        return Triangle(self.signal, np.asarray(regions), self.dates, cells, latest, self.tail,
                        self.step)


def build_triangles(vintages: pd.DataFrame, as_of: dt.date, max_delay: int, n_ref: int,
                    first_as_of: dict[str, dt.date], *, tail: bool = False,
                    steps: dict[str, int] | None = None) -> dict[str, Triangle]:
    """Turn vintage rows (region, signal, ref_date, as_of, value) into one triangle per signal.

    The value of a ref date known at delay d is the last vintage with as_of <= ref_date + d; the
    cell is its increment over delay d-1.  Reference dates before a signal's first snapshot were
    never seen at small delays, so their rows are left unobserved (NaN) rather than guessed.
    ``tail``: the last column is the "≥ D" bin (value on as_of minus the value known at D - 1)
    instead of the single delay D.

    A weekly signal (``steps[signal] = 7``) gets a triangle in weeks: rows are its week dates up
    to the last one on or before as_of, and delay k is what was known ``offset + 7 k`` days after
    the week's date, where ``offset`` = as_of - that last week date (0..6): the report grid is
    anchored on as_of's weekday, so the newest week has delay 0 on as_of whatever the weekday.
    ``max_delay`` and ``n_ref`` then count weeks.
    """
    out: dict[str, Triangle] = {}
    end = np.datetime64(as_of, "D")
    D = max_delay
    for signal, g in vintages.groupby("signal", sort=True):
        step = int((steps or {}).get(str(signal), 1))
        ref = g["ref_date"].to_numpy().astype("datetime64[D]")
        asof = g["as_of"].to_numpy().astype("datetime64[D]")
        offset = 0
        if step > 1 and ref.size:
            offset = int((end - ref[0]).astype(int)) % step
        last = end - np.timedelta64(offset, "D")
        start = last - np.timedelta64(step * (n_ref - 1), "D")
        dates = np.arange(start, last + np.timedelta64(1, "D"), step, dtype="datetime64[D]")
        keep = (ref >= start) & (asof <= end)
        g = g[keep]
        ref = ref[keep]
        asof = asof[keep]
        regions, r_idx = np.unique(g["region"].to_numpy().astype(str), return_inverse=True)
        if step == 1:
            t_idx = (ref - start).astype(int)
            delay = (asof - ref).astype(int)
        else:
            t_idx = (ref - start).astype(int) // step
            delay = -(-((asof - ref).astype(int) - offset) // step)  # first report time >= as_of
        vals = g["value"].to_numpy(dtype=float)
        n = len(regions)
        known = np.full((n, n_ref, D + 1), np.nan)
        latest = np.full((n, n_ref), np.nan)
        # rows are sorted by as_of within a key, so later writes win
        order = np.lexsort((asof, t_idx, r_idx))
        r_o, t_o, d_o, v_o = r_idx[order], t_idx[order], delay[order], vals[order]
        latest[r_o, t_o] = v_o
        in_tri = d_o <= D
        known[r_o[in_tri], t_o[in_tri], np.maximum(d_o[in_tri], 0)] = v_o[in_tri]
        # forward-fill along delay: the value stays until the next vintage changes it
        idx = np.where(np.isnan(known), 0, np.arange(D + 1))
        np.maximum.accumulate(idx, axis=2, out=idx)
        filled = np.take_along_axis(known, idx, axis=2)
        first_seen = ~np.isnan(known).all(axis=2)
        # before the first report of a ref date its value is 0 (nothing reported yet)
        filled = np.where(np.isnan(filled) & first_seen[..., None], 0.0, filled)
        filled = np.where(np.isnan(filled), 0.0, filled)
        latest = np.where(np.isnan(latest), 0.0, latest)
        cells = np.diff(filled, axis=2, prepend=0.0)
        if tail and D >= 1:
            cells[:, :, D] = latest - filled[:, :, D - 1]
        # not observable yet on as_of
        t_grid = np.arange(n_ref)[:, None]
        d_grid = np.arange(D + 1)[None, :]
        unobservable = t_grid + d_grid > n_ref - 1
        cells[:, unobservable] = np.nan
        # reference dates before the first snapshot: never seen at small delays
        fa = first_as_of.get(str(signal))
        if fa is not None:
            censored = dates + np.timedelta64(offset, "D") < np.datetime64(fa, "D")
            cells[:, censored, :] = np.nan
        out[str(signal)] = Triangle(str(signal), regions, dates, cells, latest, tail, step)
    return out


def _mask_backlog_rows(con: duckdb.DuckDBPyConnection, run_id: str, signal: str,
                       tri: Triangle) -> int:
    """Leave backlog-dump days found by the clean stage out of the delay estimation.

    A dump puts many days' late reports on one reference date at short delay; left in, it makes
    reporting look faster than it is and the nowcast too low.  The rows stay in the reported
    totals; only their cells are treated as unobserved while fitting.
    """
    rows = con.execute("SELECT DISTINCT region, ref_date FROM core.clean_actions "
                       "WHERE run_id = ? AND signal = ? AND action = 'backlog_source'",
                       [run_id, signal]).fetchall()
    pos = {r: i for i, r in enumerate(tri.regions)}
    n = 0
    for region, ref_date in rows:
        t = int((np.datetime64(ref_date, "D") - tri.dates[0]).astype(int)) // tri.step
        if region in pos and 0 <= t < len(tri.dates):
            tri.cells[pos[region], t, :] = np.nan
            n += 1
    return n


def _weekday(date: np.datetime64) -> int:
    """Weekday of a datetime64[D] (Monday = 0)."""
    return int((date.astype("datetime64[D]").astype(int) + 3) % 7)


@dataclass
class SignalDelay:
    """Everything computed once per signal over all its regions, handed to every batch."""

    template: DelayGLM  # settings of the per-region fits (drift set per region later)
    pooled: PooledDelay | None
    pooled_then: PooledDelay | None
    template_then: DelayGLM | None
    agg_gain: float  # the signal's own back-test gain (drifting - stationary)
    weekday_stat: float
    weekday_used: bool
    holidays: list[str]
    tail_shape: tuple[float, float] | None


def _holidays(cfg: dict[str, Any], tri: Triangle) -> tuple[np.ndarray, list[str]]:
    """Report-day indices (day 0 = the triangle's first date) of listed holidays and of detected
    closures (nothing reported on a weekday that usually brings reports); and their dates.
    None for a weekly signal (a report week holds every weekday)."""
    start = tri.dates[0]
    if tri.step != 1:
        return np.zeros(0, dtype=np.int64), []
    listed = [np.datetime64(dt.date.fromisoformat(str(h)), "D") for h in
              cfg.get("nowcast_holidays", [])]
    idx = {int((d - start).astype(int)) for d in listed}
    idx |= {int(i) for i in closed_report_days(tri.cells, _weekday(start))}
    days = np.asarray(sorted(i for i in idx if i >= 0), dtype=np.int64)
    return days, [str(start + np.timedelta64(int(i), "D")) for i in days]


def tail_history(con: duckdb.DuckDBPyConnection, as_of: dt.date, signal: str, max_delay: int,
                 days: int, first_as_of: dt.date | None, step: int = 1, offset: int = 0
                 ) -> pd.DataFrame:
    """Per reference date of the last ``days`` that is at least ``max_delay`` days old: the
    signal's reports at delays < D (summed over regions), those at delays >= D known on as_of,
    and how many tail delays it has had (age).  Dates whose first D days preceded the first
    snapshot are left out (their split is unknown).  A weekly signal (``step`` 7) counts
    ``max_delay`` and the age in weeks, delay k being ``offset + 7 k`` days after the week's
    date (the triangle's report grid, see :func:`build_triangles`)."""
    D = int(max_delay)
    last_before = offset + step * (D - 1)  # days after the ref date of delay D - 1
    lo = as_of - dt.timedelta(days=days - 1)
    if first_as_of is not None:
        lo = max(lo, first_as_of - dt.timedelta(days=last_before))
    df = con.execute(
        """WITH k AS (
               SELECT region, ref_date,
                      coalesce(arg_max(value, as_of) FILTER (
                          WHERE as_of <= ref_date + ?::INTEGER - 1), 0) AS v_before,
                      arg_max(value, as_of) AS v_latest
               FROM core.observations
               WHERE signal = ? AND as_of <= ? AND ref_date >= ? AND ref_date <= ?
               GROUP BY region, ref_date)
           SELECT ref_date, sum(v_before) AS before, sum(v_latest - v_before) AS seen
           FROM k GROUP BY ref_date ORDER BY ref_date""",
        [last_before + 1, signal, as_of, lo, as_of - dt.timedelta(days=offset + step * D)]).df()
    ref = pd.to_datetime(df["ref_date"]).dt.date
    df["age"] = [((as_of - r).days - offset) // step - D + 1 for r in ref]
    return df


def _signal_delay(tri: Triangle, then: Triangle | None, cfg: dict[str, Any],
                  history: pd.DataFrame | None = None) -> SignalDelay:
    """The signal-level part of the delay model (see the module docstring)."""
    D = int(cfg["max_delay_days"])
    tail = tri.tail
    holidays, hol_dates = _holidays(cfg, tri)
    template = DelayGLM(family=cfg["nowcast_family"], weekday_effect=False,
                        first_ref_weekday=_weekday(tri.dates[0]), holidays=holidays,
                        drift_sd=float(cfg["nowcast_drift_sd"]),
                        tail=cfg["nowcast_tail"] if tail else "none", max_delay=D,
                        pool_below=float(cfg["nowcast_pool_below"]), tol=1e-7)
    if tri.step != 1:  # weekly rows: the drift's random walk takes one step per week (row)
        template.segment_days = 1
    ratio = None
    if tail and history is not None and len(history) > D:
        size, mean, _ = fit_tail(history["before"].to_numpy(), history["seen"].to_numpy(),
                                 history["age"].to_numpy(), cfg["nowcast_tail"])
        ratio = (size, mean)
    elif tail:
        ratio = estimate_tail_shape(tri.cells, template)
    template.tail_shape = ratio
    stat, used = 0.0, False
    if cfg["nowcast_weekday_effect"] and tri.step == 1 and np.isfinite(tri.cells).any():
        stat, _, p_value = weekday_lr_test(tri.cells, template)
        used = p_value < WEEKDAY_TEST_LEVEL
    template.weekday_effect = used
    mode = cfg["nowcast_drift"]
    pooled = PooledDelay.fit(tri.cells, template, with_drift=mode != "off")
    pooled_then = template_then = None
    gain = 0.0
    if then is not None and mode == "auto":
        lag = int((tri.dates[-1] - then.dates[-1]).astype(int)) // tri.step
        template_then = DelayGLM(**{**template.get_params(),
                                    "first_ref_weekday": _weekday(then.dates[0]),
                                    "holidays": np.asarray(holidays) + lag})
        pooled_then = PooledDelay.fit(then.cells, template_then)
        agg_now, agg_then = aggregate_triangle(tri.cells), aggregate_triangle(then.cells)
        exposure, y = backtest_arrivals(agg_now, agg_then, lag, ratio, D + 1)
        choice = backtest_drift(agg_then, None, exposure, y, template_then, pooled=False,
                                family=cfg["nowcast_family"])
        gain = float(choice.gain[0])
    return SignalDelay(template, pooled, pooled_then, template_then, gain, stat, used,
                       hol_dates, ratio)


def _fit_block(args: tuple[Triangle, Triangle | None, SignalDelay, dict[str, Any]]
               ) -> dict[str, Any]:
    """Choose, fit and sample the delay model for one batch of regions (pure; runs in tasks).

    ``then``: the same regions' triangle ``nowcast_backtest_days`` earlier (None: no back-test).
    """
    tri, then, sig, cfg = args
    D = int(cfg["max_delay_days"])
    n = len(tri.regions)
    mode = cfg["nowcast_drift"]
    gain = np.zeros(n)
    miss = np.full((n, 2), np.nan)
    rows = np.zeros(n)
    if cfg["nowcast_method"] == "chain_ladder":
        model: Any = ChainLadder(max_delay=D)
        drift = np.zeros(n, dtype=bool)
    else:
        if mode == "auto" and then is not None and sig.template_then is not None:
            lag = int((tri.dates[-1] - then.dates[-1]).astype(int)) // tri.step
            exposure, y = backtest_arrivals(tri.cells, then.cells, lag, sig.tail_shape, D + 1)
            choice = backtest_drift(then.cells, then.latest, exposure, y, sig.template_then,
                                    sig.pooled_then, family=cfg["nowcast_family"])
            gain, miss, rows = choice.gain, choice.miss90, choice.n_rows
            w = choice.pool_weight
            drift = (w * gain + (1.0 - w) * sig.agg_gain) > float(cfg["nowcast_drift_margin"])
        else:
            drift = np.full(n, mode == "on")
        model = DelayGLM(**{**sig.template.get_params(),
                            "drift": drift if mode != "off" else False})
    weekly = {} if tri.step == 1 else {"prior_window": in_steps(14, tri.step, 2)}
    nc = DelayNowcaster(model=model, family=cfg["nowcast_family"], window=D + 1,
                        random_state=series_seeds(int(cfg["seed"]), tri.signal, tri.regions),
                        **weekly)
    nc.fit(tri.cells, reported=tri.latest, pooled=sig.pooled)
    # one set of joint draws gives both the published quantiles and the draws handed on to R_t
    # and the forecasts, so both describe the same predictive distribution
    draws = nc.sample(int(cfg["nowcast_draws"]))  # (m, n, n_ref)
    q = np.moveaxis(np.quantile(draws, NOWCAST_LEVELS, axis=0), 0, -1)
    q = np.maximum.accumulate(q, axis=-1)
    keep = min(int(cfg["nowcast_joint_draws"]), draws.shape[0])
    joint = np.ascontiguousarray(np.moveaxis(draws[:keep, :, -(D + 1):], 0, -1))
    by_week = mean_delay_by_week(tri.cells, horizon=D - 1 if tri.tail else None,
                                 week_length=7 // tri.step)
    week_start = tri.dates[by_week.week_first_row] - np.timedelta64(tri.step - 1, "D")
    m = nc.model_
    return {"pmf": nc.delay_pmf_, "q": q, "pooling": np.asarray(nc.pooling_, dtype=str),
            "drift": (by_week.mean_delay * tri.step, week_start),
            "draws": joint.astype(np.float32), "summary": _summary(m, drift, gain, miss, rows)}


def _summary(m: Any, drift: np.ndarray, gain: np.ndarray, miss: np.ndarray,
             rows: np.ndarray) -> dict[str, np.ndarray]:
    """Per-region facts about the fitted delay model for ``out.delay_model``."""
    pmf = m.delay_pmf_
    today = m.mean_delay(pmf)
    before = today.copy()
    tilt = getattr(m, "tilt_", None)
    design = m.design_
    if tilt is not None and design.seg is not None:
        back = max(0, design.n_seg - 1 - DRIFT_LOOKBACK_DAYS // 7)
        then_pmf = m.base_pmf_ * np.exp(tilt[:, back][:, None] * design.dvec[None, :])
        then_pmf = then_pmf / np.maximum(then_pmf.sum(axis=1, keepdims=True), 1e-300)
        before = np.where(drift, m.mean_delay(then_pmf), today)
    chosen = np.where(drift, miss[:, 1], miss[:, 0]) if miss.size else np.full(len(drift), np.nan)
    return {"model": np.where(drift, "drifting", "stationary"), "mean_today": today,
            "mean_before": before, "tail_prob": pmf[:, -1] if m.tail_shape_ is not None else
            np.zeros(len(drift)), "q99": m.delay_quantile(SETTLE_QUANTILE, pmf),
            "gain": gain, "miss90": chosen, "rows": rows}


def nowcast(con: duckdb.DuckDBPyConnection, as_of: dt.date, settings: Settings, *,
            run_id: str, mapper: Mapper = serial_map) -> dict[str, Any]:
    """Estimate delay distributions and nowcast the last ``max_delay_days`` reference dates."""
    firsts = {r[0]: r[1] for r in con.execute(
        "SELECT signal, min(as_of) FROM core.observations WHERE as_of <= ? GROUP BY signal",
        [as_of]).fetchall()}
    n_written = 0
    lines: list[str] = []
    skipped: list[str] = []
    con.execute(DRAWS_DDL)
    steps = signal_steps(con)
    for signal in sorted(firsts):
        cfg = settings.for_signal(signal)
        step = steps.get(signal, 1)
        if step != 1:
            cfg = in_weeks(cfg, step)
        got = _nowcast_signal(con, as_of, run_id, signal, cfg, firsts, mapper, step)
        if got is None:
            continue
        n_written += got["rows"]
        skipped.extend(got["skipped"])
        lines.append(got["line"])
    out: dict[str, Any] = {"line": "; ".join(lines) or "no signals", "rows": n_written}
    if skipped:
        out["skipped"] = skipped
    return out


def in_weeks(cfg: dict[str, Any], step: int = 7) -> dict[str, Any]:
    """A weekly signal's nowcast settings in rows of its triangle (weeks): the day-valued spans
    rounded up to whole weeks (at least 1, training at least 9 weeks), no report-weekday
    effects and no report-day holidays (a report week holds every weekday)."""
    return {**cfg, "max_delay_days": in_steps(int(cfg["max_delay_days"]), step),
            "nowcast_training_days": in_steps(int(cfg["nowcast_training_days"]), step, 9),
            "nowcast_backtest_days": in_steps(int(cfg["nowcast_backtest_days"]), step),
            "nowcast_weekday_effect": False, "nowcast_holidays": []}


def _triangles(con: duckdb.DuckDBPyConnection, as_of: dt.date, run_id: str, signal: str,
               cfg: dict[str, Any], firsts: dict[str, dt.date], step: int = 1
               ) -> tuple[Triangle, Triangle | None] | None:
    """The signal's triangle on as_of and (for the back-test) ``nowcast_backtest_days``
    earlier, aligned to the same regions; None without data.  A weekly signal (``step`` 7)
    has ``cfg`` in weeks (:func:`in_weeks`)."""
    D = int(cfg["max_delay_days"])
    n_ref = max(int(cfg["nowcast_training_days"]), D + 7) if step == 1 else \
        max(int(cfg["nowcast_training_days"]), D + 2)
    lag = int(cfg["nowcast_backtest_days"]) if cfg["nowcast_drift"] == "auto" else 0
    since = as_of - dt.timedelta(days=step * (n_ref - 1 + lag) + step - 1)
    vint = vintages_as_of(con, as_of, since=since, signals=[signal])
    vint = vint[vint["signal"] == signal]
    if vint.empty:
        return None
    tail = cfg["nowcast_tail"] != "none" and cfg["nowcast_method"] == "glm"
    steps = {signal: step}
    tri = build_triangles(vint, as_of, D, n_ref, firsts, tail=tail, steps=steps)[signal]
    _mask_backlog_rows(con, run_id, signal, tri)
    then = None
    if lag > 0:
        before = as_of - dt.timedelta(days=step * lag)
        old = vint[pd.to_datetime(vint["as_of"]).dt.date <= before]
        got = build_triangles(old, before, D, n_ref, firsts, tail=tail, steps=steps).get(signal)
        if got is not None and np.isfinite(got.cells).any():
            _mask_backlog_rows(con, run_id, signal, got)
            then = got.aligned(tri.regions)
    return tri, then


def _leaf_rows(con: duckdb.DuckDBPyConnection, regions: np.ndarray) -> np.ndarray:
    """Positions of the regions that are not parents in the region hierarchy."""
    parents = {r[0] for r in con.execute(
        "SELECT region FROM core.regions WHERE coalesce(n_children, 0) > 0").fetchall()}
    return np.array([i for i, r in enumerate(regions) if r not in parents], dtype=np.int64)


def _nowcast_signal(con: duckdb.DuckDBPyConnection, as_of: dt.date, run_id: str, signal: str,
                    cfg: dict[str, Any], firsts: dict[str, dt.date], mapper: Mapper,
                    step: int = 1) -> dict[str, Any] | None:
    """Nowcast one signal: signal-level delay structure, batches, then the output tables."""
    got = _triangles(con, as_of, run_id, signal, cfg, firsts, step)
    if got is None:
        return None
    tri, then = got
    history = None
    if tri.tail:
        history = tail_history(con, as_of, signal, int(cfg["max_delay_days"]),
                               int(cfg["nowcast_tail_days"]), firsts.get(signal), step,
                               int((np.datetime64(as_of, "D") - tri.dates[-1]).astype(int)))
    # parents of a region hierarchy are sums of their children: pooling them too would count
    # every report twice, so the signal-level structure is fitted on the leaf regions
    leaves = _leaf_rows(con, tri.regions)
    if 0 < leaves.size < len(tri.regions):
        sig = _signal_delay(tri.take(leaves), None if then is None else then.take(leaves), cfg,
                            history)
    else:
        sig = _signal_delay(tri, then, cfg, history)
    parts = batches(len(tri.regions), int(cfg["batch_regions"]))
    jobs = [(tri.take(s), None if then is None else then.take(s), sig, cfg) for s in parts]
    results = mapper(_fit_block, jobs)
    good = [(s, r) for s, r in zip(parts, results, strict=True)
            if not isinstance(r, BatchFailure)]
    skipped = [f"{signal}/{x}: {r.message[:200]}" for s, r in zip(parts, results, strict=True)
               if isinstance(r, BatchFailure) for x in tri.regions[s]]
    if not good:
        return {"rows": 0, "skipped": skipped, "line": f"{signal}: no region nowcast"}
    keep_rows = np.concatenate([np.arange(len(tri.regions))[s] for s, _ in good])
    tri = tri.take(keep_rows)
    res = {k: np.concatenate([r[k] for _, r in good]) for k in ("pmf", "q", "draws", "pooling")}
    summary = {k: np.concatenate([r["summary"][k] for _, r in good])
               for k in good[0][1]["summary"]}
    drift_dates = good[0][1]["drift"][1]
    weekly = np.concatenate([r["drift"][0] for _, r in good])
    rows = _write_outputs(con, run_id, signal, cfg, tri, res, summary, weekly, drift_dates, sig)
    n_drift = int(np.sum(summary["model"] == "drifting"))
    line = (f"{signal}: {len(tri.regions)} regions ({int(np.sum(res['pooling'] != 'own'))} "
            f"pooled/shrunk, {n_drift} drifting delay)")
    return {"rows": rows, "skipped": skipped, "line": line}


def _write_outputs(con: duckdb.DuckDBPyConnection, run_id: str, signal: str,
                   cfg: dict[str, Any], tri: Triangle, res: dict[str, np.ndarray],
                   summary: dict[str, np.ndarray], weekly: np.ndarray, drift_dates: np.ndarray,
                   sig: SignalDelay) -> int:
    """Write one signal's delay pmf, drift, delay model, nowcast, fits and joint draws."""
    D = int(cfg["max_delay_days"])
    pmf, q, joint, pooling = res["pmf"], res["q"], res["draws"], res["pooling"]
    n_reg = len(tri.regions)
    n_ref = len(tri.dates)
    # Too little history (e.g. the first snapshot of a feed): no delay distribution can be
    # estimated; say so, publish no pmf, and let the nowcast equal what is reported.
    usable = np.isfinite(pmf).all(axis=1) & (np.nansum(pmf, axis=1) > 0.5)
    pooling = np.where(usable, pooling, "insufficient")
    q = np.where(usable[:, None, None] & np.isfinite(q), q, tri.latest[..., None])
    insert_df(con, "out.delay_pmf", pd.DataFrame({
        "run_id": run_id, "region": np.repeat(tri.regions[usable], D + 1), "signal": signal,
        "delay_days": np.tile(np.arange(D + 1) * tri.step, int(usable.sum())),
        "prob": pmf[usable].reshape(-1)}))
    w = len(drift_dates)
    insert_df(con, "out.delay_drift", pd.DataFrame({
        "run_id": run_id, "region": np.repeat(tri.regions, w), "signal": signal,
        "week_start": np.tile(np.asarray(drift_dates, dtype="datetime64[D]"), n_reg),
        "mean_delay_days": weekly.reshape(-1)}))
    _write_delay_model(con, run_id, signal, cfg, tri, summary, usable, pmf, sig)
    # out.nowcast: the last D+1 reference dates (older ones are complete)
    keep = slice(n_ref - (D + 1), n_ref)
    dates = tri.dates[keep]
    reported = tri.latest[:, keep]
    # the nowcast never goes below what is already reported (incl. reports after delay D)
    qk = np.maximum(q[:, keep, :], reported[..., None])
    k = len(NOWCAST_LEVELS)
    t = len(dates)
    joint = np.where(usable[:, None, None], joint, reported[..., None])
    _write_draws(con, signal, tri.regions, dates, np.maximum(joint, reported[..., None]))
    rows = insert_df(con, "out.nowcast", pd.DataFrame({
        "run_id": run_id, "region": np.repeat(tri.regions, t * k), "signal": signal,
        "ref_date": np.tile(np.repeat(dates, k), n_reg),
        "reported": np.repeat(reported.reshape(-1), k),
        "q_level": np.tile(NOWCAST_LEVELS, n_reg * t), "value": qk.reshape(-1)}))
    insert_df(con, "out.fits", pd.DataFrame({
        "run_id": run_id, "region": tri.regions, "model": "nowcast",
        "params_json": [json.dumps({"pooling": str(p), "method": cfg["nowcast_method"],
                                    "family": cfg["nowcast_family"], "delay_model": str(dm),
                                    "mean_delay_days": float(md) * tri.step if ok else None})
                        for p, dm, md, ok in zip(pooling, summary["model"],
                                                 summary["mean_today"], usable, strict=True)],
        "objective": np.nan, "converged": usable,
        "message": [f"delay distribution: {p}, {dm}" if ok else
                    "too little reporting history to estimate delays; nowcast = reported"
                    for p, dm, ok in zip(pooling, summary["model"], usable, strict=True)],
        "signal": signal}))
    return rows


def _write_delay_model(con: duckdb.DuckDBPyConnection, run_id: str, signal: str,
                       cfg: dict[str, Any], tri: Triangle, summary: dict[str, np.ndarray],
                       usable: np.ndarray, pmf: np.ndarray, sig: SignalDelay) -> None:
    """``out.delay_model`` (per region) and ``out.delay_signal`` (the signal's pooled view)."""
    nan = np.where(usable, 1.0, np.nan)
    days = nan * tri.step  # delays in days (weeks x 7 for a weekly signal)
    insert_df(con, "out.delay_model", pd.DataFrame({
        "run_id": run_id, "region": tri.regions, "signal": signal,
        "delay_model": np.where(usable, summary["model"], "insufficient"),
        "mean_delay_days": summary["mean_today"] * days,
        "mean_delay_before_days": summary["mean_before"] * days,
        "lookback_days": DRIFT_LOOKBACK_DAYS,
        "tail_prob": summary["tail_prob"] * nan, "q99_delay_days": summary["q99"] * days,
        "backtest_gain": summary["gain"], "backtest_miss90": summary["miss90"],
        "backtest_rows": summary["rows"].astype(np.int64),
        "weekday_effect": sig.weekday_used, "n_holidays": len(sig.holidays)}))
    pooled = sig.pooled.stationary if sig.pooled is not None else None
    if pooled is not None and sig.pooled is not None and sig.pooled.drifting is not None \
            and sig.agg_gain > float(cfg["nowcast_drift_margin"]):
        pooled = sig.pooled.drifting
    mean = q99 = tail_prob = np.nan
    if pooled is not None and np.isfinite(pooled.delay_pmf_).all():
        mean = float(pooled.mean_delay()[0])
        q99 = float(pooled.delay_quantile(SETTLE_QUANTILE)[0])
        tail_prob = float(pooled.delay_pmf_[0, -1]) if sig.tail_shape is not None else 0.0
    insert_df(con, "out.delay_signal", pd.DataFrame({
        "run_id": [run_id], "signal": [signal], "n_regions": [len(tri.regions)],
        "n_drifting": [int(np.sum(summary["model"] == "drifting"))],
        "weekday_effect": [sig.weekday_used], "weekday_test": [sig.weekday_stat],
        "holidays": [json.dumps(sig.holidays)],
        "tail_size": [np.nan if sig.tail_shape is None else sig.tail_shape[0]],
        "tail_mean_days": [np.nan if sig.tail_shape is None else sig.tail_shape[1] * tri.step],
        "tail_prob": [tail_prob], "mean_delay_days": [mean * tri.step],
        "q99_delay_days": [q99 * tri.step],
        "backtest_gain": [sig.agg_gain]}))


def _write_draws(con: duckdb.DuckDBPyConnection, signal: str, regions: np.ndarray,
                 dates: np.ndarray, joint: np.ndarray) -> None:
    """Append one signal's joint draws (n, t, m) to the run's ``nowcast_draws`` table."""
    n, t, m = joint.shape
    if n * t * m == 0:
        return
    codes = np.repeat(np.arange(n), t * m)
    insert_df(con, "nowcast_draws", pd.DataFrame({
        "region": pd.Categorical.from_codes(codes, categories=pd.Index(regions.astype(str))),
        "signal": signal,
        "ref_date": np.tile(np.repeat(np.asarray(dates, dtype="datetime64[D]"), m), n),
        "draw": np.tile(np.arange(m, dtype=np.int32), n * t),
        "value": joint.reshape(-1).astype(float)}))


def _filled(a: np.ndarray) -> np.ndarray:
    """A fetched numeric column as floats with NULL as NaN."""
    return np.ma.filled(a.astype(float), np.nan) if np.ma.isMaskedArray(a) else a.astype(float)


def _region_positions(con: duckdb.DuckDBPyConnection, sql: str, params: list,
                      regions: np.ndarray) -> dict[str, np.ndarray]:
    """Run ``sql`` (which selects from a table aliased ``n`` with a ``region`` column) joined to
    the positions of ``regions``; DuckDB finds the positions, only numbers come back."""
    con.register("_nq_regions", pd.DataFrame({"region": regions, "r": np.arange(len(regions))}))
    try:
        return con.execute(sql.replace("{join}", "LEFT JOIN _nq_regions g USING (region)"),
                           params).fetchnumpy()
    finally:
        con.unregister("_nq_regions")


def nowcast_quantiles(con: duckdb.DuckDBPyConnection, run_id: str, signal: str,
                      block: SeriesBlock) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """This run's published nowcast as arrays aligned to ``block``: levels (k,), quantiles
    (n, t, k), reported (n, t) and the column where the nowcast window starts in the block."""
    got = _region_positions(
        con, "SELECT coalesce(g.r, -1) AS r, n.ref_date, n.q_level, n.value, n.reported "
             "FROM out.nowcast n {join} WHERE n.run_id = ? AND n.signal = ?",
        [run_id, signal], block.regions)
    n_reg = len(block.regions)
    if len(got["r"]) == 0:
        return np.array([0.5]), np.zeros((n_reg, 0, 1)), np.zeros((n_reg, 0)), len(block.dates)
    ref = np.asarray(got["ref_date"]).astype("datetime64[D]")
    q_level = _filled(got["q_level"])
    levels = np.unique(q_level)
    dates = np.unique(ref)
    q = np.full((n_reg, len(dates), len(levels)), np.nan)
    rep = np.full((n_reg, len(dates)), np.nan)
    r_idx = np.asarray(got["r"], dtype=np.int64)
    ok = r_idx >= 0
    t_idx = np.searchsorted(dates, ref)
    l_idx = np.searchsorted(levels, q_level)
    q[r_idx[ok], t_idx[ok], l_idx[ok]] = _filled(got["value"])[ok]
    rep[r_idx[ok], t_idx[ok]] = _filled(got["reported"])[ok]
    inside = dates >= block.dates[0]  # a series shorter than the window: only its own dates
    if not inside.all():
        q, rep, dates = q[:, inside], rep[:, inside], dates[inside]
        if len(dates) == 0:
            return levels, q, rep, len(block.dates)
    start = int(np.searchsorted(block.dates, dates[0]))
    return levels, q, rep, start


def nowcast_joint_draws(con: duckdb.DuckDBPyConnection, signal: str, block: SeriesBlock,
                        dates: np.ndarray) -> np.ndarray | None:
    """This run's joint nowcast draws (m, n, t) aligned to ``block.regions`` and ``dates``
    (NaN where a region has none), or None when the nowcast stage did not run on this
    connection (then callers fall back to the published quantiles)."""
    exists = con.execute("SELECT count(*) FROM duckdb_tables() WHERE temporary "
                         "AND table_name = 'nowcast_draws'").fetchall()[0][0]
    if not exists or len(dates) == 0:
        return None
    got = _region_positions(
        con, "SELECT coalesce(g.r, -1) AS r, n.ref_date, n.draw, n.value "
             "FROM nowcast_draws n {join} WHERE n.signal = ?", [signal], block.regions)
    if len(got["r"]) == 0:
        return None
    r_idx = np.asarray(got["r"], dtype=np.int64)
    ok = r_idx >= 0
    draw = np.asarray(got["draw"], dtype=np.int64)
    m = int(draw.max()) + 1
    ref = np.asarray(got["ref_date"]).astype("datetime64[D]")
    t_idx = np.searchsorted(dates, ref)
    ok &= (t_idx < len(dates))
    ok[ok] &= dates[t_idx[ok]] == ref[ok]
    out = np.full((m, len(block.regions), len(dates)), np.nan)
    out[draw[ok], r_idx[ok], t_idx[ok]] = _filled(got["value"])[ok]
    return out
