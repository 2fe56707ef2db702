"""Tests for pipeline.report: a synthetic published run → HTML + PNGs, escaping, run selection."""

from __future__ import annotations

import datetime as dt
import html
import re
import struct
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from tallywave.pipeline import store
from tallywave.pipeline.errors import UserError
from tallywave.pipeline.report import _bands, _trend_text, series_key, write_report

AS_OF = dt.date(2026, 5, 10)
RUN = "2026-05-10-a1b2c3d4"
OLD_RUN = "2026-05-09-e5f6a7b8"
NASTY = "Q<&>\"'; DROP TABLE x;--"
UNI = "Zørvelund Ïlmaq ✶ 東谷町"  # invented place
PLAIN = "Brackenmoor"
REGIONS = [PLAIN, NASTY, UNI]
SIGNALS = ["cases", "admissions"]
LEVELS = np.array([0.025, 0.05, 0.25, 0.5, 0.75, 0.95, 0.975])
Z = np.array([-1.96, -1.645, -0.674, 0.0, 0.674, 1.645, 1.96])  # normal quantiles, from memory
PNG_SIG = b"\x89PNG\r\n\x1a\n"  # PNG specification (W3C / ISO 15948) file signature
# P(Rt>1) of the latest growth row per (region, signal): decides the ranking
P_GROWING = {(PLAIN, "cases"): 0.55, (PLAIN, "admissions"): 0.40, (NASTY, "cases"): 0.97,
             (NASTY, "admissions"): 0.70, (UNI, "cases"): 0.05, (UNI, "admissions"): 0.20}
DOUBLING = {(PLAIN, "cases"): 30.0, (PLAIN, "admissions"): -40.0, (NASTY, "cases"): 9.0,
            (NASTY, "admissions"): 21.0, (UNI, "cases"): -12.0, (UNI, "admissions"): -25.0}


def _days(end: dt.date, n: int) -> pd.DatetimeIndex:
    return pd.date_range(end=pd.Timestamp(end), periods=n, freq="D")


def _quantile_rows(base: dict, dates: pd.DatetimeIndex, centre: np.ndarray, sd: np.ndarray,
                   date_col: str) -> pd.DataFrame:
    n, k = len(dates), len(LEVELS)
    vals = np.maximum(centre[:, None] + sd[:, None] * Z[None, :], 0.0)
    return pd.DataFrame({**{c: v for c, v in base.items()},
                         date_col: np.repeat(dates.to_numpy(), k),
                         "q_level": np.tile(LEVELS, n), "value": vals.reshape(-1)})


