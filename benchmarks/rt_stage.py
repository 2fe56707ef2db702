"""Benchmark of the transmission stage (R_t by date of infection) beside its bare-numpy limit.

``python -m benchmarks.rt_stage [--regions 3000] [--days 365] [--draws 100] [--profile]``
simulates an invented epidemic that is still running on the last day (the simulator of
:mod:`tallywave.models.outbreak`: 3 signals, cases / admissions / deaths), writes the inputs the
stage reads straight into an in-memory database — this run's cleaned series (``core.cleaned``),
a nowcast of the last ``max_delay_days`` days (``out.nowcast`` quantiles and the joint draws in
the ``nowcast_draws`` temporary table, drawn here from the true reporting delay; the nowcast
stage itself is not timed) — and times :func:`tallywave.pipeline.transmission.transmission`.

Printed: wall and CPU seconds of the stage, the bare-numpy limit (one
``scipy.signal.fftconvolve`` of the region × day array with the generation interval, as in
``benchmarks/run.py``), their ratio, the parts of the stage (``--profile``), and the accuracy the
fast mixture quantiles keep against the exact inversion of the mixture CDF on a sample of cells.
Speed is never asserted in tests.
"""

from __future__ import annotations

import argparse
import cProfile
import datetime as dt
import io
import pstats
import sys
import time
from dataclasses import dataclass
from typing import Any

import duckdb
import numpy as np
import pandas as pd

from tallywave.models.outbreak import simulate_outbreak
from tallywave.pipeline import store
from tallywave.pipeline.nowcast import DRAWS_DDL, NOWCAST_LEVELS
from tallywave.pipeline.settings import Settings, load_settings

SIGNALS = ("cases", "admissions", "deaths")
START = dt.date(2026, 3, 2)


@dataclass
class Inputs:
    """A database holding one run's transmission-stage inputs, and what built it."""

    con: duckdb.DuckDBPyConnection
    run_id: str
    as_of: dt.date
    settings: Settings
    regions: np.ndarray
    rt_true: np.ndarray  # (n_regions, n_days) instantaneous R of infections on each day
    seconds: float


def _counts(n_regions: int, n_days: int, seed: int) -> tuple[dict[str, np.ndarray], np.ndarray,
                                                              dict[str, np.ndarray], np.ndarray]:
    """Eventual counts per signal (n, T), true R_t (n, T), reporting delays and the GI.

    The simulator's default scenario, as in ``benchmarks/run.py``: two districts seeded, the
    outbreak spreads through the mixing matrix, so at 3,000 districts x 365 days it is still
    running in most districts on the last day.
    """
    sc = simulate_outbreak(n_regions=n_regions, n_days=n_days, n_snapshots=30, window=35,
                           seed=seed, first_weekday=START.weekday())
    counts = {sig: tri.sum(axis=2) for sig, tri in sc.triangles.items()}
    return counts, sc.path.rt.T, sc.delay_pmfs, sc.generation_interval


