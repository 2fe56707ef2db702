"""Stage 6 — forecast: fit the models, publish forecast quantiles → ``out.fits``, ``out.forecasts``.

Models (``models`` setting): ``baseline`` (flat level, empirical changes), ``renewal`` (R_t
projected with the renewal equation), ``compartmental`` (S-E-I-R-D refitted jointly to the
cases, admissions and deaths of each region, warm-started from the previous run's fit) and
``ensemble`` (quantile average of the others).  Every model forecasts the weekday-adjusted,
nowcast-corrected series; the quantiles are then multiplied by the weekday effect of each target
date, so forecasts are in the same units as the reports they will be scored against.
Mathematics: :mod:`tallywave.models.baseline`, :mod:`tallywave.models.renewal`, :mod:`tallywave.models.compartmental`,
:mod:`tallywave.models.ensemble`.
"""

from __future__ import annotations

import datetime as dt
import json
from typing import Any

import duckdb
import numpy as np
import pandas as pd

from tallywave.models.baseline import FlatBaseline
from tallywave.models.compartmental import CompartmentalModel
from tallywave.models.ensemble import quantile_ensemble
from tallywave.models.incidence import incidence_draws, median_corrected
from tallywave.models.renewal import CoriEstimator
from tallywave.models.renewal_forecast import RenewalForecaster
from tallywave.pipeline.clean import cleaned_blocks
from tallywave.pipeline.frames import BatchFailure, Mapper, SeriesBlock, batches, serial_map
from tallywave.pipeline.nowcast import nowcast_quantiles
from tallywave.pipeline.settings import Settings
from tallywave.pipeline.store import insert_df
from tallywave.pipeline.transmission import interval_pmfs, nowcast_draws_for, rt_span

COMPARTMENTAL_SIGNALS = ("cases", "admissions", "deaths")
RENEWAL_HISTORY_DAYS = 90
COMPARTMENTAL_BURN_IN_DAYS = 60  # history before the fit window (burn-in, people infected)
DEFAULT_POPULATION = 1_000_000.0  # used (and said in out.fits) when a region's size is unknown


# ----------------------------------------------------------------------------- pure batch jobs

def _baseline_job(args: tuple) -> np.ndarray:
    y, cfg, seed = args
    m = FlatBaseline(q_levels=cfg["quantiles"], seed=seed).fit(y)
    return m.quantiles(int(cfg["horizon_days"]), cfg["quantiles"])


def _cori(cfg: dict[str, Any]) -> CoriEstimator:
    mean, sd = float(cfg["rt_prior_mean"]), float(cfg["rt_prior_sd"])
    return CoriEstimator(window=int(cfg["rt_window_days"]), prior_shape=(mean / sd) ** 2,
                         prior_scale=sd ** 2 / mean, min_infections=float(cfg["rt_min_infections"]))


def _renewal_job(args: tuple) -> dict[str, Any]:
    """Renewal forecasts for one batch: R_t draws at the last day (mixed over nowcast draws)
    projected forward; a region too small for its own R_t uses the R_t of the batch's regions
    pooled (their summed incidence), and says so."""
    values, eventual, rep, start, cfg, seed = args
    # Only the last days matter: the last day's R_t (its window and the interval before it),
    # the projection's lags (shorter) and the nowcast window; older days change nothing.
    need = max(rt_span(cfg), values.shape[1] - start)
    t_keep = min(values.shape[1], RENEWAL_HISTORY_DAYS, need)
    cut = values.shape[1] - t_keep
    values = np.nan_to_num(values[:, cut:])
    n_draws = int(cfg["forecast_draws"])
    # the nowcast's joint draws, reused cyclically when fewer than n_draws were kept
    eventual = eventual[np.arange(n_draws) % max(eventual.shape[0], 1)]
    draws = incidence_draws(values, eventual, rep, start - cut)
    pmfs = interval_pmfs(cfg)
    interval = pmfs if len(pmfs) > 1 else pmfs[0]
    r = _cori(cfg).fit_draws(draws, interval).sample(n_draws, day=-1, seed=seed)
    own = np.all(np.isfinite(r), axis=0)
    source = np.where(own, "own", "none").astype(object)
    if not own.all():
        pooled = _cori(cfg).fit_draws(draws.sum(axis=1, keepdims=True), interval)
        rp = pooled.sample(n_draws, day=-1, seed=seed + 1)
        if np.all(np.isfinite(rp)):
            r[:, ~own] = rp
            source[~own] = "pooled"
    ok = source != "none"
    r = np.where(ok[None], r, 1.0)
    fc = RenewalForecaster(horizon=int(cfg["horizon_days"]), log_r_sd=float(cfg["drift_sd"]),
                           dispersion=20.0, seed=seed)
    out = fc.fit(draws, pmfs[0], r).quantiles(cfg["quantiles"])
    out[~ok] = np.nan
    return {"q": out, "source": source, "r_median": np.median(r, axis=0)}


