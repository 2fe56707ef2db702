"""Stage 7 — scoring: every published forecast whose target has settled data, against the truth
known now → ``out.scores``; views ``out.accuracy`` and ``out.accuracy_by_region``.

Truth for (region, signal, target_date), as known on the scoring date: the latest raw vintage
(``truth_raw``) plus the repair the newest published run's cleaning made to that date
(``core.cleaned``: value_clean - value_reported), i.e. the cleaned series as the models see it,
kept up to date with revisions that arrived after that run (``truth_run_id`` names the run).  A
target counts as settled once the scoring date is at least the signal's settle horizon after it:
with ``settle_rule = "delay"`` the longer of ``settle_days`` and the 99th percentile of the
signal's delay distribution published by that run (``out.delay_signal``), at most
``settle_max_days``; else ``settle_days`` (``out.scores.settle_days`` records it).  A weekly
signal is scored by week (truth and targets on its week dates) and its settle horizon is rounded
up to whole weeks.  Scores are a pure function of (published forecasts,
data known on the scoring date): each call brings the table to that function in one transaction
— scores whose forecast and truth are unchanged are kept, revised truths and newly settled
targets are (re-)scored (:func:`score`; ``full=True`` recomputes everything, with the same
result) — and ``truth_as_of`` says which data the row stands for.  Mathematics:
:mod:`tallywave.models.scores`; its SQL: :mod:`tallywave.pipeline.scores_sql`.
"""

from __future__ import annotations

import datetime as dt
import math
from typing import Any

import duckdb
import pandas as pd

from tallywave.models.scores import FORECAST_KEY, LEVEL_TOL
from tallywave.pipeline.frames import WEEK
from tallywave.pipeline.scores_sql import score_sql
from tallywave.pipeline.settings import Settings
from tallywave.pipeline.store import transaction
from tallywave.pipeline.vintages import signal_steps

#: Columns of ``out.scores`` filled by the stage (run_id and scored_at are set around them).
SCORE_COLUMNS = ("issued_on", "model", "region", "signal", "target_date", "horizon_days",
                 "truth", "truth_as_of", "wis", "dispersion", "overprediction",
                 "underprediction", "abs_error", "covered_50", "covered_90", "pit", "bias",
                 "truth_raw", "truth_run_id", "settle_days", "wis_log", "pit_low", "pit_high",
                 "cover_frac_50", "cover_frac_90")


def truth_run(con: duckdb.DuckDBPyConnection, as_of: dt.date) -> str | None:
    """The newest run published for an as-of date on or before ``as_of``."""
    row = con.execute("SELECT run_id FROM out.runs WHERE status = 'published' AND as_of <= ? "
                      "ORDER BY as_of DESC, finished_at DESC LIMIT 1", [as_of]).fetchall()
    return row[0][0] if row else None


def settle_horizons(con: duckdb.DuckDBPyConnection, run_id: str | None,
                    settings: Settings) -> dict[str, int]:
    """Days after its target date a signal's truth counts as settled (see the module notes);
    signals the run says nothing about use ``settle_days``; weekly signals whole weeks."""
    out: dict[str, int] = {}
    signals = [r[0] for r in con.execute("SELECT DISTINCT signal FROM out.forecasts").fetchall()]
    weekly = signal_steps(con)
    q99: dict[str, float] = {}
    if run_id is not None:
        q99 = {str(s): float(v) for s, v in con.execute(
            "SELECT signal, q99_delay_days FROM out.delay_signal WHERE run_id = ? "
            "AND q99_delay_days IS NOT NULL", [run_id]).fetchall()}
    for signal in signals:
        floor = int(settings.get("settle_days", signal))
        if settings.get("settle_rule", signal) == "delay" and signal in q99 \
                and math.isfinite(q99[signal]):
            cap = max(floor, int(settings.get("settle_max_days", signal)))
            out[signal] = min(max(floor, math.ceil(q99[signal])), cap)
        else:
            out[signal] = floor
        if signal in weekly:
            out[signal] = WEEK * math.ceil(out[signal] / WEEK)
    return out


