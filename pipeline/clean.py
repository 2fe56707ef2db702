"""Stage 3 — clean: series known on as_of → ``core.cleaned``, ``core.clean_actions``,
``core.weekday_effects``.

Reporting artefacts (negative corrections, missing days, zero runs with a catch-up day, backlog
dumps) are repaired without changing any series' total, and every change is logged with a
sentence a person can read.  ``raw.*`` and ``core.observations`` are never edited.
Mathematics: :mod:`tallywave.models.artefacts`.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

import duckdb
import numpy as np
import pandas as pd

from tallywave.models.artefacts import ReportingRepair
from tallywave.pipeline.frames import (
    BatchFailure,
    Mapper,
    SeriesBlock,
    batches,
    in_steps,
    serial_map,
)
from tallywave.pipeline.keys import clear_run
from tallywave.pipeline.settings import Settings
from tallywave.pipeline.store import insert_df
from tallywave.pipeline.vintages import dense_blocks, observation_blocks

WEEKDAYS = ["Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday", "Sunday"]


def repair_params(cfg: dict[str, Any], step: int = 1) -> dict[str, Any]:
    """Map the documented settings onto the repair model's keyword parameters.

    A weekly signal (``step`` 7) gets its day-valued windows in whole weeks, rounded up, with
    floors that leave a window something to work with (level: at least 5 weeks, odd; backlog
    baseline: 3 weeks; take-back and spread: at least 2 weeks), and no weekday effects.
    """
    params = {
        "negative_window": int(cfg["clean_negative_window_days"]),
        "backlog_z": float(cfg["clean_dump_threshold"]),
        "backlog_min_excess": float(cfg["clean_dump_min_excess"]),
        "backlog_window": int(cfg["clean_dump_spread_days"]),
        "level_window": int(cfg["clean_baseline_days"]),
        "weekday_weeks": int(cfg["clean_weekday_weeks"]),
    }
    if step > 1:
        level = in_steps(params["level_window"], step, 5)
        params.update(negative_window=in_steps(params["negative_window"], step, 2),
                      backlog_window=in_steps(params["backlog_window"], step, 2),
                      level_window=level + 1 - level % 2, backlog_baseline_window=3, step=step)
    return params


def _repair_block(args: tuple[SeriesBlock, dict[str, Any]]) -> dict[str, Any]:
    """Repair one batch of regions (pure; runs inside a task)."""
    block, params = args
    res = ReportingRepair(**params).fit(block.values, block.dates).result()
    return {"clean": res.clean, "flag": res.flag, "adjusted": res.adjusted,
            "weekday": res.weekday_effect, "actions": res.actions}


def clean(con: duckdb.DuckDBPyConnection, as_of: dt.date, settings: Settings, *,
          run_id: str, mapper: Mapper = serial_map) -> dict[str, Any]:
    """Repair every (region, signal) series known on ``as_of`` and write the audit trail."""
    clear_run(con, "clean", run_id)  # re-running under the same run_id replaces its rows
    blocks = observation_blocks(con, as_of, end=as_of)
    n_actions, n_series = 0, 0
    lines: list[str] = []
    skipped: list[str] = []
    for signal, block in blocks.items():
        cfg = settings.for_signal(signal)
        params = repair_params(cfg, block.step)
        parts = batches(len(block.regions), int(cfg["batch_regions"]))
        results = mapper(_repair_block, [(block.take(s), params) for s in parts])
        for part, res in zip(parts, results, strict=True):
            sub = block.take(part)
            if isinstance(res, BatchFailure):
                skipped.extend(f"{signal}/{r}: {res.message[:200]}" for r in sub.regions)
                continue
            insert_df(con, "core.cleaned", _cleaned_frame(run_id, sub, res))
            n_series += len(sub.regions)
            acts = res["actions"]
            if len(acts):
                a = pd.DataFrame({
                    "run_id": run_id,
                    "region": sub.regions[acts["series"].to_numpy(dtype=int)],
                    "signal": signal,
                    "ref_date": sub.dates[acts["t"].to_numpy(dtype=int)],
                    "action": acts["action"].to_numpy(),
                    "delta": acts["delta"].to_numpy(dtype=float),
                    "detail": acts["detail"].to_numpy(),
                })
                n_actions += insert_df(con, "core.clean_actions", a)
            if block.step != 1:  # weekly totals have no weekday effects
                continue
            wk = np.asarray(res["weekday"])
            insert_df(con, "core.weekday_effects", pd.DataFrame({
                "run_id": run_id, "region": np.repeat(sub.regions, 7), "signal": signal,
                "weekday": np.tile(np.arange(7), len(sub.regions)),
                "weekday_name": np.tile(WEEKDAYS, len(sub.regions)),
                "effect": wk.reshape(-1)}))
        lines.append(f"{signal} {len(block.regions)} regions")
    out = {"line": f"{n_series} series repaired, {n_actions} actions logged "
                   f"({', '.join(lines) or 'no signals'})",
           "series": n_series, "actions": n_actions}
    if skipped:
        out["skipped"] = skipped
    return out


def _codes(values: np.ndarray, n_repeat: int) -> pd.Categorical:
    """``np.repeat(values, n_repeat)`` as a categorical: integer codes instead of millions of
    Python strings (DuckDB stores it as VARCHAR like any text column)."""
    codes = np.repeat(np.arange(len(values), dtype=np.int32), n_repeat)
    return pd.Categorical.from_codes(codes, categories=pd.Index(values, dtype=object))


def _cleaned_frame(run_id: str, sub: SeriesBlock, res: dict[str, Any]) -> pd.DataFrame:
    """The core.cleaned rows of one batch (``sub.long`` plus the repair's columns)."""
    n, t = sub.values.shape
    flag = np.asarray(res["flag"], dtype=object).reshape(-1)
    flag = np.where(flag == "", np.array(None, dtype=object), flag)  # '' (no flag) is stored as NULL
    return pd.DataFrame({
        "run_id": _codes(np.array([run_id]), n * t),
        "region": _codes(sub.regions, t),
        "signal": _codes(np.array([sub.signal]), n * t),
        "ref_date": np.tile(sub.dates, n).astype("datetime64[D]"),
        "value_reported": sub.values.reshape(-1),
        "value_clean": np.asarray(res["clean"], dtype=float).reshape(-1),
        "flag": flag,
        "value_adjusted": np.asarray(res["adjusted"], dtype=float).reshape(-1),
    })


def cleaned_blocks(con: duckdb.DuckDBPyConnection, run_id: str, *, adjusted: bool = False,
                   since: dt.date | None = None, signals: list[str] | None = None
                   ) -> dict[str, SeriesBlock]:
    """This run's cleaned series per signal (the input of the later stages).

    ``since`` keeps only reference dates on or after it (stages that need the last months only);
    ``signals`` only those signals.
    """
    col = "value_adjusted" if adjusted else "value_clean"
    sql = (f"SELECT region, signal, ref_date, {col} AS value FROM core.cleaned "
           "WHERE run_id = ?")
    params: list = [run_id]
    if since is not None:
        sql += " AND ref_date >= ?"
        params.append(since)
    if signals is not None:
        sql += " AND signal IN (SELECT unnest(?::VARCHAR[]))"
        params.append(list(signals))
    return dense_blocks(con, sql, params)
