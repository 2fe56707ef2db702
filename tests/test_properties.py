"""Property tests (hypothesis): random valid feeds round-trip exactly through ingest and vintages;
cleaning preserves every series' total, never goes negative and logs every change."""

from __future__ import annotations

import csv
import datetime as dt
import json
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from tallywave.models.artefacts import ReportingRepair, repair_series
from tallywave.pipeline import store
from tallywave.pipeline.ingest import ingest_spec
from tallywave.pipeline.vintages import observations_as_of

FEED_EXAMPLES = 40
CLEAN_EXAMPLES = 60
PROPS = settings(max_examples=FEED_EXAMPLES, deadline=None,
                 suppress_health_check=[HealthCheck.too_slow])

# Names with what breaks naive CSV / SQL handling: quotes, commas, semicolons, backslashes,
# accents, other scripts, 4-byte UTF-8; inner spaces only (ingest trims names, as documented).
# An apostrophe never opens or closes a name: DuckDB's CSV sniffer may then take ' for the
# quote character (see test_csv_apostrophes_at_name_edges_kept_verbatim).
_ALPHABET = list("abcxyzAQZ09 -_.,;:'\"\\()/&éèüßøłñçÅ北京δλЖя😀")
NAMES = st.text(alphabet=_ALPHABET, min_size=1, max_size=24).filter(
    lambda s: s == s.strip() and s != "" and s[0] != "'" and s[-1] != "'")
DATES = st.dates(min_value=dt.date(1990, 1, 1), max_value=dt.date(2030, 12, 31))
COUNTS = st.integers(min_value=0, max_value=10**9)  # ingest refuses values above 1e9
AS_OF = dt.date(2031, 1, 1)  # after every generated ref_date


def _spec(sources: str) -> str:
    return "\n".join(line.strip() for line in sources.strip().splitlines()) + "\n"


def _ingest(root: Path, spec_text: str):
    (root / "feeds.toml").write_text(spec_text, encoding="utf-8")
    con = store.memory()
    summary = ingest_spec(con, root / "feeds.toml")
    return con, summary


def _observed(con, as_of: dt.date) -> dict[tuple[str, str, dt.date], float]:
    df = observations_as_of(con, as_of)
    dates = pd.to_datetime(df["ref_date"]).dt.date
    return {(r, s, d): v for r, s, d, v in zip(df["region"], df["signal"], dates, df["value"],
                                                strict=True)}