def _stage_scoring_inputs(con: duckdb.DuckDBPyConnection, as_of: dt.date,
                          settings: Settings, issued_since: dt.date | None = None,
                          forecasts: bool = True) -> dict[str, int]:
    """Temp tables ``_settle`` (signal, settle_days), ``_truth`` (settled truth known on
    ``as_of``: cleaned and raw) and ``_published`` (the quantile rows of the published
    forecasts issued by then whose target has settled) or, without ``forecasts``, ``_wanted``
    (one row per such forecast); returns the settle horizon per signal."""
    since = issued_since or dt.date(1, 1, 1)  # default: every published forecast
    run_id = truth_run(con, as_of)
    settle = settle_horizons(con, run_id, settings)
    con.execute("CREATE OR REPLACE TEMP TABLE _settle (signal VARCHAR, settle_days INTEGER)")
    if settle:
        con.executemany("INSERT INTO _settle VALUES (?, ?)", list(settle.items()))
    con.execute(
        """CREATE OR REPLACE TEMP TABLE _truth AS
           WITH raw AS (
               SELECT o.region, o.signal, o.ref_date AS target_date,
                      arg_max(o.value, o.as_of) AS truth_raw
               FROM core.observations o JOIN _settle s USING (signal)
               WHERE o.as_of <= ? AND o.ref_date <= ?::DATE - s.settle_days
                 AND o.ref_date > ?::DATE
               GROUP BY ALL),
           repair AS (
               SELECT region, signal, ref_date AS target_date,
                      value_clean - coalesce(value_reported, value_clean) AS delta
               FROM core.cleaned WHERE run_id = ?)
           SELECT r.region, r.signal, r.target_date,
                  r.truth_raw + coalesce(c.delta, 0.0) AS truth, r.truth_raw,
                  CASE WHEN c.delta IS NULL THEN NULL ELSE ?::VARCHAR END AS truth_run_id,
                  s.settle_days
           FROM raw r JOIN _settle s USING (signal)
           LEFT JOIN repair c USING (region, signal, target_date)""",
        [as_of, as_of, since, run_id, run_id])
    settled = ("FROM out.forecasts f JOIN out.runs r USING (run_id) "
               "JOIN _settle s ON s.signal = f.signal "
               "WHERE r.status = 'published' AND f.issued_on <= ? AND f.issued_on >= ? "
               "AND f.target_date <= ?::DATE - s.settle_days")
    if forecasts:
        con.execute(f"CREATE OR REPLACE TEMP TABLE _published AS SELECT f.* {settled}",
                    [as_of, since, as_of])
    else:  # one row per forecast (one without a median row is never scored: levels_ok)
        con.execute("CREATE OR REPLACE TEMP TABLE _wanted AS SELECT f.run_id, "
                    + ", ".join(f"f.{c}" for c in FORECAST_KEY)
                    + f" {settled} AND abs(f.q_level - 0.5) <= {LEVEL_TOL!r}",
                    [as_of, since, as_of])
    return settle


def _stage_unscored(con: duckdb.DuckDBPyConnection, as_of: dt.date) -> None:
    """``_published``: the quantile rows of the wanted forecasts ``out.scores`` lacks."""
    key = ", ".join(("run_id", *FORECAST_KEY))
    con.execute(
        f"""CREATE OR REPLACE TEMP TABLE _todo AS
            SELECT {key} FROM _wanted SEMI JOIN _truth USING (region, signal, target_date)
            EXCEPT SELECT {key} FROM out.scores""")
    con.execute(f"CREATE OR REPLACE TEMP TABLE _published AS "
                f"SELECT f.* FROM out.forecasts f SEMI JOIN _todo t USING ({key}) "
                f"WHERE f.issued_on <= ?", [as_of])


def _drop_inputs(con: duckdb.DuckDBPyConnection) -> None:
    for name in ("_truth", "_published", "_settle", "_wanted", "_todo"):
        con.execute(f"DROP TABLE IF EXISTS {name}")


def _scores_select() -> str:
    """SELECT of the ``out.scores`` columns from the scoring SQL over the temp tables."""
    extra = ("truth_raw", "truth_run_id", "settle_days")
    cols = ", ".join(c if c != "truth_as_of" else "?::DATE AS truth_as_of"
                     for c in SCORE_COLUMNS)
    return (f"SELECT {cols} FROM ({score_sql('_published', '_truth', extra_truth_columns=extra)})"
            " WHERE levels_ok")


