"""Stage 4 — nowcast: vintages → reporting triangle → delay pmf → eventual counts with intervals.

Reads ``core.observations`` (only vintages with ``as_of <= as_of``) and writes ``out.delay_pmf``,
``out.delay_drift``, ``out.nowcast`` and one ``out.fits`` row per region × signal (model
``nowcast``) saying whether the region's own delay distribution or a pooled one was used.
Mathematics: :mod:`tallywave.models.delay`.
"""

from __future__ import annotations

import datetime as dt
import json
from dataclasses import dataclass
from typing import Any

import duckdb
import numpy as np
import pandas as pd

from tallywave.models.delay import ChainLadder, DelayGLM, DelayNowcaster, mean_delay_by_week
from tallywave.pipeline.frames import BatchFailure, Mapper, SeriesBlock, batches, serial_map
from tallywave.pipeline.settings import Settings
from tallywave.pipeline.store import insert_df
from tallywave.pipeline.vintages import vintages_as_of

NOWCAST_LEVELS = [0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975]

#: Joint predictive draws of the eventual counts of the nowcast window, handed to the R_t and
#: forecast stages of the same run (a connection-scoped temporary table: large, and only
#: meaningful inside the run; ``out.nowcast`` holds the published quantiles).
DRAWS_DDL = ("CREATE OR REPLACE TEMP TABLE nowcast_draws (region VARCHAR, signal VARCHAR, "
             "ref_date DATE, draw INTEGER, value DOUBLE)")


@dataclass
class Triangle:
    """Reporting triangle of one signal: ``cells[s, t, d]`` = events of ref date t reported at
    delay d (NaN where not observable on as_of or before the first snapshot)."""

    signal: str
    regions: np.ndarray
    dates: np.ndarray  # (n_ref,) datetime64[D]
    cells: np.ndarray  # (n_regions, n_ref, D+1)
    latest: np.ndarray  # (n_regions, n_ref) value known on as_of (all delays, incl. > D)


def build_triangles(vintages: pd.DataFrame, as_of: dt.date, max_delay: int, n_ref: int,
                    first_as_of: dict[str, dt.date]) -> dict[str, Triangle]:
    """Turn vintage rows (region, signal, ref_date, as_of, value) into one triangle per signal.

    The value of a ref date known at delay d is the last vintage with as_of <= ref_date + d; the
    cell is its increment over delay d-1.  Reference dates before a signal's first snapshot were
    never seen at small delays, so their rows are left unobserved (NaN) rather than guessed.
    """
    out: dict[str, Triangle] = {}
    end = np.datetime64(as_of, "D")
    start = end - np.timedelta64(n_ref - 1, "D")
    dates = np.arange(start, end + np.timedelta64(1, "D"), dtype="datetime64[D]")
    D = max_delay
    for signal, g in vintages.groupby("signal", sort=True):
        ref = g["ref_date"].to_numpy().astype("datetime64[D]")
        keep = ref >= start
        g = g[keep]
        ref = ref[keep]
        regions, r_idx = np.unique(g["region"].to_numpy().astype(str), return_inverse=True)
        t_idx = (ref - start).astype(int)
        delay = (g["as_of"].to_numpy().astype("datetime64[D]") - ref).astype(int)
        vals = g["value"].to_numpy(dtype=float)
        n = len(regions)
        known = np.full((n, n_ref, D + 1), np.nan)
        latest = np.full((n, n_ref), np.nan)
        # rows are sorted by as_of within a key, so later writes win
        order = np.lexsort((g["as_of"].to_numpy(), t_idx, r_idx))
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
        cells = np.diff(filled, axis=2, prepend=0.0)
        # not observable yet on as_of
        t_grid = np.arange(n_ref)[:, None]
        d_grid = np.arange(D + 1)[None, :]
        unobservable = t_grid + d_grid > n_ref - 1
        cells[:, unobservable] = np.nan
        # reference dates before the first snapshot: never seen at small delays
        fa = first_as_of.get(str(signal))
        if fa is not None:
            censored = dates < np.datetime64(fa, "D")
            cells[:, censored, :] = np.nan
        latest = np.where(np.isnan(latest), 0.0, latest)
        out[str(signal)] = Triangle(str(signal), regions, dates, cells, latest)
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
        t = int((np.datetime64(ref_date, "D") - tri.dates[0]).astype(int))
        if region in pos and 0 <= t < len(tri.dates):
            tri.cells[pos[region], t, :] = np.nan
            n += 1
    return n


