"""Stage 6 — forecast: fit the models, publish forecast quantiles → ``out.fits``, ``out.forecasts``,
``out.ensemble_weights``, ``out.scenarios``.

Models (``models`` setting): ``baseline`` (flat level, spread from the observed h-day changes;
the yardstick, never an ensemble member), ``compartmental`` (S-E-I-R-D refitted jointly to the
cases, admissions and deaths of each region, warm-started from the previous run's fit),
``renewal`` (R_t projected with the renewal equation: estimated dispersion and drift, damping,
susceptible depletion from the compartmental fit), ``ensemble`` (quantile median or mean of the
members) and ``ensemble_weighted`` (quantile mean weighted by the members' recent scores,
:mod:`tallywave.pipeline.ensemble_weights`).  Scenario projections run through the compartmental
model (:mod:`tallywave.pipeline.scenarios`).  Every model forecasts the weekday-adjusted,
nowcast-corrected series; the quantiles are then multiplied by the weekday effect of each target
date, so forecasts are in the same units as the reports they will be scored against.

A weekly signal is forecast 1..4 weeks ahead (``horizon_days`` rounded up to weeks; published
with ``horizon_days`` = 7, 14, 21, 28 and target dates on the week dates after its last week):
the baseline moves in weeks (level = the last week, spread = observed h-week changes); the
renewal projection runs day by day from the weekly totals spread evenly over their days (R_t
from a trailing window of whole weeks, drift per day from the weekly R_t history) and the days
are summed back into weeks, with count noise sized from one-week-ahead errors; the compartmental
model is not fitted to weekly signals (one ``out.fits`` row per region says so) and the
ensembles combine the members there are.

Results never depend on batching: every random stream belongs to one (seed, signal, region)
(:func:`tallywave.models.base.series_seeds`) and everything pooled over regions (the pooled R_t
of small regions, the drift, the dispersion fallback) is computed over all regions of the signal
before the batches are handed out.
"""

from __future__ import annotations

import datetime as dt
import json
from typing import Any

import duckdb
import numpy as np
import pandas as pd

from tallywave.models.base import SeriesRandom, series_seeds
from tallywave.models.baseline import FlatBaseline
from tallywave.models.compartmental import CompartmentalModel
from tallywave.models.ensemble import quantile_ensemble
from tallywave.models.incidence import incidence_draws, median_corrected
from tallywave.models.renewal import CoriEstimator
from tallywave.models.renewal_forecast import (
    RenewalForecaster,
    days_to_weeks,
    estimate_dispersion,
    estimate_log_r_drift,
    one_step_expected,
    one_week_ahead_expected,
    sample_r,
    weeks_to_days,
)
from tallywave.pipeline.clean import cleaned_blocks
from tallywave.pipeline.ensemble_weights import MEMBERS, scoreboard_weights, weight_array
from tallywave.pipeline.frames import (
    BatchFailure,
    Mapper,
    SeriesBlock,
    batches,
    in_steps,
    serial_map,
)
from tallywave.pipeline.nowcast import nowcast_quantiles
from tallywave.pipeline.reconcile import Reconciler, leaf_mask
from tallywave.pipeline.scenarios import describe, multipliers, scenario_frame, write_scenarios
from tallywave.pipeline.settings import Settings
from tallywave.pipeline.store import insert_df
from tallywave.pipeline.transmission import interval_pmfs, nowcast_draws_for, rt_span
from tallywave.pipeline.vintages import signal_steps

COMPARTMENTAL_SIGNALS = ("cases", "admissions", "deaths")
RENEWAL_HISTORY_DAYS = 90
COMPARTMENTAL_BURN_IN_DAYS = 60  # history before the fit window (burn-in, people infected)
DEFAULT_POPULATION = 1_000_000.0  # used (and said in out.fits) when a region's size is unknown
POOLED = "(pooled regions)"  # the random stream of a signal's pooled R_t
WEEKLY_HISTORY_DAYS = 56  # weekly signals read this much more history (whole weeks, lags)
WEEKLY_NOISE_WEEKS = 10  # one-week-ahead errors of the last weeks that size the count noise
WEEKLY_MESSAGE = ("weekly signal: the compartmental model is fitted to daily signals only; no "
                  "compartmental forecast (renewal and baseline forecast it by week)")


def in_weeks(cfg: dict[str, Any], step: int = 7) -> dict[str, Any]:
    """A weekly signal's forecast settings in weeks: ``horizon_days`` becomes the number of
    weeks ahead (28 days: 4 weeks); every other key keeps its meaning."""
    return {**cfg, "horizon_days": in_steps(int(cfg["horizon_days"]), step)}


# ----------------------------------------------------------------------------- pure batch jobs