def populate(con, seed: int = 7) -> None:
    """Insert one published run (and an empty older one) with every table the report reads."""
    rng = np.random.default_rng(seed)
    now = pd.Timestamp("2026-05-10 06:30:00")
    store.insert_df(con, "out.runs", pd.DataFrame({
        "run_id": [RUN, OLD_RUN, "2026-05-11-deadbeef", "2026-05-10-00000000"],
        "as_of": pd.to_datetime([AS_OF, AS_OF - dt.timedelta(days=1), AS_OF + dt.timedelta(1),
                                 AS_OF]),
        "started_at": [now, now - pd.Timedelta(days=1), now + pd.Timedelta(days=1),
                       now - pd.Timedelta(hours=2)],
        "finished_at": [now + pd.Timedelta(minutes=3), now - pd.Timedelta(days=1), pd.NaT,
                        now - pd.Timedelta(hours=1)],
        "status": ["published", "published", "failed", "superseded"],
        "code_version": ["0.1.0+abc123", "0.1.0+abc122", "0.1.0+abc124", "0.1.0+abc123"],
    }))
    cleaned, nowcast, rt, growth, fc, drift = [], [], [], [], [], []
    for i, region in enumerate(REGIONS):
        for _j, signal in enumerate(SIGNALS):
            key = (region, signal)
            days = _days(AS_OF, 90)
            level = (200.0 if signal == "cases" else 20.0) * (1 + i)
            mu = level * np.exp(0.01 * np.arange(90) * (1 if P_GROWING[key] > 0.5 else -1))
            rep = rng.poisson(mu).astype(float)
            rep[-10:] *= np.linspace(0.9, 0.3, 10)  # incomplete recent days
            base = {"run_id": RUN, "region": region, "signal": signal}
            cleaned.append(pd.DataFrame({**base, "ref_date": days, "value_reported": rep,
                                         "value_clean": rep, "flag": None}))
            nd = _days(AS_OF, 14)
            n = _quantile_rows(base, nd, mu[-14:], 0.1 * mu[-14:], "ref_date")
            n["reported"] = np.repeat(rep[-14:], len(LEVELS))
            nowcast.append(n)
            if key != (UNI, "admissions"):  # one series without Rt: its other panels remain
                rd = _days(AS_OF, 60)
                centre = 1.0 + 0.1 * np.sin(np.arange(60) / 9.0) + (P_GROWING[key] - 0.5) * 0.2
                r = _quantile_rows(base, rd, centre, np.full(60, 0.08), "ref_date")
                r["mean"] = np.repeat(centre, len(LEVELS))
                r["nowcast_dependent"] = r["ref_date"] > pd.Timestamp(AS_OF - dt.timedelta(7))
                rt.append(r)
            gd = _days(AS_OF - dt.timedelta(days=5), 3)  # latest growth date = AS_OF - 5
            d = DOUBLING[key]
            growth.append(pd.DataFrame({
                **base, "ref_date": gd, "growth_rate": np.log(2) / d,
                "doubling_days": [d * 2, d * 1.5, d],
                "p_growing": [0.5, 0.5, P_GROWING[key]], "rt_mean": [1.0, 1.0, 1.0 + 0.1 * i],
                "nowcast_dependent": [False, False, i == 1]}))
            fd = pd.date_range(pd.Timestamp(AS_OF) + pd.Timedelta(days=1), periods=28, freq="D")
            for m, model in enumerate(["baseline", "renewal"]):
                f = _quantile_rows({"run_id": RUN, "issued_on": pd.Timestamp(AS_OF),
                                    "model": model, "region": region, "signal": signal},
                                   fd, np.full(28, mu[-1] * (1 + 0.05 * m)),
                                   0.05 * mu[-1] * np.sqrt(np.arange(1, 29)), "target_date")
                f["horizon_days"] = np.tile(np.repeat(np.arange(1, 29), len(LEVELS)), 1)
                fc.append(f)
            weeks = pd.date_range(end=pd.Timestamp(AS_OF - dt.timedelta(days=6)), periods=6,
                                  freq="7D")
            delays = np.array([2.0, 2.2, 1.9, 2.1, 2.0, 2.4])
            if key == (NASTY, "admissions"):
                delays[-1] = 4.5  # +2.5 days over the earlier median (2.0): flagged
            if key == (PLAIN, "cases"):
                delays[-1] = 2.9  # +0.9 days: below the 1-day threshold, not flagged
            drift.append(pd.DataFrame({**base, "week_start": weeks, "mean_delay_days": delays}))
    store.insert_df(con, "core.cleaned", pd.concat(cleaned, ignore_index=True))
    store.insert_df(con, "out.nowcast", pd.concat(nowcast, ignore_index=True))
    store.insert_df(con, "out.rt", pd.concat(rt, ignore_index=True))
    store.insert_df(con, "out.growth", pd.concat(growth, ignore_index=True))
    store.insert_df(con, "out.forecasts", pd.concat(fc, ignore_index=True))
    store.insert_df(con, "out.delay_drift", pd.concat(drift, ignore_index=True))
    actions = pd.DataFrame({
        "run_id": RUN,
        "region": [NASTY, NASTY, NASTY, PLAIN, UNI, NASTY, PLAIN],
        "signal": ["cases", "cases", "cases", "cases", "admissions", "admissions", "cases"],
        "ref_date": pd.to_datetime([AS_OF - dt.timedelta(d) for d in (3, 9, 20, 5, 8, 2, 30)]),
        "action": ["spike_capped"] * 3 + ["negative_spread"] * 2 + ["gap_filled"] * 2,
        "delta": [-50.0, -20.0, -31.0, 12.0, 4.0, 3.0, 8.0], "detail": "synthetic"})
    store.insert_df(con, "core.clean_actions", actions)
    store.insert_df(con, "raw.feed_files", pd.DataFrame({
        "file_id": [1, 2, 3, 4], "source": ["district_cases"] * 4,
        "path": ["feeds/a.csv", "feeds/<b>.csv", "feeds/c.csv", "feeds/future.csv"],
        "sha256": ["a", "b", "c", "d"],
        "as_of": pd.to_datetime([AS_OF - dt.timedelta(2), AS_OF - dt.timedelta(1), AS_OF,
                                 AS_OF + dt.timedelta(3)]),
        "received_at": [now - pd.Timedelta(days=2), now - pd.Timedelta(days=1), now,
                        now + pd.Timedelta(days=3)],
        "rows_read": [10, 10, 10, 10], "rows_accepted": [10, 0, 7, 0],
        "rows_rejected": [0, 10, 3, 10],
        "status": ["ok", "failed", "partial", "failed"],
        "message": [None, "header <script>alert(1)</script> missing column 'total'",
                    "3 rows rejected: bad date", "from the future"]}))
    # settled scores for two models at horizons 7 and 14 (feeds the out.accuracy view)
    rows = []
    for model, w in (("baseline", 10.0), ("renewal", 8.0)):
        for h in (7, 14):
            for region in REGIONS:
                rows.append({"issued_on": pd.Timestamp(AS_OF - dt.timedelta(30)), "model": model,
                             "region": region, "signal": "cases",
                             "target_date": pd.Timestamp(AS_OF - dt.timedelta(30 - h)),
                             "horizon_days": h, "truth": 100.0,
                             "truth_as_of": pd.Timestamp(AS_OF), "wis": w * (1 + h / 7),
                             "abs_error": w, "covered_50": True, "covered_90": True,
                             "pit": 0.5, "bias": 0.1})
    store.insert_df(con, "out.scores", pd.DataFrame(rows))


