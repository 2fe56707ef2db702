"""Shared fixtures: one Prefect test server for the whole session, one small ingested scenario
(a template database file that tests copy), and the command's executable."""

from __future__ import annotations

import datetime as dt
import os
import shutil
import sys
from collections.abc import Callable
from pathlib import Path

import pytest

# Small matrix products are faster single-threaded (and our batches already run in parallel).
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
os.environ.setdefault("PREFECT_LOGGING_LEVEL", "WARNING")

ROOT = Path(__file__).resolve().parents[1]
#: The `tallywave` console script of the interpreter running the tests.
TALLYWAVE = shutil.which("tallywave", path=str(Path(sys.executable).parent)) or "tallywave"
#: Light settings for runs in tests: fewer Monte Carlo draws (the numbers are not checked here).
LIGHT_SETTINGS = "[defaults]\nforecast_draws = 100\nnowcast_draws = 100\n"


@pytest.fixture(scope="session")
def prefect_server():
    """One Prefect server for every test that runs a flow (it takes ~20 s to start; on a busy
    machine far longer, so it gets Tallywave's start-up time, not Prefect's 20 s default)."""
    from prefect.testing.utilities import prefect_test_harness

    from tallywave.flows.server import startup_timeout

    with prefect_test_harness(server_startup_timeout=startup_timeout()):
        yield


@pytest.fixture(scope="session")
def template(tmp_path_factory: pytest.TempPathFactory) -> dict:
    """A small invented scenario (4 regions × 3 signals, 100 days, 30 daily snapshots) ingested
    once per session into a template database; tests copy the file (see ``fresh_db``)."""
    from tallywave.pipeline import store
    from tallywave.pipeline.ingest import ingest_spec
    from tallywave.pipeline.simulate import write_scenario

    root = tmp_path_factory.mktemp("template")
    info = write_scenario(root / "feeds", n_regions=4, n_days=100, n_snapshots=30, window=35,
                          seed=415)
    db = root / "template.duckdb"
    con = store.connect(db)
    try:
        ingest_spec(con, root / "feeds" / "feeds.toml")
    finally:
        con.close()
    settings = root / "light.toml"
    settings.write_text(LIGHT_SETTINGS)
    return {"db": db, "feeds": root / "feeds", "spec": root / "feeds" / "feeds.toml",
            "settings": settings, "first": dt.date.fromisoformat(info["as_of_first"]),
            "last": dt.date.fromisoformat(info["as_of_last"])}


@pytest.fixture
def fresh_db(template: dict, tmp_path: Path) -> Callable[[str], Path]:
    """``fresh_db(name)``: a copy of the template database in this test's folder."""

    def copy(name: str = "t.duckdb") -> Path:
        dest = tmp_path / name
        shutil.copy(template["db"], dest)
        return dest

    return copy


def cli_env(**extra: str) -> dict[str, str]:
    """Environment for a `tallywave` child process (this checkout first on the path)."""
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    env["PREFECT_SERVER_ANALYTICS_ENABLED"] = "false"
    env.pop("TALLYWAVE_LOCK_WAIT", None)
    env.update(extra)
    return env
