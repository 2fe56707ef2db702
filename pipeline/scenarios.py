"""What-if scenario projections → ``out.scenarios`` (never scored, never in ``out.forecasts``).

Analysts are asked questions such as "what if transmission falls by 20 % from next Monday?".
The ``scenarios`` setting lists them: a name, a multiplicative ``change`` of transmission from a
date (``start``, or ``after_days`` after the run date) and optionally the regions it applies to.
Each scenario is run through the same refitted compartmental model as the forecast, with the
same random draws (common random numbers), so a scenario differs from the compartmental forecast
only by its change of transmission.  A change dated before the run applies from the first
projected day (the fitted past is what it was).  Results are projections under an assumption,
published apart from forecasts and labelled as scenarios.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

import duckdb
import numpy as np
import pandas as pd

from tallywave.pipeline.store import insert_df


def scenario_start(sc: dict[str, Any], as_of: dt.date) -> dt.date:
    """The first day a scenario's change applies to (its ``start`` or ``after_days``)."""
    if "start" in sc:
        return dt.date.fromisoformat(str(sc["start"]))
    return as_of + dt.timedelta(days=int(sc.get("after_days", 0)))


def multipliers(scenarios: list[dict[str, Any]], as_of: dt.date, regions: np.ndarray,
                horizon: int) -> list[tuple[str, np.ndarray]]:
    """Per scenario, the transmission multiplier of every region and projected day (n, H)."""
    out = []
    targets = np.datetime64(as_of, "D") + np.arange(1, int(horizon) + 1)
    for sc in scenarios:
        start = np.datetime64(scenario_start(sc, as_of), "D")
        on_day = targets >= start
        in_scope = np.ones(len(regions), dtype=bool) if "regions" not in sc else \
            np.isin(np.asarray(regions, dtype=object), list(sc["regions"]))
        m = np.where(in_scope[:, None] & on_day[None, :], float(sc["change"]), 1.0)
        out.append((str(sc["name"]), m))
    return out


def describe(sc: dict[str, Any], as_of: dt.date) -> str:
    """One line saying what a scenario assumes."""
    pct = (float(sc["change"]) - 1.0) * 100.0
    where = f" in {', '.join(sc['regions'])}" if "regions" in sc else ""
    return (f"scenario: transmission {pct:+.0f} % from {scenario_start(sc, as_of)}{where} "
            "(compartmental model; a projection under this assumption, not a forecast)")


def scenario_frame(run_id: str, as_of: dt.date, scenario: str, description: str, signal: str,
                   regions: np.ndarray, levels: list[float], q: np.ndarray,
                   change: np.ndarray) -> pd.DataFrame:
    """Long rows of one scenario × signal: (n, H, k) quantiles → out.scenarios columns."""
    n, h, k = q.shape
    targets = np.datetime64(as_of, "D") + np.arange(1, h + 1)
    df = pd.DataFrame({
        "run_id": run_id, "issued_on": np.datetime64(as_of, "D"), "scenario": scenario,
        "description": description, "region": np.repeat(np.asarray(regions, dtype=object), h * k),
        "signal": signal, "target_date": np.tile(np.repeat(targets, k), n),
        "horizon_days": np.tile(np.repeat(np.arange(1, h + 1), k), n),
        "transmission_change": np.repeat(change.reshape(-1), k),
        "q_level": np.tile(levels, n * h), "value": q.reshape(-1)})
    return df[np.isfinite(df["value"].to_numpy())]


def write_scenarios(con: duckdb.DuckDBPyConnection, frames: list[pd.DataFrame]) -> int:
    """Insert the scenario rows of a run; returns the row count."""
    return sum(insert_df(con, "out.scenarios", f) for f in frames)
