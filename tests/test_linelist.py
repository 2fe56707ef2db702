"""Line lists (``value_kind = "records"``): each record enters the vintages on its reported_on
date, re-exported lists are not double counted, and the reporting triangle they give recovers a
known delay distribution.

Every expected number is either worked out by hand from the rule in the issue ("the value of
(region, signal, ref_date) known on D is the number of records with reported_on <= D") or
computed independently with pandas from the records written.
"""

from __future__ import annotations

import datetime as dt
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from tallywave.pipeline import store
from tallywave.pipeline.ingest import ingest_spec
from tallywave.pipeline.vintages import observations_as_of

D = dt.date


def day(n: int) -> dt.date:
    """2026-03-n."""
    return D(2026, 3, n)


def spec(folder: Path, *, record_id: bool, as_of: bool = True, extra: str = "") -> Path:
    """A line-list spec over ``folder/list/*.csv`` (signal from a column)."""
    cols = 'region = "site", ref_date = "onset", reported_on = "reported"'
    if record_id:
        cols += ', record_id = "id"'
    p = folder / "feeds.toml"
    p.write_text(textwrap.dedent(f"""\
        [source.lab]
        path = "list/*.csv"
        format = "csv"
        signal_column = "kind"
        value_kind = "records"
        columns = {{ {cols} }}
        """) + ('as_of = { from = "filename", pattern = "%Y-%m-%d" }\n' if as_of else "")
        + extra)
    (folder / "list").mkdir(exist_ok=True)
    return p


def write_list(folder: Path, as_of: dt.date, rows: list[tuple]) -> None:
    """One export: rows (id, site, onset day, reported day, kind)."""
    lines = ["id,site,onset,reported,kind"] + [
        f"{i},{s},{day(o)},{day(r)},{k}" for i, s, o, r, k in rows]
    (folder / "list" / f"export_{as_of}.csv").write_text("\n".join(lines) + "\n")


def known(con, as_of: dt.date) -> dict[tuple[str, str, int], float]:
    """{(region, signal, ref day): value} known on as_of."""
    df = observations_as_of(con, as_of)
    return {(r, s, d.day): v for r, s, d, v in
            zip(df["region"], df["signal"], pd.to_datetime(df["ref_date"]).dt.date, df["value"],
                strict=True)}


def simulated_list(rng: np.random.Generator, pmf: np.ndarray,
                   levels: dict[str, np.ndarray]) -> pd.DataFrame:
    """One record per simulated event from 2026-01-01: Poisson counts per day at
    ``levels[site]``, each reported after a delay drawn from ``pmf`` (multinomial delays).
    Columns: site, t, rep (day numbers), onset, reported (ISO dates)."""
    rows = []
    for site, level in levels.items():
        for t, c in enumerate(rng.poisson(level)):
            rows += [(site, t, t + int(d)) for d in rng.choice(len(pmf), size=c, p=pmf)]
    start = np.datetime64("2026-01-01")
    df = pd.DataFrame(rows, columns=["site", "t", "rep"])
    df["onset"] = (start + df["t"].to_numpy()).astype(str)
    df["reported"] = (start + df["rep"].to_numpy()).astype(str)
    return df


def write_simulated_list(folder: Path, records: pd.DataFrame, extra: str = "") -> Path:
    """``records`` as one line list ``folder/list/all.csv`` (no as_of) and its spec."""
    (folder / "list").mkdir()
    records[["site", "onset", "reported"]].to_csv(folder / "list" / "all.csv", index=False)
    path = folder / "feeds.toml"
    path.write_text(textwrap.dedent("""\
        [source.ll]
        path = "list/*.csv"
        format = "csv"
        signal = "cases"
        value_kind = "records"
        columns = { region = "site", ref_date = "onset", reported_on = "reported" }
        """) + extra)
    return path