def _baseline_job(args: tuple) -> np.ndarray:
    y, cfg, step = args
    if step != 1:  # weekly: the last week is the level, changes over the last 8 weeks
        m = FlatBaseline(scale=str(cfg["baseline_scale"]), level="last",
                         window_days=in_steps(FlatBaseline().window_days, step)).fit(y)
    else:
        m = FlatBaseline(scale=str(cfg["baseline_scale"])).fit(y)
    return m.forecast(int(cfg["horizon_days"]), cfg["quantiles"]).values


def _cori(cfg: dict[str, Any]) -> CoriEstimator:
    mean, sd = float(cfg["rt_prior_mean"]), float(cfg["rt_prior_sd"])
    return CoriEstimator(window=int(cfg["rt_window_days"]), prior_shape=(mean / sd) ** 2,
                         prior_scale=sd ** 2 / mean, min_infections=float(cfg["rt_min_infections"]))


def _last_day_r(est: CoriEstimator, n_draws: int, rnd: SeriesRandom) -> np.ndarray:
    """Draws (n_draws, n_series) of R on the last day of a fitted Cori estimator."""
    shape = est.shape_ if est.n_components_ > 1 else est.shape_[None]
    scale = est.scale_ if est.n_components_ > 1 else est.scale_[None]
    return sample_r(shape[..., -1], scale[..., -1], est.weights_, n_draws, rnd)


def _renewal_draws(values: np.ndarray, eventual: np.ndarray, rep: np.ndarray, start: int,
                   cfg: dict[str, Any], step: int = 1) -> tuple[np.ndarray, int]:
    """Incidence draws of the days that matter (the last day's R_t, the projection's lags and
    the nowcast window; older days change nothing) and the number of draws.  Weekly series
    (``step`` 7): the weeks that matter, spread evenly over their days."""
    need = max(in_steps(rt_span(cfg), step), values.shape[1] - start)
    t_keep = min(values.shape[1], in_steps(RENEWAL_HISTORY_DAYS, step), need)
    cut = values.shape[1] - t_keep
    n_draws = int(cfg["forecast_draws"])
    # the nowcast's joint draws, reused cyclically when fewer than n_draws were kept
    eventual = eventual[np.arange(n_draws) % max(eventual.shape[0], 1)]
    draws = incidence_draws(np.nan_to_num(values[:, cut:]), eventual, rep, start - cut)
    return (draws if step == 1 else weeks_to_days(draws, step)), n_draws


def _renewal_job(args: tuple) -> dict[str, Any]:
    """Renewal forecasts for one batch: R_t draws at the last day (mixed over nowcast draws)
    projected forward; a region too small for its own R_t uses the signal's pooled R_t (computed
    over all its regions before batching), and says so."""
    values, eventual, rep, start, cfg, seeds, pooled_r, dispersion, capacity, drift, step = args
    if step != 1:  # weekly: days spread from the weeks, projected, summed back into weeks
        cfg = _daily_view(cfg, step)
        dispersion = np.asarray(dispersion, dtype=float) / step  # 7 days of NB(k/7): NB(k)-like
    draws, n_draws = _renewal_draws(values, eventual, rep, start, cfg, step)
    pmfs = interval_pmfs(cfg)
    interval = pmfs if len(pmfs) > 1 else pmfs[0]
    rnd = SeriesRandom(seeds, len(seeds))
    r = _last_day_r(_cori(cfg).fit_draws(draws, interval), n_draws, rnd)
    own = np.all(np.isfinite(r), axis=0)
    source = np.where(own, "own", "none").astype(object)
    if not own.all() and pooled_r is not None:
        r[:, ~own] = pooled_r[:, None]
        source[~own] = "pooled"
    ok = source != "none"
    r = np.where(ok[None], r, 1.0)
    damping = float(cfg["renewal_damping_days"])
    fc = RenewalForecaster(horizon=int(cfg["horizon_days"]), log_r_sd=drift,
                           damping_days=damping if damping > 0 else None,
                           damping_spread=float(cfg["renewal_damping_spread"]),
                           random_state=[np.random.SeedSequence(s.entropy,
                                                                spawn_key=(*s.spawn_key, 1))
                                         for s in seeds])
    fc.fit(draws, pmfs[0], r, dispersion=dispersion, capacity=capacity)
    if step == 1:
        out = fc.quantiles(cfg["quantiles"])
    else:
        weeks = days_to_weeks(fc.sample(), step)  # (n_draws, n, H)
        out = np.moveaxis(np.quantile(weeks, np.asarray(cfg["quantiles"], dtype=float), axis=0),
                          0, -1)
        out = np.maximum(np.maximum.accumulate(out, axis=-1), 0.0)
    out[~ok] = np.nan
    return {"q": out, "source": source, "r_median": np.median(r, axis=0)}


def _daily_view(cfg: dict[str, Any], step: int) -> dict[str, Any]:
    """The renewal job's settings for a weekly series projected by day: the horizon in days
    (whole weeks) and an R_t window of whole weeks (so R_t of the spread days is that of week
    lags)."""
    return {**cfg, "horizon_days": step * in_steps(int(cfg["horizon_days"]), step),
            "rt_window_days": step * in_steps(int(cfg["rt_window_days"]), step)}


