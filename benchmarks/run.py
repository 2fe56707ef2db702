"""Benchmarks at national scale: time every stage on a synthetic workload against its bare limit.

``python -m benchmarks.run [--regions 3000 --days 730 --snapshots 60] [--quick] [--out DIR]
[--keep]`` writes an invented scenario with the simulator (3 signals), ingests it into a fresh
DuckDB database, runs the daily run as of the last date and prints one table row per stage:

* wall and CPU seconds (CPU = user + system time of this process, all threads; on a shared
  machine CPU seconds move less with other processes' load than wall seconds);
* peak memory, two ways: ``py MB`` = peak of Python-level allocations above the stage's start
  (``tracemalloc``; numpy arrays are included, DuckDB's own memory is not) and ``RSS MB`` = peak
  resident set size above the stage's start (``/proc/self/status`` VmHWM, reset at each stage
  through ``/proc/self/clear_refs``; where that reset is unavailable, the ``resource`` maxrss
  growth, marked ``>=``);
* throughput; the **limit**: the same data through the bare library doing the irreducible part
  of the stage (DuckDB reading the files, a pandas rolling median, one numpy cumulative sum,
  one ``scipy.signal.fftconvolve``, a DuckDB join-and-aggregate), the ratio ours / limit, the
  target where one is set, and whether it is met.

Targets are stated for 3,000 regions x 730 days (daily run <= 300 s, R_t <= 2 s and <= 3x its
limit, scoring of 10 million quantile rows <= 20 s, compartmental fits >= 20 regions/s/core);
at other sizes the time targets are scaled in proportion to the work.  Speed is never asserted
in tests (``tests/test_benchmark_smoke.py`` only checks that the table is complete).
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import math
import os
import platform
import re
import resource
import shutil
import sys
import tempfile
import time
import tracemalloc
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pandas as pd

QUICK = {"regions": 100, "days": 365, "snapshots": 30, "score_rows": 1_000_000}
FULL = {"regions": 3000, "days": 730, "snapshots": 60, "score_rows": 10_000_000}
REF_REGIONS, REF_DAYS, REF_SCORE_ROWS = 3000, 730, 10_000_000  # the size the targets are for
SIGNALS = ("cases", "admissions", "deaths")
MODELS = ("baseline", "renewal", "compartmental", "ensemble")
_FEED_DIRS = {"cases": ("cases", "csv"), "admissions": ("admissions", "csv"),
              "deaths": ("deaths", "jsonl")}


# ----------------------------------------------------------------------------- measurement

def _status_kb(key: str) -> int | None:
    """A field of /proc/self/status in kB (None off Linux)."""
    try:
        text = Path("/proc/self/status").read_text()
    except OSError:
        return None
    m = re.search(rf"^{key}:\s+(\d+)\s+kB", text, re.MULTILINE)
    return int(m.group(1)) if m else None


def _reset_hwm() -> bool:
    """Reset the peak-RSS mark (VmHWM) to the current RSS; False where the kernel refuses."""
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
        return True
    except OSError:
        return False


def _maxrss_kb() -> int:
    return int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)  # kB on Linux


@dataclass
class Measure:
    """Wall, CPU and peak memory of one timed block."""

    wall: float = math.nan
    cpu: float = math.nan
    py_mb: float = math.nan
    rss_mb: float = math.nan
    rss_exact: bool = True


class Meter:
    """Start/stop measurement of wall time, CPU time, tracemalloc peak and peak RSS.

    With ``trace`` the block runs under tracemalloc (started here unless already on); without
    it the Python peak is reported only when tracing was already on.
    """

    def __init__(self, trace: bool = False) -> None:
        self.trace = trace
        self._t = self._c = 0.0
        self._py0 = 0
        self._rss0 = 0
        self._exact = True
        self._own = False

    def start(self) -> None:
        """Begin a measured block (resets both memory peaks)."""
        self._own = self.trace and not tracemalloc.is_tracing()
        if self._own:
            tracemalloc.start()
        if tracemalloc.is_tracing():
            tracemalloc.reset_peak()
            self._py0 = tracemalloc.get_traced_memory()[0]
        self._exact = _reset_hwm()
        rss = _status_kb("VmRSS")
        self._rss0 = rss if (self._exact and rss is not None) else _maxrss_kb()
        self._exact = self._exact and rss is not None
        self._c = time.process_time()
        self._t = time.perf_counter()

    def stop(self) -> Measure:
        """End the block and return its measurements."""
        wall = time.perf_counter() - self._t
        cpu = time.process_time() - self._c
        py = math.nan
        if tracemalloc.is_tracing():
            py = (tracemalloc.get_traced_memory()[1] - self._py0) / 2**20
        if self._own:
            tracemalloc.stop()
        hwm = _status_kb("VmHWM") if self._exact else _maxrss_kb()
        rss = max(0, (hwm or 0) - self._rss0) / 1024
        return Measure(wall, cpu, py, rss, self._exact)


@contextmanager
def measured(into: list[Measure], trace: bool = False) -> Iterator[None]:
    """``with measured(box):`` appends the block's :class:`Measure` to ``box``."""
    m = Meter(trace)
    m.start()
    yield
    into.append(m.stop())


