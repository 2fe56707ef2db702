"""Stage 8 — the daily report: one published run → a self-contained HTML page plus PNG figures.

The report only reads (plain SELECTs with bound parameters, then pandas), so it works on a
read-only DuckDB connection.  Layout of ``out_dir/<run_id>/`` (the run id starts with the as-of
date): ``index.html`` and ``figures/*.png`` (one PNG per region × signal with the panels of
:data:`PANELS`, referenced by relative path).  Text taken from the database is HTML-escaped;
figure file names are an ASCII slug plus a short hash, so any region name works.  ``max_regions``
bounds the figures for very large runs: only the regions ranked highest by growth get figures,
every region stays in the growth table.

The page is the list :data:`SECTIONS`; a stage adds its own block with a builder reading what it
needs through the shared :class:`ReportContext`, e.g.::

    add_section(Section("delays", "Delays", "Reporting delays", _delays_html), before="accuracy")
"""

from __future__ import annotations

import datetime as dt
import hashlib
import html
import math
import re
import unicodedata
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb
import matplotlib
import matplotlib.dates as mdates
import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

from tallywave.pipeline.errors import UserError
from tallywave.pipeline.report_delay import delay_alerts_html
from tallywave.pipeline.report_forecast import (
    draw_scenarios,
    scenario_series,
    scenarios_html,
    weights_html,
)

#: Days of history shown in the reported/nowcast and R_t panels.
WINDOW_DAYS = 60
#: Days of data shown beside the forecast fans.
FORECAST_CONTEXT_DAYS = 35
#: Failed/partial feed files listed at most.
FEED_ALERT_ROWS = 20
#: A delay is flagged when the latest week's mean exceeds the earlier weeks' median by this much.
DRIFT_THRESHOLD_DAYS = 1.0
#: Forecast horizons shown in the accuracy table when many horizons are scored.
ACCURACY_HORIZONS = (7, 14, 21, 28)
FIG_SIZE = (11.0, 2.9)
FIG_DPI = 100

# Palette (own): ink and paper with a teal / amber / plum accent set.
INK = "#1d2a33"
PAPER = "#fbfaf6"
CARD = "#ffffff"
TEAL = "#17726d"
AMBER = "#c2691b"
PLUM = "#6a4a7c"
SLATE = "#6b7b87"
MOSS = "#5b7f2b"
ROSE = "#b23a48"
MODEL_COLOURS = {"baseline": SLATE, "renewal": AMBER, "compartmental": PLUM, "ensemble": TEAL}
EXTRA_COLOURS = [MOSS, ROSE, "#2f5d8a", "#8a6d2f"]

_DEP_MARK = "◆"
REPORTED_COLOUR = "#b9c3ca"
_LN2 = math.log(2.0)


# ---------------------------------------------------------------------------------------------
# small helpers

def _df(con: duckdb.DuckDBPyConnection, sql: str, params: Sequence[Any] = ()) -> pd.DataFrame:
    return con.execute(sql, list(params)).df()


def _rows(con: duckdb.DuckDBPyConnection, sql: str, params: Sequence[Any] = ()) -> list[tuple]:
    return con.execute(sql, list(params)).fetchall()


def _e(x: Any) -> str:
    """HTML-escape any value (quotes included)."""
    return html.escape("" if x is None else str(x), quote=True)


def _missing(x: Any) -> bool:
    try:
        return x is None or pd.isna(x)
    except (TypeError, ValueError):
        return False


def _num(x: Any, fmt: str = "{:.2f}") -> str:
    if _missing(x):
        return "–"
    try:
        v = float(x)
    except (TypeError, ValueError):
        return _e(x)
    return fmt.format(v) if math.isfinite(v) else "–"


def _date_text(x: Any) -> str:
    if _missing(x):
        return "–"
    return pd.Timestamp(x).date().isoformat()


def _time_text(x: Any) -> str:
    if _missing(x):
        return "–"
    return pd.Timestamp(x).strftime("%Y-%m-%d %H:%M")


def slug(text: str, limit: int = 32) -> str:
    """ASCII, lower-case, dash-separated form of ``text`` for file names (may be empty)."""
    s = unicodedata.normalize("NFKD", str(text)).encode("ascii", "ignore").decode("ascii")
    return re.sub(r"[^a-z0-9]+", "-", s.lower()).strip("-")[:limit].strip("-")


def series_key(region: str, signal: str) -> str:
    """File-safe, collision-resistant name of one region × signal (slugs plus a short hash)."""
    h = hashlib.sha1(f"{region}\x00{signal}".encode()).hexdigest()[:10]
    return f"{slug(region) or 'region'}--{slug(signal, 16) or 'signal'}-{h}"


def _region_anchor(region: str) -> str:
    h = hashlib.sha1(str(region).encode()).hexdigest()[:8]
    return f"r-{slug(region, 24) or 'region'}-{h}"


def _mpl(text: Any) -> str:
    """Database text made safe for matplotlib (no mathtext)."""
    return str(text).replace("$", r"\$")[:40]


def _trend_text(doubling_days: Any) -> str:
    if _missing(doubling_days) or not math.isfinite(float(doubling_days)):
        return "–"
    d = float(doubling_days)
    if abs(d) > 365:
        return "about flat"
    n = f"{abs(d):.1f}" if abs(d) < 10 else f"{abs(d):.0f}"
    return f"doubling in {n} days" if d > 0 else f"halving in {n} days"


def _nearest(available: np.ndarray, target: float) -> float | None:
    if available.size == 0:
        return None
    return float(available[np.argmin(np.abs(available - target))])


# ---------------------------------------------------------------------------------------------
# reading