@PROPS
@given(
    daily=st.dictionaries(st.tuples(NAMES, DATES), COUNTS, min_size=1, max_size=25),
    jsonl=st.dictionaries(st.tuples(NAMES, NAMES.filter(lambda s: s != "cases"), DATES), COUNTS,
                          min_size=1, max_size=25),
    order=st.permutations(["district", "date", "total"]),
)
def test_daily_csv_and_jsonl_round_trip_exactly(daily, jsonl, order) -> None:
    """Every generated (region, signal, ref_date) value comes back from observations_as_of."""
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        (root / "csv").mkdir()
        (root / "jsonl").mkdir()
        with open(root / "csv" / f"daily_{AS_OF}.csv", "w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh)  # standard quoting: fields with , " or newlines are quoted
            w.writerow(order)
            for (region, day), value in daily.items():
                row = {"district": region, "date": day.isoformat(), "total": value}
                w.writerow([row[c] for c in order])
        with open(root / "jsonl" / "d.jsonl", "w", encoding="utf-8") as fh:
            for (region, signal, day), value in jsonl.items():
                fh.write(json.dumps({"place": region, "what": signal, "day": day.isoformat(),
                                     "n": value, "known": AS_OF.isoformat()},
                                    ensure_ascii=False) + "\n")
        con, summary = _ingest(root, _spec("""
            [source.table]
            path = "csv/*.csv"
            format = "csv"
            signal = "cases"
            value_kind = "daily"
            as_of = { from = "filename", pattern = "%Y-%m-%d" }
            columns = { region = "district", ref_date = "date", value = "total" }
            [source.lines]
            path = "jsonl/*.jsonl"
            format = "jsonl"
            signal_column = "what"
            value_kind = "daily"
            as_of = { from = "column", column = "known" }
            columns = { region = "place", ref_date = "day", value = "n" }
        """))
        assert [f.status for f in summary.files] == ["accepted", "accepted"], [
            f.message for f in summary.files]
        assert con.execute("SELECT count(*) FROM raw.rejected_rows").fetchall()[0][0] == 0
        want = {(r, "cases", d): float(v) for (r, d), v in daily.items()}
        want.update({(r, s, d): float(v) for (r, s, d), v in jsonl.items()})
        assert _observed(con, AS_OF) == want
        assert _observed(con, AS_OF - dt.timedelta(days=1)) == {}  # nothing known before as_of
        con.close()


@st.composite
def cumulative_feeds(draw) -> dict:
    """Daily counts of a few regions over consecutive days, published as two cumulative
    snapshots: the first from day 0 to m-1, the second (window-limited) from day k to n-1."""
    regions = draw(st.lists(NAMES, min_size=1, max_size=3, unique=True))
    n = draw(st.integers(min_value=1, max_value=30))
    daily = draw(hnp.arrays(np.int64, (len(regions), n),
                            elements=st.integers(min_value=0, max_value=10**6)))
    m = draw(st.integers(min_value=1, max_value=n))
    k = draw(st.integers(min_value=0, max_value=m - 1))  # the windows overlap on day k at least
    start = draw(st.dates(min_value=dt.date(2000, 1, 1), max_value=dt.date(2029, 1, 1)))
    lag1 = draw(st.integers(min_value=0, max_value=5))
    lag2 = draw(st.integers(min_value=1, max_value=5))
    as_of1 = start + dt.timedelta(days=m - 1 + lag1)
    as_of2 = max(as_of1 + dt.timedelta(days=lag2), start + dt.timedelta(days=n - 1))
    return {"regions": regions, "daily": daily, "m": m, "k": k, "start": start,
            "as_of1": as_of1, "as_of2": as_of2}


@PROPS
@given(feed=cumulative_feeds())
def test_cumulative_feed_differenced_equals_daily_values(feed) -> None:
    """Non-decreasing running totals, differenced per snapshot, give back the daily counts."""
    regions, daily, start = feed["regions"], feed["daily"], feed["start"]
    totals = np.cumsum(daily, axis=1)
    assert np.all(np.diff(totals, axis=1) >= 0)
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        (root / "cum").mkdir()
        spans = ((feed["as_of1"], 0, feed["m"]), (feed["as_of2"], feed["k"], daily.shape[1]))
        for as_of, lo, hi in spans:
            with open(root / "cum" / f"c_{as_of}.csv", "w", newline="", encoding="utf-8") as fh:
                w = csv.writer(fh)
                w.writerow(["district", "date", "total"])
                for i, region in enumerate(regions):
                    for t in range(lo, hi):
                        w.writerow([region, (start + dt.timedelta(days=t)).isoformat(),
                                    int(totals[i, t])])
        con, summary = _ingest(root, _spec("""
            [source.running]
            path = "cum/*.csv"
            format = "csv"
            signal = "cases"
            value_kind = "cumulative"
            as_of = { from = "filename", pattern = "%Y-%m-%d" }
            columns = { region = "district", ref_date = "date", value = "total" }
        """))
        # a second snapshot with the very same bytes is skipped (it adds no information here)
        assert [f.status for f in summary.files] in (["accepted"] * 2, ["accepted", "skipped"]), [
            f.message for f in summary.files]

        def expect(upto: int) -> dict:
            return {(r, "cases", start + dt.timedelta(days=t)): float(daily[i, t])
                    for i, r in enumerate(regions) for t in range(upto)}

        assert _observed(con, feed["as_of1"]) == expect(feed["m"])
        assert _observed(con, feed["as_of2"]) == expect(daily.shape[1])
        con.close()


def _write_daily(path: Path, rows: dict[tuple[str, dt.date], int]) -> bytes:
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["district", "date", "n"])
        for (region, day), value in rows.items():
            w.writerow([region, day.isoformat(), value])
    return path.read_bytes()


