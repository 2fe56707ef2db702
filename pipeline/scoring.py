"""Stage 7 — scoring: every published forecast whose target has settled data, against the truth
known now → ``out.scores``; views ``out.accuracy`` and ``out.accuracy_by_region``.

Truth for (region, signal, target_date) is the latest vintage known on the scoring date; it
counts as settled once the scoring date is at least ``settle_days`` after target_date.  Scores are
a pure function of (published forecasts, observations known on the scoring date): each call
recomputes them all in one transaction, so a revised truth is re-scored and ``truth_as_of`` says
which data scored each row.  Mathematics and SQL: :mod:`tallywave.models.scores`.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

import duckdb
import pandas as pd

from tallywave.models.scores import score_sql
from tallywave.pipeline.settings import Settings
from tallywave.pipeline.store import transaction


def _stage_scoring_inputs(con: duckdb.DuckDBPyConnection, as_of: dt.date,
                          settings: Settings) -> dt.date:
    """Temp tables ``_truth`` (settled truth known on ``as_of``) and ``_published`` (published
    forecasts issued by then whose target has settled); returns the settle cutoff date."""
    settle = int(settings.get("settle_days"))
    cutoff = as_of - dt.timedelta(days=settle)
    con.execute(
        "CREATE OR REPLACE TEMP TABLE _truth AS "
        "SELECT region, signal, ref_date AS target_date, arg_max(value, as_of) AS truth "
        "FROM core.observations WHERE as_of <= ? AND ref_date <= ? "
        "GROUP BY region, signal, ref_date", [as_of, cutoff])
    con.execute(
        "CREATE OR REPLACE TEMP TABLE _published AS "
        "SELECT f.* FROM out.forecasts f JOIN out.runs r USING (run_id) "
        "WHERE r.status = 'published' AND f.issued_on <= ? AND f.target_date <= ?",
        [as_of, cutoff])
    return cutoff


def scores_as_of(con: duckdb.DuckDBPyConnection, as_of: dt.date, settings: Settings
                 ) -> pd.DataFrame:
    """The scores that could have been computed on ``as_of``: published forecasts whose target
    had settled by then, against the truth known then.  Writes nothing; no later data is read,
    so e.g. ensemble weights for a backfilled date equal what would have been published then."""
    _stage_scoring_inputs(con, as_of, settings)
    try:
        return con.execute(
            f"""SELECT issued_on, model, region, signal, target_date, horizon_days, truth,
                       ?::DATE AS truth_as_of, wis, dispersion, overprediction,
                       underprediction, abs_error, covered_50, covered_90, pit, bias
                FROM ({score_sql('_published', '_truth')}) WHERE levels_ok""",
            [as_of]).df()
    finally:
        con.execute("DROP TABLE IF EXISTS _truth")
        con.execute("DROP TABLE IF EXISTS _published")


def score(con: duckdb.DuckDBPyConnection, as_of: dt.date | None, settings: Settings
          ) -> dict[str, Any]:
    """Re-score all published forecasts against the truth known on ``as_of`` (default: latest)."""
    if as_of is None:
        as_of = con.execute("SELECT max(as_of) FROM core.observations").fetchall()[0][0]
        if as_of is None:
            return {"line": "nothing to score (no observations)", "rows": 0}
    with transaction(con):
        cutoff = _stage_scoring_inputs(con, as_of, settings)
        con.execute("DELETE FROM out.scores")
        con.execute(
            f"""INSERT INTO out.scores
            SELECT NULL AS run_id, issued_on, model, region, signal, target_date, horizon_days,
                   truth, ?::DATE AS truth_as_of, wis, dispersion, overprediction,
                   underprediction, abs_error, covered_50, covered_90, pit, bias,
                   now() AS scored_at
            FROM ({score_sql('_published', '_truth')}) WHERE levels_ok""", [as_of])
        con.execute("""UPDATE out.scores s SET run_id = p.run_id FROM (
                           SELECT DISTINCT run_id, issued_on FROM _published) p
                       WHERE s.issued_on = p.issued_on""")
        n = con.execute("SELECT count(*) FROM out.scores").fetchall()[0][0]
        con.execute("DROP TABLE _truth")
        con.execute("DROP TABLE _published")
    return {"line": f"{n} forecasts scored against data known on {as_of} "
                    f"(targets up to {cutoff})", "rows": int(n), "truth_as_of": as_of}
