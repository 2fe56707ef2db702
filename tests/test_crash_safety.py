"""Crash safety: a run killed with SIGKILL at any moment leaves a database that opens, publishes
all of a run or nothing of it, and loses no row of raw data or of earlier runs.

Each kill starts a run in a fresh process, waits for a phase marker it prints (imports, database
open, each stage, publishing, scoring, close) and kills the whole process group at a fixed
fraction of that phase's measured duration: one kill per kill point (:data:`KILL_POINTS`, every
phase once, the publish phase — the COMMIT — twice), so every phase is covered with the fewest
processes.  After every kill the database is checked from this process; after all kills the next
run must publish.
"""

from __future__ import annotations

import datetime as dt
import itertools
import os
import re
import shutil
import signal
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path

import numpy as np
import pytest

from tallywave.pipeline import store
from tallywave.pipeline.run import execute_run
from tallywave.pipeline.settings import load_settings

pytestmark = pytest.mark.slow

SEED = 20260415
ROOT = Path(__file__).resolve().parents[1]

RAW_TABLES = ("raw.feed_files", "raw.reports", "raw.rejected_rows", "core.observations",
              "core.regions")
RUN_TABLES = ("core.cleaned", "core.clean_actions", "core.weekday_effects", "out.delay_pmf",
              "out.delay_drift", "out.nowcast", "out.rt", "out.growth", "out.fits",
              "out.forecasts")
REQUIRED = ("out.nowcast", "out.rt", "out.forecasts", "core.cleaned")  # every run has these

# The child: one run on the database file, printing a timed marker at each phase.
CHILD = """
import sys, time
t0 = time.perf_counter()
def mark(m):
    print(f"{time.perf_counter() - t0:.3f} {m}", flush=True)
mark("start")
from tallywave.pipeline import store
from tallywave.pipeline.run import execute_run
from tallywave.pipeline.settings import load_settings
db, as_of, settings = sys.argv[1:4]
con = store.connect(db, wait_s=60)
mark("open")
res = execute_run(con, as_of, load_settings(settings), progress=mark)
mark("closing " + res["run_id"])
con.close()
mark("done")
"""

# Phase markers in the order a run prints them (a regex on the marker text) and their names.
PHASES = [
    ("start", r"^start$"),
    ("open", r"^open$"),
    ("clean", r"\] clean \.\.\.$"),
    ("nowcast", r"\] nowcast \.\.\.$"),
    ("transmission", r"\] transmission \.\.\.$"),
    ("forecast", r"\] forecast \.\.\.$"),
    ("publish", r"\] forecast: "),  # last stage done: out.runs row, COMMIT, then scoring
    ("close", r"^closing "),  # scored; connection close (checkpoint)
]
#: Where the stage-level kills land: (phase, fraction of the phase's measured duration).  Every
#: phase once at its middle; the publish phase (out.runs row, COMMIT, scoring) also just after
#: it starts, when the COMMIT is in flight.
KILL_POINTS = [(name, 0.5) for name, _ in PHASES] + [("publish", 0.05)]
#: The kills of `tallywave run` (through the Prefect flow): after these stage lines it prints.
CLI_KILL_POINTS = [r"^clean: ", r"^transmission: ", r"^forecast: "]


def _messages(text: str) -> list[str]:
    """Output lines without their leading time stamp."""
    return [line.partition(" ")[2] for line in text.splitlines()]


def _phase_of(text: str) -> str:
    """Name of the last phase whose marker appears in a child's output."""
    last = "spawn"
    for msg in _messages(text):
        for name, pattern in PHASES:
            if re.search(pattern, msg):
                last = name
    return last


def _marker_times(text: str) -> dict[str, float]:
    out: dict[str, float] = {}
    for line in text.splitlines():
        stamp, _, msg = line.partition(" ")
        for name, pattern in PHASES + [("done", r"^done$")]:
            if re.search(pattern, msg):
                out[name] = float(stamp)
    return out


def _env() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    env["PREFECT_SERVER_ANALYTICS_ENABLED"] = "false"
    return env


def _snapshot(db: Path) -> dict:
    """Open the file (recovering it if need be) and read everything the checks need."""
    con = store.connect(db, wait_s=30)
    try:
        counts = {t: con.execute(f"SELECT count(*) FROM {t}").fetchall()[0][0]
                  for t in RAW_TABLES + ("out.scores",)}
        runs = dict(con.execute("SELECT run_id, status FROM out.runs").fetchall())
        per_run = {t: dict(con.execute(f"SELECT run_id, count(*) FROM {t} GROUP BY run_id"
                                       ).fetchall()) for t in RUN_TABLES}
        published_twice = con.execute(
            "SELECT as_of FROM out.runs WHERE status = 'published' GROUP BY as_of "
            "HAVING count(*) > 1").fetchall()
        score_runs = {r[0] for r in con.execute(
            "SELECT DISTINCT run_id FROM out.scores WHERE run_id IS NOT NULL").fetchall()}
    finally:
        con.close()
    return {"counts": counts, "runs": runs, "per_run": per_run,
            "published_twice": published_twice, "score_runs": score_runs}