_SNAPSHOT_SPEC = _spec("""
    [source.snap]
    path = "snap/*.csv"
    format = "csv"
    signal = "cases"
    value_kind = "daily"
    as_of = { from = "filename", pattern = "%Y-%m-%d" }
    columns = { region = "district", ref_date = "date", value = "n" }
""")


@st.composite
def snapshot_sequences(draw) -> tuple[list[dt.date], list[dict]]:
    """2-4 daily snapshots over a few keys with small values, so revisions and reverts abound."""
    regions = draw(st.lists(NAMES, min_size=1, max_size=2, unique=True))
    first = dt.date(2026, 3, 2)
    keys = [(r, first - dt.timedelta(days=d)) for r in regions for d in range(3)]
    n = draw(st.integers(2, 4))
    gaps = draw(st.lists(st.integers(1, 3), min_size=n - 1, max_size=n - 1))
    days = [first + dt.timedelta(days=sum(gaps[:j])) for j in range(n)]
    snaps = [draw(st.dictionaries(st.sampled_from(keys), st.integers(0, 3), min_size=1))
             for _ in range(n)]
    return days, snaps


@PROPS
@given(seq=snapshot_sequences())
def test_snapshot_sequence_replays_every_as_of(seq) -> None:
    """observations_as_of(D) = for every key, its value in the latest snapshot on or before D.

    Byte-identical repeats are left out here (see the revert test below).
    """
    days, snaps = seq
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        (root / "snap").mkdir()
        contents = [_write_daily(root / "snap" / f"s_{d}.csv", rows)
                    for d, rows in zip(days, snaps, strict=True)]
        if len(set(contents)) < len(contents):
            return  # identical files: covered by the revert test
        con, summary = _ingest(root, _SNAPSHOT_SPEC)
        assert {f.status for f in summary.files} == {"accepted"}
        known: dict[tuple[str, dt.date], int] = {}
        for day, rows in zip(days, snaps, strict=True):
            known.update(rows)
            want = {(r, "cases", d): float(v) for (r, d), v in known.items()}
            assert _observed(con, day) == want, day
        con.close()


def test_revert_to_earlier_snapshot_is_a_new_vintage(tmp_path) -> None:
    """Snapshots 5 → 7 → 5: as of the third day the value is 5 again."""
    (tmp_path / "snap").mkdir()
    key = ("Vell Osk", dt.date(2026, 3, 1))
    for day, value in (("2026-03-02", 5), ("2026-03-03", 7), ("2026-03-04", 5)):
        _write_daily(tmp_path / "snap" / f"s_{day}.csv", {key: value})
    con, _ = _ingest(tmp_path, _SNAPSHOT_SPEC)
    got = _observed(con, dt.date(2026, 3, 4))
    con.close()
    assert got == {("Vell Osk", "cases", key[1]): 5.0}


def test_csv_apostrophes_at_name_edges_kept_verbatim(tmp_path) -> None:
    """Standard CSV (RFC 4180 quotes with "): names 'Ardel and Brisk' stay two names."""
    (tmp_path / "snap").mkdir()
    day = dt.date(2026, 3, 1)
    _write_daily(tmp_path / "snap" / "s_2026-03-02.csv", {("'Ardel", day): 1, ("Brisk'", day): 2})
    con, _ = _ingest(tmp_path, _SNAPSHOT_SPEC)
    got = _observed(con, dt.date(2026, 3, 2))
    con.close()
    assert got == {("'Ardel", "cases", day): 1.0, ("Brisk'", "cases", day): 2.0}


# --------------------------------------------------------------------------------------------
# cleaning invariants
# --------------------------------------------------------------------------------------------
_NAN = float("nan")
ENTRIES = st.one_of(
    st.integers(0, 60), st.integers(0, 60), st.integers(0, 400),  # ordinary days
    st.just(0),  # zero reports (gaps, zero runs)
    st.just(_NAN),  # days missing from the feed
    st.integers(-500, -1),  # negative corrections
    st.integers(1_000, 200_000),  # backlog dumps
).map(float)


