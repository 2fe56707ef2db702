"""The report's reporting-delay alerts: where the delay is drifting, where the nowcast would
have missed the last days, and each signal's delay structure (weekday effects, closures, late
reports beyond ``max_delay_days``).  Reads ``out.delay_model`` / ``out.delay_signal`` of one run
and returns a self-contained HTML fragment for the report's data-quality section.
"""

from __future__ import annotations

import html
import json
import math
from typing import Any

import duckdb
import pandas as pd

#: A drifting region is shown when its mean delay moved at least this much (days) in the
#: lookback recorded by the nowcast (``out.delay_model.lookback_days``).
DRIFT_ALERT_DAYS = 1.0
#: A region is shown when at least this share of the last days' arrivals fell outside the 90 %
#: predictive interval of the chosen model in the back-test (expected share 0.1) ...
MISS_ALERT_SHARE = 0.5
#: ... on at least this many reference dates.
MISS_ALERT_ROWS = 5
#: At most this many regions are listed (largest changes first).
ALERT_ROWS = 30


def delay_alerts(con: duckdb.DuckDBPyConnection, run_id: str) -> pd.DataFrame:
    """One row per region × signal to flag: kind (``lengthening``, ``shortening``,
    ``missed``), today's and earlier mean delay, back-test miss share; largest first."""
    cols = ["region", "signal", "kind", "today", "before", "lookback", "miss90", "rows"]
    if not _has(con, "delay_model"):
        return pd.DataFrame(columns=cols)
    d = con.execute(
        """SELECT region, signal, delay_model, mean_delay_days AS today,
                  mean_delay_before_days AS before, lookback_days AS lookback,
                  backtest_miss90 AS miss90, backtest_rows AS rows
           FROM out.delay_model WHERE run_id = ?""", [run_id]).df()
    if d.empty:
        return pd.DataFrame(columns=cols)
    change = d["today"] - d["before"]
    drifting = (d["delay_model"] == "drifting") & (change.abs() >= DRIFT_ALERT_DAYS)
    missed = (d["miss90"] >= MISS_ALERT_SHARE) & (d["rows"] >= MISS_ALERT_ROWS)
    d["kind"] = ""
    d.loc[missed, "kind"] = "missed"
    d.loc[drifting, "kind"] = change[drifting].map(lambda c: "lengthening" if c > 0
                                                   else "shortening")
    d["size"] = change.abs().fillna(0.0) + d["miss90"].fillna(0.0)
    out = d[d["kind"] != ""].sort_values(["size", "region", "signal"], ascending=[False, True,
                                                                                    True])
    return out[cols].reset_index(drop=True)


def _has(con: duckdb.DuckDBPyConnection, table: str) -> bool:
    return bool(con.execute("SELECT count(*) FROM information_schema.tables WHERE "
                            "table_schema = 'out' AND table_name = ?", [table]).fetchall()[0][0])


def _num(x: Any, fmt: str = "{:.1f}") -> str:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return "–"
    return "–" if math.isnan(v) else fmt.format(v)


def _signals_html(con: duckdb.DuckDBPyConnection, run_id: str) -> str:
    """One line per signal: weekday effects, closures, late reports, settle horizon."""
    if not _has(con, "delay_signal"):
        return ""
    s = con.execute("SELECT * FROM out.delay_signal WHERE run_id = ? ORDER BY signal",
                    [run_id]).df()
    items = []
    for r in s.itertuples(index=False):
        bits = [(f"mean delay {_num(r.mean_delay_days)} d, 99 % within "
                 f"{_num(r.q99_delay_days, '{:.0f}')} d")]
        if r.weekday_effect:
            bits.append("report-weekday effects")
        days = json.loads(r.holidays) if isinstance(r.holidays, str) else []
        if days:
            bits.append("no reporting on " + ", ".join(days))
        if isinstance(r.tail_prob, float) and r.tail_prob >= 0.01:
            bits.append(f"{r.tail_prob:.0%} of reports come later than the modelled delays "
                        f"(a tail of mean {_num(r.tail_mean_days)} d more is nowcast)")
        if r.n_drifting:
            bits.append(f"{int(r.n_drifting)} of {int(r.n_regions)} regions with a drifting "
                        "delay")
        items.append(f"<li><b>{html.escape(str(r.signal))}</b>: "
                     f"{html.escape('; '.join(bits))}</li>")
    return f'<ul class="note">{"".join(items)}</ul>' if items else ""


def delay_alerts_html(con: duckdb.DuckDBPyConnection, run_id: str) -> tuple[str, bool]:
    """The HTML fragment for the report and whether it holds an alert."""
    alerts = delay_alerts(con, run_id)
    parts = ["<h4>Reporting delay (nowcast)</h4>", _signals_html(con, run_id)]
    if alerts.empty:
        parts.append('<p class="quiet">no region shows a changing delay or a nowcast that '
                     "missed the last days</p>")
        return "".join(parts), False
    words = {"lengthening": "delay lengthening", "shortening": "delay shortening",
             "missed": "nowcast missed the last days"}
    rows = []
    for r in alerts.head(ALERT_ROWS).itertuples(index=False):
        rows.append("<tr>" + "".join([
            f"<td>{html.escape(str(r.region))}</td>", f"<td>{html.escape(str(r.signal))}</td>",
            f'<td class="hot">{html.escape(words[str(r.kind)])}</td>',
            f'<td class="n">{_num(r.before)}</td>', f'<td class="n">{_num(r.today)}</td>',
            f'<td class="n">{_num(r.miss90, "{:.0%}")}</td>']) + "</tr>")
    head = ("<tr><th>region</th><th>signal</th><th>alert</th>"
            f'<th class="n">mean delay {int(alerts["lookback"].iloc[0])} d ago (d)</th>'
            '<th class="n">mean delay now (d)</th>'
            '<th class="n">last days outside 90 % band</th></tr>')
    parts.append(f"<table><thead>{head}</thead><tbody>{''.join(rows)}</tbody></table>")
    if len(alerts) > ALERT_ROWS:
        parts.append(f'<p class="note">{len(alerts) - ALERT_ROWS} more in '
                     "<code>out.delay_model</code>.</p>")
    parts.append('<p class="note">A drifting delay is followed by the nowcast (its delay '
                 "distribution changes over time); where the back-test missed, the newest "
                 "days' nowcast is less reliable than its bands say.</p>")
    return "".join(parts), True