def _compartmental_job(args: tuple) -> dict[str, Any]:
    observed, population, init, cfg, seed = args
    model = CompartmentalModel(latent_days=float(cfg["latent_days"]),
                               infectious_days=float(cfg["infectious_days"]),
                               window_weeks=int(cfg["fit_window_weeks"]),
                               drift_sd=float(cfg["drift_sd"]) * np.sqrt(7.0),
                               n_draws=int(cfg["forecast_draws"]), q_levels=cfg["quantiles"],
                               seed=seed)
    model.fit(observed, population, init=init)
    fc = model.forecast(int(cfg["horizon_days"]), cfg["quantiles"], rng=seed)
    return {"q": fc, "params": model.params_, "objective": np.asarray(model.objective_),
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


def _long(run_id: str, as_of: dt.date, model: str, signal: str, regions: np.ndarray,
          q_levels: list[float], q: np.ndarray) -> pd.DataFrame:
    n, h, k = q.shape
    targets = np.datetime64(as_of, "D") + np.arange(1, h + 1)
    # region as a categorical: integer codes, not millions of Python strings (stored as VARCHAR)
    region = pd.Categorical.from_codes(np.repeat(np.arange(n, dtype=np.int32), h * k),
                                       categories=pd.Index(regions, dtype=object))
    df = pd.DataFrame({
        "run_id": run_id, "issued_on": np.datetime64(as_of, "D"), "model": model,
        "region": region, "signal": signal,
        "target_date": np.tile(np.repeat(targets, k), n),
        "horizon_days": np.tile(np.repeat(np.arange(1, h + 1), k), n),
        "q_level": np.tile(q_levels, n * h), "value": q.reshape(-1)})
    return df[np.isfinite(df["value"].to_numpy())]


# ----------------------------------------------------------------------------- the stage

def history_days(settings: Settings) -> int:
    """Days of cleaned series (ending on as_of) the models read: older days cannot change a
    forecast, so they are not loaded (series are years long, the models look back months)."""
    need = 0
    for signal in ["", *settings.per_signal]:
        cfg = settings.for_signal(signal)
        need = max(need, RENEWAL_HISTORY_DAYS,  # the renewal job's history
                   int(cfg["fit_window_weeks"]) * 7 + COMPARTMENTAL_BURN_IN_DAYS,
                   FlatBaseline().window_days + 8,  # changes of the 7-day mean, one step back
                   int(cfg["max_delay_days"]) + 1)  # the nowcast window
    return need


def forecast(con: duckdb.DuckDBPyConnection, as_of: dt.date, settings: Settings, *,
             run_id: str, mapper: Mapper = serial_map) -> dict[str, Any]:
    """Fit every model and write forecast quantiles for horizons 1..H of every region × signal."""
    blocks = cleaned_blocks(con, run_id, adjusted=True,
                            since=as_of - dt.timedelta(days=history_days(settings) - 1))
    wanted = list(settings.get("models"))
    results: dict[str, dict[str, np.ndarray]] = {}  # model -> signal -> (n, H, k) adjusted
    corrected: dict[str, tuple[SeriesBlock, tuple]] = {}
    skipped: list[str] = []
    lines: list[str] = []
    for signal, block in blocks.items():
        cfg = settings.for_signal(signal)
        nq = nowcast_quantiles(con, run_id, signal, block)
        y = median_corrected(np.nan_to_num(block.values), *nq)
        corrected[signal] = (block, nq)
        parts = batches(len(block.regions), int(cfg["batch_regions"]))
        seed = int(cfg["seed"])
        if "baseline" in wanted:
            res = mapper(_baseline_job, [(y[s], cfg, seed + i) for i, s in enumerate(parts)])
            results.setdefault("baseline", {})[signal] = _stack(res, parts, block, cfg,
                                                               skipped, "baseline", signal)
        if "renewal" in wanted:
            eventual, rep, start = nowcast_draws_for(con, run_id, signal, block,
                                                     int(cfg["forecast_draws"]), seed)
            res = mapper(_renewal_job, [(np.nan_to_num(block.values[s]), eventual[:, s], rep[s],
                                         start, cfg, seed + i) for i, s in enumerate(parts)])
            _renewal_fits(con, run_id, signal, block, parts, res)
            res = [r if isinstance(r, BatchFailure) else r["q"] for r in res]
            results.setdefault("renewal", {})[signal] = _stack(res, parts, block, cfg,
                                                              skipped, "renewal", signal)
    if "compartmental" in wanted:
        _run_compartmental(con, as_of, settings, run_id, blocks, corrected, results, mapper,
                           skipped, lines)
    if "ensemble" in wanted:
        for signal in blocks:
            members = [results[m][signal] for m in results if signal in results[m]]
            if members:
                how = settings.get("ensemble_method", signal)
                results.setdefault("ensemble", {})[signal] = quantile_ensemble(members,
                                                                               method=how)
    n_rows = 0
    for model, per_signal in results.items():
        for signal, q in per_signal.items():
            block = blocks[signal]
            cfg = settings.for_signal(signal)
            h = q.shape[1]
            targets = np.datetime64(as_of, "D") + np.arange(1, h + 1)
            factor = _weekday_factors(con, run_id, signal, block.regions, targets)
            q_out = np.maximum(q * factor[..., None], 0.0)
            q_out = np.maximum.accumulate(np.nan_to_num(q_out, nan=-1.0), axis=-1)
            q_out[q_out < 0] = np.nan
            n_rows += insert_df(con, "out.forecasts", _long(run_id, as_of, model, signal,
                                                            block.regions, cfg["quantiles"],
                                                            q_out))
    lines.insert(0, f"{n_rows} quantile rows for {', '.join(results) or 'no models'}")
    out = {"line": "; ".join(lines), "rows": n_rows}
    if skipped:
        out["skipped"] = skipped
    return out


def _renewal_fits(con: duckdb.DuckDBPyConnection, run_id: str, signal: str,
                  block: SeriesBlock, parts: list[slice], res: list) -> None:
    """One out.fits row per region: where the projected R_t came from."""
    rows = []
    for s, r in zip(parts, res, strict=True):
        if isinstance(r, BatchFailure):
            continue
        for region, src, med in zip(block.regions[s], r["source"], r["r_median"], strict=True):
            msg = {"own": "R_t of the region itself",
                   "pooled": "too few counts for its own R_t: R_t of the pooled regions used",
                   "none": "too few counts, no renewal forecast"}[src]
            rows.append((region, json.dumps({"r_source": src, "r_median": float(med)}),
                         src != "none", msg))
    if rows:
        df = pd.DataFrame(rows, columns=["region", "params_json", "converged", "message"])
        df.insert(0, "run_id", run_id)
        df.insert(2, "model", "renewal")
        df["objective"] = np.nan
        df["signal"] = signal
        insert_df(con, "out.fits", df)


def _stack(res: list, parts: list[slice], block: SeriesBlock, cfg: dict, skipped: list[str],
           model: str, signal: str) -> np.ndarray:
    """Join batch results; failed batches become NaN and are recorded as skipped."""
    h, k = int(cfg["horizon_days"]), len(cfg["quantiles"])
    out = np.full((len(block.regions), h, k), np.nan)
    for s, r in zip(parts, res, strict=True):
        if isinstance(r, BatchFailure):
            skipped.extend(f"{model}/{signal}/{x}: {r.message[:200]}" for x in block.regions[s])
        else:
            out[s] = r
    return out


def _run_compartmental(con: duckdb.DuckDBPyConnection, as_of: dt.date, settings: Settings,
                       run_id: str, blocks: dict[str, SeriesBlock],
                       corrected: dict[str, tuple], results: dict, mapper: Mapper,
                       skipped: list[str], lines: list[str]) -> None:
    """Joint fit per region over the signals the model knows; fail soft per region."""
    sigs = [s for s in COMPARTMENTAL_SIGNALS if s in blocks]
    if not sigs:
        lines.append("compartmental: no cases/admissions/deaths signal")
        return
    cfg = settings.for_signal(sigs[0])
    regions = np.unique(np.concatenate([blocks[s].regions for s in sigs]))
    n_days = int(cfg["fit_window_weeks"]) * 7 + COMPARTMENTAL_BURN_IN_DAYS
    series: dict[str, np.ndarray] = {}
    for s in sigs:
        block, nq = corrected[s]
        y = median_corrected(np.nan_to_num(block.values), *nq)
        arr = np.full((len(regions), n_days), np.nan)
        pos = np.searchsorted(regions, block.regions)
        take = y[:, -n_days:]
        arr[pos, n_days - take.shape[1]:] = take
        series[s] = arr
    pop, pop_missing = _populations(con, regions)
    init = _previous_params(con, as_of, regions)
    parts = batches(len(regions), int(cfg["batch_regions"]))
    jobs = [({s: series[s][p] for s in sigs}, pop[p], _init_batch(init[p]), cfg,
             int(cfg["seed"]) + i) for i, p in enumerate(parts)]
    res = mapper(_compartmental_job, jobs)
    fits = []
    h, k = int(cfg["horizon_days"]), len(cfg["quantiles"])
    per_signal = {s: np.full((len(regions), h, k), np.nan) for s in sigs}
    n_conv = 0
    for p, r in zip(parts, res, strict=True):
        regs = regions[p]
        if isinstance(r, BatchFailure):
            skipped.extend(f"compartmental/{x}: {r.message[:200]}" for x in regs)
            fits.append(pd.DataFrame({"region": regs, "params_json": None,
                                      "objective": np.nan, "converged": False,
                                      "message": f"batch failed: {r.message[:300]}"}))
            continue
        for s in sigs:
            per_signal[s][p] = r["q"][s]
        conv = np.asarray(r["converged"], dtype=bool)
        n_conv += int(conv.sum())
        msgs = [m + ("; population unknown, 1,000,000 assumed" if pm else "")
                for m, pm in zip(r["message"], pop_missing[p], strict=True)]
        fits.append(pd.DataFrame({
            "region": regs, "params_json": [json.dumps(x) for x in _per_region(r["params"],
                                                                                len(regs))],
            "objective": r["objective"], "converged": conv, "message": msgs}))
    if fits:
        f = pd.concat(fits, ignore_index=True)
        f.insert(0, "run_id", run_id)
        f.insert(2, "model", "compartmental")
        f["signal"] = None
        insert_df(con, "out.fits", f)
    for s in sigs:
        block = blocks[s]
        pos = np.searchsorted(regions, block.regions)
        results.setdefault("compartmental", {})[s] = per_signal[s][pos]
    lines.append(f"compartmental: {n_conv}/{len(regions)} regions converged")


def _init_batch(init: list[dict | None]) -> list[dict | None] | None:
    return init if any(x is not None for x in init) else None


def _per_region(params: dict[str, Any], n: int) -> list[dict]:
    """The model's ``params_`` split into one JSON-ready dict per region (warm-start input)."""
    regions = list(params.get("regions", []))
    shared = {k: v for k, v in params.items() if k != "regions"}
    return [{**shared, **r} for r in regions] if len(regions) == n else [params] * n