def _compartmental_job(args: tuple) -> dict[str, Any]:
    """Fit one batch of regions jointly over the signals; forecast and run the scenarios."""
    observed, population, init, prior, immune, cfg, seeds, drift, scen, noise = args
    delays = cfg["compartmental_delays"]
    fracs = cfg["compartmental_fractions"]
    model = CompartmentalModel(
        latent_days=float(cfg["latent_days"]), infectious_days=float(cfg["infectious_days"]),
        ifr=float(fracs["deaths"]), rho=float(fracs["cases"]),
        hosp_frac=float(fracs["admissions"]), case_delay=tuple(delays["cases"]),
        admission_delay=tuple(delays["admissions"]), death_delay=tuple(delays["deaths"]),
        window_weeks=int(cfg["fit_window_weeks"]), method=str(cfg["ode_method"]),
        dt=1.0 / max(int(cfg["ode_steps_per_day"]), 1),
        fraction_prior_sd=dict(cfg["fraction_prior_sd"]),
        fraction_drift_sd=float(cfg["fraction_drift_sd"]), drift_sd=drift,
        damping_days=float(cfg["compartmental_damping_days"]) or None,
        damping_spread=float(cfg["compartmental_damping_spread"]),
        n_draws=int(cfg["forecast_draws"]), q_levels=cfg["quantiles"], random_state=seeds)
    model.fit(observed, population, init=init, prior_counts=prior, immune=immune)
    h = int(cfg["horizon_days"])
    fc = {s: r.values for s, r in model.forecast(h, cfg["quantiles"],
                                                 dispersion=noise).items()}
    scenarios = {name: {s: r.values for s, r in model.forecast(
        h, cfg["quantiles"], multiplier=m, dispersion=noise).items()} for name, m in scen}
    capacity = {s: model.susceptible_ * model.population_  # people left to infect ...
                * model.fraction_path_[s][:, -1]  # ... in the units of the signal
                for s in model.signals_}
    return {"q": fc, "scenarios": scenarios, "capacity": capacity, "params": model.params_,
            "objective": np.asarray(model.objective_),
            "converged": np.asarray(model.converged_), "message": list(model.message_)}


# ----------------------------------------------------------------------------- helpers

def _weekday_factors(con: duckdb.DuckDBPyConnection, run_id: str, signal: str,
                     regions: np.ndarray, targets: np.ndarray) -> np.ndarray:
    """Weekday effect of each target date per region, (n_regions, H); 1 where unknown."""
    df = con.execute("SELECT region, weekday, effect FROM core.weekday_effects "
                     "WHERE run_id = ? AND signal = ?", [run_id, signal]).df()
    eff = np.ones((len(regions), 7))
    if len(df):
        pos = {r: i for i, r in enumerate(regions)}
        idx = df["region"].map(pos)
        ok = idx.notna().to_numpy()
        eff[idx[ok].astype(int).to_numpy(), df["weekday"].to_numpy()[ok]] = \
            df["effect"].to_numpy()[ok]
    eff = np.where(np.isfinite(eff) & (eff > 0), eff, 1.0)
    wd = (targets.astype("datetime64[D]").astype(int) + 3) % 7  # Monday = 0
    return eff[:, wd]


def _to_report_units(con: duckdb.DuckDBPyConnection, run_id: str, signal: str,
                     regions: np.ndarray, as_of: dt.date, q: np.ndarray,
                     step: int = 1) -> np.ndarray:
    """Adjusted-scale quantiles (n, H, k) × each target date's weekday effect, monotone
    (weekly totals have no weekday effect)."""
    if step == 1:
        targets = np.datetime64(as_of, "D") + np.arange(1, q.shape[1] + 1)
        factor = _weekday_factors(con, run_id, signal, regions, targets)
    else:
        factor = np.ones(q.shape[:2])
    out = np.maximum(q * factor[..., None], 0.0)
    out = np.maximum.accumulate(np.nan_to_num(out, nan=-1.0), axis=-1)
    out[out < 0] = np.nan
    return out


def _populations(con: duckdb.DuckDBPyConnection, regions: np.ndarray) -> tuple[np.ndarray,
                                                                                np.ndarray]:
    df = con.execute("SELECT region, population FROM core.regions").df()
    known = dict(zip(df["region"], df["population"], strict=True))
    pop = np.array([float(known.get(r, np.nan)) for r in regions])
    missing = ~np.isfinite(pop) | (pop <= 0)
    return np.where(missing, DEFAULT_POPULATION, pop), missing