def _check(snap: dict, base: dict, seen: dict[tuple[str, str], int]) -> int:
    """Assert the invariants; return the rows lost against the baseline and earlier runs."""
    visible = {r for r, s in snap["runs"].items() if s in ("published", "superseded")}
    for table in REQUIRED:  # no run is published without its outputs
        missing = visible - set(snap["per_run"][table])
        assert not missing, f"published runs without rows in {table}: {missing}"
    for table in RUN_TABLES:  # no partial output of an unpublished run is visible
        orphans = set(snap["per_run"][table]) - visible
        assert not orphans, f"rows of unpublished runs in {table}: {orphans}"
    assert snap["score_runs"] <= visible
    assert not snap["published_twice"], "two published runs for one as_of"
    lost = 0
    for table in RAW_TABLES + ("out.scores",):
        lost += max(0, base["counts"][table] - snap["counts"][table])
        assert snap["counts"][table] == base["counts"][table], table
    for table in RUN_TABLES:
        for run_id, n in snap["per_run"][table].items():
            before = seen.setdefault((table, run_id), n)
            lost += max(0, before - n)
            assert n == before, f"{table} rows of run {run_id} changed: {before} -> {n}"
    for (table, run_id), n in seen.items():
        if run_id not in snap["per_run"][table]:
            lost += n
            raise AssertionError(f"{table} lost every row of run {run_id}")
    return lost


@pytest.fixture(scope="module")
def scenario(template, tmp_path_factory) -> dict:
    """The session's small scenario (conftest ``template``) with two good published runs."""
    root = tmp_path_factory.mktemp("crash")
    settings = template["settings"]
    db = root / "base.duckdb"
    shutil.copy(template["db"], db)
    con = store.connect(db)
    # Good runs: an early one, whose forecasts later runs score (out.scores not empty), and
    # one on the last date, which every run of the tests then supersedes.
    last = template["last"]
    for day in (template["first"] + dt.timedelta(days=1), last):
        execute_run(con, day, load_settings(settings))
    assert con.execute("SELECT count(*) FROM out.scores").fetchall()[0][0] > 0
    con.close()
    return {"root": root, "db": db, "settings": settings, "as_of": last}


def _spawn(args: list[str], log: Path, env: dict[str, str]) -> subprocess.Popen:
    """Start a child in its own session (so a kill reaches its whole process group)."""
    with open(log, "wb") as fh:  # the child keeps its own copy of the descriptor
        return subprocess.Popen(args, stdout=fh, stderr=subprocess.STDOUT, env=env,
                                cwd=log.parent, start_new_session=True)


def _wait_for(log: Path, pattern: str, proc: subprocess.Popen, timeout: float = 120) -> bool:
    """Poll the child's output until a marker line appears (False if the child ended first)."""
    rx = re.compile(pattern)
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if any(rx.search(m) for m in _messages(log.read_text(errors="replace"))):
            return True
        if proc.poll() is not None:
            return False
        time.sleep(0.01)
    raise AssertionError(f"no marker {pattern!r} within {timeout} s")


def _kill(proc: subprocess.Popen) -> bool:
    """SIGKILL the child's whole process group (its own session); True if it was still running."""
    alive = proc.poll() is None
    if alive:
        os.killpg(proc.pid, signal.SIGKILL)
    proc.wait(timeout=60)
    return alive


