"""Region hierarchies: ``[regions]`` with a parent column → core.regions (parent, level,
n_children, population) and parent series in core.observations that are the sums of their
leaves' series at every as_of; the whole pipeline then covers parents like any region.

Expected values are worked out by hand (sums of the districts' values below)."""

from __future__ import annotations

import datetime as dt
import json
import textwrap
from pathlib import Path

import pandas as pd
import pytest

from tallywave.pipeline import store
from tallywave.pipeline.errors import UserError
from tallywave.pipeline.ingest import ingest_spec
from tallywave.pipeline.vintages import observations_as_of

D = dt.date
SPEC = textwrap.dedent("""\
    [source.c]
    path = "feed/*.csv"
    format = "csv"
    signal = "cases"
    value_kind = "daily"
    as_of = { from = "filename", pattern = "%Y-%m-%d" }
    columns = { region = "region", ref_date = "date", value = "value" }
    """)
TREE = ("region,population,parent\nAsh,100,North\nBeech,50,North\nCedar,30,South\n"
        "North,,Realm\nSouth,999,Realm\n")


def setup(tmp_path: Path, tree: str | None = TREE) -> Path:
    """Two snapshots of three districts (and a row for the parent North itself)."""
    feed = tmp_path / "feed"
    feed.mkdir(exist_ok=True)
    (feed / "c_2026-01-02.csv").write_text(
        "region,date,value\nAsh,2026-01-01,3\nBeech,2026-01-01,4\nCedar,2026-01-01,5\n"
        "North,2026-01-01,1000\n")
    (feed / "c_2026-01-03.csv").write_text(
        "region,date,value\nAsh,2026-01-01,6\nAsh,2026-01-02,1\nCedar,2026-01-02,2\n")
    text = SPEC
    if tree is not None:
        (tmp_path / "regions.csv").write_text(tree)
        text += textwrap.dedent("""\
            [regions]
            path = "regions.csv"
            columns = { region = "region", population = "population", parent = "parent" }
            """)
    (tmp_path / "feeds.toml").write_text(text)
    return tmp_path / "feeds.toml"


def values(con, as_of: dt.date) -> dict[tuple[str, int], float]:
    df = observations_as_of(con, as_of)
    return {(r, d.day): v for r, d, v in zip(df["region"], pd.to_datetime(df["ref_date"]).dt.date,
                                             df["value"], strict=True)}


def test_parents_are_sums_of_leaves_at_every_as_of(tmp_path: Path) -> None:
    """By hand: on 01-02 North = Ash 3 + Beech 4 = 7 (its own row 1000 is not used), South =
    Cedar 5, Realm = 12; on 01-03 Ash's 01-01 is revised to 6 → North 10, Realm 15, and the
    new date 01-02: North 1, South 2, Realm 3."""
    con = store.memory()
    s = ingest_spec(con, setup(tmp_path))
    assert "3 parent(s) in 3 levels" in (s.regions or "")
    v2 = values(con, D(2026, 1, 2))
    assert {k: v for k, v in v2.items() if k[0] in ("North", "South", "Realm")} == {
        ("North", 1): 7.0, ("South", 1): 5.0, ("Realm", 1): 12.0}
    v3 = values(con, D(2026, 1, 3))
    assert {k: v for k, v in v3.items() if k[0] in ("North", "South", "Realm")} == {
        ("North", 1): 10.0, ("South", 1): 5.0, ("Realm", 1): 15.0,
        ("North", 2): 1.0, ("South", 2): 2.0, ("Realm", 2): 3.0}
    regions = con.execute("SELECT region, parent, level, n_children, population "
                          "FROM core.regions ORDER BY region").fetchall()
    # populations of parents: sums of their leaves (South's given 999 is replaced by 30)
    assert regions == [("Ash", "North", 2, 0, 100.0), ("Beech", "North", 2, 0, 50.0),
                       ("Cedar", "South", 2, 0, 30.0), ("North", "Realm", 1, 2, 150.0),
                       ("Realm", None, 0, 2, 180.0), ("South", "Realm", 1, 1, 30.0)]
    # the parent's own feed row is kept in raw.reports (raw is never edited)
    assert con.execute("SELECT value FROM raw.reports WHERE region = 'North'").fetchall() == [
        (1000.0,)]


