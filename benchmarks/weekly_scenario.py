"""A weekly surveillance feed with known truth, and how well every stage does on it (README).

The invented province of :mod:`tallywave.models.outbreak` is simulated day by day (its reporting
scenarios: stationary, drifting or long-tailed delays), then seen only as weekly totals: weeks
run Monday to Sunday (ISO) and are dated on their Sunday; a snapshot is published every Tuesday
holding the weekly totals known that day (the last ``window_weeks`` weeks, the first snapshot the
whole history), written as CSV files with a weekly feed spec.  The truth kept beside them: the
eventual weekly counts (every report, however late) and the R_t of each infection week (the
simulator's daily R_t averaged over the week with weights infections / R_t, i.e. the expected
infections' total infectiousness).

    python -m benchmarks.weekly_scenario                   # README figures (24 regions, 6 runs)
    python -m benchmarks.weekly_scenario --regions 12 --scenario long_tail
    python -m benchmarks.weekly_scenario --settings S.toml  # the same with other settings

Figures per scenario: 90 % / 50 % coverage of the nowcast of the last weeks against the eventual
counts and its median log bias (against: the counts reported on as_of); R_t 90 % coverage and
median |error| against the weekly truth (weeks not yet nowcast-dependent); forecast 90 %
coverage and relative WIS against the baseline per horizon (1-4 weeks), scored on the eventual
counts.  Nothing is asserted here; ``tests/test_weekly_stages.py`` runs a smaller version.
"""

from __future__ import annotations

import argparse
import datetime as dt
import textwrap
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from tallywave.models.outbreak import SCENARIOS, reporting_scenario, simulate_outbreak

START = dt.date(2026, 3, 2)  # a Monday: day 0; ISO weeks end on Sundays (days 6, 13, ...)
N_DAYS = 210  # 30 weeks; a second wave grows at the end
PUBLISH_LAG = 2  # a week's first snapshot comes out on the Tuesday after it


@dataclass
class WeeklyWorld:
    """A weekly feed on disk and its truth."""

    spec: Path
    as_of: list[dt.date]  # snapshot (publication) dates
    final: pd.DataFrame  # region, signal, ref_date (week's Sunday), truth
    rt: pd.DataFrame  # region, ref_date (infection week's Sunday), rt_true
    populations: dict[str, float]


def week_date(week: int) -> dt.date:
    """The Sunday ending week ``week`` (days 7 week .. 7 week + 6)."""
    return START + dt.timedelta(days=7 * week + 6)


def weekly_known(tri: np.ndarray, as_of_day: int) -> np.ndarray:
    """Weekly totals (n, W) known on day ``as_of_day`` of the weeks that ended by then: each
    day's reports at delays up to ``as_of_day - day`` (``tri`` is (n, days, delays))."""
    n, _, k = tri.shape
    cum = np.cumsum(tri, axis=2)
    n_weeks = (as_of_day + 1) // 7
    days = np.arange(7 * n_weeks)
    known = cum[:, days, np.clip(as_of_day - days, 0, k - 1)]
    return known.reshape(n, n_weeks, 7).sum(axis=2)