def test_killed_runs_leave_nothing_partial(scenario, tmp_path) -> None:
    db = tmp_path / "crash.duckdb"
    shutil.copy(scenario["db"], db)
    env = _env()
    as_of = scenario["as_of"].isoformat()
    args = [sys.executable, "-c", CHILD, str(db), as_of, str(scenario["settings"])]

    # Reference run (published, to be superseded): phase durations for the kill delays.
    t0 = time.monotonic()
    ref = subprocess.run(args, capture_output=True, text=True, env=env, timeout=300, check=False)
    wall = time.monotonic() - t0
    assert ref.returncode == 0, ref.stdout[-2000:] + ref.stderr[-2000:]
    times = _marker_times(ref.stdout)
    names = [p[0] for p in PHASES] + ["done"]
    span = {a: max(times[b] - times[a], 0.05) for a, b in itertools.pairwise(names)}
    base = _snapshot(db)
    seen: dict[tuple[str, str], int] = {}
    lost = _check(base, base, seen)

    patterns = dict(PHASES)
    outcome: Counter[str] = Counter()
    phases: Counter[str] = Counter()
    kills = attempts = 0
    todo = list(KILL_POINTS)
    while todo and attempts < len(KILL_POINTS) + 6:
        name, fraction = todo[0]
        anchor = (name, patterns[name])
        retries = attempts - kills  # a run that finished first: kill earlier in the phase
        delay = fraction * span[name] * 0.5 ** retries
        attempts += 1
        log = tmp_path / f"kill{attempts}.log"
        proc = _spawn(args, log, env)
        try:
            if _wait_for(log, anchor[1], proc):
                time.sleep(delay)
            killed = _kill(proc)
        finally:
            if proc.poll() is None:  # pragma: no cover - only if the test itself fails
                _kill(proc)
        text = log.read_text(errors="replace")
        before = set(base["runs"])
        snap = _snapshot(db)
        lost += _check(snap, base, seen)
        new = {r for r in snap["runs"] if r not in before}
        assert all(snap["runs"][r] == "published" for r in new)
        assert killed or new, "a run that was not killed must have published"
        if not killed:
            outcome["finished before the kill"] += 1
        else:
            todo.pop(0)
            kills += 1
            phase = _phase_of(text)
            phases[phase] += 1
            outcome["after commit" if new else "before commit"] += 1
        base = {**snap, "counts": base["counts"]}

    # After all kills the next run publishes and supersedes the earlier one of its date.
    done = subprocess.run(args, capture_output=True, text=True, env=env, timeout=300,
                          check=False)
    assert done.returncode == 0, done.stdout[-2000:] + done.stderr[-2000:]
    run_id = re.search(r"closing (\S+)", done.stdout).group(1)
    snap = _snapshot(db)
    lost += _check(snap, base, seen)
    assert snap["runs"][run_id] == "published"
    same_day = [s for r, s in snap["runs"].items() if r.startswith(as_of)]
    assert same_day.count("published") == 1 and len(same_day) >= 2
    print(f"\ncrash safety: reference run {wall:.1f} s; {attempts} attempts, {kills} SIGKILLs "
          f"({dict(outcome)}); phases hit {dict(phases)}; crashes survived {kills}; "
          f"rows lost {lost}")
    assert kills == len(KILL_POINTS), f"kill points not reached: {todo}"
    assert set(phases) >= {p for p, _ in PHASES} - {"start"}  # "start" may read as "spawn"
    assert lost == 0


def test_killed_cli_runs_recover(scenario, tmp_path, prefect_server) -> None:
    """The same through `tallywave run` (Prefect flow) against the session's Prefect server."""
    import prefect.settings

    db = tmp_path / "cli.duckdb"
    shutil.copy(scenario["db"], db)
    env = _env()
    env["PREFECT_API_URL"] = str(prefect.settings.PREFECT_API_URL.value())
    as_of = scenario["as_of"].isoformat()
    exe = shutil.which("tallywave", path=str(Path(sys.executable).parent)) or "tallywave"
    args = [exe, "--db", str(db), "run", "--as-of", as_of, "--no-report",
            "--settings", str(scenario["settings"])]
    base = _snapshot(db)
    seen: dict[tuple[str, str], int] = {}
    lost = _check(base, base, seen)
    rng = np.random.default_rng(SEED + 1)
    phases: Counter[str] = Counter()
    kills = 0
    for k, anchor in enumerate(CLI_KILL_POINTS):
        log = tmp_path / f"cli{k}.log"
        proc = _spawn(args, log, env)
        try:
            if _wait_for(log, anchor, proc, timeout=180):
                time.sleep(float(rng.uniform(0.0, 0.5)))
            kills += _kill(proc)
        finally:
            if proc.poll() is None:  # pragma: no cover
                _kill(proc)
        snap = _snapshot(db)
        lost += _check(snap, base, seen)
        new = set(snap["runs"]) - set(base["runs"])
        phases["after commit" if new else "before commit"] += 1
        base = {**snap, "counts": base["counts"]}
    done = subprocess.run(args, capture_output=True, text=True, env=env, timeout=300,
                          check=False)
    assert done.returncode == 0, done.stdout[-2000:] + done.stderr[-2000:]
    snap = _snapshot(db)
    lost += _check(snap, base, seen)
    assert list(snap["runs"].values()).count("published") == 2  # the early run and this one
    print(f"\ncrash safety (CLI): {kills} SIGKILLs ({dict(phases)}); rows lost {lost}")
    assert kills == len(CLI_KILL_POINTS)
    assert lost == 0
