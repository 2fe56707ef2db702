"""Stage 7 — scoring: every published forecast whose target has settled data, against the truth
known now → ``out.scores``; views ``out.accuracy`` and ``out.accuracy_by_region``.

Truth for (region, signal, target_date) is the latest vintage known on the scoring date; it
counts as settled once the scoring date is at least ``settle_days`` after target_date.  Scores are
a pure function of (published forecasts, observations known on the scoring date): each call
recomputes them all in one transaction, so a revised truth is re-scored and ``truth_as_of`` says
which data scored each row.  Mathematics and SQL: :mod:`models.scores`.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

import duckdb

from models.scores import score_sql
from pipeline.settings import Settings
from pipeline.store import transaction

_PAIRWISE = """
WITH s AS (
    SELECT model, signal, horizon_days, {extra} region, issued_on, target_date, wis,
           covered_50, covered_90, bias, abs_error
    FROM out.scores
),
per_model AS (
    SELECT model, signal, horizon_days, {extra}
           count(*) AS n, avg(wis) AS mean_wis, avg(abs_error) AS mean_abs_error,
           avg(covered_50::INT) AS coverage_50, avg(covered_90::INT) AS coverage_90,
           avg(bias) AS bias
    FROM s GROUP BY ALL
),
pair AS (  -- mean WIS of each model pair on their common forecasts (Cramer et al. 2022)
    SELECT a.model AS m1, b.model AS m2, a.signal, a.horizon_days, {extra_a}
           avg(a.wis) AS w1, avg(b.wis) AS w2
    FROM s a JOIN s b
      ON a.signal = b.signal AND a.horizon_days = b.horizon_days AND a.region = b.region
     AND a.issued_on = b.issued_on AND a.target_date = b.target_date
    GROUP BY ALL
),
theta AS (  -- geometric mean of the pairwise ratios
    SELECT m1 AS model, signal, horizon_days, {extra}
           exp(avg(ln(w1 / w2))) AS theta
    FROM pair WHERE w1 > 0 AND w2 > 0
    GROUP BY ALL
)
SELECT p.model, p.signal, p.horizon_days, {extra_p} p.n, p.mean_wis,
       CASE WHEN p.model = 'baseline' AND b.theta IS NOT NULL THEN 1.0
            ELSE t.theta / b.theta END AS rel_wis,
       p.coverage_50, p.coverage_90, p.bias, p.mean_abs_error
FROM per_model p
LEFT JOIN theta t USING (model, signal, horizon_days {using})
LEFT JOIN theta b ON b.model = 'baseline' AND b.signal = p.signal
     AND b.horizon_days = p.horizon_days {join_b}
"""


def _accuracy_sql(by_region: bool) -> str:
    if by_region:
        return _PAIRWISE.format(extra="region,", extra_a="a.region,", extra_p="p.region,",
                                using=", region", join_b="AND b.region = p.region")
    return _PAIRWISE.format(extra="", extra_a="", extra_p="", using="", join_b="")


#: Views created by the store's migrations (kept here beside the scoring that feeds them).
ACCURACY_VIEWS = [
    f"CREATE OR REPLACE VIEW out.accuracy AS {_accuracy_sql(False)}",
    f"CREATE OR REPLACE VIEW out.accuracy_by_region AS {_accuracy_sql(True)}",
]


def score(con: duckdb.DuckDBPyConnection, as_of: dt.date | None, settings: Settings
          ) -> dict[str, Any]:
    """Re-score all published forecasts against the truth known on ``as_of`` (default: latest)."""
    if as_of is None:
        as_of = con.execute("SELECT max(as_of) FROM core.observations").fetchall()[0][0]
        if as_of is None:
            return {"line": "nothing to score (no observations)", "rows": 0}
    settle = int(settings.get("settle_days"))
    cutoff = as_of - dt.timedelta(days=settle)
    with transaction(con):
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
