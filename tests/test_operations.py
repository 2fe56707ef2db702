"""Operating Tallywave: runs publish on a busy machine, the console stays short with the
orchestration log in a file, a Prefect start-up that fails is one line, and the retention policy
drops only what no published forecast needs."""

from __future__ import annotations

import datetime as dt
import shutil
import subprocess
import sys
import threading
import time
from pathlib import Path

import duckdb
import pytest

from tallywave.pipeline import store
from tallywave.pipeline.retention import KEPT_TABLES, PRUNED_TABLES, prune, prune_plan
from tallywave.pipeline.run import execute_run
from tallywave.pipeline.scoring import score
from tallywave.pipeline.settings import load_settings
from tests.conftest import TALLYWAVE, cli_env

#: CPU-bound processes started beside a run: with the run and its Prefect server, a load of ~8
#: on 2 cores — what the operator saw when start-up timed out (issue 16).
BURNERS = 6
BURN = "while True:\n    pass\n"


def _lines(text: str) -> list[str]:
    return [line for line in text.splitlines() if line.strip()]


def _published(db: Path) -> list[tuple]:
    con = duckdb.connect(str(db), read_only=True)
    try:
        return con.execute("SELECT run_id, as_of FROM out.runs WHERE status = 'published' "
                           "ORDER BY as_of").fetchall()
    finally:
        con.close()


# ------------------------------------------------------------------------- orchestration


@pytest.mark.slow
def test_run_publishes_on_a_busy_machine(template, fresh_db, tmp_path) -> None:
    """Six busy-loop processes for the whole `tallywave run`, which starts its own temporary
    Prefect server (no PREFECT_API_URL): the run waits for the server and publishes."""
    db = fresh_db()
    settings = tmp_path / "s.toml"
    settings.write_text("[defaults]\nforecast_draws = 40\nnowcast_draws = 40\n"
                        'models = ["baseline"]\n')
    env = cli_env()
    env.pop("PREFECT_API_URL", None)
    burners = [subprocess.Popen([sys.executable, "-c", BURN]) for _ in range(BURNERS)]
    try:
        t0 = time.monotonic()
        res = subprocess.run([TALLYWAVE, "--db", str(db), "run", "--as-of",
                              template["last"].isoformat(), "--no-report", "--settings",
                              str(settings)], capture_output=True, text=True, env=env,
                             timeout=900, check=False)
        seconds = time.monotonic() - t0
    finally:
        for p in burners:
            p.kill()
        for p in burners:
            p.wait(timeout=30)
    assert res.returncode == 0, res.stdout[-2000:] + res.stderr[-2000:]
    assert [d for _, d in _published(db)] == [template["last"]]
    out = _lines(res.stdout)
    assert res.stderr.strip() == ""
    assert 6 <= len(out) <= 12, res.stdout  # a line per stage, scoring, summary, log path
    assert out[-1].startswith("log: ") and Path(out[-1][5:]).is_file()
    print(f"\nbusy machine ({BURNERS} burners): `tallywave run` published in {seconds:.0f} s")


def test_server_start_is_retried_then_fails_in_one_line(monkeypatch, tmp_path) -> None:
    """ensure_api tries the temporary server twice, resetting it in between, then raises one
    line naming both fixes (exit code 5)."""
    from tallywave.flows import server as srv

    calls: list[int] = []

    class Stub:
        port, running, server_process, api_url = None, False, None, "http://x/api"

        def start(self, timeout: int) -> None:
            calls.append(timeout)
            self.port = 8123
            if len(calls) < 3:
                raise RuntimeError("Timed out while attempting to connect to ephemeral "
                                   "Prefect API server. stdout: noise")

        def stop(self) -> None:
            self.running = False

    stub = Stub()
    monkeypatch.delenv("PREFECT_API_URL", raising=False)
    monkeypatch.setattr(srv, "api_url", lambda: "")
    monkeypatch.setattr(srv, "_server", lambda log_file: stub)
    monkeypatch.setattr(srv.time, "sleep", lambda s: None)
    monkeypatch.setenv(srv.STARTUP_ENV, "7")
    with pytest.raises(srv.OrchestrationUnavailable) as err:
        srv.ensure_api(tmp_path / "x.log")
    assert calls == [7, 7] and stub.port is None  # reset before the retry
    msg = str(err.value)
    assert err.value.exit_code == 5 and "\n" not in msg
    assert "within 7 s, twice" in msg and srv.STARTUP_ENV in msg
    assert "prefect server start" in msg and "PREFECT_API_URL" in msg
    assert srv.ensure_api(tmp_path / "x.log", attempts=1) == "http://x/api"  # third start works
    monkeypatch.delenv(srv.STARTUP_ENV)
    assert srv.startup_timeout() >= srv.DEFAULT_STARTUP_S  # never Prefect's 20 s default