def timed(fn: Callable[[], Any], repeat: int = 1) -> float:
    """Best wall time of ``repeat`` calls (used for the bare-library limits)."""
    best = math.inf
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t)
    return best


# ----------------------------------------------------------------------------- table rows

@dataclass
class Row:
    """One line of the benchmark table."""

    stage: str
    m: Measure
    work: float  # units processed (rows or regions)
    unit: str  # "rows" or "regions"
    limit: float | None = None
    limit_what: str = ""
    target: str = "—"
    met: bool | None = None
    note: str = ""

    @property
    def throughput(self) -> float:
        return self.work / self.m.wall if self.m.wall > 0 else math.nan

    @property
    def ratio(self) -> float | None:
        return self.m.wall / self.limit if self.limit else None


def _num(x: float | None, digits: int = 2) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "—"
    if abs(x) >= 100:
        return f"{x:,.0f}"
    if abs(x) >= 10:
        return f"{x:.1f}"
    return f"{x:.{digits}f}"


def _rate(x: float, unit: str) -> str:
    if math.isnan(x):
        return "—"
    if x >= 1e6:
        return f"{x / 1e6:.2f} M {unit}/s"
    if x >= 1e4:
        return f"{x / 1e3:.0f} k {unit}/s"
    return f"{x:,.1f} {unit}/s"


COLUMNS = ["stage", "wall s", "cpu s", "py MB", "RSS MB", "throughput", "limit s",
           "ours/limit", "target", "met?"]


def table(rows: list[Row]) -> str:
    """The rows as a Markdown table (printed, and pasted into the README)."""
    lines = ["| " + " | ".join(COLUMNS) + " |", "|" + "|".join("---" for _ in COLUMNS) + "|"]
    for r in rows:
        rss = _num(r.m.rss_mb, 0) if r.m.rss_exact else f">={_num(r.m.rss_mb, 0)}"
        met = "—" if r.met is None else ("yes" if r.met else "**no**")
        ratio = r.ratio
        cells = [r.stage, _num(r.m.wall), _num(r.m.cpu), _num(r.m.py_mb, 0), rss,
                 _rate(r.throughput, r.unit), _num(r.limit, 3),
                 "—" if ratio is None else f"{ratio:,.1f}x", r.target, met]
        lines.append("| " + " | ".join(cells) + " |")
    return "\n".join(lines)


def notes(rows: list[Row]) -> str:
    """Footnotes: what each limit is and anything the row needs said."""
    out = []
    for r in rows:
        bits = [b for b in (f"limit = {r.limit_what}" if r.limit_what else "", r.note) if b]
        if bits:
            out.append(f"- **{r.stage}**: " + "; ".join(bits))
    return "\n".join(out)


# ----------------------------------------------------------------------------- environment

def environment(db_kind: str) -> dict[str, Any]:
    """Machine, library versions, load and date: printed with every table."""
    import scipy

    mem_kb = None
    try:
        text = Path("/proc/meminfo").read_text()
        mem_kb = int(re.search(r"MemTotal:\s+(\d+)", text).group(1))  # type: ignore[union-attr]
    except (OSError, AttributeError):
        pass
    try:
        load = os.getloadavg()
    except OSError:
        load = (math.nan,) * 3
    return {
        "date": dt.datetime.now().isoformat(timespec="minutes"),
        "cores": os.cpu_count(),
        "ram_gib": round(mem_kb / 2**20, 1) if mem_kb else None,
        "python": platform.python_version(),
        "duckdb": duckdb.__version__,
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "pandas": pd.__version__,
        "platform": platform.platform(terse=True),
        "load_start": [round(x, 2) for x in load],
        "db": db_kind,
    }


# ----------------------------------------------------------------------------- workload

def generate(feeds: Path, regions: int, days: int, snapshots: int, seed: int) -> dict[str, Any]:
    """Write the scenario (reused when ``feeds`` already holds the same one)."""
    from tallywave.pipeline.simulate import write_scenario

    marker = feeds / "benchmark.json"
    want = {"regions": regions, "days": days, "snapshots": snapshots, "seed": seed}
    if marker.exists():
        info = json.loads(marker.read_text())
        if info.get("params") == want:
            info["reused"] = True
            return info
    info = write_scenario(feeds, n_regions=regions, n_days=days, n_snapshots=snapshots,
                          seed=seed)
    info.pop("files", None)
    info["params"] = want
    marker.write_text(json.dumps(info))
    info["reused"] = False
    return info


def _held_back(feeds: Path, as_of: str) -> list[Path]:
    """The last day's feed files (one per signal): ingested later, as the 'new day'."""
    out = []
    for sub, ext in _FEED_DIRS.values():
        p = feeds / sub / f"{sub}_{as_of}.{ext}"
        if p.exists():
            out.append(p)
    return out


