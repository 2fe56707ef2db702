"""Scoreboard weights of the weighted ensemble → ``out.ensemble_weights``.

The project keeps an as-of-honest scoreboard of its own past forecasts.  The weighted ensemble
(model ``ensemble_weighted``) uses it: for every signal and band of horizons, each member's
weight is the inverse of its mean WIS over the **same** recent past forecasts
(:func:`tallywave.models.ensemble.inverse_score_weights`).  Only scores that could have been
computed on the run's as_of enter (:func:`tallywave.pipeline.scoring.scores_as_of`: forecasts
published by then whose truth had settled by then, against the data known then), so a backfill
publishes exactly the weights that would have been published on the day.  While a band has
fewer than ``ensemble_min_scores`` common scored forecasts it borrows the weights of the nearest
shorter band that has enough, else the members are weighted equally; ``basis`` says which.
Parents of a region hierarchy are left out of the scores (their data are their leaves').

Members are the forecasting models (``renewal``, ``compartmental``); the baseline is the
yardstick, never a member.
"""

from __future__ import annotations

import datetime as dt

import duckdb
import numpy as np
import pandas as pd

from tallywave.models.ensemble import inverse_score_weights
from tallywave.pipeline.reconcile import parent_leaves
from tallywave.pipeline.scoring import scores_as_of
from tallywave.pipeline.settings import Settings

#: Models an ensemble may combine (in this order).  Never the baseline, never an ensemble.
MEMBERS: tuple[str, ...] = ("renewal", "compartmental")

COLUMNS = ["signal", "horizon_from", "horizon_to", "model", "weight", "mean_wis", "n_scores",
           "basis"]


def horizon_bands(horizon: int, band_days: int) -> list[tuple[int, int]]:
    """Consecutive bands of horizons, e.g. 28 days in bands of 7: (1, 7), (8, 14), ..."""
    step = max(int(band_days), 1)
    return [(lo, min(lo + step - 1, int(horizon))) for lo in range(1, int(horizon) + 1, step)]


def _band_weights(wide: pd.DataFrame, members: list[str], band: tuple[int, int],
                  cfg: dict) -> tuple[np.ndarray, np.ndarray, int]:
    """Weights, mean WIS and count of common forecasts of one band."""
    rows = wide[(wide["horizon_days"] >= band[0]) & (wide["horizon_days"] <= band[1])]
    cols = [m for m in members if m in rows.columns]
    if len(cols) < len(members):
        return np.full(len(members), 1.0 / len(members)), np.full(len(members), np.nan), 0
    mat = rows[members].to_numpy(dtype=float)
    weights, n = inverse_score_weights(mat, power=float(cfg["ensemble_weight_power"]),
                                       min_forecasts=int(cfg["ensemble_min_scores"]))
    ok = np.all(np.isfinite(mat), axis=1)
    mean = mat[ok].mean(axis=0) if ok.any() else np.full(len(members), np.nan)
    return weights, mean, n


def signal_weights(scores: pd.DataFrame, signal: str, members: list[str], as_of: dt.date,
                   cfg: dict) -> pd.DataFrame:
    """The weights of one signal's members per horizon band (rows as :data:`COLUMNS`)."""
    start = pd.Timestamp(as_of - dt.timedelta(days=int(cfg["ensemble_window_days"])))
    s = scores[(scores["signal"] == signal) & scores["model"].isin(members)]
    s = s[pd.to_datetime(s["issued_on"]) >= start]
    if len(s):
        wide = s.pivot_table(index=["region", "issued_on", "horizon_days"], columns="model",
                             values="wis", aggfunc="first").reset_index()
    else:
        wide = pd.DataFrame(columns=["region", "issued_on", "horizon_days"])
    need = int(cfg["ensemble_min_scores"])
    rows = []
    found: list[tuple[tuple[int, int], np.ndarray]] = []  # bands with enough scores so far
    for band in horizon_bands(int(cfg["horizon_days"]), int(cfg["ensemble_band_days"])):
        w, mean, n = _band_weights(wide, members, band, cfg)
        if n >= need:
            basis = f"inverse mean WIS of {n} common forecasts"
            found.append((band, w))
        elif found:
            src, w = found[-1]
            basis = (f"{n} common forecasts (need {need}): weights of horizons "
                     f"{src[0]}-{src[1]}")
        else:
            w = np.full(len(members), 1.0 / len(members))
            basis = f"{n} common forecasts (need {need}): equal weights"
        for j, m in enumerate(members):
            rows.append((signal, band[0], band[1], m, float(w[j]), float(mean[j]), n, basis))
    return pd.DataFrame(rows, columns=COLUMNS)


def scoreboard_weights(con: duckdb.DuckDBPyConnection, as_of: dt.date, settings: Settings,
                       members: dict[str, list[str]]) -> pd.DataFrame:
    """Weights per signal × horizon band × member from the scores knowable on ``as_of``."""
    if not any(members.values()):
        return pd.DataFrame(columns=COLUMNS)
    # only the forecasts the weights can use: issued within the longest window of any signal
    window = max(int(settings.get("ensemble_window_days", sig)) for sig in members)
    scores = scores_as_of(con, as_of, settings,
                          issued_since=as_of - dt.timedelta(days=window))
    parents = set(parent_leaves(con))  # a parent's scores repeat its leaves': not counted
    scores = scores[~scores["region"].isin(parents)]
    parts = [signal_weights(scores, signal, mem, as_of, settings.for_signal(signal))
             for signal, mem in members.items() if mem]
    return pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(columns=COLUMNS)


def weight_array(table: pd.DataFrame, signal: str, members: list[str],
                 horizon: int) -> np.ndarray:
    """The weights as an array (horizon, n_members) for combining day by day."""
    out = np.full((horizon, len(members)), 1.0 / max(len(members), 1))
    t = table[table["signal"] == signal]
    for j, m in enumerate(members):
        for lo, hi, w in t.loc[t["model"] == m, ["horizon_from", "horizon_to",
                                                 "weight"]].itertuples(index=False):
            out[int(lo) - 1:int(hi), j] = w
    return out