def _previous_params(con: duckdb.DuckDBPyConnection, as_of: dt.date,
                     regions: np.ndarray) -> list[dict | None]:
    """Yesterday's (the newest earlier published run's) fitted parameters, for a warm start."""
    rows = con.execute(
        """SELECT f.region, f.params_json FROM out.fits f JOIN out.runs r USING (run_id)
           WHERE r.status = 'published' AND r.as_of < ? AND f.model = 'compartmental'
             AND f.converged
           QUALIFY row_number() OVER (PARTITION BY f.region ORDER BY r.as_of DESC) = 1""",
        [as_of]).fetchall()
    found = {r: json.loads(p) for r, p in rows if p}
    return [found.get(r) for r in regions]


def _history_totals(con: duckdb.DuckDBPyConnection, run_id: str, before: dt.date,
                    signal: str, regions: np.ndarray) -> np.ndarray:
    """Cleaned counts of one signal reported before ``before`` (the whole history) per region:
    the people already infected, for the compartmental model's susceptible pool."""
    df = con.execute("SELECT region, sum(value_clean) AS total FROM core.cleaned "
                     "WHERE run_id = ? AND signal = ? AND ref_date < ? GROUP BY region",
                     [run_id, signal, before]).df()
    known = dict(zip(df["region"], df["total"], strict=True))
    return np.array([float(known.get(r, 0.0) or 0.0) for r in regions])


def _rt_drift(con: duckdb.DuckDBPyConnection, run_id: str, signal: str,
              cfg: dict[str, Any], step: int = 1) -> float:
    """Random-walk sd of log R_t per day for a signal, from this run's R_t history over all its
    regions (``drift_sd`` is the ceiling, and the answer without history or estimation).  A
    weekly signal's R_t history is by week: its changes per week give the sd per day / sqrt 7,
    with the estimation noise left in (weekly R_t intervals are conservative, so removing their
    width would remove more than the noise: measured in benchmarks/weekly_scenario, 90 %
    coverage at 4 weeks 0.75-0.77 with it removed, 0.86-0.88 without)."""
    ceiling = float(cfg["drift_sd"])
    if not cfg["drift_from_rt"]:
        return ceiling
    df = con.execute(
        """SELECT region, ref_date, mean,
                  (max(value) FILTER (WHERE abs(q_level - 0.95) < 1e-9)
                   - max(value) FILTER (WHERE abs(q_level - 0.05) < 1e-9)) AS width
           FROM out.rt WHERE run_id = ? AND signal = ? AND NOT coalesce(nowcast_dependent, false)
             AND region NOT IN (SELECT region FROM core.regions WHERE n_children > 0)
           GROUP BY region, ref_date, mean""", [run_id, signal]).df()
    if df.empty:
        return ceiling
    wide = df.pivot_table(index="region", columns="ref_date", values="mean")
    width = df.pivot_table(index="region", columns="ref_date", values="width")
    width = width.reindex(index=wide.index, columns=wide.columns)
    log_sd = width.to_numpy(dtype=float) / (2.0 * 1.645 * wide.to_numpy(dtype=float))
    if step != 1:
        root = float(np.sqrt(step))
        per_week = estimate_log_r_drift(
            wide.to_numpy(dtype=float), None, lag=in_steps(int(cfg["rt_window_days"]), step),
            bounds=(min(0.005, ceiling) * root, ceiling * root))
        return per_week / root
    lag = int(cfg["rt_window_days"])
    return estimate_log_r_drift(wide.to_numpy(dtype=float), log_sd, lag=lag,
                                bounds=(min(0.005, ceiling), ceiling))


def _noise_sizes(y: np.ndarray, cfg: dict[str, Any], step: int = 1,
                 leaf: np.ndarray | None = None) -> np.ndarray:
    """Negative-binomial sizes of each region's count noise, from the errors of one-day-ahead
    renewal predictions over the last six weeks (regions with too few counts: the median of the
    signal's others, all regions of the signal taken together before batching; parents are not
    counted: ``leaf``).  A weekly signal: the size of weekly counts, from one-week-ahead errors
    over the last 10 weeks."""
    if step != 1:
        tail = y[:, -(WEEKLY_NOISE_WEEKS + 12):]
        mu = one_week_ahead_expected(tail, interval_pmfs(cfg)[0], step)
        return estimate_dispersion(tail, window=WEEKLY_NOISE_WEEKS, skip_last=1, expected=mu,
                                   pool_mask=leaf)
    tail = y[:, -90:]
    mu = one_step_expected(tail, interval_pmfs(cfg)[0], int(cfg["rt_window_days"]))
    return estimate_dispersion(tail, expected=mu, pool_mask=leaf)