@st.composite
def count_matrices(draw) -> tuple[np.ndarray, np.ndarray]:
    n = draw(st.integers(1, 4))
    t = draw(st.integers(1, 90))
    y = draw(hnp.arrays(np.float64, (n, t), elements=ENTRIES))
    start = draw(st.dates(min_value=dt.date(2020, 1, 1), max_value=dt.date(2030, 1, 1)))
    dates = np.datetime64(start, "D") + np.arange(t)
    return y, dates


@settings(max_examples=CLEAN_EXAMPLES, deadline=None)
@given(data=count_matrices(), restore=st.booleans())
def test_repair_preserves_totals_and_never_goes_negative(data, restore) -> None:
    """Totals kept (NaN as 0) to rtol 1e-9, clean >= 0, and the audit trail explains every day.

    The documented exception: a series whose reported total is negative is set to 0 everywhere
    and flagged ``negative_total``.
    """
    y, dates = data
    res = ReportingRepair(negative_restore_level=restore).fit(y, dates).result()
    reported = np.nan_to_num(y, nan=0.0)
    total = reported.sum(axis=1)
    scale = np.abs(reported).sum(axis=1)  # float rounding of the moves is relative to this
    assert res.clean.shape == y.shape and np.all(np.isfinite(res.clean))
    np.testing.assert_array_equal(res.reported, reported)
    neg = total < 0
    for i in np.flatnonzero(neg):
        assert np.all(res.clean[i] == 0)
        assert any("negative_total" in f.split("|") for f in res.flag[i])
    ok = ~neg
    np.testing.assert_allclose(res.clean[ok].sum(axis=1), total[ok], rtol=1e-9,
                               atol=1e-9 * float(scale[ok].max(initial=0.0)))
    assert np.all(res.clean[ok] >= 0)
    # every change is logged: per series and day, the logged deltas add up to clean - reported
    moved = np.zeros_like(reported)
    a = res.actions
    if len(a):
        np.add.at(moved, (a["series"].to_numpy(int), a["t"].to_numpy(int)),
                  a["delta"].to_numpy(float))
    logged = ~neg  # a negative_total series is zeroed by one action per series
    np.testing.assert_allclose(moved[logged], (res.clean - reported)[logged], rtol=0,
                               atol=1e-7 * max(1.0, float(scale.max())))


@settings(max_examples=30, deadline=None)
@given(data=count_matrices())
def test_repair_treats_series_independently(data) -> None:
    """Repairing a stack of series equals repairing each alone (vectorisation mixes nothing)."""
    y, dates = data
    together = repair_series(y, dates).clean
    for i in range(y.shape[0]):
        alone = repair_series(y[i:i + 1], dates).clean
        np.testing.assert_allclose(together[i], alone[0], rtol=1e-12, atol=1e-9)


# ---- line lists and region hierarchies (issue 15) ----

LL_START = dt.date(2026, 1, 1)
LL_PROPS = settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow])
RECORDS = st.lists(st.tuples(st.sampled_from(["Ash", "Elm", "Oak"]),  # region
                             st.integers(0, 9),  # ref day
                             st.integers(0, 5),  # reporting delay (days)
                             st.integers(0, 3)),  # version day: export from which it is known
                   min_size=1, max_size=40)


def _ll_write(root: Path, records: list, record_id: bool, drop: set[int]) -> dict[int, list]:
    """Exports on days 10..13: export k holds every record with version day <= k - 10 (a
    complete list), minus the ``drop`` set in the last export.  With ``record_id`` a record's
    later version moves its ref date one day earlier.  Returns {export day: rows}."""
    (root / "list").mkdir()
    out: dict[int, list] = {}
    for k in range(4):
        rows = []
        for i, (reg, ref, delay, ver) in enumerate(records):
            if ver > k or (k == 3 and i in drop and not record_id):
                continue
            moved = record_id and ver == 0 and k >= 2 and ref > 0 and i % 2 == 0
            rows.append((f"r{i}", reg, ref - 1 if moved else ref, ref + delay))
        out[10 + k] = rows
        text = "id,site,onset,reported\n" + "".join(
            f"{i},{reg},{LL_START + dt.timedelta(r)},{LL_START + dt.timedelta(p)}\n"
            for i, reg, r, p in rows)
        (root / "list" / f"x_{LL_START + dt.timedelta(10 + k)}.csv").write_text(text)
    return out