def _pick_run(con: duckdb.DuckDBPyConnection, as_of: dt.date | None) -> dict[str, Any]:
    sql = ("SELECT run_id, as_of, started_at, finished_at, code_version FROM out.runs "
           "WHERE status = 'published'")
    params: list[Any] = []
    if as_of is not None:
        sql += " AND as_of = ?"
        params.append(as_of)
    sql += " ORDER BY as_of DESC, finished_at DESC NULLS LAST, started_at DESC LIMIT 1"
    rows = _rows(con, sql, params)
    if not rows:
        newest = _rows(con, "SELECT max(as_of) FROM out.runs WHERE status = 'published'")[0][0]
        if newest is None:
            raise UserError("no published run in the database: run `tallywave run` or "
                            "`tallywave demo` first")
        raise UserError(f"no published run for --as-of {as_of}; the newest published run is "
                        f"for {newest}")
    run_id, run_as_of, started, finished, version = rows[0]
    if isinstance(run_as_of, dt.datetime):
        run_as_of = run_as_of.date()
    return {"run_id": str(run_id), "as_of": run_as_of, "started_at": started,
            "finished_at": finished, "code_version": version}


def _growth(con: duckdb.DuckDBPyConnection, run_id: str) -> pd.DataFrame:
    """Latest growth row per region × signal, ranked: P(Rt>1) first, then growth speed."""
    g = _df(con, """
        SELECT region, signal, ref_date, growth_rate, doubling_days, p_growing, rt_mean,
               nowcast_dependent
        FROM out.growth WHERE run_id = ?
        QUALIFY row_number() OVER (PARTITION BY region, signal ORDER BY ref_date DESC) = 1
    """, [run_id])
    if g.empty:
        return g
    d = g["doubling_days"].astype(float).to_numpy()
    with np.errstate(divide="ignore", invalid="ignore"):
        from_doubling = np.where(np.isfinite(d) & (d != 0), _LN2 / d, np.nan)
    rate = g["growth_rate"].astype(float).to_numpy()
    g["_speed"] = np.where(np.isfinite(rate), rate, from_doubling)
    g["_p"] = g["p_growing"].astype(float)
    g = g.sort_values(["_p", "_speed", "region", "signal"], ascending=[False, False, True, True],
                      na_position="last", kind="mergesort").reset_index(drop=True)
    return g.drop(columns=["_speed", "_p"])


def _series(con: duckdb.DuckDBPyConnection, run_id: str) -> pd.DataFrame:
    """Every region × signal with any output in this run."""
    return _df(con, """
        SELECT DISTINCT region, signal FROM (
            SELECT region, signal FROM core.cleaned WHERE run_id = ?
            UNION ALL SELECT region, signal FROM out.nowcast WHERE run_id = ?
            UNION ALL SELECT region, signal FROM out.rt WHERE run_id = ?
            UNION ALL SELECT region, signal FROM out.growth WHERE run_id = ?
            UNION ALL SELECT region, signal FROM out.forecasts WHERE run_id = ?)
        ORDER BY region, signal
    """, [run_id] * 5)


def _rank_regions(growth: pd.DataFrame, series: pd.DataFrame) -> list[str]:
    """Regions in report order: by their best growth row, then the rest alphabetically."""
    ranked = list(dict.fromkeys(growth["region"].tolist())) if not growth.empty else []
    seen = set(ranked)
    rest = sorted({r for r in series["region"].tolist() if r not in seen})
    return ranked + rest


def _clean_actions(con: duckdb.DuckDBPyConnection, run_id: str
                   ) -> tuple[pd.DataFrame, pd.DataFrame]:
    counts = _df(con, """
        SELECT action, signal, count(*) AS n FROM core.clean_actions WHERE run_id = ?
        GROUP BY action, signal ORDER BY action, signal
    """, [run_id])
    regions = _df(con, """
        SELECT region, count(*) AS n, count(DISTINCT action) AS kinds,
               string_agg(DISTINCT signal, ', ' ORDER BY signal) AS signals
        FROM core.clean_actions WHERE run_id = ?
        GROUP BY region ORDER BY n DESC, region LIMIT 5
    """, [run_id])
    return counts, regions


def _feed_alerts(con: duckdb.DuckDBPyConnection, as_of: dt.date) -> pd.DataFrame:
    return _df(con, """
        SELECT file_id, source, path, as_of, received_at, status, rows_read, rows_rejected,
               message
        FROM raw.feed_files
        WHERE status IN ('failed', 'partial')
          AND coalesce(as_of, CAST(received_at AS DATE)) <= ?
        ORDER BY received_at DESC, file_id DESC LIMIT ?
    """, [as_of, FEED_ALERT_ROWS])


def _delay_drift(con: duckdb.DuckDBPyConnection, run_id: str) -> pd.DataFrame:
    """Region × signal whose latest weekly mean delay exceeds its earlier median by > threshold."""
    d = _df(con, """
        SELECT region, signal, week_start, mean_delay_days FROM out.delay_drift
        WHERE run_id = ? AND mean_delay_days IS NOT NULL
        ORDER BY region, signal, week_start
    """, [run_id])
    cols = ["region", "signal", "week_start", "latest", "earlier_median", "excess"]
    if d.empty:
        return pd.DataFrame(columns=cols)
    last = d.groupby(["region", "signal"], sort=False).tail(1)
    earlier = (d.drop(index=last.index).groupby(["region", "signal"])["mean_delay_days"]
               .median().rename("earlier_median"))
    m = last.join(earlier, on=["region", "signal"]).rename(columns={"mean_delay_days": "latest"})
    m["excess"] = m["latest"] - m["earlier_median"]
    m = m[m["excess"] > DRIFT_THRESHOLD_DAYS]
    return m.sort_values("excess", ascending=False)[cols].reset_index(drop=True)