def build(n_regions: int, n_days: int, *, seed: int = 7, n_draws: int = 100,
          settings: Settings | None = None) -> Inputs:
    """Simulate and write the stage's inputs into a fresh in-memory database."""
    t0 = time.perf_counter()
    counts, rt_true, delays, gi = _counts(n_regions, n_days, seed)
    rng = np.random.default_rng(seed + 1)
    con = store.memory()
    as_of = START + dt.timedelta(days=n_days - 1)
    run_id = f"bench-{as_of}"
    s = settings or load_settings(None)
    s.base["generation_interval"] = {"pmf": gi.tolist()}
    regions = np.array([f"R{i:05d}" for i in range(n_regions)])
    dates = np.datetime64(START, "D") + np.arange(n_days)
    con.execute(DRAWS_DDL)
    for sig in SIGNALS:
        cfg = s.for_signal(sig)
        D = int(cfg["max_delay_days"])
        eventual = counts[sig].astype(float)
        cdf = np.cumsum(np.pad(delays[sig], (0, max(0, D + 1 - delays[sig].size))))[: D + 1]
        age = np.arange(n_days)[::-1]  # days between ref date and as_of
        frac = np.where(age <= D, cdf[np.minimum(age, D)], 1.0)
        reported = rng.binomial(eventual.astype(np.int64), frac).astype(float)
        store.insert_df(con, "core.cleaned", pd.DataFrame({
            "run_id": run_id, "region": np.repeat(regions, n_days), "signal": sig,
            "ref_date": np.tile(dates, n_regions), "value_reported": reported.ravel(),
            "value_clean": reported.ravel(), "flag": None, "value_adjusted": reported.ravel()}))
        # nowcast stand-in: unreported part ~ negative binomial around its expectation
        win = slice(n_days - (D + 1), n_days)
        rep_w, f_w = reported[:, win], frac[win]
        miss_mean = rep_w * (1.0 - f_w) / np.maximum(f_w, 0.05) + 0.5 * (1.0 - f_w)
        k = 10.0
        lam = rng.gamma(k, miss_mean[None] / k, size=(n_draws, *miss_mean.shape))
        draws = rep_w[None] + rng.poisson(lam)  # (m, n, t)
        q = np.moveaxis(np.quantile(draws, NOWCAST_LEVELS, axis=0), 0, -1)
        t_w = D + 1
        nl = len(NOWCAST_LEVELS)
        store.insert_df(con, "out.nowcast", pd.DataFrame({
            "run_id": run_id, "region": np.repeat(regions, t_w * nl), "signal": sig,
            "ref_date": np.tile(np.repeat(dates[win], nl), n_regions),
            "reported": np.repeat(rep_w.ravel(), nl), "q_level": np.tile(NOWCAST_LEVELS,
                                                                         n_regions * t_w),
            "value": q.ravel()}))
        joint = np.moveaxis(draws, 0, -1)  # (n, t, m)
        store.insert_df(con, "nowcast_draws", pd.DataFrame({
            "region": np.repeat(regions, t_w * n_draws), "signal": sig,
            "ref_date": np.tile(np.repeat(dates[win], n_draws), n_regions),
            "draw": np.tile(np.arange(n_draws, dtype=np.int32), n_regions * t_w),
            "value": joint.ravel().astype(float)}))
    return Inputs(con, run_id, as_of, s, regions, rt_true, time.perf_counter() - t0)


def limit_seconds(inp: Inputs) -> float:
    """Bare-numpy limit: one fftconvolve of the (regions x days) array of every signal with the
    generation interval (best of 3), as in ``benchmarks/run.py``."""
    from scipy import signal as sps

    from tallywave.pipeline.clean import cleaned_blocks
    from tallywave.pipeline.transmission import interval_pmfs

    blocks = cleaned_blocks(inp.con, inp.run_id)
    x = np.concatenate([np.nan_to_num(b.values) for b in blocks.values()])
    w = interval_pmfs(inp.settings.for_signal("cases"))[0]
    best = np.inf
    for _ in range(3):
        t = time.perf_counter()
        sps.fftconvolve(x, w[None, :], axes=1)
        best = min(best, time.perf_counter() - t)
    return best


def time_stage(inp: Inputs, profile: bool = False) -> dict[str, Any]:
    """Run the transmission stage once; wall and CPU seconds (and a profile if asked)."""
    from tallywave.pipeline.transmission import transmission

    prof = cProfile.Profile() if profile else None
    w0, c0 = time.perf_counter(), time.process_time()
    if prof:
        prof.enable()
    summary = transmission(inp.con, inp.as_of, inp.settings, run_id=inp.run_id)
    if prof:
        prof.disable()
    out: dict[str, Any] = {"wall": time.perf_counter() - w0, "cpu": time.process_time() - c0,
                           "summary": summary}
    if prof:
        buf = io.StringIO()
        pstats.Stats(prof, stream=buf).sort_stats("cumulative").print_stats(25)
        out["profile"] = buf.getvalue()
    return out


