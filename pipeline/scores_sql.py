"""The DuckDB SQL that scores forecasts: the definitions of :mod:`tallywave.models.scores`
(WIS, log-scale WIS, coverage, PIT, bias — also for counts) on the long ``out.forecasts`` table.

SQL lives here (pipeline), the mathematics and its numpy reference in ``models/scores.py``; the
tests check that both give the same numbers.
"""

from __future__ import annotations

import re
from collections.abc import Sequence

from tallywave.models.scores import COUNT_LOWER, FORECAST_KEY, LEVEL_TOL

__all__ = ["pit_uniform_sql", "score_sql"]

_IDENT = re.compile(r'^(?:[A-Za-z_][A-Za-z0-9_]*|"[^"]+")(?:\.(?:[A-Za-z_][A-Za-z0-9_]*|"[^"]+"))*$')


def _check_ident(name: str, what: str) -> str:
    if not _IDENT.match(name):
        raise ValueError(f"{what} {name!r} is not a (qualified) table or column name")
    return name


def pit_uniform_sql(seed: int = 0, alias: str = "") -> str:
    """SQL expression for the per-forecast pseudo-uniform U in [0, 1] used by the SQL PIT.

    A hash of the forecast key and ``seed``: deterministic, independent of row order/threads.
    """
    p = f"{_check_ident(alias, 'alias')}." if alias else ""
    cols = ", ".join(f"{p}{c}" for c in FORECAST_KEY)
    return f"(hash({cols}, {int(seed)})::DOUBLE / 18446744073709551616.0)"


def _at(name: str, offset: float) -> str:
    """Aggregates locating x = y + offset among a forecast's quantiles (for :func:`_cdf`)."""
    x = f"(y + {offset!r})"
    return (f"count(*) FILTER (WHERE q < {x}) AS nb_{name},\n"
            f"        count(*) FILTER (WHERE q = {x}) AS nt_{name},\n"
            f"        max(q) FILTER (WHERE q < {x}) AS qb_{name},\n"
            f"        min(q) FILTER (WHERE q > {x}) AS qa_{name}")


def _cdf(name: str, offset: float, end: str, tails: str, lower: float | None) -> str:
    """SQL for one end (``low`` / ``high``) of :func:`models.scores.cdf_bounds` at y + offset."""
    x = f"(truth + {offset!r})"
    nb, nt, qb, qa = (f"{p}_{name}" for p in ("nb", "nt", "qb", "qa"))
    interp = f"taus[{nb}] + (taus[{nb} + 1] - taus[{nb}]) * ({x} - {qb}) / ({qa} - {qb})"
    if lower is not None:
        ramp = (f"(CASE WHEN q_min > {lower!r} AND {x} >= {lower!r} "
                f"THEN taus[1] * ({x} - {lower!r}) / (q_min - {lower!r}) ELSE 0.0 END)")
        first_low = f"(CASE WHEN q_min > {lower!r} THEN taus[1] ELSE 0.0 END)"
        left = (ramp, ramp)
    else:
        first_low = "0.0"
        left = ("0.0", "taus[1]") if tails == "unknown" else ("0.0", "0.0")
    right = ("taus[n_levels]", "1.0") if tails == "unknown" else ("1.0", "1.0")
    if end == "low":
        tie = f"(CASE WHEN {nb} = 0 THEN {first_low} ELSE taus[{nb} + 1] END)"
        return (f"CASE WHEN {nt} > 0 THEN {tie} WHEN {nb} = 0 THEN {left[0]} "
                f"WHEN {nb} = n_levels THEN {right[0]} ELSE {interp} END")
    tie = f"(CASE WHEN {nb} + {nt} = n_levels THEN 1.0 ELSE taus[{nb} + {nt}] END)"
    return (f"CASE WHEN {nt} > 0 THEN {tie} WHEN {nb} = 0 THEN {left[1]} "
            f"WHEN {nb} = n_levels THEN {right[1]} ELSE {interp} END")


def _range(tails: str, counts: bool) -> tuple[str, str]:
    """(low, high) SQL of the PIT range at the truth; counts use y -/+ 1/2 (whole numbers)."""
    lower = COUNT_LOWER if counts else None
    low_y, high_y = _cdf("y", 0.0, "low", tails, lower), _cdf("y", 0.0, "high", tails, lower)
    if not counts:
        return low_y, high_y
    low_c = _cdf("m", -0.5, "low", tails, lower)
    high_c = _cdf("p", 0.5, "high", tails, lower)
    whole = "(truth = round(truth))"
    return (f"CASE WHEN {whole} THEN {low_c} ELSE {low_y} END",
            f"CASE WHEN {whole} THEN {high_c} ELSE {high_y} END")


def _cover(width: float) -> str:
    """Tie-corrected coverage of the central ``width`` interval from the PIT range."""
    a = repr((1.0 - width) / 2.0)
    b = repr(1.0 - (1.0 - width) / 2.0)
    return (f"CASE WHEN pit_high > pit_low THEN greatest(least(pit_high, {b}) - "
            f"greatest(pit_low, {a}), 0.0) / (pit_high - pit_low) "
            f"ELSE CAST(pit_low >= {a} AND pit_low <= {b} AS DOUBLE) END")