def write_weekly_feed(out: Path, *, n_regions: int = 12, scenario: str = "default",
                      signals: tuple[str, ...] = ("cases", "admissions"), n_days: int = N_DAYS,
                      first_week: int = 8, window_weeks: int = 20, seed: int = 20260302,
                      kind: str = "daily", rename: dict[str, str] | None = None,
                      regions_file: bool = True) -> WeeklyWorld:
    """Simulate, then write one CSV per weekly snapshot (``region,week,n``; as_of in the file
    name) from week ``first_week`` on, a weekly feed spec and a regions file.  ``kind``:
    ``daily`` (weekly counts) or ``cumulative`` (running totals of the weekly counts);
    ``rename`` publishes a simulated signal under another name (e.g. beside the daily demo feed
    of the same outbreak, ``pipeline.simulate.write_scenario`` with the same seed)."""
    rep = reporting_scenario(scenario, n_days, START.weekday())
    sc = simulate_outbreak(n_regions=n_regions, n_days=n_days, n_snapshots=n_days - 60,
                           window=35, seed=seed, first_weekday=START.weekday(), reporting=rep)
    names = np.asarray(sc.names, dtype=object)
    out.mkdir(parents=True, exist_ok=True)
    spec = []
    as_of: list[dt.date] = []
    finals = []
    for sim_signal in signals:
        tri = sc.triangles[sim_signal]
        signal = (rename or {}).get(sim_signal, sim_signal)
        (out / signal).mkdir(exist_ok=True)
        for f in (out / signal).glob("*.csv"):
            f.unlink()
        n_weeks = n_days // 7
        for week in range(first_week, n_weeks):
            day = 7 * week + 6 + PUBLISH_LAG
            if day >= n_days:
                break
            vals = weekly_known(tri, day)
            w0 = 0 if week == first_week else max(0, vals.shape[1] - window_weeks)
            if kind == "cumulative":
                vals = np.cumsum(vals, axis=1)
            d = START + dt.timedelta(days=day)
            if sim_signal == signals[0]:
                as_of.append(d)
            lines = ["region,week,n"] + [
                f"{names[r]},{week_date(w).isoformat()},{int(vals[r, w])}"
                for r in range(n_regions) for w in range(w0, vals.shape[1])]
            (out / signal / f"{signal}_{d.isoformat()}.csv").write_text("\n".join(lines) + "\n")
        spec.append(textwrap.dedent(f"""\
            [source.weekly_{signal}]
            path = "{signal}/*.csv"
            format = "csv"
            signal = "{signal}"
            value_kind = "{kind}"
            frequency = "weekly"
            as_of = {{ from = "filename", pattern = "%Y-%m-%d" }}
            columns = {{ region = "region", ref_date = "week", value = "n" }}
            """))
        eventual = tri.sum(axis=2)
        n_weeks = n_days // 7
        wk = eventual[:, : 7 * n_weeks].reshape(n_regions, n_weeks, 7).sum(axis=2)
        finals.append(pd.DataFrame({
            "region": np.repeat(names, n_weeks), "signal": signal,
            "ref_date": np.tile([week_date(w) for w in range(n_weeks)], n_regions),
            "truth": wk.ravel().astype(float)}))
    if regions_file:
        spec.append(textwrap.dedent("""\
            [regions]
            path = "regions.csv"
            columns = { region = "region", population = "population" }
            """))
    (out / "regions.csv").write_text("region,population\n" + "".join(
        f"{n},{int(p)}\n" for n, p in zip(names, sc.populations, strict=True)))
    path = out / "feeds.toml"
    path.write_text("\n".join(spec))
    return WeeklyWorld(path, as_of, pd.concat(finals, ignore_index=True), _weekly_rt(sc, names),
                       {str(n): float(p) for n, p in zip(names, sc.populations, strict=True)})


def _weekly_rt(sc: Any, names: np.ndarray) -> pd.DataFrame:
    """True R_t of every infection week: sum infections / sum (infections / R_t) over its days."""
    rt = np.asarray(sc.path.rt, dtype=float)  # (T, R)
    inf = np.asarray(sc.path.infections, dtype=float)
    n_weeks = rt.shape[0] // 7
    num = inf[: 7 * n_weeks].reshape(n_weeks, 7, -1).sum(axis=1)
    den = (inf / np.maximum(rt, 1e-9))[: 7 * n_weeks].reshape(n_weeks, 7, -1).sum(axis=1)
    r_true = np.where(den > 0, num / np.maximum(den, 1e-12), np.nan)
    return pd.DataFrame({
        "region": np.tile(names, n_weeks),
        "ref_date": np.repeat([week_date(w) for w in range(n_weeks)], len(names)),
        "rt_true": r_true.ravel(), "infections": num.ravel()})