def test_each_record_enters_on_its_reported_on_date(tmp_path: Path) -> None:
    """By hand: North/cases onset 1 reported on 2, 3, 3 and 6 → known 1 on day 2, 3 on day 3
    (two more), 4 from day 6; the file's as_of (day 6) bounds what it may contain."""
    p = spec(tmp_path, record_id=True)
    write_list(tmp_path, day(6), [
        ("a", "North", 1, 2, "cases"), ("b", "North", 1, 3, "cases"),
        ("c", "North", 1, 3, "cases"), ("d", "North", 1, 6, "cases"),
        ("e", "South", 2, 2, "cases"), ("f", "South", 2, 4, "admissions"),
    ])
    con = store.memory()
    s = ingest_spec(con, p)
    assert [f.status for f in s.files] == ["accepted"]
    assert known(con, day(1)) == {}
    assert known(con, day(2)) == {("North", "cases", 1): 1.0, ("South", "cases", 2): 1.0}
    assert known(con, day(3))[("North", "cases", 1)] == 3.0
    assert known(con, day(5)) == {("North", "cases", 1): 3.0, ("South", "cases", 2): 1.0,
                                  ("South", "admissions", 2): 1.0}
    assert known(con, day(6))[("North", "cases", 1)] == 4.0
    # one row per change: North/cases/1 changed on days 2, 3 and 6
    n = con.execute("SELECT count(*) FROM core.observations WHERE region = 'North'").fetchall()
    assert n == [(3,)]
    # raw.reports keeps one row per record: value 1, as_of = reported_on, the record id
    raw = con.execute("SELECT record_id, as_of, value, value_kind FROM raw.reports "
                      "WHERE record_id = 'd'").fetchall()
    assert raw == [("d", day(6), 1.0, "records")]
    assert con.execute("SELECT list_files FROM raw.feed_files").fetchall() == [("by_record_id",)]


def test_complete_reexports_without_record_id_do_not_double_count(tmp_path: Path) -> None:
    """Three daily exports of the whole list (no record id): each is the complete list as of its
    date, so the counts are those of the newest export (a record dropped from it is gone)."""
    p = spec(tmp_path, record_id=False)
    base = [("", "North", 1, 2, "cases"), ("", "North", 1, 3, "cases"),
            ("", "North", 2, 3, "cases")]
    write_list(tmp_path, day(3), base)
    write_list(tmp_path, day(4), base + [("", "North", 2, 4, "cases")])
    # export of day 5 drops one record of onset 1 (e.g. found to be a duplicate)
    write_list(tmp_path, day(5), base[1:] + [("", "North", 2, 4, "cases"),
                                             ("", "North", 3, 5, "cases")])
    con = store.memory()
    ingest_spec(con, p)
    assert known(con, day(5)) == {("North", "cases", 1): 1.0, ("North", "cases", 2): 2.0,
                                  ("North", "cases", 3): 1.0}
    # history by the newest list: onset 1 known 0 records on day 2 (record reported on 2 gone)
    assert known(con, day(2)) == {}
    assert known(con, day(4))[("North", "cases", 2)] == 2.0
    # the same exports ingested again add nothing
    before = con.execute("SELECT count(*) FROM core.observations").fetchall()
    ingest_spec(con, p)
    assert con.execute("SELECT count(*) FROM core.observations").fetchall() == before


def test_record_id_dedupe_later_version_wins(tmp_path: Path) -> None:
    """With a record id, files are merged: a record in two files counts once, the version of the
    later file wins (here record b moves from onset 1 to onset 2), a record absent from a later
    file keeps its last version."""
    p = spec(tmp_path, record_id=True)
    write_list(tmp_path, day(3), [("a", "North", 1, 2, "cases"), ("b", "North", 1, 3, "cases")])
    write_list(tmp_path, day(4), [("b", "North", 2, 3, "cases"), ("c", "North", 2, 4, "cases")])
    con = store.memory()
    ingest_spec(con, p)
    assert known(con, day(4)) == {("North", "cases", 1): 1.0, ("North", "cases", 2): 2.0}
    assert known(con, day(3)) == {("North", "cases", 1): 1.0, ("North", "cases", 2): 1.0}


def test_increments_add_up(tmp_path: Path) -> None:
    """``list_files = "increments"``: each file holds new records only, so they all count."""
    p = spec(tmp_path, record_id=False, extra='list_files = "increments"\n')
    write_list(tmp_path, day(3), [("", "North", 1, 2, "cases"), ("", "North", 1, 3, "cases")])
    write_list(tmp_path, day(4), [("", "North", 1, 4, "cases")])
    con = store.memory()
    ingest_spec(con, p)
    assert known(con, day(4)) == {("North", "cases", 1): 3.0}
    assert known(con, day(3)) == {("North", "cases", 1): 2.0}