def _section(text: str, sid: str) -> str:
    m = re.search(rf'id="{sid}".*?</(section|footer)>', text, flags=re.DOTALL)
    assert m, sid
    return m.group(0)


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    con = store.memory()
    populate(con)
    out = tmp_path_factory.mktemp("reports")
    index = write_report(con, out_dir=out)
    yield con, index, index.read_text(encoding="utf-8")
    con.close()


def test_newest_published_run_and_layout(built):
    _, index, _ = built
    assert index.name == "index.html" and index.exists()
    # failed (newer) and superseded runs are ignored; folder is <run_id>
    assert index.parent.name == RUN  # the run id starts with the as-of date: named once


def test_every_series_has_one_linked_png(built):
    _, index, text = built
    srcs = re.findall(r'<img src="([^"]+)"', text)
    assert len(srcs) == len(REGIONS) * len(SIGNALS) == len(set(srcs))
    for region in REGIONS:
        for signal in SIGNALS:
            rel = f"figures/{series_key(region, signal)}.png"
            assert rel in srcs
            png = index.parent / rel
            data = png.read_bytes()
            assert data[:8] == PNG_SIG
            w, h = struct.unpack(">II", data[16:24])  # IHDR width/height (PNG specification)
            assert (w, h) == (1100, 290)  # FIG_SIZE 11 x 2.9 in at 100 dpi
            assert len(data) < 200_000
    assert {p.name for p in (index.parent / "figures").iterdir()} == {
        Path(s).name for s in srcs}
    assert all(re.fullmatch(r"figures/[a-z0-9-]+--[a-z0-9-]+-[0-9a-f]{10}\.png", s)
               for s in srcs)


def test_database_text_is_escaped(built):
    _, _, text = built
    assert NASTY not in text
    assert "<&>" not in text and "<script>" not in text and "<b>.csv" not in text
    assert html.escape(NASTY, quote=True) in text
    assert html.escape(UNI) in text
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in text


def test_growth_ranking_and_trend_text(built):
    _, _, text = built
    sec = _section(text, "growth")
    rows = re.findall(r"<tr>(.*?)</tr>", sec.split("<tbody>")[1])
    assert len(rows) == 6
    # order by P(Rt>1) descending: 0.97, 0.70, 0.55, 0.40, 0.20, 0.05
    ps = [float(re.search(r'<span(?: class="[a-z]+")?>([0-9.]+)</span>', r).group(1)) for r in rows]
    assert ps == [0.97, 0.70, 0.55, 0.40, 0.20, 0.05]
    assert html.escape(NASTY, quote=True) in rows[0] and ">cases<" in rows[0]
    assert "doubling in 9.0 days" in rows[0]
    assert "halving in 40 days" in rows[3] and "halving in 12 days" in rows[5]
    assert "2026-05-05" in rows[0]  # the latest growth ref_date, not the earlier ones
    # nowcast-dependent marker only for the region flagged in its latest row (NASTY)
    assert sum('title="depends on nowcast"' in r for r in rows) == 2
    assert 'title="depends on nowcast"' in rows[0]
    assert '<td class="n">1.10</td>' in rows[0]  # rt_mean of region index 1


def test_quality_alerts(built):
    _, _, text = built
    sec = _section(text, "quality")
    # clean actions by action x signal: spike_capped cases = 3, totals over signals
    assert re.search(r"spike_capped</td><td class=\"n\">0</td><td class=\"n\">3</td>"
                     r"<td class=\"n\">3</td>", sec)
    assert re.search(r"negative_spread</td><td class=\"n\">1</td><td class=\"n\">1</td>"
                     r"<td class=\"n\">2</td>", sec)
    # most affected region first: NASTY with 4 actions
    most = sec.split("Regions with the most repairs")[1]
    assert most.index(html.escape(NASTY, quote=True)) < most.index(PLAIN)
    assert '<td class="n">4</td>' in most
    # failed/partial files up to as_of only (the future one is excluded, the ok one too)
    assert "feeds/&lt;b&gt;.csv" in sec and "feeds/c.csv" in sec
    assert "future.csv" not in sec and "feeds/a.csv" not in sec
    # delay drift: only NASTY admissions (+2.5 d); PLAIN cases (+0.9 d) stays below threshold
    drift = sec.split("Reporting delay drift")[1]
    assert "+2.5" in drift and "4.5" in drift
    assert drift.count("<tr>") == 2  # header + one flagged series
    assert PLAIN not in drift