def evaluate(con: Any, world: WeeklyWorld, run_ids: dict[dt.date, str],
             last_weeks: int = 3) -> dict[str, float]:
    """Nowcast, R_t and forecast figures of the given runs against the truth."""
    runs = pd.DataFrame({"run_id": list(run_ids.values()), "as_of": list(run_ids.keys())})
    con.register("_wk_runs", runs)
    con.register("_wk_final", world.final)
    con.register("_wk_rt", world.rt)
    try:
        nc = con.execute(
            """SELECT n.run_id, n.region, n.signal, n.ref_date, any_value(n.reported) AS reported,
                      any_value(t.truth) AS truth,
                      max(n.value) FILTER (WHERE n.q_level = 0.05) AS q05,
                      max(n.value) FILTER (WHERE n.q_level = 0.25) AS q25,
                      max(n.value) FILTER (WHERE n.q_level = 0.5) AS q50,
                      max(n.value) FILTER (WHERE n.q_level = 0.75) AS q75,
                      max(n.value) FILTER (WHERE n.q_level = 0.95) AS q95
               FROM out.nowcast n JOIN _wk_runs r USING (run_id)
               JOIN _wk_final t ON t.region = n.region AND t.signal = n.signal
                    AND t.ref_date = n.ref_date
               WHERE n.ref_date > r.as_of - 7 * ?
               GROUP BY ALL""", [last_weeks]).df()
        rt = con.execute(
            """SELECT o.run_id, o.region, o.ref_date, t.rt_true,
                      max(o.value) FILTER (WHERE o.q_level = 0.05) AS q05,
                      max(o.value) FILTER (WHERE o.q_level = 0.5) AS q50,
                      max(o.value) FILTER (WHERE o.q_level = 0.95) AS q95
               FROM out.rt o JOIN _wk_rt t ON t.region = o.region AND t.ref_date = o.ref_date
               WHERE NOT o.nowcast_dependent AND o.signal = 'cases' AND t.infections >= 50
               GROUP BY ALL""").df()
        fc = con.execute(
            """SELECT f.run_id, f.model, f.horizon_days, f.region, f.signal, f.target_date, t.truth,
                      max(f.value) FILTER (WHERE abs(f.q_level - 0.05) < 1e-9) AS q05,
                      max(f.value) FILTER (WHERE abs(f.q_level - 0.5) < 1e-9) AS q50,
                      max(f.value) FILTER (WHERE abs(f.q_level - 0.95) < 1e-9) AS q95,
                      2 * avg((CASE WHEN t.truth < f.value THEN 1.0 ELSE 0.0 END - f.q_level)
                              * (f.value - t.truth)) AS wis
               FROM out.forecasts f JOIN _wk_runs r USING (run_id)
               JOIN _wk_final t ON t.region = f.region AND t.signal = f.signal
                    AND t.ref_date = f.target_date
               GROUP BY ALL""").df() if _has_forecasts(con, runs) else pd.DataFrame()
    finally:
        for name in ("_wk_runs", "_wk_final", "_wk_rt"):
            con.unregister(name)
    y = nc["truth"].to_numpy()
    out: dict[str, float] = {
        "nowcast_cells": len(nc),
        "nowcast_cov90": float(((nc["q05"] <= y) & (y <= nc["q95"])).mean()),
        "nowcast_cov50": float(((nc["q25"] <= y) & (y <= nc["q75"])).mean()),
        "nowcast_log_bias": float(np.median(np.log((nc["q50"] + 1) / (y + 1)))),
        "reported_log_bias": float(np.median(np.log((nc["reported"] + 1) / (y + 1)))),
        "rt_cells": len(rt),
        "rt_cov90": float(((rt["q05"] <= rt["rt_true"]) & (rt["rt_true"] <= rt["q95"])).mean())
        if len(rt) else float("nan"),
        "rt_mae": float(np.median(np.abs(rt["q50"] - rt["rt_true"]))) if len(rt) else np.nan,
    }
    if len(fc):
        for (model, h), g in fc.groupby(["model", "horizon_days"]):
            cov = ((g["q05"] <= g["truth"]) & (g["truth"] <= g["q95"])).mean()
            out[f"fc_{model}_h{h}_cov90"] = float(cov)
            out[f"fc_{model}_h{h}_wis"] = float(g["wis"].mean())
            out[f"fc_{model}_h{h}_log_bias"] = float(np.median(
                np.log((g["q50"] + 1) / (g["truth"] + 1))))
        out["fc_n"] = len(fc)
    return out