def _long(run_id: str, as_of: dt.date, model: str, signal: str, regions: np.ndarray,
          q_levels: list[float], q: np.ndarray, last: np.datetime64 | None = None,
          step: int = 1) -> pd.DataFrame:
    """Long quantile rows; a weekly signal (``step`` 7) has targets ``last`` + 7 h (the weeks
    after its last week) and horizon_days 7 h."""
    n, h, k = q.shape
    first = np.asarray(as_of if last is None else last, dtype="datetime64[D]")
    targets = first + step * np.arange(1, h + 1)
    # region as a categorical: integer codes, not millions of Python strings (stored as VARCHAR)
    region = pd.Categorical.from_codes(np.repeat(np.arange(n, dtype=np.int32), h * k),
                                       categories=pd.Index(regions, dtype=object))
    df = pd.DataFrame({
        "run_id": run_id, "issued_on": np.datetime64(as_of, "D"), "model": model,
        "region": region, "signal": signal,
        "target_date": np.tile(np.repeat(targets, k), n),
        "horizon_days": np.tile(np.repeat(step * np.arange(1, h + 1), k), n),
        "q_level": np.tile(q_levels, n * h), "value": q.reshape(-1)})
    return df[np.isfinite(df["value"].to_numpy())]


def _stack(res: list, parts: list[slice], n: int, cfg: dict, skipped: list[str],
           model: str, signal: str, regions: np.ndarray) -> np.ndarray:
    """Join batch results; failed batches become NaN and are recorded as skipped."""
    h, k = int(cfg["horizon_days"]), len(cfg["quantiles"])
    out = np.full((n, h, k), np.nan)
    for s, r in zip(parts, res, strict=True):
        if isinstance(r, BatchFailure):
            skipped.extend(f"{model}/{signal}/{x}: {r.message[:200]}" for x in regions[s])
        else:
            out[s] = r
    return out


class _Run:
    """What the stage collects while it works: forecasts on the adjusted scale, fits, notes."""

    def __init__(self, con: duckdb.DuckDBPyConnection, as_of: dt.date, settings: Settings,
                 run_id: str, mapper: Mapper) -> None:
        self.con, self.as_of, self.settings, self.run_id, self.mapper = (con, as_of, settings,
                                                                         run_id, mapper)
        self.results: dict[str, dict[str, np.ndarray]] = {}  # model -> signal -> (n, H, k)
        self.scenarios: dict[str, dict[str, np.ndarray]] = {}  # scenario -> signal -> (n, H, k)
        self.capacity: dict[str, np.ndarray] = {}  # signal -> (n,) aligned to its block
        self.dispersion: dict[str, np.ndarray] = {}  # signal -> (n,) count-noise sizes
        self.drift: dict[str, float] = {}
        self.skipped: list[str] = []
        self.lines: list[str] = []


# ----------------------------------------------------------------------------- the stage

def history_days(settings: Settings) -> int:
    """Days of cleaned series (ending on as_of) the models read: older days cannot change a
    forecast, so they are not loaded (series are years long, the models look back months)."""
    need = 0
    for signal in ["", *settings.per_signal]:
        cfg = settings.for_signal(signal)
        need = max(need, RENEWAL_HISTORY_DAYS,  # the renewal job's history
                   int(cfg["fit_window_weeks"]) * 7 + COMPARTMENTAL_BURN_IN_DAYS,
                   FlatBaseline().history_days(int(cfg["horizon_days"])),
                   int(cfg["max_delay_days"]) + 1)  # the nowcast window
    return need


def forecast(con: duckdb.DuckDBPyConnection, as_of: dt.date, settings: Settings, *,
             run_id: str, mapper: Mapper = serial_map) -> dict[str, Any]:
    """Fit every model and write forecast quantiles for horizons 1..H of every region × signal."""
    since = as_of - dt.timedelta(days=history_days(settings) - 1)
    blocks = cleaned_blocks(con, run_id, adjusted=True, since=since)
    weekly = sorted(set(signal_steps(con)) & set(blocks))
    if weekly:  # weeks: a longer history in days for the same number of lags and changes
        blocks.update(cleaned_blocks(con, run_id, adjusted=True, signals=weekly,
                                     since=since - dt.timedelta(days=WEEKLY_HISTORY_DAYS)))
    wanted = list(settings.get("models"))
    run = _Run(con, as_of, settings, run_id, mapper)
    corrected: dict[str, tuple[np.ndarray, tuple]] = {}
    for signal, block in blocks.items():
        nq = nowcast_quantiles(con, run_id, signal, block)
        corrected[signal] = (median_corrected(np.nan_to_num(block.values), *nq), nq)
        run.drift[signal] = _rt_drift(con, run_id, signal, settings.for_signal(signal),
                                      block.step)
        run.dispersion[signal] = _noise_sizes(corrected[signal][0], settings.for_signal(signal),
                                              block.step, leaf_mask(con, block.regions))
    if "compartmental" in wanted or ("renewal" in wanted and
                                     settings.get("renewal_depletion")):
        _run_compartmental(run, blocks, corrected, publish="compartmental" in wanted)
    for signal, block in blocks.items():
        cfg = _signal_cfg(settings, signal, block)
        y = corrected[signal][0]
        parts = batches(len(block.regions), int(cfg["batch_regions"]))
        if "baseline" in wanted:
            res = mapper(_baseline_job, [(y[s], cfg, block.step) for s in parts])
            run.results.setdefault("baseline", {})[signal] = _stack(
                res, parts, len(block.regions), cfg, run.skipped, "baseline", signal,
                block.regions)
        if "renewal" in wanted:
            _run_renewal(run, signal, block, y, parts)
    _ensembles(run, blocks, wanted)
    n_rows = 0
    rec = Reconciler(con, settings)  # parents: bottom-up from their leaves (pipeline/reconcile)
    for model, per_signal in run.results.items():
        for signal, q in per_signal.items():
            block = blocks[signal]
            q_out = _to_report_units(con, run_id, signal, block.regions, as_of, q, block.step)
            q_out = rec.apply(signal, block.regions, model, q_out)
            last = None if block.step == 1 else block.dates[-1]
            n_rows += insert_df(con, "out.forecasts", _long(
                run_id, as_of, model, signal, block.regions,
                settings.for_signal(signal)["quantiles"], q_out, last, block.step))
    _publish_scenarios(run, blocks, rec)
    insert_df(con, "out.fits", rec.fits_frame(run_id))
    run.lines.insert(0, f"{n_rows} quantile rows for {', '.join(run.results) or 'no models'}")
    out: dict[str, Any] = {"line": "; ".join(run.lines), "rows": n_rows}
    if run.skipped:
        out["skipped"] = run.skipped
    return out