def test_failed_server_start_exits_5_in_one_line(template, fresh_db, monkeypatch, tmp_path,
                                                 capsys) -> None:
    """The command maps a Prefect API that cannot be reached to exit 5 and one line ending with
    the log file, before any stage runs (the start-up itself: the test above)."""
    from tallywave.flows import console, server
    from tallywave.pipeline.cli import main

    db = fresh_db()
    log = tmp_path / "logs" / "x.log"
    monkeypatch.setattr(console, "route_logs", lambda path, verbose=False: log)

    def no_server(log_file=None):
        raise server.OrchestrationUnavailable("the temporary Prefect server did not start "
                                              "within 1 s, twice (machine busy?): ...")

    monkeypatch.setattr(server, "ensure_api", no_server)
    code = main(["--db", str(db), "run", "--as-of", template["last"].isoformat()])
    captured = capsys.readouterr()
    lines = _lines(captured.err)
    assert code == 5 and captured.out == ""
    assert len(lines) == 1 and lines[0].startswith("tallywave: error: the temporary Prefect")
    assert lines[0].endswith(f"(log: {log})")
    assert _published(db) == []


# ------------------------------------------------------------------------------- console


def test_demo_console_is_short_and_the_log_has_the_rest(prefect_server, template,
                                                        tmp_path) -> None:
    """`tallywave demo` prints at most 40 lines; Prefect's task-run lines go to the log file
    beside the database (named on the last line).  The settings also prune after each run."""
    import prefect.settings

    feeds = tmp_path / "feeds"
    shutil.copytree(template["feeds"], feeds)
    settings = tmp_path / "s.toml"
    settings.write_text(template["settings"].read_text()
                        + "retention_days = 1\nprune_after_run = true\n"
                        + "horizon_days = 7\nsettle_days = 3\n")  # scores within 3 dates
    db = tmp_path / "demo" / "demo.duckdb"
    db.parent.mkdir()
    env = cli_env(PREFECT_API_URL=str(prefect.settings.PREFECT_API_URL.value()),
                  PREFECT_LOGGING_LEVEL="INFO")
    res = subprocess.run([TALLYWAVE, "--db", str(db), "demo", "--feeds", str(feeds), "--days",
                          "3", "--settings", str(settings)], capture_output=True, text=True,
                         env=env, timeout=600, cwd=tmp_path, check=False)
    assert res.returncode == 0, res.stdout[-2000:] + res.stderr[-3000:]
    out = res.stdout.splitlines()
    assert len(out) + len(res.stderr.splitlines()) <= 40, res.stdout + res.stderr
    assert "Task run" not in res.stdout + res.stderr and "Finished in state" not in res.stdout
    assert any(line.startswith("backfill: 3/3 as-of dates done") for line in out)
    assert any(line.startswith("report: ") for line in out)
    log = Path(out[-1].removeprefix("log: "))
    assert out[-1].startswith("log: ") and log.parent == db.parent / "logs"
    text = log.read_text(encoding="utf-8")
    assert "Finished in state Completed()" in text and "region-batch" in text
    assert "retention: dropped" in text
    con = duckdb.connect(str(db), read_only=True)
    try:  # prune_after_run kept the intermediate outputs of the runs of the last day only
        kept = con.execute("SELECT count(DISTINCT run_id) FROM core.cleaned").fetchall()[0][0]
        runs = con.execute("SELECT count(*) FROM out.runs WHERE status = 'published'"
                           ).fetchall()[0][0]
    finally:
        con.close()
    assert runs == 4 and kept == 1


def test_verbose_run_prints_the_orchestration_log(prefect_server, template, fresh_db) -> None:
    import prefect.settings

    db = fresh_db()
    env = cli_env(PREFECT_API_URL=str(prefect.settings.PREFECT_API_URL.value()),
                  PREFECT_LOGGING_LEVEL="INFO")
    res = subprocess.run([TALLYWAVE, "--db", str(db), "run", "--verbose", "--no-report",
                          "--as-of", template["last"].isoformat(), "--settings",
                          str(template["settings"])], capture_output=True, text=True, env=env,
                         timeout=600, check=False)
    assert res.returncode == 0, res.stderr[-3000:]
    assert "Finished in state Completed()" in res.stderr  # Prefect's own console lines
    assert "published run" in res.stdout