def test_tree_change_rebuilds_parents(tmp_path: Path) -> None:
    """Ingest without a tree, then with one (parents appear), then move Beech to South (the
    aggregates follow) — core.observations stays a pure function of raw and the tree."""
    con = store.memory()
    p = setup(tmp_path, tree=None)
    ingest_spec(con, p)
    assert ("North", 1) in values(con, D(2026, 1, 3))  # North's own row while it is no parent
    assert values(con, D(2026, 1, 3))[("North", 1)] == 1000.0
    setup(tmp_path)
    ingest_spec(con, p.parent / "feeds.toml")
    assert values(con, D(2026, 1, 3))[("North", 1)] == 10.0
    (tmp_path / "regions.csv").write_text(TREE.replace("Beech,50,North", "Beech,50,South"))
    ingest_spec(con, p)
    v = values(con, D(2026, 1, 3))
    assert (v[("North", 1)], v[("South", 1)], v[("Realm", 1)]) == (6.0, 9.0, 15.0)
    # a fresh database ingesting the final state gives the same rows
    fresh = store.memory()
    ingest_spec(fresh, p)
    q = "SELECT region, signal, ref_date, as_of, value FROM core.observations ORDER BY ALL"
    assert con.execute(q).fetchall() == fresh.execute(q).fetchall()


def test_implicit_parent_and_tree_only_columns(tmp_path: Path) -> None:
    """A parent named only in the parent column is added; a [regions] table mapping only region
    and parent keeps earlier populations."""
    con = store.memory()
    p = setup(tmp_path, tree="region,population,parent\nAsh,100,Isle\nBeech,50,Isle\n")
    ingest_spec(con, p)
    assert con.execute("SELECT population, level, n_children FROM core.regions "
                       "WHERE region = 'Isle'").fetchall() == [(150.0, 0, 2)]
    (tmp_path / "regions.csv").write_text("region,parent\nAsh,Isle\nBeech,Isle\nCedar,Isle\n")
    p.write_text(p.read_text().replace(
        'columns = { region = "region", population = "population", parent = "parent" }',
        'columns = { region = "region", parent = "parent" }'))
    ingest_spec(con, p)
    got = dict(con.execute("SELECT region, population FROM core.regions").fetchall())
    assert got["Ash"] == 100.0 and pd.isna(got["Cedar"]) and pd.isna(got["Isle"])
    assert values(con, D(2026, 1, 3))[("Isle", 1)] == 6.0 + 4.0 + 5.0


def test_cycle_refused_and_nothing_changed(tmp_path: Path) -> None:
    """A cycle in the tree is refused with one line naming the spec and the loop."""
    con = store.memory()
    p = setup(tmp_path)
    ingest_spec(con, p)
    before = con.execute("SELECT * FROM core.regions ORDER BY ALL").fetchall()
    (tmp_path / "regions.csv").write_text(TREE + "Realm,,Ash\n")
    with pytest.raises(UserError, match="cycle") as info:
        ingest_spec(con, p)
    assert "\n" not in str(info.value) and str(p) in str(info.value)
    assert con.execute("SELECT * FROM core.regions ORDER BY ALL").fetchall() == before


@pytest.mark.slow
def test_pipeline_covers_parents_like_any_region(tmp_path: Path) -> None:
    """One run on a simulated scenario under a two-level tree: every output table has rows for
    the parents, and a parent's nowcast median is close to the sum of its districts' medians
    (the eventual counts add up; 15 % is a loose bound for a sum of medians vs a median of a
    sum)."""
    from benchmarks.hierarchy import hierarchy_scenario, leaves_of
    from tallywave.pipeline.run import execute_run
    from tallywave.pipeline.settings import load_settings

    tree = hierarchy_scenario(tmp_path, n_regions=4, seed=7, n_days=110)
    con = store.memory()
    ingest_spec(con, tmp_path / "feeds.toml")
    last = dt.date.fromisoformat(json.loads(
        (tmp_path / "truth" / "scenario.json").read_text())["end"])
    (tmp_path / "s.toml").write_text('[defaults]\nmodels = ["baseline", "renewal"]\n')
    run = execute_run(con, last, load_settings(tmp_path / "s.toml"), score_after=False)
    rid = run["run_id"]
    parents = {"Upper", "Lower", "Realm"}
    for table in ("out.nowcast", "out.rt", "out.forecasts", "core.cleaned"):
        got = {r[0] for r in con.execute(f"SELECT DISTINCT region FROM {table} WHERE run_id = ?",
                                         [rid]).fetchall()}
        assert parents <= got, table
    nc = con.execute("SELECT region, ref_date, value FROM out.nowcast WHERE run_id = ? AND "
                     "signal = 'cases' AND q_level = 0.5", [rid]).df()
    wide = nc.pivot(index="ref_date", columns="region", values="value")
    for parent, kids in leaves_of(tree).items():
        total = wide[kids].sum(axis=1)
        bad = (wide[parent] - total).abs() > 0.15 * total.abs() + 5
        assert not bad.any(), (parent, wide.loc[bad, [parent]].assign(kids=total[bad]))