def test_later_bad_file_loses_nothing(tmp_path: Path) -> None:
    """A later complete export that fails (no valid rows) or is header-only leaves the counts of
    the earlier export untouched."""
    p = spec(tmp_path, record_id=False)
    write_list(tmp_path, day(3), [("", "North", 1, 2, "cases"), ("", "North", 1, 3, "cases")])
    con = store.memory()
    ingest_spec(con, p)
    before = con.execute("SELECT * FROM core.observations ORDER BY ALL").fetchall()
    (tmp_path / "list" / f"export_{day(4)}.csv").write_text(
        "id,site,onset,reported,kind\n,North,2026-03-05,2026-03-01,cases\n")
    (tmp_path / "list" / f"export_{day(5)}.csv").write_text("id,site,onset,reported,kind\n")
    s = ingest_spec(con, p)
    assert sorted(f.status for f in s.files if f.status != "skipped") == ["empty", "failed"]
    assert con.execute("SELECT * FROM core.observations ORDER BY ALL").fetchall() == before


def test_line_list_triangle_recovers_known_delay_pmf(tmp_path: Path) -> None:
    """Simulate events with a known reporting-delay pmf (multinomial delays), write them as one
    line list without as_of, and read the reporting triangle back from the vintages: the
    share reported at each delay matches the pmf within 4 binomial standard errors.  (Known
    truth; the binomial standard error sqrt(p(1-p)/n) is textbook, from memory.)"""
    rng = np.random.default_rng(15)
    pmf = np.array([0.30, 0.25, 0.18, 0.12, 0.08, 0.04, 0.03])
    n_days = 40
    df = simulated_list(rng, pmf, {r: np.full(n_days, 60.0) for r in ("Alder", "Birch")})
    write_simulated_list(tmp_path, df)
    con = store.memory()
    ingest_spec(con, tmp_path / "feeds.toml")
    # cells[d] = (value known at ref+d) - (value known at ref+d-1), summed over complete rows
    tri = con.execute("""
        WITH grid AS (
            SELECT DISTINCT o.region, o.ref_date, d.d FROM core.observations o,
                   range(0, 7) d(d)
            WHERE o.ref_date <= DATE '2026-01-01' + INTERVAL 32 DAY),
        k AS (
            SELECT g.region, g.ref_date, g.d,
                   (SELECT coalesce(arg_max(value, as_of), 0) FROM core.observations o
                    WHERE o.region = g.region AND o.ref_date = g.ref_date
                      AND o.as_of <= g.ref_date + g.d::INTEGER) AS known
            FROM grid g)
        SELECT d, sum(known) AS known FROM k GROUP BY d ORDER BY d""").df()
    cum = tri["known"].to_numpy()
    share = np.diff(np.concatenate([[0.0], cum])) / cum[-1]
    se = np.sqrt(pmf * (1 - pmf) / cum[-1])
    assert np.all(np.abs(share - pmf) < 4 * se), (share, pmf)
    # and the final counts equal the number of records per (region, onset)
    final = observations_as_of(con, D(2026, 3, 1))
    want = df.groupby(["site", "onset"]).size()
    got = final.set_index(["region", final["ref_date"].astype(str)])["value"]
    assert int(got.sum()) == len(df)
    assert np.array_equal(got.sort_index().to_numpy(), want.sort_index().to_numpy())


@pytest.mark.parametrize("fmt", ["jsonl", "parquet"])
def test_line_list_in_jsonl_and_parquet(tmp_path: Path, fmt: str) -> None:
    """The same records as JSON lines or Parquet (dates as DATE) give the same counts."""
    recs = pd.DataFrame({"site": ["North", "North", "South"],
                         "onset": pd.to_datetime(["2026-03-01", "2026-03-01", "2026-03-02"]),
                         "reported": pd.to_datetime(["2026-03-02", "2026-03-04", "2026-03-02"])})
    (tmp_path / "list").mkdir()
    if fmt == "parquet":
        recs.to_parquet(tmp_path / "list" / "x.parquet", index=False)
    else:
        recs.assign(onset=recs["onset"].dt.strftime("%Y-%m-%d"),
                    reported=recs["reported"].dt.strftime("%Y-%m-%d")).to_json(
            tmp_path / "list" / "x.jsonl", orient="records", lines=True)
    (tmp_path / "feeds.toml").write_text(textwrap.dedent(f"""\
        [source.ll]
        path = "list/*.{fmt}"
        format = "{fmt}"
        signal = "cases"
        value_kind = "records"
        columns = {{ region = "site", ref_date = "onset", reported_on = "reported" }}
        """))
    con = store.memory()
    s = ingest_spec(con, tmp_path / "feeds.toml")
    assert [f.status for f in s.files] == ["accepted"]
    assert known(con, day(3)) == {("North", "cases", 1): 1.0, ("South", "cases", 2): 1.0}
    assert known(con, day(4)) == {("North", "cases", 1): 2.0, ("South", "cases", 2): 1.0}