def score_sql(
    forecast_table: str = "out.forecasts",
    truth_table: str = "truth",
    *,
    randomise_pit: bool = True,
    pit_seed: int = 0,
    extra_truth_columns: Sequence[str] = (),
    counts: bool = True,
) -> str:
    """DuckDB SQL scoring every forecast in a long quantile table against a truth table.

    Input: ``forecast_table`` with FORECAST_KEY + (q_level, value); ``truth_table`` with
    (region, signal, target_date, truth, *extra_truth_columns), one row per key.  Output one
    row per forecast: truth, n_levels, levels_ok, wis, wis_log, dispersion, overprediction,
    underprediction, abs_error, covered_50, covered_90 (closed intervals), cover_frac_50,
    cover_frac_90 (tie-corrected), pit_low, pit_high, pit, bias — the same numbers as the numpy
    functions (with ``discrete=counts``; ``pit`` with U from :func:`pit_uniform_sql`, or 1/2
    when ``randomise_pit`` is false).  Rows with ``levels_ok = false`` (levels not the median
    plus symmetric pairs, or duplicated rows) must not be used.
    """
    ft = _check_ident(forecast_table, "forecast table")
    tt = _check_ident(truth_table, "truth table")
    extra = [_check_ident(c, "truth column") for c in extra_truth_columns]
    key = ", ".join(FORECAST_KEY)
    key_f = ", ".join(f"f.{c}" for c in FORECAST_KEY)
    extra_j = "".join(f", t.{c}" for c in extra)
    extra_a = "".join(f",\n        any_value({c}) AS {c}" for c in extra)
    extra_s = "".join(f", {c}" for c in extra)
    eps = repr(LEVEL_TOL)
    u = pit_uniform_sql(pit_seed) if randomise_pit else "0.5"
    pit_low, pit_high = _range("unknown", counts)
    flat_low, flat_high = _range("flat", counts)
    locate = ",\n        ".join([_at("y", 0.0)] + ([_at("m", -0.5), _at("p", 0.5)] if counts
                                                    else []))
    return f"""
WITH j AS (
    SELECT {key_f},
           CAST(f.q_level AS DOUBLE) AS tau,
           CAST(f.value AS DOUBLE) AS q,
           CAST(t.truth AS DOUBLE) AS y{extra_j}
    FROM {ft} AS f
    JOIN {tt} AS t
      ON f.region = t.region AND f.signal = t.signal AND f.target_date = t.target_date
    WHERE isfinite(CAST(f.value AS DOUBLE)) AND isfinite(CAST(f.q_level AS DOUBLE))
      AND isfinite(CAST(t.truth AS DOUBLE))
),
a AS (
    SELECT {key},
        any_value(y) AS truth{extra_a},
        count(*) AS n_levels,
        -- WIS = 2 * mean pinball loss over the 2K + 1 quantiles (Bracher et al. 2021)
        2 * avg((CASE WHEN y < q THEN 1.0 ELSE 0.0 END - tau) * (q - y)) AS wis,
        -- the same on log(x + 1) (Bosse et al. 2023); negatives count as 0
        2 * avg((CASE WHEN ln(1 + greatest(y, 0.0)) < ln(1 + greatest(q, 0.0)) THEN 1.0
                      ELSE 0.0 END - tau)
                * (ln(1 + greatest(q, 0.0)) - ln(1 + greatest(y, 0.0)))) AS wis_log,
        2 * avg(CASE WHEN tau < 0.5 - {eps} THEN -tau * q
                     WHEN tau > 0.5 + {eps} THEN (1 - tau) * q
                     ELSE 0.0 END) AS dispersion,
        2 * avg(CASE WHEN tau < 0.5 - {eps} THEN greatest(q - y, 0.0)
                     WHEN tau > 0.5 + {eps} THEN 0.0
                     ELSE 0.5 * greatest(q - y, 0.0) END) AS overprediction,
        2 * avg(CASE WHEN tau > 0.5 + {eps} THEN greatest(y - q, 0.0)
                     WHEN tau < 0.5 - {eps} THEN 0.0
                     ELSE 0.5 * greatest(y - q, 0.0) END) AS underprediction,
        max(q) FILTER (WHERE abs(tau - 0.5) <= {eps}) AS q50,
        max(q) FILTER (WHERE abs(tau - 0.25) <= {eps}) AS q25,
        max(q) FILTER (WHERE abs(tau - 0.75) <= {eps}) AS q75,
        max(q) FILTER (WHERE abs(tau - 0.05) <= {eps}) AS q05,
        max(q) FILTER (WHERE abs(tau - 0.95) <= {eps}) AS q95,
        min(q) AS q_min,
        {locate},
        list_sort(list(tau)) AS taus
    FROM j
    GROUP BY {key}
),
p AS (
    SELECT *,
        -- levels = median + symmetric pairs: sorted levels strictly increasing, inside (0, 1),
        -- odd in number and taus[i] + taus[n + 1 - i] = 1 (so the middle one is 0.5)
        (n_levels % 2 = 1 AND taus[1] > 0 AND taus[n_levels] < 1
         AND coalesce(list_bool_and([taus[i + 1] - taus[i] > {eps}
                                     for i in range(1, n_levels)]), true)
         AND list_bool_and([abs(taus[i] + taus[n_levels + 1 - i] - 1) <= {eps}
                            for i in range(1, n_levels + 1)])) AS levels_ok,
        {pit_low} AS pit_low,
        {pit_high} AS pit_high,
        {flat_low} AS flat_low,
        {flat_high} AS flat_high
    FROM a
)
SELECT {key}, truth{extra_s}, n_levels, levels_ok,
    wis, wis_log, dispersion, overprediction, underprediction,
    abs(q50 - truth) AS abs_error,
    (q25 <= truth AND truth <= q75) AS covered_50,
    (q05 <= truth AND truth <= q95) AS covered_90,
    {_cover(0.5)} AS cover_frac_50,
    {_cover(0.9)} AS cover_frac_90,
    pit_low, pit_high,
    pit_low + {u} * (pit_high - pit_low) AS pit,
    1.0 - flat_low - flat_high AS bias
FROM p
"""
