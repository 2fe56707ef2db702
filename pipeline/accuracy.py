"""Accuracy views over ``out.scores``: per model × signal × horizon (and per region) means,
coverage, bias and the pairwise relative WIS of Cramer et al. (2022) against the baseline, on
the natural and on the log scale.

The relative WIS here is the SQL form of :func:`tallywave.models.scores.pairwise_relative_wis`
(one definition; a test checks both give the same numbers on the same scores).  Coverage is
tie-corrected (``cover_frac_*``: the share of each PIT range inside the interval, right for
counts); the closed-interval share is kept beside it.  Kept apart from both the store (which
creates the views in its migrations) and the scoring stage (which fills ``out.scores``), so
neither imports the other.
"""

from __future__ import annotations

_THETA = """
pair_{col} AS (  -- mean score of each model pair on their common forecasts (Cramer et al. 2022)
    SELECT a.model AS m1, b.model AS m2, a.signal, a.horizon_days, {extra_a}
           avg(a.{col}) AS w1, avg(b.{col}) AS w2
    FROM s a JOIN s b
      ON a.signal = b.signal AND a.horizon_days = b.horizon_days AND a.region = b.region
     AND a.issued_on = b.issued_on AND a.target_date = b.target_date
    WHERE a.{col} IS NOT NULL AND b.{col} IS NOT NULL
    GROUP BY ALL
),
theta_{col} AS (  -- geometric mean of the pairwise ratios (pairs with both means > 0)
    SELECT m1 AS model, signal, horizon_days, {extra}
           exp(avg(ln(w1 / w2))) AS theta
    FROM pair_{col} WHERE w1 > 0 AND w2 > 0
    GROUP BY ALL
)"""

_PAIRWISE = """
WITH s AS (
    SELECT model, signal, horizon_days, {extra} region, issued_on, target_date, wis, wis_log,
           covered_50, covered_90, cover_frac_50, cover_frac_90, bias, abs_error
    FROM out.scores
),
per_model AS (
    SELECT model, signal, horizon_days, {extra}
           count(*) AS n, avg(wis) AS mean_wis, avg(wis_log) AS mean_wis_log,
           avg(abs_error) AS mean_abs_error,
           avg(coalesce(cover_frac_50, covered_50::INT)) AS coverage_50,
           avg(coalesce(cover_frac_90, covered_90::INT)) AS coverage_90,
           avg(covered_50::INT) AS coverage_50_closed, avg(covered_90::INT) AS coverage_90_closed,
           avg(bias) AS bias
    FROM s GROUP BY ALL
),
{theta_wis},
{theta_log}
SELECT p.model, p.signal, p.horizon_days, {extra_p} p.n, p.mean_wis,
       CASE WHEN p.model = 'baseline' AND b.theta IS NOT NULL THEN 1.0
            ELSE t.theta / b.theta END AS rel_wis,
       p.coverage_50, p.coverage_90, p.bias, p.mean_abs_error, p.mean_wis_log,
       CASE WHEN p.model = 'baseline' AND bl.theta IS NOT NULL THEN 1.0
            ELSE tl.theta / bl.theta END AS rel_wis_log,
       p.coverage_50_closed, p.coverage_90_closed
FROM per_model p
LEFT JOIN theta_wis t USING (model, signal, horizon_days {using})
LEFT JOIN theta_wis b ON b.model = 'baseline' AND b.signal = p.signal
     AND b.horizon_days = p.horizon_days {join_b}
LEFT JOIN theta_wis_log tl USING (model, signal, horizon_days {using})
LEFT JOIN theta_wis_log bl ON bl.model = 'baseline' AND bl.signal = p.signal
     AND bl.horizon_days = p.horizon_days {join_bl}
"""


def _accuracy_sql(by_region: bool) -> str:
    extra = "region," if by_region else ""
    extra_a = "a.region," if by_region else ""
    parts = {"extra": extra, "extra_a": extra_a}
    return _PAIRWISE.format(
        extra=extra, extra_p="p.region," if by_region else "",
        using=", region" if by_region else "",
        join_b="AND b.region = p.region" if by_region else "",
        join_bl="AND bl.region = p.region" if by_region else "",
        theta_wis=_THETA.format(col="wis", **parts),
        theta_log=_THETA.format(col="wis_log", **parts))


#: Views created by the store's migrations (kept here beside the scoring that feeds them).
ACCURACY_VIEWS = [
    f"CREATE OR REPLACE VIEW out.accuracy AS {_accuracy_sql(False)}",
    f"CREATE OR REPLACE VIEW out.accuracy_by_region AS {_accuracy_sql(True)}",
]