def test_cli_line_list_with_a_hierarchy_runs_and_reports(prefect_server, tmp_path: Path) -> None:
    """``tallywave ingest`` + ``run`` (the Prefect flow) + ``report`` on a line list of four
    sites under two provinces and a nation (a two-level tree): the run publishes nowcasts, R_t
    and forecasts for every site and parent, the parents' forecasts are bottom-up from their
    sites, and the report draws every region.  The events are simulated (growing Poisson
    counts, known multinomial reporting delays), so the last nowcast's median must also sit
    closer to the eventual counts than the reported ones do."""
    from tallywave.pipeline.cli import main

    rng = np.random.default_rng(42)
    pmf = np.array([0.20, 0.25, 0.20, 0.12, 0.09, 0.06, 0.04, 0.02, 0.02])
    sites = {"Fenwick": "Upland", "Gorsey": "Upland", "Hollin": "Lowmere", "Ivel": "Lowmere"}
    n_days = 100
    df = simulated_list(rng, pmf, {site: 25.0 * (1 + k) * np.exp(0.012 * np.arange(n_days))
                                   for k, site in enumerate(sites)})
    as_of = D(2026, 1, 1) + dt.timedelta(days=n_days - 1)
    seen = df[df["rep"] <= n_days - 1]
    (tmp_path / "regions.csv").write_text("site,province\n" + "".join(
        f"{s},{p}\n" for s, p in sites.items()) + "Upland,Realm\nLowmere,Realm\n")
    write_simulated_list(tmp_path, seen, textwrap.dedent("""
        [regions]
        path = "regions.csv"
        columns = { region = "site", parent = "province" }
        """))
    (tmp_path / "s.toml").write_text(
        '[defaults]\nforecast_draws = 150\nnowcast_draws = 150\n'
        'models = ["baseline", "renewal"]\n')
    db = str(tmp_path / "ll.duckdb")
    assert main(["--db", db, "ingest", str(tmp_path / "feeds.toml")]) == 0
    assert main(["--db", db, "run", "--as-of", as_of.isoformat(), "--settings",
                 str(tmp_path / "s.toml"), "--no-report"]) == 0
    out = tmp_path / "reports"
    assert main(["--db", db, "report", "--as-of", as_of.isoformat(), "--out", str(out)]) == 0
    con = store.connect(Path(db), read_only=True)
    try:
        assert con.execute("SELECT status FROM out.runs").fetchall() == [("published",)]
        everyone = set(sites) | {"Upland", "Lowmere", "Realm"}
        for table in ("out.nowcast", "out.rt", "out.forecasts"):
            got = {r[0] for r in con.execute(f"SELECT DISTINCT region FROM {table}").fetchall()}
            assert got == everyone, table
        notes = con.execute("SELECT region, message FROM out.fits WHERE model = 'reconciled'"
                            ).fetchall()
        assert {r for r, _ in notes} == {"Upland", "Lowmere", "Realm"}
        assert all("bottom-up" in m and "renewal" in m for _, m in notes)
        # the nowcast of the last 5 days against the eventual counts of the simulated events
        nc = con.execute("SELECT region, ref_date, value FROM out.nowcast WHERE q_level = 0.5 "
                         "AND region IN ('Fenwick', 'Gorsey', 'Hollin', 'Ivel') AND "
                         "ref_date > ?::DATE - 5", [as_of]).df()
    finally:
        con.close()
    nc["ref_date"] = pd.to_datetime(nc["ref_date"]).dt.strftime("%Y-%m-%d")
    eventual = df.groupby(["site", "onset"]).size()
    reported = seen.groupby(["site", "onset"]).size()
    keys = list(zip(nc["region"], nc["ref_date"], strict=True))
    truth = np.array([eventual.get(k, 0) for k in keys], dtype=float)
    raw = np.array([reported.get(k, 0) for k in keys], dtype=float)
    assert np.abs(nc["value"].to_numpy() - truth).mean() < 0.5 * np.abs(raw - truth).mean()
    assert len(list(out.glob("*/figures/*.png"))) == len(everyone)
