"""Operations benchmarks: how long the HTML report takes, and how big the database grows.

``python -m benchmarks.operations report [--regions 10] [--db PATH]`` times ``write_report`` on
one published run (the demo's size by default: 10 regions x 3 signals = 30 figures; with
``--regions 3000`` the national size, where the 50 fastest-growing regions get figures).

``python -m benchmarks.operations storage [--regions 500] [--runs 60]`` makes ``--runs`` daily
runs in a row (one per as-of date, as a scheduled morning job would) and prints the database
file size after each tenth run without any retention, then after ``tallywave prune`` with the
default retention (without and with ``--compact``; and with 7 days), and with ``prune_after_run``
on from the start.

``python -m benchmarks.operations scoring [--regions 200] [--runs 40]`` makes the same daily
runs without scoring, then scores after each one (as ``tallywave run`` does) and times the
incremental scoring stage against a full recomputation of every score on the same database.

Speed is never asserted in tests; the figures go to the README ("Performance", "Operations").
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import platform
import resource
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

from tallywave.pipeline import store
from tallywave.pipeline.ingest import ingest_spec
from tallywave.pipeline.run import execute_run
from tallywave.pipeline.settings import load_settings
from tallywave.pipeline.simulate import DEMO_SNAPSHOTS, DEMO_WINDOW, write_scenario

LIGHT = "[defaults]\nforecast_draws = 100\nnowcast_draws = 100\nnowcast_joint_draws = 50\n"


def _cpu() -> float:
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


def environment() -> str:
    """One line saying where the figures were measured."""
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    return (f"{dt.date.today()} · {platform.machine()} · {os.cpu_count()} cores · Python "
            f"{platform.python_version()} · load average at start {load:.1f}")


def build(root: Path, *, regions: int, days: int, snapshots: int, window: int,
          runs: int = 1) -> tuple[Path, Path, list[dt.date]]:
    """An invented scenario ingested into ``root/bench.duckdb``; returns (db, settings, the
    as-of dates available for runs, oldest first)."""
    feeds = root / "feeds"
    info = write_scenario(feeds, n_regions=regions, n_days=days, n_snapshots=snapshots,
                          window=window)
    settings = root / "settings.toml"
    settings.write_text(LIGHT)
    db = root / "bench.duckdb"
    con = store.connect(db)
    try:
        ingest_spec(con, feeds / "feeds.toml")
    finally:
        con.close()
    last = dt.date.fromisoformat(info["as_of_last"])
    return db, settings, [last - dt.timedelta(days=k) for k in range(runs - 1, -1, -1)]


# ----------------------------------------------------------------------------------- report

def bench_report(args: argparse.Namespace) -> dict[str, Any]:
    """Time write_report on one published run (``--repeat`` times, fresh output folder)."""
    from tallywave.pipeline.report import write_report

    tmp = Path(tempfile.mkdtemp(prefix="tw-report-", dir=args.out))
    db = Path(args.db) if args.db else None
    if db is None or not db.exists():
        t0 = time.perf_counter()
        days = args.days or 200
        built, settings, dates = build(tmp, regions=args.regions, days=days,
                                       snapshots=args.snapshots or DEMO_SNAPSHOTS,
                                       window=DEMO_WINDOW)
        con = store.connect(built)
        execute_run(con, dates[-1], load_settings(settings))
        con.close()
        if db is not None:
            shutil.copy(built, db)
        else:
            db = built
        print(f"built {db} in {time.perf_counter() - t0:.0f} s", file=sys.stderr)
    walls, cpus = [], []
    index = None
    for k in range(args.repeat):
        con = store.connect(db, read_only=True)
        w0, c0 = time.perf_counter(), _cpu()
        index = write_report(con, out_dir=tmp / f"reports{k}")
        walls.append(time.perf_counter() - w0)
        cpus.append(_cpu() - c0)
        con.close()
    assert index is not None
    figures = len(list((index.parent / "figures").glob("*.png")))
    kb = sum(p.stat().st_size for p in index.parent.rglob("*") if p.is_file()) / 1024
    if not args.keep:
        shutil.rmtree(tmp, ignore_errors=True)
    return {"regions": args.regions, "figures": figures, "wall_s": walls, "cpu_s": cpus,
            "median_wall_s": statistics.median(walls), "report_kb": kb}


# ---------------------------------------------------------------------------------- storage

def _size_mb(db: Path) -> float:
    wal = db.with_name(db.name + ".wal")
    return (db.stat().st_size + (wal.stat().st_size if wal.exists() else 0)) / 1e6


def _rows(db: Path) -> dict[str, int]:
    """Rows per table (the tables a run writes, and the raw data)."""
    from tallywave.pipeline.retention import KEPT_TABLES, PRUNED_TABLES

    con = store.connect(db, read_only=True)
    try:
        return {t: int(con.execute(f"SELECT count(*) FROM {t}").fetchall()[0][0])
                for t in PRUNED_TABLES + KEPT_TABLES}
    finally:
        con.close()


def bench_storage(args: argparse.Namespace) -> dict[str, Any]:
    """``--runs`` daily runs; file size along the way, then after pruning (see module doc)."""
    from tallywave.pipeline.retention import prune

    tmp = Path(tempfile.mkdtemp(prefix="tw-storage-", dir=args.out))
    t0 = time.perf_counter()
    base, settings, dates = build(tmp, regions=args.regions, days=args.days or 365,
                                  snapshots=args.snapshots or args.runs + 10, window=35,
                                  runs=args.runs)
    print(f"built in {time.perf_counter() - t0:.0f} s; ingested {_size_mb(base):.1f} MB",
          file=sys.stderr)
    out: dict[str, Any] = {"regions": args.regions, "runs": args.runs,
                           "ingested_mb": _size_mb(base), "keep_days": args.keep_days}
    for policy in args.policies.split(","):
        db = tmp / f"{policy}.duckdb"
        shutil.copy(base, db)
        s = load_settings(settings)
        sizes, seconds = [], []
        for k, day in enumerate(dates, start=1):
            con = store.connect(db)
            t = time.perf_counter()
            execute_run(con, day, s)
            if policy == "prune_after_run":
                con.close()
                prune(db, keep_days=args.keep_days)
            else:
                con.close()
            seconds.append(time.perf_counter() - t)
            if k % 10 == 0 or k == len(dates):
                sizes.append((k, _size_mb(db)))
                print(f"{policy}: {k} runs, {sizes[-1][1]:.1f} MB, "
                      f"{statistics.mean(seconds[-10:]):.1f} s/run", file=sys.stderr)
        out[policy] = {"sizes": sizes, "s_per_run": statistics.mean(seconds),
                       "rows": _rows(db)}
        if policy == "none":
            for keep, compact in ((args.keep_days, False), (args.keep_days, True), (7, True)):
                copy = tmp / f"pruned-{keep}-{compact}.duckdb"
                shutil.copy(db, copy)
                t = time.perf_counter()
                summary = prune(copy, keep_days=keep, compact=compact)
                out[f"prune {keep} d" + (" + compact" if compact else "")] = {
                    "mb": _size_mb(copy), "seconds": time.perf_counter() - t,
                    "line": summary["line"]}
    if not args.keep:
        shutil.rmtree(tmp, ignore_errors=True)
    return out


# ----------------------------------------------------------------------------------- scoring

def bench_scoring(args: argparse.Namespace) -> dict[str, Any]:
    """Daily runs; after each, time incremental scoring and (every 10th) a full re-scoring."""
    from tallywave.pipeline.scoring import score

    tmp = Path(tempfile.mkdtemp(prefix="tw-scoring-", dir=args.out))
    base, settings, dates = build(tmp, regions=args.regions, days=args.days or 365,
                                  snapshots=args.snapshots or args.runs + 10, window=35,
                                  runs=args.runs)
    s = load_settings(settings)
    con = store.connect(base)
    rows: list[dict[str, Any]] = []
    try:
        for k, day in enumerate(dates, start=1):
            execute_run(con, day, s, score_after=False)
            t, c = time.perf_counter(), _cpu()
            res = score(con, day, s)
            row = {"run": k, "scores": res["rows"], "new": res.get("new_rows", res["rows"]),
                   "incremental_s": time.perf_counter() - t, "incremental_cpu": _cpu() - c}
            if k % 10 == 0 or k == len(dates):
                t, c = time.perf_counter(), _cpu()
                score(con, day, s, full=True)
                row |= {"full_s": time.perf_counter() - t, "full_cpu": _cpu() - c}
                print(f"run {k}: {row}", file=sys.stderr)
            rows.append(row)
    finally:
        con.close()
        if not args.keep:
            shutil.rmtree(tmp, ignore_errors=True)
    return {"regions": args.regions, "runs": args.runs, "rows": rows}


# ------------------------------------------------------------------------------------ main

def main(argv: list[str] | None = None) -> int:
    """Command line: ``report``, ``storage`` or ``scoring`` (see the module docstring)."""
    ap = argparse.ArgumentParser(prog="python -m benchmarks.operations",
                                 description=__doc__.splitlines()[0])
    sub = ap.add_subparsers(dest="what", required=True)
    r = sub.add_parser("report")
    r.add_argument("--regions", type=int, default=10)
    r.add_argument("--days", type=int)
    r.add_argument("--snapshots", type=int)
    r.add_argument("--db", help="reuse (or keep) the benchmark database at this path")
    r.add_argument("--repeat", type=int, default=3)
    s = sub.add_parser("storage")
    s.add_argument("--regions", type=int, default=500)
    s.add_argument("--runs", type=int, default=60)
    s.add_argument("--days", type=int)
    s.add_argument("--snapshots", type=int)
    s.add_argument("--keep-days", type=int, default=None,
                   help="retention window (default: the setting retention_days)")
    s.add_argument("--policies", default="none,prune_after_run",
                   help="none (no retention; then prune the copies at the end) and/or "
                        "prune_after_run, comma-separated")
    c = sub.add_parser("scoring")
    c.add_argument("--regions", type=int, default=200)
    c.add_argument("--runs", type=int, default=40)
    c.add_argument("--days", type=int)
    c.add_argument("--snapshots", type=int)
    for p in (r, s, c):
        p.add_argument("--out", help="folder for temporary files (default: system temp)")
        p.add_argument("--keep", action="store_true", help="keep the temporary folder")
    args = ap.parse_args(argv)
    print(environment())
    if args.what == "report":
        res = bench_report(args)
        print(f"report, {res['regions']} regions: {res['figures']} figures, "
              f"{res['report_kb']:.0f} kB; wall s {[round(w, 2) for w in res['wall_s']]} "
              f"(median {res['median_wall_s']:.2f}), CPU s "
              f"{[round(c, 2) for c in res['cpu_s']]}")
    elif args.what == "scoring":
        res = bench_scoring(args)
        print(f"scoring, {res['regions']} regions, {res['runs']} daily runs "
              "(wall / CPU s of the scoring stage after each run)")
        for row in res["rows"]:
            if "full_s" in row:
                print(f"  after run {row['run']:3d}: {row['scores']:>9,} scores, "
                      f"{row['new']:>8,} computed: incremental {row['incremental_s']:.2f} / "
                      f"{row['incremental_cpu']:.2f} s; full {row['full_s']:.2f} / "
                      f"{row['full_cpu']:.2f} s")
    else:
        if args.keep_days is None:
            args.keep_days = int(load_settings(None).get("retention_days"))
        res = bench_storage(args)
        print(f"storage, {res['regions']} regions, {res['runs']} daily runs "
              f"(ingested feeds {res['ingested_mb']:.1f} MB); retention {res['keep_days']} d")
        policies = [p for p in ("none", "prune_after_run") if p in res]
        for policy in policies:
            sizes = ", ".join(f"{k}: {mb:.1f}" for k, mb in res[policy]["sizes"])
            print(f"  {policy:16s} MB after runs {sizes} ({res[policy]['s_per_run']:.1f} s/run)")
        for key, v in res.items():
            if key.startswith("prune "):
                print(f"  {key:18s} {v['mb']:.1f} MB in {v['seconds']:.1f} s — {v['line']}")
        for policy in policies:
            print(f"  rows ({policy}): " + ", ".join(
                f"{t} {n:,}" for t, n in res[policy]["rows"].items()))
    return 0


if __name__ == "__main__":
    sys.exit(main())