def _fit_block(args: tuple[Triangle, dict[str, Any], int]) -> dict[str, Any]:
    """Fit the delay model and draw the nowcast for one batch of regions (pure; runs in tasks)."""
    tri, cfg, seed = args
    rng = np.random.default_rng(seed)
    D = int(cfg["max_delay_days"])
    if cfg["nowcast_method"] == "chain_ladder":
        model: Any = ChainLadder(max_delay=D)
    else:
        weekday = int((tri.dates[0].astype("datetime64[D]").astype(int) + 3) % 7)  # Monday = 0
        model = DelayGLM(family=cfg["nowcast_family"], weekday_effect=cfg["nowcast_weekday_effect"],
                         first_ref_weekday=weekday, max_delay=D,
                         pool_below=float(cfg["nowcast_pool_below"]))
    nc = DelayNowcaster(model=model, family=cfg["nowcast_family"]).fit(tri.cells,
                                                                      reported=tri.latest)
    # one set of joint draws gives both the published quantiles and the draws handed on to R_t
    # and the forecasts, so both describe the same predictive distribution
    draws = nc.sample(int(cfg["nowcast_draws"]), rng=rng)  # (m, n, n_ref)
    q = np.moveaxis(np.quantile(draws, NOWCAST_LEVELS, axis=0), 0, -1)
    q = np.maximum.accumulate(q, axis=-1)
    keep = min(int(cfg["nowcast_joint_draws"]), draws.shape[0])
    joint = np.ascontiguousarray(np.moveaxis(draws[:keep, :, -(D + 1):], 0, -1))
    weekly = mean_delay_by_week(tri.cells)
    return {"pmf": nc.delay_pmf_, "q": q, "pooling": np.asarray(nc.pooling_, dtype=str),
            "drift": (weekly.mean_delay, tri.dates[weekly.week_first_row]),
            "draws": joint.astype(np.float32)}


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
    for signal in sorted(firsts):
        cfg = settings.for_signal(signal)
        D = int(cfg["max_delay_days"])
        n_ref = max(int(cfg["nowcast_training_days"]), D + 7)
        since = as_of - dt.timedelta(days=n_ref - 1)
        vint = vintages_as_of(con, as_of, since=since, signals=[signal])
        vint = vint[vint["signal"] == signal]
        if vint.empty:
            continue
        tri = build_triangles(vint, as_of, D, n_ref, firsts)[signal]
        _mask_backlog_rows(con, run_id, signal, tri)
        parts = batches(len(tri.regions), int(cfg["batch_regions"]))
        jobs = [(Triangle(signal, tri.regions[s], tri.dates, tri.cells[s], tri.latest[s]), cfg,
                 int(cfg["seed"]) + i) for i, s in enumerate(parts)]
        results = mapper(_fit_block, jobs)
        good = [(s, r) for s, r in zip(parts, results, strict=True) if not isinstance(r, BatchFailure)]
        for s, r in zip(parts, results, strict=True):
            if isinstance(r, BatchFailure):
                skipped.extend(f"{signal}/{x}: {r.message[:200]}" for x in tri.regions[s])
        if not good:
            continue
        keep_rows = np.concatenate([np.arange(len(tri.regions))[s] for s, _ in good])
        tri = Triangle(signal, tri.regions[keep_rows], tri.dates, tri.cells[keep_rows],
                       tri.latest[keep_rows])
        pmf = np.concatenate([r["pmf"] for _, r in good])
        q = np.concatenate([r["q"] for _, r in good])
        joint = np.concatenate([r["draws"] for _, r in good])  # (n, D+1, m)
        pooling = np.concatenate([r["pooling"] for _, r in good])
        drift_dates = good[0][1]["drift"][1]
        drift = np.concatenate([r["drift"][0] for _, r in good])
        n_reg = len(tri.regions)
        # Too little history (e.g. the first snapshot of a feed): no delay distribution can be
        # estimated; say so, publish no pmf, and let the nowcast equal what is reported.
        usable = np.isfinite(pmf).all(axis=1) & (np.nansum(pmf, axis=1) > 0.5)
        pooling = np.where(usable, pooling, "insufficient")
        q = np.where(usable[:, None, None] & np.isfinite(q), q, tri.latest[..., None])
        # out.delay_pmf
        insert_df(con, "out.delay_pmf", pd.DataFrame({
            "run_id": run_id, "region": np.repeat(tri.regions[usable], D + 1), "signal": signal,
            "delay_days": np.tile(np.arange(D + 1), int(usable.sum())),
            "prob": pmf[usable].reshape(-1)}))
        # out.delay_drift
        w = len(drift_dates)
        insert_df(con, "out.delay_drift", pd.DataFrame({
            "run_id": run_id, "region": np.repeat(tri.regions, w), "signal": signal,
            "week_start": np.tile(np.asarray(drift_dates, dtype="datetime64[D]"), n_reg),
            "mean_delay_days": drift.reshape(-1)}))
        # out.nowcast: the last D+1 reference dates (older ones are complete)
        keep = slice(n_ref - (D + 1), n_ref)
        dates = tri.dates[keep]
        qk = q[:, keep, :]
        reported = tri.latest[:, keep]
        # the nowcast never goes below what is already reported (incl. reports after delay D)
        qk = np.maximum(qk, reported[..., None])
        k = len(NOWCAST_LEVELS)
        t = len(dates)
        joint = np.where(usable[:, None, None], joint, reported[..., None])
        _write_draws(con, signal, tri.regions, dates, np.maximum(joint, reported[..., None]))
        n_written += insert_df(con, "out.nowcast", pd.DataFrame({
            "run_id": run_id, "region": np.repeat(tri.regions, t * k), "signal": signal,
            "ref_date": np.tile(np.repeat(dates, k), n_reg),
            "reported": np.repeat(reported.reshape(-1), k),
            "q_level": np.tile(NOWCAST_LEVELS, n_reg * t), "value": qk.reshape(-1)}))
        insert_df(con, "out.fits", pd.DataFrame({
            "run_id": run_id, "region": tri.regions, "model": "nowcast",
            "params_json": [json.dumps({"pooling": str(p), "method": cfg["nowcast_method"],
                                        "family": cfg["nowcast_family"],
                                        "mean_delay_days": float(np.sum(np.arange(D + 1) * row))
                                        if ok else None})
                            for p, row, ok in zip(pooling, pmf, usable, strict=True)],
            "objective": np.nan, "converged": usable,
            "message": [f"delay distribution: {p}" if ok else
                        "too little reporting history to estimate delays; nowcast = reported"
                        for p, ok in zip(pooling, usable, strict=True)], "signal": signal}))
        lines.append(f"{signal}: {n_reg} regions ({int(np.sum(pooling != 'own'))} pooled/shrunk)")
    out = {"line": "; ".join(lines) or "no signals", "rows": n_written}
    if skipped:
        out["skipped"] = skipped
    return out


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
