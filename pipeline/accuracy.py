"""Accuracy views over ``out.scores``: per model × signal × horizon (and per region) means,
coverage, bias and the pairwise relative WIS of Cramer et al. (2022) against the baseline.

Kept apart from both the store (which creates the views in its migrations) and the scoring stage
(which fills ``out.scores``), so neither imports the other.
"""

from __future__ import annotations

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
