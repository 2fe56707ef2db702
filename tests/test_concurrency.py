"""Several processes on one database file.

DuckDB lets one process open a file for writing, or any number of processes open it read-only;
a writer and a reader exclude each other.  Tallywave waits a bounded time for the lock
(``store.connect(wait_s=...)``, ``tallywave --wait SECONDS``, ``$TALLYWAVE_LOCK_WAIT``) and then
stops with one line "database in use by another process (PID n)" and exit code 3.  These tests
hold the lock from child processes and check both outcomes and that nothing is corrupted.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import pytest

from tallywave.pipeline import store
from tallywave.pipeline.errors import DatabaseBusy
from tallywave.pipeline.ingest import ingest_spec
from tallywave.pipeline.simulate import write_scenario
from tests.conftest import cli_env

ROOT = Path(__file__).resolve().parents[1]
TALLYWAVE = shutil.which("tallywave", path=str(Path(sys.executable).parent)) or "tallywave"
COUNTED = ("raw.feed_files", "raw.reports", "core.observations", "out.runs")

# A child process that opens the database and keeps it for a while.  mode: "write" (open for
# writing), "read" (read-only), "txn" (writer inside an open transaction that adds one run row,
# committed when the hold ends, like a run publishing).
HOLDER = """
import sys, time
from tallywave.pipeline import store
db, mode, seconds = sys.argv[1], sys.argv[2], float(sys.argv[3])
con = store.connect(db, read_only=(mode == "read"), wait_s=30)
if mode == "txn":
    con.execute("BEGIN TRANSACTION")
    con.execute("INSERT INTO out.runs VALUES ('held-run', DATE '2026-01-01', now(), now(), "
                "'failed', NULL, NULL, NULL, 'written by the lock holder')")
print("holding", flush=True)
time.sleep(seconds)
if mode == "txn":
    con.execute("COMMIT")