def test_console_backfill_lines_without_a_terminal() -> None:
    """Not a terminal: a backfill prints at most PIPE_STEPS progress lines, a run one line per
    finished stage and none for a stage starting."""
    import io

    from tallywave.flows.console import PIPE_STEPS, Console

    buf = io.StringIO()
    c = Console(buf)
    c.message("[2026-01-02] clean ...")
    c.message("[2026-01-02] clean: 3 series (0.1 s)")
    c.message("report: reports/x/index.html")
    assert buf.getvalue().splitlines() == ["[2026-01-02] clean: 3 series (0.1 s)"]
    buf = io.StringIO()
    c = Console(buf)
    c.begin_dates(23)
    for k in range(23):
        c.message("[2026-01-02] nowcast: fine (0.1 s)")  # moves the bar's label only
        c.date_done(dt.date(2026, 1, 1) + dt.timedelta(days=k))
    c.end_dates()
    lines = buf.getvalue().splitlines()
    assert len(lines) == PIPE_STEPS and lines[-1].startswith("backfill: 23/23 as-of dates done")
    silent = io.StringIO()
    c = Console(silent, verbose=True)  # Prefect prints everything itself
    c.message("[2026-01-02] clean: 3 series (0.1 s)")
    assert silent.getvalue() == ""


# ----------------------------------------------------------------------------- retention


@pytest.fixture(scope="module")
def history(template, tmp_path_factory) -> dict:
    """Runs on three as-of dates over three weeks, a re-run (the first run of the last date is
    superseded) and a cleaning-only inspection (rows with no out.runs record)."""
    from tallywave.pipeline.clean import clean

    root = tmp_path_factory.mktemp("history")
    db = root / "h.duckdb"
    shutil.copy(template["db"], db)
    path = root / "s.toml"
    path.write_text('[defaults]\nforecast_draws = 60\nnowcast_draws = 60\nmodels = ["baseline"]\n')
    settings = load_settings(path)
    last = template["last"]
    days = [last - dt.timedelta(days=d) for d in (21, 7, 0, 0)]
    con = store.connect(db)
    ids = [execute_run(con, d, settings)["run_id"] for d in days]
    clean(con, last, settings, run_id=f"clean-{last}")
    con.close()
    return {"db": db, "ids": ids, "days": days, "settings": settings}


def _state(con: duckdb.DuckDBPyConnection) -> dict:
    kept = {t: con.execute(f"SELECT count(*), sum(hash(x)::HUGEINT) FROM {t} x").fetchall()[0]
            for t in KEPT_TABLES if t != "out.scores"}
    per_run = {t: dict(con.execute(f"SELECT run_id, count(*) FROM {t} GROUP BY run_id"
                                   ).fetchall()) for t in PRUNED_TABLES}
    return {"kept": kept, "per_run": per_run}


def test_prune_keeps_what_published_forecasts_need(history, tmp_path) -> None:
    db = tmp_path / "p.duckdb"
    shutil.copy(history["db"], db)
    ids, settings = history["ids"], history["settings"]
    con = store.connect(db)
    before = _state(con)
    scores_sql = "SELECT * EXCLUDE (scored_at) FROM out.scores ORDER BY ALL"
    scores_before = con.execute(scores_sql).fetchall()
    plan = prune_plan(con, 10)
    con.close()
    reasons = dict(zip(plan["run_id"], plan["reason"], strict=True))
    # the run 21 days before the newest is old (its 1-7 day forecasts are scored), the first
    # run of the last date was superseded, the inspection has no run record; the 7-day-old run
    # and the newest stay
    assert reasons == {ids[0]: "older than 10 days", ids[2]: "superseded",
                       f"clean-{history['days'][-1]}": "no run record"}
    dry = prune(db, keep_days=10, dry_run=True)
    assert dry["rows"] == 0 and dry["line"].startswith("would drop")
    res = prune(db, keep_days=10)
    assert res["rows"] > 0 and "3 run(s)" in res["line"]
    con = store.connect(db)
    after = _state(con)
    assert after["kept"] == before["kept"]  # raw, observations, runs, forecasts, fits untouched
    for table, rows in after["per_run"].items():
        assert set(rows) == {ids[1], ids[3]} & set(before["per_run"][table]), table
        for run_id, n in rows.items():  # the kept runs keep every row (full series per run)
            assert n == before["per_run"][table][run_id], (table, run_id)
    pruned = con.execute("SELECT run_id, reason, rows_deleted FROM out.pruned_runs"
                         ).fetchall()
    assert {r[0]: r[1] for r in pruned} == reasons
    assert sum(r[2] for r in pruned) == res["rows"]
    score(con, None, settings)  # every published forecast still scores the same
    assert con.execute(scores_sql).fetchall() == scores_before and scores_before
    again = prune_plan(con, 10)
    con.close()
    assert again.empty  # idempotent


