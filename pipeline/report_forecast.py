"""Report pieces of the forecasting stage: ensemble weights, scenario projections.

Called from :mod:`tallywave.pipeline.report` (read-only SELECTs, then pandas): HTML fragments for
the weighted ensemble's weights and the list of scenarios, and a drawing of each scenario's
median onto a region's forecast panel.  Scenarios are always drawn dashed and labelled
"scenario", so they are never mistaken for forecasts.
"""

from __future__ import annotations

import html
from typing import Any

import duckdb
import numpy as np
import pandas as pd

#: Line colours of scenario medians (dashed), in scenario order.
SCENARIO_COLOURS = ("#8a3b12", "#2f5d8a", "#5b7f2b", "#7c2f6a")


def _e(x: Any) -> str:
    return html.escape(str(x), quote=True)


def _table_exists(con: duckdb.DuckDBPyConnection, name: str) -> bool:
    schema, table = name.split(".")
    return bool(con.execute("SELECT count(*) FROM information_schema.tables "
                            "WHERE table_schema = ? AND table_name = ?",
                            [schema, table]).fetchall()[0][0])


def scenario_series(con: duckdb.DuckDBPyConnection, run_id: str, regions: list[str]
                    ) -> dict[tuple[str, str], pd.DataFrame]:
    """Scenario medians and 90 % bounds of a run per (region, signal)."""
    if not _table_exists(con, "out.scenarios"):
        return {}
    df = con.execute(
        """SELECT scenario, region, signal, target_date, q_level, value FROM out.scenarios
           WHERE run_id = ? AND list_contains(?::VARCHAR[], region)
             AND (abs(q_level - 0.5) < 1e-9 OR abs(q_level - 0.05) < 1e-9
                  OR abs(q_level - 0.95) < 1e-9)
           ORDER BY scenario, target_date""", [run_id, regions]).df()
    if df.empty:
        return {}
    return {(str(k[0]), str(k[1])): g for k, g in df.groupby(["region", "signal"], sort=False)}


def draw_scenarios(ax: Any, df: pd.DataFrame | None) -> None:
    """Each scenario's median (dashed) and 90 % bounds (dotted) on a forecast panel."""
    if df is None or df.empty:
        return
    for j, (name, g) in enumerate(df.groupby("scenario", sort=True)):
        colour = SCENARIO_COLOURS[j % len(SCENARIO_COLOURS)]
        wide = g.pivot_table(index="target_date", columns="q_level", values="value")
        x = wide.index.to_numpy()
        cols = np.asarray(wide.columns, dtype=float)
        med = wide[cols[np.argmin(np.abs(cols - 0.5))]].to_numpy(float)
        ax.plot(x, med, ls="--", lw=1.3, color=colour, label=f"scenario: {name}")
        for level in (0.05, 0.95):
            if np.min(np.abs(cols - level)) < 1e-9:
                ax.plot(x, wide[cols[np.argmin(np.abs(cols - level))]].to_numpy(float),
                        ls=":", lw=0.8, color=colour)
    ax.legend(fontsize=7, loc="upper left", ncol=2, frameon=True, framealpha=0.85,
              edgecolor="none")


def weights_html(con: duckdb.DuckDBPyConnection, run_id: str) -> str:
    """The weighted ensemble's member weights per signal and band of horizons, with basis."""
    if not _table_exists(con, "out.ensemble_weights"):
        return ""
    df = con.execute("SELECT signal, horizon_from, horizon_to, model, weight, mean_wis, "
                     "n_scores, basis FROM out.ensemble_weights WHERE run_id = ? "
                     "ORDER BY signal, horizon_from, model", [run_id]).df()
    if df.empty:
        return '<p class="quiet">no weighted ensemble in this run</p>'
    models = sorted(df["model"].unique())
    head = "".join(f'<th class="n">{_e(m)}</th>' for m in models)
    rows = []
    for (signal, lo, hi), g in df.groupby(["signal", "horizon_from", "horizon_to"], sort=True):
        w = dict(zip(g["model"], g["weight"], strict=True))
        cells = "".join(f'<td class="n">{w[m]:.0%}</td>' if m in w else "<td></td>"
                        for m in models)
        rows.append(f"<tr><td>{_e(signal)}</td><td>{int(lo)}–{int(hi)} days</td>{cells}"
                    f'<td class="msg">{_e(g["basis"].iloc[0])}</td></tr>')
    return (f"<table><tr><th>signal</th><th>horizons</th>{head}<th>basis</th></tr>"
            + "".join(rows) + "</table>"
            '<p class="note">Weights of the members in <code>ensemble_weighted</code>: inverse '
            "mean WIS over the same recent forecasts, using only scores known on the run's "
            "date. The baseline is the yardstick and never a member.</p>")


def scenarios_html(con: duckdb.DuckDBPyConnection, run_id: str) -> str:
    """The run's scenario projections: what each assumes (drawn dashed in the panels)."""
    if not _table_exists(con, "out.scenarios"):
        return ""
    df = con.execute("SELECT scenario, any_value(description) AS description, "
                     "count(DISTINCT region) AS n_regions, "
                     "string_agg(DISTINCT signal, ', ' ORDER BY signal) AS signals "
                     "FROM out.scenarios WHERE run_id = ? GROUP BY scenario ORDER BY scenario",
                     [run_id]).df()
    if df.empty:
        return ('<p class="quiet">no scenarios configured (setting <code>scenarios</code>)'
                "</p>")
    rows = "".join(f"<tr><td>{_e(r.scenario)}</td><td>{_e(r.description)}</td>"
                   f'<td class="n">{int(r.n_regions)}</td><td>{_e(r.signals)}</td></tr>'
                   for r in df.itertuples(index=False))
    return ("<table><tr><th>scenario</th><th>assumption</th><th class=\"n\">regions</th>"
            f"<th>signals</th></tr>{rows}</table>"
            '<p class="note">Scenarios are projections of the compartmental model under an '
            "assumed change of transmission, not forecasts: they are never scored. In the "
            "regions' forecast panels each scenario's median is dashed, its 90% bounds "
            "dotted.</p>")


def forecast_sections(con: duckdb.DuckDBPyConnection, run_id: str) -> str:
    """Both sections, ready to place in the report page."""
    return ('<section class="block" id="weights"><h2>Weighted ensemble</h2>'
            f"{weights_html(con, run_id)}</section>"
            '<section class="block" id="scenarios"><h2>Scenarios</h2>'
            f"{scenarios_html(con, run_id)}</section>")