@contextmanager
def holding_back(files: list[Path], park: Path) -> Iterator[None]:
    """Move files out of the feed folders for the duration of the block, then back."""
    park.mkdir(parents=True, exist_ok=True)
    moved = []
    try:
        for f in files:
            dest = park / f.name
            shutil.move(str(f), dest)
            moved.append((dest, f))
        yield
    finally:
        for dest, f in moved:
            shutil.move(str(dest), f)


def _feed_files(feeds: Path) -> list[tuple[str, Path]]:
    out = []
    for sub, ext in _FEED_DIRS.values():
        out += [(sub, p) for p in sorted((feeds / sub).glob(f"*.{ext}"))]
    return out


def _connect(path: Path | None) -> duckdb.DuckDBPyConnection:
    from tallywave.pipeline import store

    return store.memory() if path is None else store.connect(path)


# ----------------------------------------------------------------------------- limits

def ingest_limit(files: list[tuple[str, Path]], db: Path | None) -> float:
    """Bare DuckDB: one read_csv / read_json statement per file into one table per source."""
    con = duckdb.connect(str(db) if db else ":memory:")
    try:
        t = time.perf_counter()
        made: set[str] = set()
        for sub, p in files:
            reader = "read_json" if p.suffix == ".jsonl" else "read_csv"
            src = f"{reader}('{p.as_posix()}')"
            if sub in made:
                con.execute(f"INSERT INTO lim_{sub} SELECT * FROM {src}")
            else:
                con.execute(f"CREATE OR REPLACE TABLE lim_{sub} AS SELECT * FROM {src}")
                made.add(sub)
        return time.perf_counter() - t
    finally:
        con.close()
        if db is not None:
            db.unlink(missing_ok=True)
            Path(str(db) + ".wal").unlink(missing_ok=True)


_VINTAGE_LIMIT = """
CREATE OR REPLACE TEMP TABLE _lim_obs AS
SELECT region, signal, ref_date, as_of,
       CASE WHEN value_kind = 'cumulative'
            THEN value - coalesce(lag(value) OVER (PARTITION BY source, region, signal, as_of
                                                   ORDER BY ref_date), 0)
            ELSE value END AS value
FROM raw.reports
"""


def vintages_limit(con: duckdb.DuckDBPyConnection) -> float:
    """Bare DuckDB: one window pass differencing every snapshot (no change detection)."""
    t = timed(lambda: con.execute(_VINTAGE_LIMIT))
    con.execute("DROP TABLE IF EXISTS _lim_obs")
    return t


def _stacked(blocks: dict[str, Any]) -> np.ndarray:
    """Every signal's (regions, days) array stacked on a common, right-aligned date axis."""
    t = max(b.values.shape[1] for b in blocks.values())
    parts = []
    for b in blocks.values():
        v = np.nan_to_num(np.asarray(b.values, dtype=float))
        parts.append(np.pad(v, ((0, 0), (t - v.shape[1], 0))))
    return np.concatenate(parts, axis=0)


# ----------------------------------------------------------------------------- scoring workload