con.close()
"""

# A child that runs every stage for one date on the file, waiting up to 120 s for the lock.
RUNNER = """
import sys
from tallywave.pipeline import store
from tallywave.pipeline.run import execute_run
from tallywave.pipeline.settings import load_settings
con = store.connect(sys.argv[1], wait_s=120)
print(execute_run(con, sys.argv[2], load_settings(sys.argv[3]), score_after=False)["run_id"])
con.close()
"""


@pytest.fixture(scope="module")
def base(tmp_path_factory) -> dict:
    """A small ingested scenario; each test works on its own copy of the file."""
    root = tmp_path_factory.mktemp("conc")
    info = write_scenario(root / "feeds", n_regions=3, n_days=70, n_snapshots=4, window=21,
                          seed=5)
    db = root / "base.duckdb"
    con = store.connect(db)
    ingest_spec(con, root / "feeds" / "feeds.toml")
    con.close()
    settings = root / "settings.toml"
    settings.write_text("[defaults]\nforecast_draws = 60\nnowcast_draws = 60\n"
                        "models = [\"baseline\", \"renewal\"]\n")
    return {"db": db, "spec": root / "feeds" / "feeds.toml", "settings": settings,
            "as_of": info["as_of_last"], "counts": _counts(db)}


def _counts(db: Path) -> dict[str, int]:
    con = store.connect(db, wait_s=30)
    try:
        return {t: con.execute(f"SELECT count(*) FROM {t}").fetchall()[0][0] for t in COUNTED}
    finally:
        con.close()


@pytest.fixture
def db(base, tmp_path) -> Path:
    path = tmp_path / "t.duckdb"
    shutil.copy(base["db"], path)
    return path


@contextmanager
def hold(db: Path, mode: str, seconds: float = 60.0) -> Iterator[subprocess.Popen]:
    """Keep the database open in a child process; yields once the child holds the lock."""
    proc = subprocess.Popen([sys.executable, "-c", HOLDER, str(db), mode, str(seconds)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=cli_env())
    try:
        line = proc.stdout.readline()
        assert line.strip() == "holding", proc.stderr.read()
        yield proc
    finally:
        if proc.poll() is None:
            proc.kill()
        proc.wait(timeout=30)
        proc.stdout.close()
        proc.stderr.close()


def _cli(*args: str, timeout: float = 120) -> tuple[subprocess.CompletedProcess, float]:
    t0 = time.monotonic()
    res = subprocess.run([TALLYWAVE, *args], capture_output=True, text=True, env=cli_env(),
                         timeout=timeout, check=False)
    return res, time.monotonic() - t0


def _assert_busy_line(res: subprocess.CompletedProcess, holder: subprocess.Popen) -> None:
    """Exit code 3 and exactly one stderr line naming the lock holder, no traceback."""
    lines = res.stderr.strip().splitlines()
    assert res.returncode == 3, res.stderr
    assert len(lines) == 1, res.stderr
    assert lines[0].startswith("tallywave: error: ")
    assert "database in use by another process" in lines[0]
    assert f"(PID {holder.pid})" in lines[0]


def test_second_writer_gives_up_after_bounded_wait(db, base) -> None:
    with hold(db, "write") as holder:
        t0 = time.monotonic()
        with pytest.raises(DatabaseBusy, match="database in use") as err:
            store.connect(db, wait_s=1.0)
        waited = time.monotonic() - t0
        assert err.value.exit_code == 3
        assert f"PID {holder.pid}" in str(err.value)
        assert 1.0 <= waited < 5.0  # bounded: the wait plus one last attempt
    assert _counts(db) == base["counts"]  # nothing written, nothing lost


def test_second_writer_waits_for_the_first_and_sees_its_commit(db, base) -> None:
    with hold(db, "txn", seconds=2.0):
        t0 = time.monotonic()
        con = store.connect(db, wait_s=60)
        waited = time.monotonic() - t0
    try:
        rows = con.execute("SELECT status FROM out.runs WHERE run_id = 'held-run'").fetchall()
    finally:
        con.close()
    assert waited > 0.5  # it did wait for the holder (which held the file ~2 s)
    assert rows == [("failed",)]  # the first writer's commit is there, whole
    counts = _counts(db)
    assert counts["out.runs"] == base["counts"]["out.runs"] + 1
    assert {k: v for k, v in counts.items() if k != "out.runs"} == {
        k: v for k, v in base["counts"].items() if k != "out.runs"}


def test_killed_writer_mid_transaction_leaves_nothing(db, base) -> None:
    with hold(db, "txn") as holder:
        holder.kill()  # SIGKILL with the transaction open
    assert _counts(db) == base["counts"]


@pytest.mark.parametrize("verb", ["score", "ingest", "run", "clean"])
def test_cli_writer_exits_3_while_database_in_use(db, base, verb) -> None:
    args = {"score": ["score"], "ingest": ["ingest", str(base["spec"])],
            "run": ["run", "--as-of", base["as_of"], "--no-report"],
            "clean": ["clean", "--as-of", base["as_of"]]}[verb]
    with hold(db, "write") as holder:
        res, seconds = _cli("--db", str(db), "--wait", "1", *args)
        _assert_busy_line(res, holder)
        assert seconds < 30  # `run` checks the lock before Prefect starts
    assert _counts(db) == base["counts"]


def test_lock_wait_from_environment(db, base) -> None:
    with hold(db, "write") as holder:
        t0 = time.monotonic()
        res = subprocess.run([TALLYWAVE, "--db", str(db), "score"], capture_output=True,
                             text=True, env=cli_env(TALLYWAVE_LOCK_WAIT="0.5"), timeout=60,
                             check=False)
        assert time.monotonic() - t0 < 25  # not the 30 s default
        _assert_busy_line(res, holder)
        assert "(waited 0.5 s)" in res.stderr


def test_sql_while_a_writer_holds_the_file_exits_3(db, base) -> None:
    # DuckDB: a read-only open from another process conflicts with a writer.
    with hold(db, "txn") as holder:
        res, _ = _cli("--db", str(db), "--wait", "1", "sql",
                      "SELECT count(*) AS n FROM raw.reports")
        _assert_busy_line(res, holder)
    assert _counts(db)["raw.reports"] == base["counts"]["raw.reports"]


def test_sql_waits_for_a_writer_then_answers(db, base) -> None:
    with hold(db, "txn", seconds=2.0):
        res, _ = _cli("--db", str(db), "--wait", "60", "sql",
                      "SELECT count(*) AS n FROM out.runs WHERE run_id = 'held-run'")
    assert res.returncode == 0, res.stderr
    assert res.stdout.split() == ["n", "1"]  # the writer's committed row, never a partial state


def test_readers_share_the_file_and_block_writers(db, base) -> None:
    with hold(db, "read") as holder:
        res, _ = _cli("--db", str(db), "--wait", "1", "sql",
                      "SELECT count(*) AS n FROM raw.reports")
        assert res.returncode == 0, res.stderr
        assert res.stdout.split() == ["n", str(base["counts"]["raw.reports"])]
        res, _ = _cli("--db", str(db), "--wait", "1", "score")
        _assert_busy_line(res, holder)


def test_two_runs_started_at_once_both_publish_in_turn(db, base) -> None:
    """Two runs of one date started together: the second waits, then supersedes the first."""
    args = [sys.executable, "-c", RUNNER, str(db), base["as_of"], str(base["settings"])]
    procs = [subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                              env=cli_env()) for _ in range(2)]
    outs = [p.communicate(timeout=300) for p in procs]
    for p, (_out, err) in zip(procs, outs, strict=True):
        assert p.returncode == 0, err[-2000:]
    run_ids = [out.strip().splitlines()[-1] for out, _ in outs]
    con = store.connect(db, wait_s=30)
    try:
        status = dict(con.execute("SELECT run_id, status FROM out.runs").fetchall())
        per_run = {t: dict(con.execute(f"SELECT run_id, count(*) FROM {t} GROUP BY run_id"
                                       ).fetchall())
                   for t in ("out.nowcast", "out.rt", "out.forecasts", "core.cleaned")}
    finally:
        con.close()
    assert sorted(status[r] for r in run_ids) == ["published", "superseded"]
    for rows in per_run.values():  # both runs complete and the same size (same inputs)
        assert set(rows) == set(run_ids)
        assert rows[run_ids[0]] == rows[run_ids[1]] > 0
    counts = _counts(db)
    assert counts["raw.reports"] == base["counts"]["raw.reports"]
    assert counts["core.observations"] == base["counts"]["core.observations"]


def test_two_cli_runs_at_once_one_line_for_the_loser(prefect_server, db, base) -> None:
    """Two `tallywave run`s started together both pass the quick lock check; the command takes
    the lock before its flow starts, so the one that waits too long fails in one line (exit 3)
    and no flow traceback reaches the console; otherwise both publish in turn."""
    import prefect.settings

    env = cli_env(PREFECT_API_URL=str(prefect.settings.PREFECT_API_URL.value()))
    args = [TALLYWAVE, "--db", str(db), "--wait", "1", "run", "--as-of", base["as_of"],
            "--no-report", "--settings", str(base["settings"])]
    procs = [subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                              env=env) for _ in range(2)]
    outs = [p.communicate(timeout=600) for p in procs]
    codes = sorted(p.returncode for p in procs)
    assert codes in ([0, 0], [0, 3]), outs
    for p, (out, err) in zip(procs, outs, strict=True):
        assert "Traceback" not in out + err
        if p.returncode == 3:
            lines = err.strip().splitlines()
            assert len(lines) == 1 and "database in use by another process" in lines[0], err
            assert out.strip() == ""  # it stopped before any stage ran
    con = store.connect(db, wait_s=30)
    try:
        published = con.execute("SELECT count(*) FROM out.runs WHERE status IN "
                                "('published', 'superseded')").fetchall()[0][0]
    finally:
        con.close()
    assert published == codes.count(0)
