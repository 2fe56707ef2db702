"""Natural keys: after the whole path — and after re-running verbs — no key occurs twice.

Layered warehouse practice (common practice): every table declares the columns that identify a
row and CI checks them, so re-running a stage can never silently duplicate rows.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import pytest

from tallywave.pipeline import store
from tallywave.pipeline.clean import clean
from tallywave.pipeline.ingest import ingest_spec
from tallywave.pipeline.keys import NATURAL_KEYS, base_tables, duplicate_keys
from tallywave.pipeline.run import execute_run
from tallywave.pipeline.scoring import score
from tallywave.pipeline.settings import load_settings
from tallywave.pipeline.simulate import write_scenario


@pytest.mark.slow
def test_rerunning_every_verb_leaves_unique_keys(tmp_path: Path) -> None:
    write_scenario(tmp_path / "feeds", n_regions=4, n_days=120, n_snapshots=30, window=35,
                   seed=5)
    con = store.connect(tmp_path / "t.duckdb")
    settings = load_settings(None)
    settings.base["forecast_draws"] = 100
    spec = tmp_path / "feeds" / "feeds.toml"
    for _ in range(2):  # the same files twice: skipped, not duplicated
        ingest_spec(con, spec)
    last = con.execute("SELECT max(as_of) FROM core.observations").fetchall()[0][0]
    earlier = last - dt.timedelta(days=21)  # its first targets have settled by last
    for day in (earlier, last, last):  # the same as_of twice: a new run supersedes the first
        execute_run(con, day, settings)
    before = con.execute("SELECT count(*) FROM core.cleaned").fetchall()[0][0]
    for _ in range(3):  # the clean verb's fixed run_id: replaced, not appended
        clean(con, last, settings, run_id=f"clean-{last}")
    after = con.execute("SELECT count(*) FROM core.cleaned").fetchall()[0][0]
    once = con.execute("SELECT count(*) FROM core.cleaned WHERE run_id = ?",
                       [f"clean-{last}"]).fetchall()[0][0]
    assert after - before == once > 0
    for _ in range(2):
        score(con, last, settings)
    assert con.execute("SELECT count(*) FROM out.scores").fetchall()[0][0] > 0
    # every table declares its key, and no key occurs twice
    assert set(base_tables(con)) <= set(NATURAL_KEYS), set(base_tables(con)) - set(NATURAL_KEYS)
    dup = duplicate_keys(con)
    assert all(v == 0 for v in dup.values()), {k: v for k, v in dup.items() if v}
    assert con.execute("SELECT count(*) FROM out.runs WHERE status = 'published'"
                       ).fetchall()[0][0] == 2


def test_a_stage_that_produces_nothing_for_a_signal_fails_the_run(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """Every nowcast batch failing (as a bad setting would make it) must not publish a run with
    a silent gap: the run fails, says which signal, and publishes nothing."""
    from tallywave.pipeline import nowcast as nowcast_stage
    from tallywave.pipeline.errors import RunFailed

    write_scenario(tmp_path / "feeds", n_regions=3, n_days=100, n_snapshots=20, window=30,
                   seed=8)
    con = store.connect(tmp_path / "t.duckdb")
    ingest_spec(con, tmp_path / "feeds" / "feeds.toml")

    def broken(_args: object) -> dict:
        raise ValueError("family 'negbinomial' unknown")

    monkeypatch.setattr(nowcast_stage, "_fit_block", broken)
    with pytest.raises(RunFailed, match="nowcast stage produced nothing for signal"):
        execute_run(con, con.execute("SELECT max(as_of) FROM core.observations"
                                     ).fetchall()[0][0], load_settings(None))
    assert con.execute("SELECT count(*) FROM out.runs WHERE status = 'published'"
                       ).fetchall()[0][0] == 0
    assert con.execute("SELECT count(*) FROM out.nowcast").fetchall()[0][0] == 0