def _scoring_db(path: Path | None, n_rows: int, n_regions: int, seed: int
                ) -> tuple[duckdb.DuckDBPyConnection, dt.date, int]:
    """A database holding ``n_rows`` published forecast quantile rows and their settled truth.

    Forecast i (9 quantile rows) is horizon i % 28 + 1, signal (i // 28) % 3, model
    (i // 84) % 4, region (i // 336) % n_regions and issue day i // (336 n_regions); quantiles
    are spread around a noisy truth so scores are not degenerate.
    """
    con = _connect(path)
    levels = [0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975]
    n_fc = max(1, n_rows // len(levels))
    per_issue = 336 * n_regions
    n_issue = -(-n_fc // per_issue)
    first = dt.date(2026, 1, 5)
    as_of = first + dt.timedelta(days=n_issue + 28 + 14)
    con.execute(f"SELECT setseed({(seed % 1000) / 1000.0})").fetchall()
    con.execute("""
        INSERT INTO core.observations
        SELECT 'R' || lpad(r::VARCHAR, 5, '0'), s.sig, ?::DATE + d::INTEGER, ?::DATE,
               round(40 + 30 * sin(d / 9.0 + r) + 10 * random()), NULL
        FROM range(?) t(r), range(?) u(d),
             (SELECT unnest(['cases', 'admissions', 'deaths']) AS sig) s
    """, [first, as_of, n_regions, n_issue + 29])
    con.execute("""
        CREATE TEMP TABLE _fc AS
        SELECT i, i % 28 + 1 AS h, (i // 28) % 3 AS s, (i // 84) % 4 AS m,
               (i // 336) % ? AS r, i // (336 * ?) AS k
        FROM range(?) t(i)
    """, [n_regions, n_regions, n_fc])
    con.execute("INSERT INTO out.runs SELECT 'bench-' || k, ?::DATE + k::INTEGER, now(), now(), "
                "'published', '{}', 'benchmark', NULL, NULL FROM (SELECT DISTINCT k FROM _fc)",
                [first])
    con.execute("""
        INSERT INTO out.forecasts
        SELECT 'bench-' || f.k, ?::DATE + f.k::INTEGER,
               (['baseline', 'renewal', 'compartmental', 'ensemble'])[f.m + 1],
               'R' || lpad(f.r::VARCHAR, 5, '0'),
               (['cases', 'admissions', 'deaths'])[f.s + 1],
               ?::DATE + (f.k + f.h)::INTEGER, f.h, q.lvl,
               greatest(0, (40 + 30 * sin((f.k + f.h) / 9.0 + f.r) + 8 * random())
                        * (0.55 + 0.9 * q.lvl))
        FROM _fc f, (SELECT unnest(?::DOUBLE[]) AS lvl) q
    """, [first, first, levels])
    con.execute("DROP TABLE _fc")
    n = con.execute("SELECT count(*) FROM out.forecasts").fetchall()[0][0]
    return con, as_of, int(n)


_SCORE_LIMIT = """
SELECT sum(abs(f.value - o.value))
FROM out.forecasts f
JOIN core.observations o
  ON f.region = o.region AND f.signal = o.signal AND f.target_date = o.ref_date
"""


# ----------------------------------------------------------------------------- the benchmark

@dataclass
class Config:
    """Sizes and options of one benchmark run."""

    regions: int
    days: int
    snapshots: int
    score_rows: int
    seed: int = 20260302
    out: Path | None = None
    keep: bool = False
    memory_db: bool = False
    trace: bool = True
    flow: bool = False
    profile: bool = False
    extra: dict[str, Any] = field(default_factory=dict)

    @property
    def scale(self) -> float:
        """Work relative to the target size (regions x days)."""
        return self.regions * self.days / (REF_REGIONS * REF_DAYS)


def _say(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


class StageMeter:
    """A ``progress`` callback for :func:`pipeline.run.execute_run` that measures each stage.

    execute_run announces ``[as_of] NAME ...`` before a stage and ``[as_of] NAME: ...`` after
    it, so the stages are measured inside the real run (same transaction, same code path).
    ``peak_py`` is the largest traced Python memory seen at the end of any stage (absolute).
    """

    def __init__(self, names: list[str], verbose: bool = True) -> None:
        self.names = names
        self.verbose = verbose
        self.meter = Meter()
        self.current: str | None = None
        self.results: dict[str, Measure] = {}
        self.peak_py = 0

    def __call__(self, msg: str) -> None:
        text = msg.split("] ", 1)[-1]
        for name in self.names:
            if text == f"{name} ...":
                self.current = name
                self.meter.start()
            elif text.startswith(f"{name}: ") and self.current == name:
                if tracemalloc.is_tracing():
                    self.peak_py = max(self.peak_py, tracemalloc.get_traced_memory()[1])
                self.results[name] = self.meter.stop()
                self.current = None
        if self.verbose:
            _say(f"  {msg}")


def _daily_run(con: duckdb.DuckDBPyConnection, last: dt.date, settings: Any, names: list[str],
               trace: bool) -> tuple[dict[str, Any], StageMeter, Measure]:
    """One execute_run (serial mapper, then scoring), every stage measured; with ``trace``
    under tracemalloc (the whole run's Python peak is the largest of its stages' peaks)."""
    from tallywave.pipeline.run import execute_run

    sm = StageMeter(names)
    if trace:
        tracemalloc.start()
    try:
        base = tracemalloc.get_traced_memory()[0] if trace else 0
        box: list[Measure] = []
        with measured(box):
            result = execute_run(con, last, settings, progress=sm, score_after=True)
        whole = box[-1]
        if trace:
            peak = max(sm.peak_py, tracemalloc.get_traced_memory()[1])
            whole.py_mb = (peak - base) / 2**20
    finally:
        if trace:
            tracemalloc.stop()
    return result, sm, whole


def run_benchmark(cfg: Config) -> dict[str, Any]:
    """Generate, ingest, run and score; return the rows, the environment and the sizes.

    Times come from an untraced pass.  The Python peaks (tracemalloc) of the Python-heavy steps
    (ingest, the daily run's stages, the model cores) come from a second, traced pass of the
    same step, because tracing slows Python-level allocation several-fold; the SQL-bound steps
    (vintages, daily ingest, scoring) are traced in place (the tracing costs them nothing
    measurable).
    """
    from tallywave.pipeline.ingest import ingest_spec
    from tallywave.pipeline.run import stages
    from tallywave.pipeline.settings import Settings
    from tallywave.pipeline.vintages import update_observations

    root = cfg.out or Path(tempfile.mkdtemp(prefix="tallywave-bench-"))
    root.mkdir(parents=True, exist_ok=True)
    feeds = root / "feeds"
    db = None if cfg.memory_db else root / "bench.duckdb"
    if db is not None:
        for p in (db, Path(str(db) + ".wal")):
            p.unlink(missing_ok=True)
    env = environment("in-memory (pipeline.store.memory())" if cfg.memory_db
                      else f"DuckDB file ({db})")
    rows: list[Row] = []
    settings = Settings()
    profiles: dict[str, str] = {}
    box: list[Measure] = []

    # -- workload
    _say(f"generating {cfg.regions} regions x {cfg.days} days x {cfg.snapshots} snapshots "
         f"in {feeds} ...")
    with measured(box):
        info = generate(feeds, cfg.regions, cfg.days, cfg.snapshots, cfg.seed)
    n_feed_rows = int(sum(info["rows"][s] for s in SIGNALS))
    rows.append(Row("generate scenario (simulator)", box[-1], n_feed_rows, "rows",
                    note=("reused from an earlier run" if info.get("reused") else
                          f"{info['feed_bytes'] / 2**20:,.0f} MB of feeds, "
                          f"{3 * cfg.snapshots} files") + "; not a pipeline stage"))
    last = dt.date.fromisoformat(info["as_of_last"])
    spec = feeds / "feeds.toml"
    held = _held_back(feeds, last.isoformat())
    con = _connect(db)

    # -- ingest all history except the last day (that one is the daily run's new data)
    with holding_back(held, root / "held_back"):
        files = _feed_files(feeds)
        _say(f"ingesting {len(files)} files ...")
        prof = _profiler(cfg.profile)
        with measured(box):
            summary = ingest_spec(con, spec, update_vintages=False)
        _stop_profile(prof, profiles, "ingest")
        n_raw = con.execute("SELECT count(*) FROM raw.reports").fetchall()[0][0]
        lim_db = None if cfg.memory_db else root / "limit_ingest.duckdb"
        _say("ingest limit (bare DuckDB readers) ...")
        lim = ingest_limit(files, lim_db)
        ingest_row = Row(f"ingest ({len(files)} files)", box[-1], n_raw, "rows", lim,
                         f"DuckDB read_csv/read_json of the same {len(files)} files, one "
                         "statement per file, into one table per source",
                         note=summary.line())
        rows.append(ingest_row)
        if cfg.trace:
            ingest_row.m.py_mb = _ingest_py_peak(spec, files)

    _say("vintages ...")
    with measured(box, cfg.trace):
        vs = update_observations(con)
    rows.append(Row("vintages (core.observations)", box[-1], n_raw, "rows",
                    vintages_limit(con),
                    "one DuckDB window pass over raw.reports differencing each snapshot",
                    note=f"{vs['rows']:,} observation rows from {n_raw:,} report rows"))

    # -- the new day: ingest its 3 files (every older file is re-hashed and skipped)
    _say("daily ingest of the last snapshot ...")
    with measured(box, cfg.trace):
        day = ingest_spec(con, spec, update_vintages=True)
    rows.append(Row("daily ingest (1 new snapshot + vintages update)", box[-1],
                    sum(f.rows_accepted for f in day.files), "rows", note=day.line()))

    # -- the daily run, each stage measured inside execute_run
    names = [n for n, _ in stages()]
    _say(f"daily run as of {last} (serial mapper) ...")
    prof = _profiler(cfg.profile)
    result, sm, whole = _daily_run(con, last, settings, names, trace=False)
    _stop_profile(prof, profiles, "daily_run")
    run_id = result["run_id"]
    n_reg = cfg.regions
    stage_rows = {}
    for name in names:
        m = sm.results.get(name) or Measure(wall=float(result["stages"][name]["seconds"]))
        stage_rows[name] = Row(name, m, n_reg, "regions",
                               note=str(result["stages"][name].get("line", ""))[:200])
        rows.append(stage_rows[name])
    whole_row = Row(f"whole daily run ({n_reg} regions, serial)", whole, n_reg, "regions",
                    target=f"<= {300 * cfg.regions / REF_REGIONS:,.0f} s",
                    met=whole.wall <= 300 * cfg.regions / REF_REGIONS,
                    note="pipeline.run.execute_run: clean, nowcast, transmission, forecast, "
                         "publish, score; target 300 s per 3,000 regions, scaled")

    # -- limits and model cores on the run's own arrays (untimed preparation)
    _say("limits and model cores ...")
    _stage_limits(con, last, settings, run_id, rows, cfg)
    rows.append(whole_row)
    if cfg.trace:
        _say("memory pass: the daily run again under tracemalloc ...")
        _, sm2, whole2 = _daily_run(con, last, settings, names, trace=True)
        for name in names:
            if name in sm2.results:
                stage_rows[name].m.py_mb = sm2.results[name].py_mb
        whole_row.m.py_mb = whole2.py_mb
    con.close()

    if cfg.flow:
        rows.append(_flow_row(cfg, db, last))

    # -- scoring at scale on its own database
    _say(f"scoring {cfg.score_rows:,} quantile rows ...")
    sdb = None if cfg.memory_db else root / "bench_scores.duckdb"
    if sdb is not None:
        sdb.unlink(missing_ok=True)
    scon, s_as_of, n_rows = _scoring_db(sdb, cfg.score_rows, cfg.regions, cfg.seed)
    from tallywave.pipeline.scoring import score

    prof = _profiler(cfg.profile)
    with measured(box, cfg.trace):
        sres = score(scon, s_as_of, settings)
    _stop_profile(prof, profiles, "scoring")
    lim = timed(lambda: scon.execute(_SCORE_LIMIT).fetchall())
    target_s = 20.0 * n_rows / REF_SCORE_ROWS
    rows.append(Row(f"scoring ({n_rows / 1e6:.1f} M quantile rows)", box[-1], n_rows,
                    "rows", lim, "DuckDB sum(abs(value - truth)) over the forecast x truth "
                    "join", f"<= {target_s:.1f} s", box[-1].wall <= target_s,
                    note=f"pipeline.scoring.score; {sres['rows']:,} forecasts scored; "
                         "target 20 s per 10 M rows, scaled"))
    scon.close()

    env["load_end"] = [round(x, 2) for x in os.getloadavg()]
    env["sizes"] = {"regions": cfg.regions, "days": cfg.days, "snapshots": cfg.snapshots,
                    "score_rows": cfg.score_rows, "feed_rows": n_feed_rows,
                    "feed_mb": round(info["feed_bytes"] / 2**20, 1)}
    env["traced"] = cfg.trace
    out = {"env": env, "rows": rows, "root": str(root), "profiles": profiles}
    for name, text in profiles.items():
        (root / f"profile_{name}.txt").write_text(text)
    return out


def _ingest_py_peak(spec: Path, files: list[tuple[str, Path]]) -> float:
    """Python peak of ingest: files are ingested one at a time, so the peak is that of the
    largest file of a source; ingest each source's largest file traced into a scratch store."""
    from tallywave.pipeline import store
    from tallywave.pipeline.ingest import ingest_file, load_spec

    by_dir = {s.path.split("/")[0]: s for s in load_spec(spec)}
    scratch = store.memory()
    try:
        peak = 0.0
        for sub in _FEED_DIRS:
            mine = [p for d, p in files if d == _FEED_DIRS[sub][0]]
            if not mine or _FEED_DIRS[sub][0] not in by_dir:
                continue
            big = max(mine, key=lambda p: p.stat().st_size)
            box: list[Measure] = []
            with measured(box, trace=True):
                ingest_file(scratch, by_dir[_FEED_DIRS[sub][0]], big)
            peak = max(peak, box[-1].py_mb)
        return peak
    finally:
        scratch.close()


def _profiler(on: bool) -> Any:
    if not on:
        return None
    from pyinstrument import Profiler  # optional: only for --profile

    p = Profiler(interval=0.005)
    p.start()
    return p


def _stop_profile(p: Any, into: dict[str, str], name: str) -> None:
    if p is not None:
        p.stop()
        into[name] = p.output_text(unicode=False, color=False)


def _stage_limits(con: duckdb.DuckDBPyConnection, as_of: dt.date, settings: Any, run_id: str,
                  rows: list[Row], cfg: Config) -> None:
    """Attach the bare-library limits to the stage rows and add the model-core rows."""
    from scipy import signal as sps

    from tallywave.models.compartmental import CompartmentalModel
    from tallywave.models.incidence import median_corrected
    from tallywave.models.renewal import CoriEstimator
    from tallywave.pipeline.clean import cleaned_blocks
    from tallywave.pipeline.frames import to_blocks
    from tallywave.pipeline.nowcast import build_triangles, nowcast_quantiles
    from tallywave.pipeline.transmission import interval_pmfs
    from tallywave.pipeline.vintages import observations_as_of, vintages_as_of

    by = {r.stage: r for r in rows}
    # clean: pandas rolling median of the same (regions, days) arrays
    blocks = to_blocks(observations_as_of(con, as_of), end=as_of)
    arr = _stacked(blocks)
    cfg0 = settings.for_signal("cases")
    win = int(cfg0["clean_baseline_days"])
    frame = pd.DataFrame(arr.T)
    by["clean"].limit = timed(lambda: frame.rolling(win, center=True, min_periods=1).median(),
                              repeat=3)
    by["clean"].limit_what = (f"pandas rolling median (window {win}) over the same "
                              f"{arr.shape[0]} x {arr.shape[1]} array")
    # nowcast: one numpy cumulative sum over the triangle array
    d = int(cfg0["max_delay_days"])
    n_ref = max(int(cfg0["nowcast_training_days"]), d + 7)
    vint = vintages_as_of(con, as_of, since=as_of - dt.timedelta(days=n_ref - 1))
    firsts = {r[0]: r[1] for r in con.execute(
        "SELECT signal, min(as_of) FROM core.observations GROUP BY signal").fetchall()}
    tris = build_triangles(vint, as_of, d, n_ref, firsts)
    cells = np.concatenate([t.cells for t in tris.values()], axis=0)
    by["nowcast"].limit = timed(lambda: np.cumsum(cells, axis=2), repeat=3)
    by["nowcast"].limit_what = f"one numpy cumsum over the {'x'.join(map(str, cells.shape))} " \
                               "triangle array"
    # transmission: one fftconvolve of the full region x day array with the interval pmf
    cblocks = cleaned_blocks(con, run_id)
    x = _stacked(cblocks)
    w = interval_pmfs(cfg0)[0]
    lim = timed(lambda: sps.fftconvolve(x, w[None, :], axes=1), repeat=3)
    tr = by["transmission"]
    tr.limit = lim
    tr.limit_what = (f"one scipy.signal.fftconvolve of the {x.shape[0]} x {x.shape[1]} "
                     "array with the interval pmf")
    t_target = 2.0 * cfg.scale
    tr.target = f"<= {t_target:.2f} s and <= 3x limit"
    tr.met = tr.m.wall <= t_target and tr.m.wall <= 3 * lim
    tr.note = (tr.note + "; includes mixing 100 nowcast draws per region (mixture quantiles) "
               f"— target 2 s per {REF_REGIONS} x {REF_DAYS}, scaled").strip("; ")
    # the core estimator alone, on the full array
    box: list[Measure] = []
    for _ in range(3):  # best of 3, like the limit it is compared with
        with measured(box):
            CoriEstimator(window=int(cfg0["rt_window_days"])).fit(x, w)
    m = min(box, key=lambda b: b.wall)
    if cfg.trace:
        with measured(box, trace=True):
            CoriEstimator(window=int(cfg0["rt_window_days"])).fit(x, w)
        m.py_mb = box[-1].py_mb
    rows.insert(rows.index(tr) + 1, Row(
        "  R_t core: CoriEstimator().fit on the full array", m, x.shape[0] / 3, "regions", lim,
        "the same fftconvolve", f"<= {t_target:.2f} s and <= 3x limit",
        m.wall <= t_target and m.wall <= 3 * lim,
        note=f"{x.shape[0]} series (3 signals) x {x.shape[1]} days, one posterior, no draws"))
    # compartmental fits on all regions, in the stage's batches, from the stage's inputs
    fc = by["forecast"]
    adj = cleaned_blocks(con, run_id, adjusted=True)
    sigs = [s for s in SIGNALS if s in adj]
    regions = np.unique(np.concatenate([adj[s].regions for s in sigs]))
    n_days = int(cfg0["fit_window_weeks"]) * 7 + 60
    series = {}
    for s in sigs:
        b = adj[s]
        y = median_corrected(np.nan_to_num(b.values), *nowcast_quantiles(con, run_id, s, b))
        a = np.full((len(regions), n_days), np.nan)
        take = y[:, -n_days:]
        a[np.searchsorted(regions, b.regions), n_days - take.shape[1]:] = take
        series[s] = a
    pops = dict(con.execute("SELECT region, population FROM core.regions").fetchall())
    pop = np.array([float(pops.get(r, 1e6)) for r in regions])
    size = int(cfg0["batch_regions"])

    def fit(sl: slice) -> int:
        model = CompartmentalModel(latent_days=float(cfg0["latent_days"]),
                                   infectious_days=float(cfg0["infectious_days"]),
                                   window_weeks=int(cfg0["fit_window_weeks"]),
                                   random_state=int(cfg0["seed"]))
        model.fit({s: series[s][sl] for s in sigs}, pop[sl])
        return int(np.sum(model.converged_))

    with measured(box):
        n_conv = sum(fit(slice(lo, lo + size)) for lo in range(0, len(regions), size))
    m = box[-1]
    if cfg.trace:  # batches run one after another: the peak is one batch's
        with measured(box, trace=True):
            fit(slice(0, size))
        m.py_mb = box[-1].py_mb
    per_core = len(regions) / m.cpu if m.cpu > 0 else math.nan
    rows.insert(rows.index(fc) + 1, Row(
        "  compartmental fits (CompartmentalModel.fit)", m, len(regions), "regions",
        target=">= 20 regions/s/core", met=per_core >= 20,
        note=f"{per_core:,.1f} regions per CPU-second ({n_conv}/{len(regions)} converged, "
             f"batches of {size}, cold start, {len(sigs)} signals jointly)"))


def _flow_row(cfg: Config, db: Path | None, last: dt.date) -> Row:
    """The same daily run through the Prefect flow with the local (threads) runner."""
    from tallywave.flows.daily import daily

    if db is None:
        raise SystemExit("--flow needs a database file (drop --memory)")
    box: list[Measure] = []
    _say("daily run through the Prefect flow (local runner) ...")
    with measured(box):
        out = daily(as_of=last.isoformat(), db=str(db), runner="local", report=False)
    return Row(f"whole daily run through flows.daily (local runner, {os.cpu_count()} threads)",
               box[-1], cfg.regions, "regions",
               target=f"<= {300 * cfg.regions / REF_REGIONS:,.0f} s",
               met=box[-1].wall <= 300 * cfg.regions / REF_REGIONS,
               note=f"includes Prefect start-up; run {out['run_id']}")


# ----------------------------------------------------------------------------- CLI

def parse_args(argv: list[str] | None) -> Config:
    """Command-line options -> :class:`Config` (``--quick`` sets the small defaults)."""
    ap = argparse.ArgumentParser(prog="python -m benchmarks.run",
                                 description="Time every Tallywave stage on a synthetic workload "
                                             "against the bare library doing the same work.")
    ap.add_argument("--regions", type=int, help="regions (default 3000; --quick 100)")
    ap.add_argument("--days", type=int, help="days simulated (default 730; --quick 365)")
    ap.add_argument("--snapshots", type=int, help="daily snapshots per feed (default 60; "
                                                  "--quick 30)")
    ap.add_argument("--score-rows", type=int, help="quantile rows scored (default 10 million; "
                                                   "--quick 1 million)")
    ap.add_argument("--quick", action="store_true", help="small size, finishes in about a minute")
    ap.add_argument("--out", type=Path, help="folder for feeds, databases and results "
                                             "(default: a temporary folder)")
    ap.add_argument("--keep", action="store_true", help="keep the temporary folder")
    ap.add_argument("--memory", action="store_true",
                    help="in-memory DuckDB instead of a database file")
    ap.add_argument("--no-tracemalloc", action="store_true",
                    help="skip Python allocation tracing (it slows Python-heavy code a little)")
    ap.add_argument("--flow", action="store_true",
                    help="also time the daily run through the Prefect flow (local runner)")
    ap.add_argument("--profile", action="store_true",
                    help="write pyinstrument profiles of ingest, the daily run and scoring")
    ap.add_argument("--seed", type=int, default=20260302)
    ns = ap.parse_args(argv)
    base = QUICK if ns.quick else FULL
    pick = {k: getattr(ns, k) if getattr(ns, k) is not None else v for k, v in base.items()}
    for k, v in pick.items():
        if v < 1:
            ap.error(f"--{k.replace('_', '-')} must be positive")
    return Config(regions=pick["regions"], days=pick["days"], snapshots=pick["snapshots"],
                  score_rows=pick["score_rows"], seed=ns.seed, out=ns.out, keep=ns.keep,
                  memory_db=ns.memory, trace=not ns.no_tracemalloc, flow=ns.flow,
                  profile=ns.profile)


def render(res: dict[str, Any]) -> str:
    """Header, table and notes as Markdown."""
    e, s = res["env"], res["env"]["sizes"]
    head = (f"**{s['regions']:,} regions x {s['days']} days x {s['snapshots']} snapshots** "
            f"({s['feed_rows']:,} feed rows, {s['feed_mb']:,} MB; 3 signals), "
            f"{e['date']}: {e['cores']} cores, {e['ram_gib']} GiB RAM, Python {e['python']}, "
            f"DuckDB {e['duckdb']}, numpy {e['numpy']}, scipy {e['scipy']}, pandas "
            f"{e['pandas']}; database: {e['db']}; load average {e['load_start'][0]} at start, "
            f"{e['load_end'][0]} at end (other processes share the cores).")
    traced = ("py MB = peak Python allocations above the stage start (tracemalloc; includes "
              "numpy arrays, not DuckDB's own memory), measured in a second, traced pass for "
              "ingest (its largest file per source), the daily run's stages and the model cores "
              "(tracing slows Python code 1.3-3x, so times come from the untraced pass), and in "
              "place for the SQL-bound vintages, daily ingest and scoring; ")
    mem = ((traced if e.get("traced") else "py MB not measured (--no-tracemalloc); ")
           + "RSS MB = peak resident memory above the stage start (/proc/self/status VmHWM, "
           "reset per stage through /proc/self/clear_refs); cpu s = user + system CPU time of "
           "the process, all threads (DuckDB uses every core); limit = the bare library doing "
           "the irreducible part of the same work; targets are for 3,000 regions x 730 days "
           "and scaled to the size run.")
    return "\n\n".join([head, table(res["rows"]), mem, notes(res["rows"])])


def main(argv: list[str] | None = None) -> int:
    """Entry point of ``python -m benchmarks.run``."""
    os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
    cfg = parse_args(argv)
    t0 = time.perf_counter()
    res = run_benchmark(cfg)
    text = render(res)
    print(text)
    print(f"\n(total benchmark time {time.perf_counter() - t0:,.0f} s)")
    root = Path(res["root"])
    if cfg.out is not None:
        (root / "results.md").write_text(text + "\n")
        (root / "results.json").write_text(json.dumps(
            {"env": res["env"], "rows": [{**asdict(r), "throughput": r.throughput,
                                          "ratio": r.ratio} for r in res["rows"]]},
            indent=2, default=str))
    elif not cfg.keep:
        shutil.rmtree(root, ignore_errors=True)
    else:
        print(f"(kept {root})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