def _signal_cfg(settings: Settings, signal: str, block: SeriesBlock) -> dict[str, Any]:
    """One signal's settings as the stage uses them (a weekly signal's horizon in weeks)."""
    cfg = settings.for_signal(signal)
    return cfg if block.step == 1 else in_weeks(cfg, block.step)


def _run_renewal(run: _Run, signal: str, block: SeriesBlock, y: np.ndarray,
                 parts: list[slice]) -> None:
    """Renewal forecasts of one signal: pooled R_t and dispersion over all regions first."""
    con, cfg = run.con, run.settings.for_signal(signal)
    step = block.step
    seed = int(cfg["seed"])
    n_draws = int(cfg["forecast_draws"])
    eventual, rep, start = nowcast_draws_for(con, run.run_id, signal, block, n_draws, seed)
    values = np.nan_to_num(block.values)
    leaf = leaf_mask(con, block.regions)  # parents' data are their leaves': pool leaves only
    pooled_r = _pooled_r(values[leaf], eventual[:, leaf], rep[leaf], start, cfg, signal, step)
    dispersion = run.dispersion[signal]
    capacity = run.capacity.get(signal, np.full(len(block.regions), np.nan))
    if not cfg["renewal_depletion"]:
        capacity = np.full(len(block.regions), np.nan)
    seeds = series_seeds(seed, signal, block.regions)
    jobs = [(values[s], eventual[:, s], rep[s], start, cfg, seeds[s], pooled_r,
             dispersion[s], capacity[s], run.drift[signal], step) for s in parts]
    res = run.mapper(_renewal_job, jobs)
    _renewal_fits(run, signal, block, parts, res, dispersion, capacity)
    res = [r if isinstance(r, BatchFailure) else r["q"] for r in res]
    run.results.setdefault("renewal", {})[signal] = _stack(
        res, parts, len(block.regions), _signal_cfg(run.settings, signal, block), run.skipped,
        "renewal", signal, block.regions)


def _pooled_r(values: np.ndarray, eventual: np.ndarray, rep: np.ndarray, start: int,
              cfg: dict[str, Any], signal: str, step: int = 1) -> np.ndarray | None:
    """Draws of the R_t of all the signal's regions pooled (their summed incidence), for the
    regions too small for their own; summed in chunks, so memory stays bounded."""
    total = None
    if step != 1:
        cfg = _daily_view(cfg, step)
    for lo in range(0, values.shape[0], 250):
        s = slice(lo, lo + 250)
        d, _ = _renewal_draws(values[s], eventual[:, s], rep[s], start, cfg, step)
        part = d.sum(axis=1, keepdims=True)
        total = part if total is None else total + part
    if total is None:
        return None
    pmfs = interval_pmfs(cfg)
    est = _cori(cfg).fit_draws(total, pmfs if len(pmfs) > 1 else pmfs[0])
    rnd = SeriesRandom(series_seeds(int(cfg["seed"]), signal, [POOLED]), 1)
    r = _last_day_r(est, int(cfg["forecast_draws"]), rnd)[:, 0]
    return r if np.all(np.isfinite(r)) else None