def test_accuracy_and_cautions(built):
    _, _, text = built
    acc = _section(text, "accuracy")
    assert "mean_wis" in acc and "rel_wis" in acc and "no settled forecasts yet" not in acc
    # renewal WIS is 0.8 x baseline on every common forecast → rel_wis 0.80 (geometric mean)
    assert re.search(r"renewal</td>.*?<td class=\"n\">7</td>.*?0\.80", acc, flags=re.DOTALL)
    foot = _section(text, "cautions").lower()
    for phrase in ("model output", "uncertain", "too narrow", "epidemiological judgement",
                   "local guidance"):
        assert phrase in foot


def test_no_published_run_raises(tmp_path):
    con = store.memory()
    with pytest.raises(UserError, match="no published run"):
        write_report(con, out_dir=tmp_path)
    con.close()


def test_unknown_as_of_raises(built, tmp_path):
    con, _, _ = built
    with pytest.raises(UserError, match="2026-01-01"):
        write_report(con, as_of=dt.date(2026, 1, 1), out_dir=tmp_path)


def test_run_without_outputs_reports_no_data(built, tmp_path):
    con, _, _ = built
    index = write_report(con, as_of=AS_OF - dt.timedelta(days=1), out_dir=tmp_path)
    assert index.parent.name == OLD_RUN
    text = index.read_text(encoding="utf-8")
    assert "no growth estimates in this run" in text
    assert "no data for any region" in text
    assert "<img" not in text


def test_empty_accuracy_says_no_settled_forecasts(tmp_path):
    con = store.memory()
    store.insert_df(con, "out.runs", pd.DataFrame({
        "run_id": ["r1"], "as_of": [pd.Timestamp(AS_OF)], "started_at": [pd.Timestamp(AS_OF)],
        "finished_at": [pd.Timestamp(AS_OF)], "status": ["published"], "code_version": ["x"]}))
    text = write_report(con, out_dir=tmp_path).read_text(encoding="utf-8")
    assert "no settled forecasts yet" in text
    con.close()


def test_read_only_file_and_max_regions(tmp_path):
    path = tmp_path / "tw.duckdb"
    con = store.connect(path)
    populate(con)
    con.close()
    ro = store.connect(path, read_only=True)
    index = write_report(ro, as_of=AS_OF, out_dir=tmp_path / "rep", max_regions=1)
    ro.close()
    text = index.read_text(encoding="utf-8")
    pngs = sorted(p.name for p in (index.parent / "figures").glob("*.png"))
    # only the top region by growth (NASTY, P=0.97) gets figures; all regions stay in the table
    assert pngs == sorted(f"{series_key(NASTY, s)}.png" for s in SIGNALS)
    assert "2 more region(s)" in text
    growth = _section(text, "growth")
    assert all(html.escape(r, quote=True) in growth for r in REGIONS)


def test_bands_use_nearest_levels_and_trend_wording():
    df = pd.DataFrame({"d": np.repeat(pd.to_datetime(["2026-01-01", "2026-01-02"]), 5),
                       "q_level": np.tile([0.1, 0.3, 0.5, 0.7, 0.9], 2),
                       "value": [1.0, 3.0, 5.0, 7.0, 9.0, 2.0, 4.0, 6.0, 8.0, 10.0]})
    b = _bands(df, "d")
    np.testing.assert_allclose(b["median"], [5.0, 6.0])
    np.testing.assert_allclose(b["b50"], [[3.0, 4.0], [7.0, 8.0]])  # 0.3/0.7 nearest 0.25/0.75
    np.testing.assert_allclose(b["b90"], [[1.0, 2.0], [9.0, 10.0]])  # 0.1/0.9 nearest 0.05/0.95
    only_median = _bands(df[df["q_level"] == 0.5], "d")
    assert only_median["b50"] is None and only_median["b90"] is None
    assert _trend_text(-7.25) == "halving in 7.2 days"
    assert _trend_text(14.0) == "doubling in 14 days"
    assert _trend_text(float("inf")) == "–" and _trend_text(None) == "–"
    assert _trend_text(1000.0) == "about flat"