@LL_PROPS
@given(records=RECORDS, record_id=st.booleans(), drop=st.sets(st.integers(0, 39), max_size=5))
def test_line_list_vintages_equal_counts_of_reported_records(records, record_id, drop) -> None:
    """For every D, the value known on D of (region, ref_date) is the number of the effective
    records (the newest complete export; with record ids every record's newest version) with
    reported_on <= D, computed independently with pandas."""
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        exports = _ll_write(root, records, record_id, drop)
        cols = 'region = "site", ref_date = "onset", reported_on = "reported"'
        cols += ', record_id = "id"' if record_id else ""
        con, summary = _ingest(root, _spec(f"""
            [source.ll]
            path = "list/*.csv"
            format = "csv"
            signal = "cases"
            value_kind = "records"
            columns = {{ {cols} }}
        """))
        # identical exports are skipped (same bytes): the same list, nothing to add
        assert all(f.status in ("accepted", "empty", "skipped") for f in summary.files)
        if record_id:  # newest version of each record over all exports
            newest: dict[str, tuple] = {}
            for k in sorted(exports):
                for row in exports[k]:
                    newest[row[0]] = row
            eff = pd.DataFrame(list(newest.values()), columns=["id", "site", "ref", "rep"])
        else:
            eff = pd.DataFrame(exports[max(k for k in exports if exports[k])],
                               columns=["id", "site", "ref", "rep"])
        for d in range(16):
            want = eff[eff["rep"] <= d].groupby(["site", "ref"]).size()
            want_d = {(s, "cases", LL_START + dt.timedelta(int(r))): float(n)
                      for (s, r), n in want.items()}
            assert _observed(con, LL_START + dt.timedelta(d)) == want_d


@LL_PROPS
@given(values=st.dictionaries(st.tuples(st.sampled_from(["d1", "d2", "d3", "d4"]),
                                        st.integers(0, 6), st.integers(0, 3)),
                              st.integers(0, 50), min_size=1, max_size=40))
def test_parent_series_is_sum_of_children_at_every_as_of(values) -> None:
    """Random daily snapshots of four districts in two provinces under one nation: for every
    as_of, each parent's known value is the sum of its districts' known values."""
    tree = {"d1": "p1", "d2": "p1", "d3": "p2", "d4": "p2", "p1": "nation", "p2": "nation"}
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        (root / "feed").mkdir()
        by_snap: dict[int, list] = {}
        for (reg, ref, snap), v in values.items():
            by_snap.setdefault(snap, []).append((reg, ref, v))
        for snap, rows in by_snap.items():
            (root / "feed" / f"c_{LL_START + dt.timedelta(10 + snap)}.csv").write_text(
                "region,date,value\n" + "".join(
                    f"{r},{LL_START + dt.timedelta(d)},{v}\n" for r, d, v in rows))
        (root / "regions.csv").write_text("region,population,parent\n" + "".join(
            f"{r},100,{p}\n" for r, p in tree.items()))
        con, _ = _ingest(root, _spec("""
            [source.c]
            path = "feed/*.csv"
            format = "csv"
            signal = "cases"
            value_kind = "daily"
            as_of = { from = "filename", pattern = "%Y-%m-%d" }
            columns = { region = "region", ref_date = "date", value = "value" }
            [regions]
            path = "regions.csv"
            columns = { region = "region", population = "population", parent = "parent" }
        """))
        leaves = {"p1": ["d1", "d2"], "p2": ["d3", "d4"], "nation": ["d1", "d2", "d3", "d4"]}
        for d in range(10, 15):
            obs = _observed(con, LL_START + dt.timedelta(d))
            for parent, kids in leaves.items():
                for ref in range(7):
                    key = LL_START + dt.timedelta(ref)
                    kid_vals = [obs[(k, "cases", key)] for k in kids if (k, "cases", key) in obs]
                    assert obs.get((parent, "cases", key)) == (sum(kid_vals) if kid_vals
                                                               else None)