def _renewal_fits(run: _Run, signal: str, block: SeriesBlock, parts: list[slice], res: list,
                  dispersion: np.ndarray, capacity: np.ndarray) -> None:
    """One out.fits row per region: where the projected R_t came from, and the noise used."""
    rows = []
    drift = run.drift[signal]
    msgs = {"own": "R_t of the region itself",
            "pooled": "too few counts for its own R_t: R_t of the signal's regions pooled",
            "none": "too few counts, no renewal forecast"}
    for s, r in zip(parts, res, strict=True):
        if isinstance(r, BatchFailure):
            continue
        for j, (region, src, med) in enumerate(zip(block.regions[s], r["source"],
                                                   r["r_median"], strict=True)):
            cap = float(capacity[s][j])
            params = {"r_source": src, "r_median": float(med),
                      "dispersion": float(dispersion[s][j]), "log_r_drift_sd": drift,
                      "damping_days": float(run.settings.get("renewal_damping_days", signal)),
                      "damping_spread": float(run.settings.get("renewal_damping_spread",
                                                               signal)),
                      "depletion_capacity": cap if np.isfinite(cap) else None}
            rows.append((region, json.dumps(params), src != "none", msgs[src]))
    if rows:
        df = pd.DataFrame(rows, columns=["region", "params_json", "converged", "message"])
        df.insert(0, "run_id", run.run_id)
        df.insert(2, "model", "renewal")
        df["objective"] = np.nan
        df["signal"] = signal
        insert_df(run.con, "out.fits", df)


def _run_compartmental(run: _Run, blocks: dict[str, SeriesBlock],
                       corrected: dict[str, tuple], publish: bool) -> None:
    """Joint fit per region over the signals the model knows; fail soft per region.  Also the
    scenarios and the susceptible pool the renewal projection depletes."""
    con, settings = run.con, run.settings
    sigs = [s for s in COMPARTMENTAL_SIGNALS if s in blocks and blocks[s].step == 1]
    if publish:
        _weekly_refusals(run, blocks)
    if not sigs:
        run.lines.append("compartmental: no cases/admissions/deaths signal")
        return
    cfg = settings.for_signal(sigs[0])
    regions = np.unique(np.concatenate([blocks[s].regions for s in sigs]))
    n_days = int(cfg["fit_window_weeks"]) * 7 + COMPARTMENTAL_BURN_IN_DAYS
    first_day = run.as_of - dt.timedelta(days=n_days - 1)
    series: dict[str, np.ndarray] = {}
    prior: dict[str, np.ndarray] = {}
    noise: dict[str, np.ndarray] = {}
    for s in sigs:
        block = blocks[s]
        y = corrected[s][0]
        arr = np.full((len(regions), n_days), np.nan)
        pos = np.searchsorted(regions, block.regions)
        take = y[:, -n_days:]
        arr[pos, n_days - take.shape[1]:] = take
        series[s] = arr
        noise[s] = np.full(len(regions), np.nan)
        noise[s][pos] = run.dispersion[s]
        prior[s] = _history_totals(con, run.run_id, first_day, s, regions)
    pop, pop_missing = _populations(con, regions)
    imm_regions = dict(cfg["immune_fraction_regions"])
    immune = np.array([imm_regions.get(r, float(cfg["immune_fraction"])) for r in regions])
    init = _previous_params(con, run.as_of, regions)
    parts = batches(len(regions), int(cfg["batch_regions"]))
    seeds = series_seeds(int(cfg["seed"]), "compartmental", regions)
    scen = multipliers(list(cfg["scenarios"]), run.as_of, regions, int(cfg["horizon_days"])) \
        if publish else []
    jobs = [({s: series[s][p] for s in sigs}, pop[p], _init_batch(init[p]),
             {s: prior[s][p] for s in sigs}, immune[p], cfg, seeds[p], run.drift[sigs[0]],
             [(name, m[p]) for name, m in scen], {s: noise[s][p] for s in sigs})
            for p in parts]
    res = run.mapper(_compartmental_job, jobs)
    h, k = int(cfg["horizon_days"]), len(cfg["quantiles"])
    per_signal = {s: np.full((len(regions), h, k), np.nan) for s in sigs}
    per_scen = {name: {s: np.full((len(regions), h, k), np.nan) for s in sigs}
                for name, _ in scen}
    capacity = {s: np.full(len(regions), np.nan) for s in sigs}
    fits, n_conv = [], 0
    for p, r in zip(parts, res, strict=True):
        regs = regions[p]
        if isinstance(r, BatchFailure):
            run.skipped.extend(f"compartmental/{x}: {r.message[:200]}" for x in regs)
            fits.append(pd.DataFrame({"region": regs, "params_json": None,
                                      "objective": np.nan, "converged": False,
                                      "message": f"batch failed: {r.message[:300]}"}))
            continue
        conv = np.asarray(r["converged"], dtype=bool)
        for s in sigs:
            per_signal[s][p] = r["q"][s]
            capacity[s][p] = np.where(conv, r["capacity"][s], np.nan)
            for name in per_scen:
                per_scen[name][s][p] = r["scenarios"][name][s]
        n_conv += int(conv.sum())
        msgs = [m + ("; population unknown, 1,000,000 assumed" if pm else "")
                for m, pm in zip(r["message"], pop_missing[p], strict=True)]
        fits.append(pd.DataFrame({
            "region": regs, "params_json": [json.dumps(x) for x in _per_region(r["params"],
                                                                                len(regs))],
            "objective": r["objective"], "converged": conv, "message": msgs}))
    for s in sigs:
        pos = np.searchsorted(regions, blocks[s].regions)
        run.capacity[s] = capacity[s][pos]
        if publish:
            run.results.setdefault("compartmental", {})[s] = per_signal[s][pos]
            for name in per_scen:
                run.scenarios.setdefault(name, {})[s] = per_scen[name][s][pos]
    if not publish:
        return
    if fits:
        f = pd.concat(fits, ignore_index=True)
        f.insert(0, "run_id", run.run_id)
        f.insert(2, "model", "compartmental")
        f["signal"] = None
        insert_df(con, "out.fits", f)
    run.lines.append(f"compartmental: {n_conv}/{len(regions)} regions converged")