def accuracy(inp: Inputs, n_regions: int = 100, max_cells: int = 3000) -> list[str]:
    """Accuracy the fast path keeps, on this workload's own mixtures (one batch per signal).

    * the published gamma (mixture mean and variance) against the exact mixture quantiles
      (safeguarded Newton on the mixture CDF, :func:`tallywave.models.renewal._gamma_mixture_ppf`),
      in probability (the exact mixture CDF at the published quantile minus the level) and in
      value, on the days the nowcast draws reach;
    * the tabulated gamma quantiles against ``scipy.special.gammaincinv``;
    * ``rt_draws`` draws against all the nowcast's joint draws (Monte Carlo error).
    """
    from scipy import special, stats

    from tallywave.models.renewal import _gamma_mixture_ppf, gamma_ppf_fast
    from tallywave.pipeline import transmission as tr
    from tallywave.pipeline.clean import cleaned_blocks

    s = inp.settings
    since = inp.as_of - dt.timedelta(days=tr.history_days(s) - 1)
    blocks = cleaned_blocks(inp.con, inp.run_id, since=since)
    levels = np.array(tr.RT_LEVELS)
    lines = []
    for sig, block in blocks.items():
        cfg = s.for_signal(sig)
        part = block.take(slice(0, n_regions))
        fits = {}
        for m in (int(cfg["rt_draws"]), 100):
            ev, rep, start = tr.nowcast_draws_for(inp.con, inp.run_id, sig, part, m, 1)
            values = np.nan_to_num(part.values).copy()
            t = ev.shape[2]
            draws = tr.incidence_draws(values[:, start:start + t], ev, rep, 0)
            values[:, start:start + t] = draws.mean(axis=0)
            est = tr.estimator(cfg)
            est.keep_components = True
            pmfs = tr.interval_pmfs(cfg)
            fits[m] = est.fit(values, tr.delay_pmfs(cfg, sig), pmfs[0], draws=draws,
                              draws_start=start)
        est = fits[int(cfg["rt_draws"])]
        if not est.components_:
            continue
        (rows, days, alpha, beta, _), = est.components_
        ok = est.estimable_[np.ix_(rows, days)]
        ri, tt = np.nonzero(ok)
        if ri.size == 0:
            continue
        pick = np.random.default_rng(0).permutation(ri.size)[:max_cells]
        ri, tt = ri[pick], tt[pick]
        rr = rows[ri]
        a = alpha[ri, :, tt].T  # (m, cells)
        th = 1.0 / beta[ri, :, tt].T
        w = np.full(a.shape[0], 1.0 / a.shape[0])
        exact = _gamma_mixture_ppf(a, th, w, levels)
        fast = est.quantiles(levels)[rr, days[tt]]
        cdf = (w[:, None, None] * stats.gamma.cdf(fast[None], a[..., None], scale=th[..., None])
               ).sum(axis=0)
        shp, scl = est.shape_[rr, days[tt]], est.scale_[rr, days[tt]]
        ref = special.gammaincinv(shp[:, None], levels) * scl[:, None]
        table = np.abs(gamma_ppf_fast(shp, scl, levels) / ref - 1).max()
        q_all = fits[100].quantiles(levels)[rr, days[tt]]
        mc = np.abs(fast[:, [1, 7]] / q_all[:, [1, 7]] - 1)
        lines.append(
            f"{sig:10s} {rr.size:5d} cells the draws reach: published vs exact mixture "
            f"|F(x_q) - q| mean {np.abs(cdf - levels).mean():.4f}, 99th pct "
            f"{np.percentile(np.abs(cdf - levels), 99):.4f}, max {np.abs(cdf - levels).max():.4f};"
            f" value rel. 99th pct {np.percentile(np.abs(fast / exact - 1), 99):.4f}"
            f"; table vs scipy {table:.1e}; {int(cfg['rt_draws'])} vs 100 draws: 5%/95% "
            f"quantiles median rel. {np.nanmedian(mc):.4f}, 99th pct {np.nanpercentile(mc, 99):.4f}")
    return lines


def main(argv: list[str] | None = None) -> int:
    """Command line: build the inputs, time the stage, print the figures."""
    ap = argparse.ArgumentParser(description="time the transmission stage")
    ap.add_argument("--regions", type=int, default=3000)
    ap.add_argument("--days", type=int, default=365)
    ap.add_argument("--draws", type=int, default=100, help="nowcast joint draws per region")
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--profile", action="store_true")
    ap.add_argument("--no-accuracy", action="store_true", help="skip the accuracy checks")
    ns = ap.parse_args(argv)
    inp = build(ns.regions, ns.days, seed=ns.seed, n_draws=ns.draws)
    print(f"inputs: {ns.regions} regions x {ns.days} days x {len(SIGNALS)} signals, "
          f"{ns.draws} nowcast draws; built in {inp.seconds:.1f} s")
    res = time_stage(inp, ns.profile)
    lim = limit_seconds(inp)
    print(f"transmission stage: {res['wall']:.2f} s wall, {res['cpu']:.2f} s CPU "
          f"({res['summary']['rows']:,} out.rt rows; {res['summary']['line']})")
    print(f"bare-numpy limit (one fftconvolve of the region x day array): {lim:.3f} s; "
          f"ours / limit = {res['wall'] / lim:.0f}x")
    if ns.profile:
        print(res["profile"])
    if not ns.no_accuracy:
        print("accuracy kept:")
        for line in accuracy(inp):
            print("  " + line)
    return 0


if __name__ == "__main__":
    sys.exit(main())