def _has_forecasts(con: Any, runs: pd.DataFrame) -> bool:
    return bool(con.execute("SELECT count(*) FROM out.forecasts WHERE run_id IN "
                            "(SELECT run_id FROM _wk_runs)").fetchall()[0][0])


def main(argv: list[str] | None = None) -> None:  # pragma: no cover - prints README figures
    """Run the weekly feed of each scenario end to end and print the figures."""
    import tempfile

    from tallywave.pipeline import store
    from tallywave.pipeline.ingest import ingest_spec
    from tallywave.pipeline.run import execute_run
    from tallywave.pipeline.settings import load_settings

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--regions", type=int, default=24)
    ap.add_argument("--runs", type=int, default=6)
    ap.add_argument("--scenario", action="append", choices=list(SCENARIOS))
    ap.add_argument("--settings", default=None, help="settings TOML (default: the defaults)")
    args = ap.parse_args(argv)
    settings = load_settings(args.settings)
    rows = []
    for name in args.scenario or ["default", "delay_lengthens", "long_tail"]:
        t0 = time.perf_counter()
        with tempfile.TemporaryDirectory() as tmp:
            world = write_weekly_feed(Path(tmp), n_regions=args.regions, scenario=name)
            con = store.memory()
            ingest_spec(con, world.spec)
            run_ids = {}
            # every other week, the last one four weeks before the end (forecasts are scored)
            for d in world.as_of[:-4][::-2][: args.runs][::-1]:
                run_ids[d] = execute_run(con, d, settings, score_after=False)["run_id"]
            got = evaluate(con, world, run_ids)
        rows.append({"scenario": name, **got, "seconds": round(time.perf_counter() - t0, 1)})
    print("| scenario | nowcast cells | nowcast 90% / 50% coverage | nowcast log bias (reported "
          "counts) | R_t cells | R_t 90% coverage / median abs error | seconds |")
    print("|---|---|---|---|---|---|---|")
    for r in rows:
        print(f"| {r['scenario']} | {r['nowcast_cells']} | {r['nowcast_cov90']:.3f} / "
              f"{r['nowcast_cov50']:.3f} | {r['nowcast_log_bias']:+.3f} "
              f"({r['reported_log_bias']:+.3f}) | {r['rt_cells']} | {r['rt_cov90']:.3f} / "
              f"{r['rt_mae']:.3f} | {r['seconds']} |")
    print()
    print(forecast_table(rows))


def forecast_table(rows: list[dict[str, Any]]) -> str:
    """Markdown: per model x horizon, WIS relative to the baseline's (same forecasts) / 90 %
    coverage / median log bias, pooled over the scenarios (mean of their ratios)."""
    models = sorted({k.split("_h")[0][3:] for r in rows for k in r if k.startswith("fc_")
                     and "_h" in k})
    horizons = [7, 14, 21, 28]
    lines = ["| model | " + " | ".join(f"{h // 7} week(s): rel WIS / cov90 / log bias"
                                        for h in horizons) + " |",
             "|---|" + "---|" * len(horizons)]
    for m in models:
        cells = []
        for h in horizons:
            rel = np.mean([r[f"fc_{m}_h{h}_wis"] / r[f"fc_baseline_h{h}_wis"] for r in rows])
            cov = np.mean([r[f"fc_{m}_h{h}_cov90"] for r in rows])
            bias = np.mean([r[f"fc_{m}_h{h}_log_bias"] for r in rows])
            cells.append(f"{rel:.2f} / {cov:.2f} / {bias:+.2f}")
        lines.append(f"| {m} | " + " | ".join(cells) + " |")
    return "\n".join(lines)


if __name__ == "__main__":  # pragma: no cover
    main()