def _accuracy(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    exists = _rows(con, "SELECT count(*) FROM information_schema.tables "
                        "WHERE table_schema = 'out' AND table_name = 'accuracy'")[0][0]
    if not exists:
        return pd.DataFrame()
    try:
        acc = _df(con, "SELECT * FROM out.accuracy")
    except duckdb.Error:
        return pd.DataFrame()
    want = ["model", "signal", "horizon_days", "n", "mean_wis", "rel_wis", "coverage_50",
            "coverage_90", "bias"]
    acc = acc[[c for c in want if c in acc.columns]]
    if acc.empty or "horizon_days" not in acc.columns:
        return acc
    horizons = set(acc["horizon_days"].dropna().astype(int))
    if len(horizons) > len(ACCURACY_HORIZONS):
        keep = acc["horizon_days"].isin(ACCURACY_HORIZONS)
        if keep.any():
            acc = acc[keep]
    sort = [c for c in ("signal", "horizon_days", "model") if c in acc.columns]
    return acc.sort_values(sort).reset_index(drop=True)


# ---------------------------------------------------------------------------------------------
# figures: one reusable figure whose panels are emptied between series

Bands = dict[str, Any]


def _bands_wide(wide: pd.DataFrame) -> Bands | None:
    """Median, 50% and 90% bands from a date × q_level table, at the nearest available levels."""
    wide = wide.dropna(axis=1, how="all")
    if wide.empty:
        return None
    wide = wide.sort_index()
    levels = wide.columns.to_numpy(dtype=float)
    out: Bands = {"x": wide.index.to_numpy(), "median": None, "b50": None, "b90": None}
    med = _nearest(levels, 0.5)
    if med is not None and abs(med - 0.5) < 0.1:
        out["median"] = wide[med].to_numpy(float)
    for name, lo_t, hi_t in (("b50", 0.25, 0.75), ("b90", 0.05, 0.95)):
        lo, hi = _nearest(levels, lo_t), _nearest(levels, hi_t)
        if lo is not None and hi is not None and lo < 0.5 < hi:
            out[name] = (wide[lo].to_numpy(float), wide[hi].to_numpy(float))
    return out


def _bands(df: pd.DataFrame | None, date_col: str) -> Bands | None:
    """Wide quantile arrays (median, 50% and 90% bands) at the nearest available levels."""
    if df is None or df.empty:
        return None
    return _bands_wide(df.pivot_table(index=date_col, columns="q_level", values="value",
                                      aggfunc="mean"))


def _bands_by(df: pd.DataFrame, keys: list[str], date_col: str) -> dict[tuple[str, ...], Bands]:
    """:func:`_bands` of every ``keys`` group, from one pivot of the whole table (a pivot per
    series was an eighth of the report's time)."""
    if df.empty:
        return {}
    wide = df.pivot_table(index=[*keys, date_col], columns="q_level", values="value",
                          aggfunc="mean")
    levels = list(range(len(keys)))
    out: dict[tuple[str, ...], Bands] = {}
    for k, g in wide.groupby(level=levels, sort=False):
        b = _bands_wide(g.droplevel(levels))
        if b is not None:
            out[tuple(str(x) for x in k)] = b
    return out


@dataclass
class SeriesData:
    """What the panels of one region × signal figure draw."""

    region: str
    signal: str
    as_of: dt.date
    reported: pd.DataFrame | None = None  # ref_date, value_reported: the last WINDOW_DAYS
    nowcast: Bands | None = None
    rt: Bands | None = None
    rt_dependent: np.ndarray | None = None  # per date of ``rt["x"]``: relies on the nowcast
    forecasts: dict[str, Bands] = field(default_factory=dict)  # model → bands
    colours: dict[str, str] = field(default_factory=dict)  # model → colour, the same run-wide
    scenarios: pd.DataFrame | None = None  # what-if projections (report_forecast)


def model_colours(models: Iterable[str]) -> dict[str, str]:
    """Colour of each model: fixed for the built-in ones, then the extra colours in name order
    (one assignment for the whole report, so the page's key holds for every figure)."""
    known = {m: MODEL_COLOURS[m] for m in models if m in MODEL_COLOURS}
    others = sorted({str(m) for m in models} - set(known))
    extra = EXTRA_COLOURS * (1 + len(others) // len(EXTRA_COLOURS))
    return {**known, **dict(zip(others, extra[:len(others)], strict=True))}


def _figure_data(con: duckdb.DuckDBPyConnection, run_id: str, as_of: dt.date,
                 regions: list[str]) -> dict[tuple[str, str], SeriesData]:
    """Everything the figures of ``regions`` draw, read with four queries."""
    start = as_of - dt.timedelta(days=WINDOW_DAYS)
    p = [run_id, start, regions]
    where = "run_id = ? AND ref_date > ? AND list_contains(?::VARCHAR[], region)"
    cleaned = _df(con, f"SELECT region, signal, ref_date, value_reported FROM core.cleaned "
                       f"WHERE {where} ORDER BY ref_date", p)
    nowcast = _df(con, f"SELECT region, signal, ref_date, q_level, value FROM out.nowcast "
                       f"WHERE {where}", p)
    rt = _df(con, f"SELECT region, signal, ref_date, q_level, value, mean, nowcast_dependent "
                  f"FROM out.rt WHERE {where}", p)
    fc = _df(con, "SELECT model, region, signal, target_date, q_level, value FROM out.forecasts "
                  "WHERE run_id = ? AND list_contains(?::VARCHAR[], region)", [run_id, regions])
    out: dict[tuple[str, str], SeriesData] = {}

    def get(key: tuple[str, ...]) -> SeriesData:
        k = (str(key[0]), str(key[1]))
        if k not in out:
            out[k] = SeriesData(k[0], k[1], as_of)
        return out[k]

    for key, g in (cleaned.groupby(["region", "signal"], sort=False) if not cleaned.empty
                   else []):
        get(key).reported = g[["ref_date", "value_reported"]]
    for key, b in _bands_by(nowcast, ["region", "signal"], "ref_date").items():
        get(key).nowcast = b
    rt_bands = _bands_by(rt, ["region", "signal"], "ref_date")
    if not rt.empty:
        rt["dep"] = rt["nowcast_dependent"].astype("boolean").fillna(False).astype(bool)
        per_day = rt.groupby(["region", "signal", "ref_date"], sort=True).agg(
            mean=("mean", "mean"), dep=("dep", "max"))
        for key, g in per_day.groupby(level=[0, 1], sort=False):
            k = (str(key[0]), str(key[1]))
            if k not in rt_bands:
                continue
            bands = rt_bands[k]
            if bands["median"] is None:
                bands["median"] = g["mean"].to_numpy(float)
            get(k).rt, get(k).rt_dependent = bands, g["dep"].to_numpy(bool)
    colours = model_colours(fc["model"].unique().tolist() if not fc.empty else [])
    for (model, region, signal), b in _bands_by(fc, ["model", "region", "signal"],
                                                "target_date").items():
        get((region, signal)).forecasts[model] = b
    for key, g in scenario_series(con, run_id, regions).items():
        get(key).scenarios = g
    for s in out.values():
        s.colours = colours
    return out


def _title(ax: Any, title: str) -> None:
    # a plain text artist: cheaper than set_title, which re-measures the axes on every draw
    ax.text(0.0, 1.03, title, transform=ax.transAxes, ha="left", va="bottom", fontsize=9,
            color=INK)


def _style(ax: Any) -> None:
    """Set once per axes: spines, ticks, date axis, grid (kept while series are redrawn)."""
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color("#c9cdd0")
    ax.tick_params(labelsize=7, colors="#3b4852", length=2)
    # fixed ticks on the 1st and 15th: 2-5 per panel, far cheaper than an automatic locator
    ax.xaxis.set_major_locator(mdates.MonthLocator(bymonthday=(1, 15)))
    ax.xaxis.set_major_formatter(mdates.DateFormatter("%d %b"))
    ax.yaxis.set_major_locator(MaxNLocator(nbins=4))
    ax.grid(axis="y", color="#eceae4", lw=0.6)
    ax.set_axisbelow(True)


def _empty(ax: Any) -> None:
    """Remove one series' artists from a panel, keeping the axes and their ticks (creating
    axes and ticks anew for every figure was a third of the drawing time)."""
    for artist in [*ax.lines, *ax.collections, *ax.patches, *ax.texts]:
        artist.remove()
    ax.xaxis.set_visible(True)
    ax.yaxis.set_visible(True)


def _no_data(ax: Any, title: str) -> None:
    _title(ax, title)
    ax.text(0.5, 0.5, "no data", transform=ax.transAxes, ha="center", va="center",
            color=SLATE, fontsize=9, style="italic")
    ax.xaxis.set_visible(False)
    ax.yaxis.set_visible(False)


def _limits(ax: Any, xs: list[Any], ys: list[Any], top: float | None = None) -> None:
    """Axis limits from the plotted data (set, not autoscaled: artists are swapped in place)."""
    days = np.concatenate([np.asarray(x).astype("datetime64[D]").ravel() for x in xs])
    ax.set_xlim(days.min() - np.timedelta64(1, "D"), days.max() + np.timedelta64(1, "D"))
    if top is None:
        vals = np.concatenate([np.asarray(y, dtype=float).ravel() for y in ys] + [np.zeros(1)])
        finite = vals[np.isfinite(vals)]
        top = float(finite.max()) * 1.05 if finite.size and finite.max() > 0 else 1.0
    ax.set_ylim(0.0, top)


def _fan(ax: Any, b: Bands, colour: str) -> list[Any]:
    """Draw a median and its bands; return the y arrays drawn (for the limits)."""
    x, drawn = b["x"], []
    if b["b90"] is not None:
        ax.fill_between(x, *b["b90"], color=colour, alpha=0.14, lw=0)
        drawn.append(b["b90"][1])
    if b["b50"] is not None:
        ax.fill_between(x, *b["b50"], color=colour, alpha=0.30, lw=0)
        drawn.append(b["b50"][1])
    if b["median"] is not None:
        ax.plot(x, b["median"], color=colour, lw=1.4)
        drawn.append(b["median"])
    return drawn


def _has_reported(s: SeriesData) -> bool:
    return s.reported is not None and bool(s.reported["value_reported"].notna().any())


def _panel_counts(ax: Any, s: SeriesData) -> None:
    """(a) reported counts as bars with the nowcast median and bands."""
    title = f"(a) reported {_mpl(s.signal)} vs nowcast"
    if not _has_reported(s) and s.nowcast is None:
        _no_data(ax, title)
        return
    _title(ax, title)
    xs: list[Any] = [np.datetime64(s.as_of)]
    ys: list[Any] = []
    if s.reported is not None and _has_reported(s):
        x, y = s.reported["ref_date"].to_numpy(), s.reported["value_reported"].to_numpy(float)
        # one LineCollection instead of a bar patch per day (much faster to draw); weekly
        # counts get bars about as wide as five days' (a week's bar, leaving a gap)
        step = float(np.median(np.diff(x).astype("timedelta64[D]").astype(float))) \
            if len(x) > 1 else 1.0
        ax.vlines(x, 0, y, color=REPORTED_COLOUR, lw=2.6 * min(max(step, 1.0), 5.0))
        xs.append(x)
        ys.append(y)
    if s.nowcast is not None:
        ys += _fan(ax, s.nowcast, TEAL)
        xs.append(s.nowcast["x"])
    ax.axvline(np.datetime64(s.as_of), color=INK, lw=0.7, ls=":")
    _limits(ax, xs, ys)


def _panel_rt(ax: Any, s: SeriesData) -> None:
    """(b) R_t with its bands, the R = 1 line and the nowcast-dependent days shaded."""
    title = "(b) R_t by date of infection, 50% / 90% intervals"
    b = s.rt
    if b is None:
        _no_data(ax, title)
        return
    _title(ax, title)
    x = b["x"]
    dep = s.rt_dependent
    if dep is not None and dep.any():
        edges = np.flatnonzero(np.diff(np.r_[0, dep.astype(int), 0]))
        half = np.timedelta64(12, "h")
        for i0, i1 in zip(edges[::2], edges[1::2], strict=True):
            ax.axvspan(x[i0] - half, x[i1 - 1] + half, color=AMBER, alpha=0.12, lw=0)
    _fan(ax, b, PLUM)
    ax.axhline(1.0, color=INK, lw=0.8, ls="--")
    upper = b["b90"][1] if b["b90"] is not None else b["median"]
    top = np.nanmax(upper) if upper is not None and np.isfinite(upper).any() else 2.0
    _limits(ax, [x], [], top=float(min(4.0, max(1.5, top * 1.05))))


def _panel_forecast(ax: Any, s: SeriesData) -> None:
    """(c) each model's forecast median and bands beside the recent reported counts."""
    title = "(c) forecasts by model"
    if not s.forecasts and not _has_reported(s):
        _no_data(ax, title)
        return
    _title(ax, title)
    xs: list[Any] = [np.datetime64(s.as_of)]
    ys: list[Any] = []
    if s.reported is not None and _has_reported(s):
        cut = pd.Timestamp(s.as_of) - pd.Timedelta(days=FORECAST_CONTEXT_DAYS)
        recent = s.reported[s.reported["ref_date"] > cut]
        x, y = recent["ref_date"].to_numpy(), recent["value_reported"].to_numpy(float)
        ax.plot(x, y, "o", ms=2.2, color=INK)
        xs.append(x)
        ys.append(y)
    if not s.forecasts:
        ax.text(0.98, 0.92, "no forecasts", transform=ax.transAxes, ha="right", fontsize=8,
                color=SLATE, style="italic")
    for m in sorted(s.forecasts, key=lambda m: (m == "ensemble", str(m))):
        ys += _fan(ax, s.forecasts[m], s.colours.get(m, SLATE))
        xs.append(s.forecasts[m]["x"])
    draw_scenarios(ax, s.scenarios)
    ax.axvline(np.datetime64(s.as_of), color=INK, lw=0.7, ls=":")
    _limits(ax, xs, ys)


Panel = Callable[[Any, SeriesData], None]
#: The panels of every region × signal figure, left to right (append to add one).
PANELS: list[Panel] = [_panel_counts, _panel_rt, _panel_forecast]


class FigureWriter:
    """Writes one PNG per region × signal with a single figure whose axes are made once."""

    def __init__(self, panels: Sequence[Panel] | None = None) -> None:
        self.panels = list(PANELS if panels is None else panels)
        width = FIG_SIZE[0] * len(self.panels) / 3
        self.fig = Figure(figsize=(width, FIG_SIZE[1]), dpi=FIG_DPI, facecolor=CARD)
        self.canvas = FigureCanvasAgg(self.fig)
        self.axes = list(self.fig.subplots(1, len(self.panels), squeeze=False)[0])
        self.fig.subplots_adjust(left=0.045 * 3 / len(self.panels), right=0.99, bottom=0.13,
                                 top=0.88, wspace=0.18)
        for ax in self.axes:
            _style(ax)

    def write(self, path: Path, series: SeriesData) -> None:
        """Draw ``series`` in every panel and save the PNG."""
        for ax, panel in zip(self.axes, self.panels, strict=True):
            _empty(ax)
            panel(ax, series)
        self.canvas.print_png(str(path))


# ---------------------------------------------------------------------------------------------
# HTML

_CSS = """
*{box-sizing:border-box}
body{margin:0;background:%(paper)s;color:%(ink)s;
 font:15px/1.5 "Iowan Old Style","Palatino Linotype",Georgia,serif}
.top{background:%(ink)s;color:#f3efe6;padding:26px 5vw 18px}
.top h1{margin:0 0 6px;font-weight:600;letter-spacing:.02em;font-size:26px}
.meta{display:flex;flex-wrap:wrap;gap:8px;margin:10px 0;
 font:12px/1.4 ui-monospace,Menlo,Consolas,monospace}
.meta span{border:1px solid #4d5c66;border-radius:3px;padding:3px 8px}
.meta b{color:#e7b27a;font-weight:500}
.how{max-width:900px;color:#cfd6da;font-size:14px;margin:6px 0 0}
nav{padding:8px 5vw;background:#e9e5da;font:13px sans-serif}
nav a{color:%(teal)s;margin-right:18px;text-decoration:none}
main{padding:8px 5vw 30px;max-width:1240px}
section.block{background:%(card)s;border-top:3px solid %(teal)s;margin:22px 0;
 padding:14px 18px;box-shadow:0 1px 2px rgba(0,0,0,.06)}
section.block.warn{border-top-color:%(amber)s}
h2{font-size:19px;margin:2px 0 10px}
h3{font-size:16px;margin:18px 0 6px;border-bottom:1px solid #e2ded3;padding-bottom:3px}
h4{font:600 13px sans-serif;margin:14px 0 6px;color:#3b4852;text-transform:uppercase;
 letter-spacing:.05em}
table{border-collapse:collapse;font:13px/1.35 system-ui,sans-serif;margin:4px 0 10px}
th{text-align:left;font-weight:600;border-bottom:2px solid %(ink)s;padding:4px 10px 4px 4px}
td{padding:3px 10px 3px 4px;border-bottom:1px solid #eeece6;vertical-align:top}
tr:nth-child(even) td{background:#faf9f5}
td.n,th.n{text-align:right;font-variant-numeric:tabular-nums}
td.msg{max-width:520px;word-break:break-word;color:#4a4a4a}
.bar{display:inline-block;width:70px;height:8px;background:#ebe8df;margin-right:6px;
 vertical-align:middle}
.bar i{display:block;height:8px}
.hot{color:%(amber)s;font-weight:600}.cool{color:%(teal)s}
.dep{color:%(amber)s}
.best{font-weight:700}
.quiet{color:%(slate)s;font-style:italic}
.note{font-size:13px;color:#4d5860}
.key{font:12px sans-serif;color:#3b4852;margin:4px 0 10px}
.key span{margin-right:14px;white-space:nowrap}
.key i{display:inline-block;width:18px;height:8px;margin-right:5px;vertical-align:middle}
figure{margin:6px 0 14px}
figure img{width:100%%;max-width:1100px;height:auto;border:1px solid #ece9e1;background:#fff}
figcaption{font:12px sans-serif;color:#4d5860}
footer{background:#efe9dc;border-top:1px solid #d8d0bd;padding:16px 5vw 26px;font-size:14px}
footer h2{font-size:16px}
"""


def _css() -> str:
    return _CSS % {"paper": PAPER, "ink": INK, "card": CARD, "teal": TEAL, "amber": AMBER,
                   "slate": SLATE}


def _table(headers: Iterable[tuple[str, bool]], rows: Iterable[Iterable[tuple[str, str]]]) -> str:
    """HTML table; headers are (text, numeric); cells are (already-escaped html, css class)."""
    head = "".join(f'<th class="n">{_e(h)}</th>' if n else f"<th>{_e(h)}</th>"
                   for h, n in headers)
    body = "".join("<tr>" + "".join(f'<td class="{c}">{v}</td>' if c else f"<td>{v}</td>"
                                    for v, c in r) + "</tr>" for r in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _p_cell(p: Any) -> str:
    if _missing(p):
        return "–"
    v = min(max(float(p), 0.0), 1.0)
    colour = AMBER if v >= 0.5 else TEAL
    cls = "hot" if v >= 0.9 else ("cool" if v <= 0.1 else "")
    return (f'<span class="bar"><i style="width:{v * 100:.0f}%;background:{colour}"></i></span>'
            + (f'<span class="{cls}">{v:.2f}</span>' if cls else f"<span>{v:.2f}</span>"))


def _growth_html(growth: pd.DataFrame, with_fig: set[str]) -> str:
    if growth.empty:
        return '<p class="quiet">no growth estimates in this run (no data)</p>'
    rows = []
    for i, r in enumerate(growth.itertuples(index=False), start=1):
        region = _e(r.region)
        if r.region in with_fig:
            region = f'<a href="#{_region_anchor(r.region)}">{region}</a>'
        dep = bool(r.nowcast_dependent) if not _missing(r.nowcast_dependent) else False
        trend = _e(_trend_text(r.doubling_days))
        if not _missing(r.doubling_days) and 0 < float(r.doubling_days) <= 14:
            trend = f'<span class="hot">{trend}</span>'
        rows.append([
            (str(i), "n"), (region, ""), (_e(r.signal), ""), (_date_text(r.ref_date), ""),
            (_p_cell(r.p_growing), ""), (_num(r.rt_mean), "n"), (trend, ""),
            (f'<span class="dep" title="depends on nowcast">{_DEP_MARK}</span>' if dep else "",
             ""),
        ])
    table = _table([("#", True), ("region", False), ("signal", False), ("estimate date", False),
                    ("P(Rt > 1)", False), ("Rt mean", True), ("trend", False),
                    ("nowcast", False)], rows)
    return (table + f'<p class="note"><span class="dep">{_DEP_MARK}</span> the estimate relies '
            "on the nowcast of recent, still-incomplete days and may move as reports arrive.</p>")


def _quality_html(actions: pd.DataFrame, act_regions: pd.DataFrame, feeds: pd.DataFrame,
                  drift: pd.DataFrame, as_of: dt.date) -> str:
    parts = ["<h4>Repairs made by cleaning</h4>"]
    if actions.empty:
        parts.append('<p class="quiet">no cleaning actions in this run</p>')
    else:
        wide = actions.pivot_table(index="action", columns="signal", values="n", aggfunc="sum",
                                   fill_value=0)
        signals = list(wide.columns)
        rows = [[(_e(a), "")] + [(str(int(wide.loc[a, s])), "n") for s in signals]
                + [(str(int(wide.loc[a].sum())), "n")] for a in wide.index]
        parts.append(_table([("action", False)] + [(str(s), True) for s in signals]
                            + [("total", True)], rows))
        rrows = [[(_e(r.region), ""), (str(int(r.n)), "n"), (str(int(r.kinds)), "n"),
                  (_e(r.signals), "")] for r in act_regions.itertuples(index=False)]
        parts.append('<p class="note">Regions with the most repairs:</p>')
        parts.append(_table([("region", False), ("actions", True), ("kinds", True),
                             ("signals", False)], rrows))

    parts.append(f"<h4>Feed files failed or partly read (up to {_e(as_of)})</h4>")
    if feeds.empty:
        parts.append('<p class="quiet">none</p>')
    else:
        frows = [[(_e(r.status), "hot" if r.status == "failed" else ""), (_e(r.source), ""),
                  (_e(r.path), "msg"), (_date_text(r.as_of), ""),
                  (_time_text(r.received_at), ""), (_num(r.rows_rejected, "{:.0f}"), "n"),
                  (_e(str(r.message or "")[:300]), "msg")]
                 for r in feeds.itertuples(index=False)]
        parts.append(_table([("status", False), ("source", False), ("file", False),
                             ("as of", False), ("received", False), ("rejected rows", True),
                             ("message", False)], frows))

    parts.append(f"<h4>Reporting delay drift (latest week &gt; earlier median + "
                 f"{DRIFT_THRESHOLD_DAYS:g} day)</h4>")
    if drift.empty:
        parts.append('<p class="quiet">no region shows a lengthening delay</p>')
    else:
        drows = [[(_e(r.region), ""), (_e(r.signal), ""), (_date_text(r.week_start), ""),
                  (_num(r.latest, "{:.1f}"), "n"), (_num(r.earlier_median, "{:.1f}"), "n"),
                  (_num(r.excess, "+{:.1f}"), "n hot")] for r in drift.itertuples(index=False)]
        parts.append(_table([("region", False), ("signal", False), ("latest week", False),
                             ("mean delay (d)", True), ("earlier median (d)", True),
                             ("excess (d)", True)], drows))
    return "".join(parts)


def _accuracy_html(acc: pd.DataFrame) -> str:
    if acc.empty:
        return '<p class="quiet">no settled forecasts yet</p>'
    best: set[int] = set()
    key = "rel_wis" if "rel_wis" in acc.columns else "mean_wis"
    if key in acc.columns and {"signal", "horizon_days"} <= set(acc.columns):
        ok = acc[acc[key].notna()]
        if not ok.empty:
            idx = ok[key].astype(float).groupby([ok["signal"], ok["horizon_days"]]).idxmin()
            best = {int(i) for i in idx}
    fmts = {"n": "{:.0f}", "mean_wis": "{:.2f}", "rel_wis": "{:.2f}", "coverage_50": "{:.0%}",
            "coverage_90": "{:.0%}", "bias": "{:+.2f}", "horizon_days": "{:.0f}"}
    cols = list(acc.columns)
    rows = []
    for i, r in enumerate(acc.itertuples(index=False)):
        cells = []
        for c, v in zip(cols, r, strict=True):
            if c in fmts:
                cells.append((_num(v, fmts[c]), "n best" if i in best and c == key else "n"))
            else:
                cells.append((_e(v), "best" if i in best and c == "model" else ""))
        rows.append(cells)
    return (_table([(c, c in fmts) for c in cols], rows)
            + '<p class="note">Scores over every settled forecast in the database. WIS: weighted '
              "interval score, lower is better; rel_wis &lt; 1 beats the baseline model; "
              "coverage should be near 50% and 90%; bias near 0. Bold: lowest per signal and "
              "horizon.</p>")


_CAUTION = (
    "<p>Everything here is model output computed from the counts reported so far, not a direct "
    "measurement of what is happening, and it is uncertain. The intervals show only the "
    "uncertainty the models can see: when testing, reporting practice or case definitions "
    "change, they can be too narrow and recent estimates can shift markedly as late reports "
    "arrive.</p><p>Read the report as one input to epidemiological judgement, not as a "
    "substitute for it. Where it disagrees with local guidance, local knowledge or established "
    "practice, defer to those.</p>"
)


# ---------------------------------------------------------------------------------------------
# the report: a context shared by sections, a list of sections, one page

@dataclass
class ReportContext:
    """One published run being reported: the connection, the run, its folder, and data the
    sections share (each read once, on first use, through :meth:`memo`)."""

    con: duckdb.DuckDBPyConnection
    run: dict[str, Any]
    folder: Path
    max_regions: int | None = 50
    _memo: dict[str, Any] = field(default_factory=dict)

    @property
    def run_id(self) -> str:
        return str(self.run["run_id"])

    @property
    def as_of(self) -> dt.date:
        return self.run["as_of"]

    def memo(self, key: str, make: Callable[[], Any]) -> Any:
        """``make()`` once per report, then its cached value."""
        if key not in self._memo:
            self._memo[key] = make()
        return self._memo[key]

    @property
    def growth(self) -> pd.DataFrame:
        return self.memo("growth", lambda: _growth(self.con, self.run_id))

    @property
    def series(self) -> pd.DataFrame:
        return self.memo("series", lambda: _series(self.con, self.run_id))

    @property
    def regions(self) -> list[str]:
        """Every region of the run, in report order (growth ranking first)."""
        return self.memo("regions", lambda: _rank_regions(self.growth, self.series))

    @property
    def figure_regions(self) -> list[str]:
        """The regions that get figures: the first ``max_regions`` in report order."""
        n = len(self.regions) if self.max_regions is None else max(0, int(self.max_regions))
        return self.regions[:n]


@dataclass(frozen=True)
class Section:
    """One block of the page: ``build(ctx)`` returns its HTML below the heading; ``warn(ctx)``
    True draws it with the alert colour."""

    id: str
    nav: str
    title: str
    build: Callable[[ReportContext], str]
    warn: Callable[[ReportContext], bool] | None = None


def _growth_section(ctx: ReportContext) -> str:
    return ('<p class="note">Latest estimate per region and signal, ranked by the probability '
            "that R<sub>t</sub> exceeds 1, then by how fast counts are changing.</p>"
            + _growth_html(ctx.growth, set(ctx.figure_regions)))


def _quality_data(ctx: ReportContext) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame,
                                               pd.DataFrame]:
    def make() -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame, pd.DataFrame]:
        actions, act_regions = _clean_actions(ctx.con, ctx.run_id)
        return (actions, act_regions, _feed_alerts(ctx.con, ctx.as_of),
                _delay_drift(ctx.con, ctx.run_id))

    return ctx.memo("quality", make)


def _quality_section(ctx: ReportContext) -> str:
    return _quality_html(*_quality_data(ctx), ctx.as_of)


def _quality_warn(ctx: ReportContext) -> bool:
    actions, _, feeds, drift = _quality_data(ctx)
    return bool((not actions.empty and actions["n"].sum() > 0) or not feeds.empty
                or not drift.empty)


def _write_figures(ctx: ReportContext) -> list[str]:
    """One PNG per region × signal of the figure regions; returns the HTML per region."""
    figdir = ctx.folder / "figures"
    figdir.mkdir(parents=True, exist_ok=True)
    for old in figdir.glob("*.png"):  # this folder belongs to this run's report only
        old.unlink()
    signals_of: dict[str, list[str]] = {}
    for r, s in ctx.series[["region", "signal"]].itertuples(index=False):
        signals_of.setdefault(str(r), []).append(str(s))
    data = _figure_data(ctx.con, ctx.run_id, ctx.as_of, ctx.figure_regions)
    blocks: list[str] = []
    with matplotlib.rc_context({"font.size": 8}):
        writer = FigureWriter()
        for region in ctx.figure_regions:
            items = []
            for signal in signals_of.get(region, []):
                name = series_key(region, signal) + ".png"
                series = data.get((region, signal)) or SeriesData(region, signal, ctx.as_of)
                writer.write(figdir / name, series)
                alt = f"{region} – {signal}: reported vs nowcast, R_t, forecasts"
                items.append(f'<figure><img src="figures/{_e(name)}" alt="{_e(alt)}" '
                             f'loading="lazy"><figcaption>{_e(signal)}</figcaption></figure>')
            blocks.append(f'<h3 id="{_region_anchor(region)}">{_e(region)}</h3>'
                          + "".join(items))
    return blocks


def _key_html(ctx: ReportContext) -> str:
    """The colour key of every figure, once on the page (legends in each PNG cost a fifth of
    the drawing time)."""
    models = [r[0] for r in _rows(ctx.con, "SELECT DISTINCT model FROM out.forecasts "
                                           "WHERE run_id = ? ORDER BY 1", [ctx.run_id])]
    models.sort(key=lambda m: (m == "ensemble", m))
    colours = model_colours(models)

    def swatch(colour: str, text: str) -> str:
        return f'<span><i style="background:{colour}"></i>{_e(text)}</span>'

    return ('<p class="key">' + swatch(REPORTED_COLOUR, "reported (a)")
            + swatch(INK, "reported (c, dots)") + swatch(TEAL, "nowcast") + swatch(PLUM, "R_t")
            + swatch(AMBER + "33", "R_t relies on the nowcast") + " forecasts: "
            + "".join(swatch(colours[m], m) for m in models) + "</p>")


def _regions_section(ctx: ReportContext) -> str:
    parts = [(f'<p class="note">Per signal: (a) reported daily counts (bars) with the nowcast '
             f"median and bands for the last {WINDOW_DAYS} days; (b) R<sub>t</sub> with the "
             "R = 1 line, amber shading marks days that depend on the nowcast; (c) each model's "
             "forecast median and bands beside the recent counts. The dotted line is the as-of "
             "date.</p>")]
    if ctx.figure_regions:
        parts.append(_key_html(ctx))
        parts += _write_figures(ctx)
    more = len(ctx.regions) - len(ctx.figure_regions)
    if more > 0:
        parts.append(f'<p class="note">{more} more region(s) are listed in the growth table '
                     f"without figures (figures are limited to the top "
                     f"{len(ctx.figure_regions)} regions by growth; see "
                     "<code>max_regions</code>).</p>")
    if not ctx.regions:
        parts.append('<p class="quiet">no data for any region in this run</p>')
    return "".join(parts)


def _accuracy_section(ctx: ReportContext) -> str:
    return _accuracy_html(_accuracy(ctx.con))


def _delays(ctx: ReportContext) -> tuple[str, bool]:
    return ctx.memo("delays", lambda: delay_alerts_html(ctx.con, ctx.run_id))


#: The page's sections, top to bottom.  Another stage adds its panel with :func:`add_section`.
SECTIONS: list[Section] = [
    Section("growth", "Growth", "Where transmission is growing", _growth_section),
    Section("quality", "Data quality", "Data-quality alerts", _quality_section, _quality_warn),
    Section("regions", "Regions", "Regions", _regions_section),
    Section("delays", "Delays", "Reporting delays", lambda c: _delays(c)[0],
            lambda c: _delays(c)[1]),
    Section("accuracy", "Forecast accuracy", "Forecast accuracy", _accuracy_section),
    Section("weights", "Ensemble weights", "Weighted ensemble",
            lambda c: weights_html(c.con, c.run_id)),
    Section("scenarios", "Scenarios", "Scenarios (what-if projections, not forecasts)",
            lambda c: scenarios_html(c.con, c.run_id)),
]


def add_section(section: Section, *, before: str | None = None) -> None:
    """Register a section (placed before the section with id ``before``, else last)."""
    ids = [s.id for s in SECTIONS]
    if section.id in ids:
        SECTIONS[ids.index(section.id)] = section
        return
    SECTIONS.insert(ids.index(before) if before in ids else len(SECTIONS), section)


def _section_html(section: Section, ctx: ReportContext) -> str:
    body = section.build(ctx)
    warn = " warn" if section.warn is not None and section.warn(ctx) else ""
    return (f'<section class="block{warn}" id="{_e(section.id)}"><h2>{_e(section.title)}</h2>\n'
            f"{body}</section>\n")


def _page(ctx: ReportContext, sections: Sequence[Section], body: str) -> str:
    run = ctx.run
    nav = "".join(f'<a href="#{_e(s.id)}">{_e(s.nav)}</a>' for s in sections)
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>Tallywave report {_e(ctx.as_of)}</title>
<style>{_css()}</style></head>
<body>
<header class="top">
<h1>Tallywave · daily surveillance report</h1>
<div class="meta"><span>as of <b>{_e(ctx.as_of)}</b></span><span>run <b>{_e(ctx.run_id)}</b></span>
<span>published <b>{_e(_time_text(run["finished_at"]))}</b></span>
<span>code <b>{_e(run["code_version"] or "unknown")}</b></span></div>
<p class="how">How to read this: start with the growth table (the regions most likely to be
growing are at the top), check the data-quality alerts before trusting any single number, then
look at each region's panels — reported counts against the nowcast, R<sub>t</sub> against the
R = 1 line, and the forecast fans. Shaded bands are 50% (darker) and 90% (lighter)
intervals.</p>
</header>
<nav>{nav}<a href="#cautions">Cautions</a></nav>
<main>
{body}</main>
<footer id="cautions"><h2>Cautions</h2>{_CAUTION}
<p class="note">Generated from run {_e(ctx.run_id)} of Tallywave {_e(run["code_version"] or "")}.
</p></footer>
</body></html>
"""


def report_folder(out_dir: str | Path, run_id: str) -> Path:
    """``out_dir/<run_id>``: the run id starts with the as-of date, so the date appears once."""
    return Path(out_dir) / re.sub(r"[^A-Za-z0-9._-]+", "_", run_id)


def write_report(con: duckdb.DuckDBPyConnection, *, as_of: dt.date | str | None = None,
                 out_dir: str | Path = "reports", max_regions: int | None = 50) -> Path:
    """Write the HTML report of a published run and return the path of its ``index.html``.

    ``as_of`` None → newest published run; otherwise the newest published run of that as_of
    (UserError if none).  Only the ``max_regions`` regions ranked highest by growth get figures
    (None = all); every region stays listed in the growth table.  Read-only on ``con``.
    """
    if isinstance(as_of, str):
        as_of = dt.date.fromisoformat(as_of)
    elif isinstance(as_of, dt.datetime):
        as_of = as_of.date()
    run = _pick_run(con, as_of)
    ctx = ReportContext(con, run, report_folder(out_dir, run["run_id"]), max_regions)
    ctx.folder.mkdir(parents=True, exist_ok=True)
    sections = list(SECTIONS)
    page = _page(ctx, sections, "".join(_section_html(s, ctx) for s in sections))
    index = ctx.folder / "index.html"
    tmp = ctx.folder / "index.html.tmp"
    tmp.write_text(page, encoding="utf-8")
    tmp.replace(index)
    return index