def _weekly_refusals(run: _Run, blocks: dict[str, SeriesBlock]) -> None:
    """One ``out.fits`` row per region of every weekly signal the compartmental model would
    otherwise fit: it is not fitted to weekly signals, and says so."""
    for s in COMPARTMENTAL_SIGNALS:
        if s in blocks and blocks[s].step != 1:
            regions = blocks[s].regions
            insert_df(run.con, "out.fits", pd.DataFrame({
                "run_id": run.run_id, "region": regions, "model": "compartmental",
                "params_json": None, "objective": np.nan, "converged": False,
                "message": WEEKLY_MESSAGE, "signal": s}))
            run.lines.append(f"compartmental: {s} is weekly, not fitted")


def _ensembles(run: _Run, blocks: dict[str, SeriesBlock], wanted: list[str]) -> None:
    """The plain ensemble and the scoreboard-weighted one, from the members (never the
    baseline); weights published in out.ensemble_weights."""
    members = {s: [m for m in MEMBERS if s in run.results.get(m, {})] for s in blocks}
    if "ensemble" in wanted:
        for signal, mem in members.items():
            if mem:
                how = run.settings.get("ensemble_method", signal)
                run.results.setdefault("ensemble", {})[signal] = quantile_ensemble(
                    [run.results[m][signal] for m in mem], method=how)
    if "ensemble_weighted" not in wanted or not any(members.values()):
        return
    table = scoreboard_weights(run.con, run.as_of, run.settings, members)
    for signal, mem in members.items():
        if not mem:
            continue
        stack = [run.results[m][signal] for m in mem]
        h = stack[0].shape[1]
        step = blocks[signal].step
        w = weight_array(table, signal, mem, step * h)[step - 1::step]  # horizon h: day step h
        out = np.empty_like(stack[0])
        for day in range(h):
            out[:, day:day + 1] = quantile_ensemble([a[:, day:day + 1] for a in stack],
                                                    method="mean", weights=w[day])
        run.results.setdefault("ensemble_weighted", {})[signal] = out
    if len(table):
        table = table.copy()
        table.insert(0, "run_id", run.run_id)
        table.insert(1, "issued_on", np.datetime64(run.as_of, "D"))
        insert_df(run.con, "out.ensemble_weights", table)
        basis = table.groupby("signal")["basis"].apply(
            lambda b: "scores" if b.str.startswith("inverse").any() else "equal").to_dict()
        run.lines.append("ensemble weights: " + ", ".join(f"{s} {v}" for s, v in basis.items()))


def _publish_scenarios(run: _Run, blocks: dict[str, SeriesBlock], rec: Reconciler) -> None:
    """Scenario projections in report units → out.scenarios."""
    if not run.scenarios:
        return
    frames = []
    for sc in run.settings.get("scenarios"):
        name = str(sc["name"])
        for signal, q in run.scenarios.get(name, {}).items():
            block = blocks[signal]
            cfg = run.settings.for_signal(signal)
            change = multipliers([sc], run.as_of, block.regions, q.shape[1])[0][1]
            q_out = _to_report_units(run.con, run.run_id, signal, block.regions, run.as_of, q)
            q_out = rec.apply(signal, block.regions, f"scenario {name}", q_out)
            keep = np.ones(len(block.regions), dtype=bool) if "regions" not in sc else \
                np.isin(block.regions.astype(object), list(sc["regions"]))  # its regions only
            frames.append(scenario_frame(run.run_id, run.as_of, name, describe(sc, run.as_of),
                                         signal, block.regions[keep], cfg["quantiles"],
                                         q_out[keep], change[keep]))
    n = write_scenarios(run.con, frames)
    run.lines.append(f"{len(run.scenarios)} scenario(s): {n} rows")


def _init_batch(init: list[dict | None]) -> list[dict | None] | None:
    return init if any(x is not None for x in init) else None


def _per_region(params: dict[str, Any], n: int) -> list[dict]:
    """The model's ``params_`` split into one JSON-ready dict per region (warm-start input)."""
    regions = list(params.get("regions", []))
    shared = {k: v for k, v in params.items() if k != "regions"}
    return [{**shared, **r} for r in regions] if len(regions) == n else [params] * n