def scores_as_of(con: duckdb.DuckDBPyConnection, as_of: dt.date, settings: Settings,
                 issued_since: dt.date | None = None) -> pd.DataFrame:
    """The scores that could have been computed on ``as_of``: published forecasts whose target
    had settled by then, against the truth known then.  Writes nothing; no later data is read,
    so e.g. ensemble weights for a backfilled date equal what would have been published then.
    ``issued_since`` limits the work to forecasts issued on or after that date."""
    _stage_scoring_inputs(con, as_of, settings, issued_since)
    try:
        return con.execute(_scores_select(), [as_of]).df()
    finally:
        _drop_inputs(con)


def score(con: duckdb.DuckDBPyConnection, as_of: dt.date | None, settings: Settings,
          full: bool = False) -> dict[str, Any]:
    """Bring ``out.scores`` to the scores of all published forecasts against the truth known on
    ``as_of`` (default: latest).

    Incremental: a stored score is kept when its forecast is still published and settled and
    its target's truth (cleaned and raw) and settle horizon are unchanged — the score is then
    the same number a recomputation would give, and only its bookkeeping (``truth_as_of``,
    ``truth_run_id``) is brought up to date.  Every other row is deleted and every missing one
    computed, so the table equals a full recomputation (``full=True``; tested) while a daily run
    scores only the newly settled and the revised targets."""
    if as_of is None:
        as_of = con.execute("SELECT max(as_of) FROM core.observations").fetchall()[0][0]
        if as_of is None:
            return {"line": "nothing to score (no observations)", "rows": 0}
    with transaction(con):
        settle = _stage_scoring_inputs(con, as_of, settings, forecasts=False)
        if full:
            con.execute("DELETE FROM out.scores")
        else:
            _drop_stale_scores(con, as_of)
        kept = con.execute("SELECT count(*) FROM out.scores").fetchall()[0][0]
        _stage_unscored(con, as_of)
        cols = ", ".join(SCORE_COLUMNS)
        con.execute(f"INSERT INTO out.scores ({cols}, scored_at) "
                    f"SELECT *, now() FROM ({_scores_select()})", [as_of])
        con.execute("""UPDATE out.scores s SET run_id = p.run_id FROM (
                           SELECT DISTINCT run_id, issued_on FROM _published) p
                       WHERE s.issued_on = p.issued_on AND s.run_id IS NULL""")
        n = con.execute("SELECT count(*) FROM out.scores").fetchall()[0][0]
        _drop_inputs(con)
    horizons = ", ".join(f"{s} {d} d" for s, d in sorted(settle.items()))
    new = f"; {n - kept} newly scored, {kept} unchanged" if kept else ""
    return {"line": f"{n} forecasts scored against data known on {as_of}{new} "
                    f"(settled after: {horizons or 'nothing to score'})", "rows": int(n),
            "truth_as_of": as_of, "new_rows": int(n - kept)}


def _drop_stale_scores(con: duckdb.DuckDBPyConnection, as_of: dt.date) -> None:
    """Delete the stored scores a recomputation on ``as_of`` would change or not produce: the
    forecast is no longer published and settled (``_wanted``), or its target's truth or settle
    horizon differs from ``_truth``; refresh the bookkeeping of the rest."""
    con.execute(
        """DELETE FROM out.scores s WHERE NOT EXISTS (
               SELECT 1 FROM _wanted w JOIN _truth t USING (region, signal, target_date)
               WHERE w.run_id = s.run_id AND w.issued_on = s.issued_on AND w.model = s.model
                 AND w.region = s.region AND w.signal = s.signal
                 AND w.target_date = s.target_date AND w.horizon_days = s.horizon_days
                 AND t.truth = s.truth AND t.truth_raw IS NOT DISTINCT FROM s.truth_raw
                 AND t.settle_days IS NOT DISTINCT FROM s.settle_days)""")
    con.execute(
        """UPDATE out.scores s SET truth_as_of = ?::DATE, truth_run_id = t.truth_run_id
           FROM _truth t
           WHERE t.region = s.region AND t.signal = s.signal AND t.target_date = s.target_date
             AND (s.truth_as_of IS DISTINCT FROM ?::DATE
                  OR s.truth_run_id IS DISTINCT FROM t.truth_run_id)""", [as_of, as_of])