def test_compact_shrinks_the_file_and_it_stays_usable(history, template, tmp_path) -> None:
    """Deleting rows leaves the file's size as it is (DuckDB reuses the space); compaction
    shrinks it.  A bulky superseded run (a million nowcast rows) makes the effect visible."""
    db = tmp_path / "c.duckdb"
    shutil.copy(history["db"], db)
    con = store.connect(db)
    con.execute("INSERT INTO out.runs (run_id, as_of, started_at, status) "
                "VALUES ('bulky', DATE '2026-01-01', now(), 'superseded')")
    con.execute("INSERT INTO out.nowcast SELECT 'bulky', 'r' || (i % 997), 'cases', "
                "DATE '2026-01-01' + (i % 300)::INTEGER, random(), 0.5, random() "
                "FROM range(1000000) t(i)")
    con.close()
    size = db.stat().st_size / 1e6
    assert prune(db, keep_days=0)["mb_after"] >= size - 1e-6  # deleting alone: same size
    res = prune(db, keep_days=0, compact=True)
    assert db.stat().st_size / 1e6 < 0.6 * size, (size, db.stat().st_size)
    assert not (tmp_path / "c.duckdb.compact").exists()
    assert not store.compaction_marker(db).exists()
    assert "MB →" in res["line"]
    con = store.connect(db)
    try:
        assert store.schema_version(con) == store.SCHEMA_VERSION
        newest = history["ids"][3]
        assert con.execute("SELECT DISTINCT run_id FROM core.cleaned").fetchall() == [(newest,)]
        # sequences, keys and views came along: a new run and a new file ingest still work
        run = execute_run(con, template["last"], history["settings"], score_after=False)
        assert con.execute("SELECT count(*) FROM out.latest_forecasts WHERE run_id = ?",
                           [run["run_id"]]).fetchall()[0][0] > 0
        n = con.execute("SELECT nextval('raw.file_id_seq')").fetchall()[0][0]
        assert n > con.execute("SELECT max(file_id) FROM raw.feed_files").fetchall()[0][0]
    finally:
        con.close()


def test_open_waits_while_the_file_is_being_swapped(tmp_path) -> None:
    """A connection attempt during compaction waits (as for a lock), then opens the new file."""
    db = tmp_path / "m.duckdb"
    store.connect(db).close()
    marker = store.compaction_marker(db)
    marker.write_text("4242\n")
    with pytest.raises(store.DatabaseBusy, match="PID 4242"):
        store.connect(db, wait_s=0.3)
    threading.Timer(0.5, marker.unlink).start()
    t0 = time.monotonic()
    store.connect(db, wait_s=10).close()
    assert 0.4 <= time.monotonic() - t0 < 5


def test_prune_verb_one_line(history, tmp_path, capsys) -> None:
    from tallywave.pipeline.cli import main

    db = tmp_path / "v.duckdb"
    shutil.copy(history["db"], db)
    logs = tmp_path / "logs"
    logs.mkdir()
    old = logs / f"tallywave-{dt.date.today() - dt.timedelta(days=60)}.log"
    new = logs / f"tallywave-{dt.date.today()}.log"
    old.write_text("x")
    new.write_text("y")
    assert main(["--db", str(db), "prune"]) == 0  # retention_days (42) from the settings
    out = capsys.readouterr().out.strip().splitlines()
    assert len(out) == 1 and "1 superseded" in out[0] and "1 old log file(s) removed" in out[0]
    assert not old.exists() and new.exists()
    assert main(["--db", str(db), "prune", "--keep-days", "-1"]) == 2
    assert "tallywave: error: --keep-days -1" in capsys.readouterr().err


@pytest.mark.benchmark
def test_storage_benchmark_smoke(tmp_path, capsys) -> None:
    """The storage benchmark runs end to end at a toy size (figures are not checked)."""
    from benchmarks.operations import main

    assert main(["storage", "--regions", "2", "--runs", "2", "--days", "80", "--keep-days", "0",
                 "--out", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    for key in ("none", "prune_after_run", "prune 0 d + compact", "rows (none)"):
        assert key in out, out
