"""Bottom-up reconciliation of parents' forecasts: the quantile rule against closed forms and
Monte Carlo, and the forecast stage on a small region hierarchy (parents published bottom-up,
labelled in out.fits, parents out of everything pooled, results independent of batching)."""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from benchmarks.forecast_eval import START, load_world, simulate
from tallywave.models.reconcile import bottom_up_quantiles
from tallywave.pipeline import store
from tallywave.pipeline.forecast import forecast
from tallywave.pipeline.hierarchy import aggregate_parents
from tallywave.pipeline.run import execute_run
from tallywave.pipeline.settings import Settings

LEVELS = np.array([0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975])


# ------------------------------------------------------------------ the quantile rule


@pytest.mark.parametrize("rho", [0.0, 0.3, 0.7, 1.0])
def test_normal_leaves_give_the_exact_quantiles_of_their_sum(rho: float) -> None:
    # closed form: a sum of N(m_i, s_i^2) with pairwise correlation rho is normal with variance
    # sum s_i^2 + rho sum_{i != j} s_i s_j (quantiles from scipy.stats.norm)
    m = np.array([40.0, 10.0, 250.0, 3.0])
    s = np.array([6.0, 2.5, 30.0, 1.0])
    leaf_q = stats.norm.ppf(LEVELS[None, :], m[:, None], s[:, None])
    var = (s ** 2).sum() + rho * (s.sum() ** 2 - (s ** 2).sum())
    exact = stats.norm.ppf(LEVELS, m.sum(), np.sqrt(var))
    np.testing.assert_allclose(bottom_up_quantiles(leaf_q, LEVELS, rho), exact, rtol=1e-12)


def test_rho_one_adds_quantiles_of_any_leaves_as_a_comonotone_sum() -> None:
    # comonotone sum X = sum_i F_i^-1(U) of skewed, discrete and continuous leaves: its
    # quantiles are the sums of theirs (Monte Carlo with one uniform shared by every leaf)
    dists = [stats.gamma(2.0, scale=15.0), stats.poisson(7.0), stats.nbinom(3, 0.05),
             stats.lognorm(0.8, scale=40.0)]
    leaf_q = np.stack([d.ppf(LEVELS) for d in dists])
    got = bottom_up_quantiles(leaf_q, LEVELS, 1.0)
    np.testing.assert_allclose(got, leaf_q.sum(axis=0), rtol=1e-12)
    u = np.random.default_rng(3).uniform(size=400_000)
    total = sum(d.ppf(u) for d in dists)
    np.testing.assert_allclose(got, np.quantile(total, LEVELS), rtol=0.02)


def test_independent_skewed_leaves_interval_widths_close_to_the_exact_sum() -> None:
    # independent gamma(k_i, theta) leaves sum to gamma(sum k_i, theta) (closed form,
    # scipy.stats.gamma).  The rule's 50 % and 90 % interval widths match the exact ones within
    # 5 % (measured 3 % and 2 %); its centre is the sum of the medians, which for right-skewed
    # independent leaves lies below the median of the sum (measured 6 % here): the price of a
    # parent median that is exactly the sum of its children's
    shapes = np.array([3.0, 5.0, 2.0, 8.0, 4.0])
    leaf_q = np.stack([stats.gamma(k, scale=10.0).ppf(LEVELS) for k in shapes])
    exact = stats.gamma(shapes.sum(), scale=10.0).ppf(LEVELS)
    got = bottom_up_quantiles(leaf_q, LEVELS, 0.0)
    for lo, hi in ((3, 5), (1, 7)):  # 25-75 % and 5-95 %
        assert got[hi] - got[lo] == pytest.approx(exact[hi] - exact[lo], rel=0.05)
    assert 0.9 * exact[4] < got[4] < exact[4]


def test_rule_keeps_median_order_and_bounds() -> None:
    rng = np.random.default_rng(7)
    leaf_q = np.sort(rng.gamma(2.0, 20.0, (6, 4, LEVELS.size)), axis=-1)  # 6 leaves, 4 days
    comon = leaf_q.sum(axis=0)
    for rho in (0.0, 0.5, 1.0):
        q = bottom_up_quantiles(leaf_q, LEVELS, rho)
        np.testing.assert_allclose(q[:, 4], leaf_q[:, :, 4].sum(axis=0), rtol=1e-12)
        assert np.all(np.diff(q, axis=-1) >= 0)
        lo, hi = comon[:, :4], comon[:, 5:]  # between the sum of medians and the comonotone sum
        assert np.all(q[:, :4] >= lo - 1e-9) and np.all(q[:, 5:] <= hi + 1e-9)
        assert np.all(q >= 0)
    with pytest.raises(ValueError, match="rho"):
        bottom_up_quantiles(leaf_q, LEVELS, 1.5)


# ------------------------------------------------------------------ the forecast stage

TREE = {"North": 3, "South": 3}  # the first 3 districts under North, the other 3 under South
DAYS = (143, 150)


def _hierarchy_world(with_parents: bool):
    """Six simulated districts (forecast_eval's default outbreak), optionally under two
    provinces and one top region whose series the vintages step derives."""
    sim = simulate("default", 5, 6)
    con = store.memory()
    load_world(con, sim)
    if with_parents:
        names = list(sim["names"])
        parent = {n: ("North" if i < 3 else "South") for i, n in enumerate(names)}
        con.execute("UPDATE core.regions SET level = 2, n_children = 0")
        for n, p in parent.items():
            con.execute("UPDATE core.regions SET parent = ? WHERE region = ?", [p, n])
        con.execute("INSERT INTO core.regions (region, population, parent, level, n_children) "
                    "VALUES ('North', NULL, 'Whole', 1, 3), ('South', NULL, 'Whole', 1, 3), "
                    "('Whole', NULL, NULL, 0, 2)")
        con.execute("CREATE OR REPLACE TEMP TABLE _affected AS "
                    "SELECT DISTINCT signal FROM core.observations")
        aggregate_parents(con)
        con.execute("DROP TABLE _affected")
    settings = Settings()
    settings.base.update({"forecast_draws": 100, "nowcast_draws": 100})
    runs = [execute_run(con, START + dt.timedelta(days=d), settings, score_after=False)["run_id"]
            for d in DAYS]
    return con, settings, runs, sim


@pytest.fixture(scope="module")
def tree_world():
    con, settings, runs, sim = _hierarchy_world(True)
    yield con, settings, runs, sim
    con.close()


def _wide(con, run_id: str) -> pd.DataFrame:
    return con.execute("SELECT model, region, signal, target_date, q_level, value "
                       "FROM out.forecasts WHERE run_id = ? ORDER BY ALL", [run_id]).df()


def test_parents_are_published_bottom_up_from_their_leaves(tree_world) -> None:
    con, _, runs, sim = tree_world
    fc = _wide(con, runs[1])
    names = list(sim["names"])
    leaves = {"North": names[:3], "South": names[3:], "Whole": names}
    cube = fc.set_index(["model", "signal", "region", "target_date", "q_level"])["value"]
    cube = cube.sort_index()
    n_checked = 0
    for (model, signal), g in fc.groupby(["model", "signal"]):
        tab = g.pivot_table(index=["region", "target_date"], columns="q_level", values="value")
        for parent, kids in leaves.items():
            leaf_q = np.stack([tab.loc[k].to_numpy() for k in kids])
            want = bottom_up_quantiles(leaf_q, LEVELS, 0.5)
            np.testing.assert_allclose(tab.loc[parent].to_numpy(), want, rtol=1e-9, atol=1e-9,
                                       err_msg=f"{model}/{signal}/{parent}")
            # the parent's median is the sum of its leaves' medians
            med = cube.loc[(model, signal, parent)].xs(0.5, level="q_level")
            kid_med = sum(cube.loc[(model, signal, k)].xs(0.5, level="q_level") for k in kids)
            np.testing.assert_allclose(med.to_numpy(), kid_med.to_numpy(), rtol=1e-9)
            n_checked += 1
    assert n_checked == 5 * 3 * 3  # 5 models × 3 signals × 3 parents
    fits = con.execute("SELECT region, signal, params_json, converged, message FROM out.fits "
                       "WHERE run_id = ? AND model = 'reconciled' ORDER BY ALL", [runs[1]]).df()
    assert set(fits["region"]) == set(leaves) and len(fits) == 9
    p = json.loads(fits["params_json"].iloc[0])
    assert p["method"] == "bottom_up" and p["correlation"] == 0.5 and not p["own"]
    assert set(p["bottom_up"]) >= {"baseline", "renewal", "compartmental", "ensemble"}
    assert fits["converged"].all() and fits["message"].str.startswith("bottom-up from").all()


def _rerun_forecast(con, settings: Settings, run_id: str, as_of: dt.date) -> pd.DataFrame:
    """The forecast stage of a published run again (rolled back): its forecasts."""
    con.execute("BEGIN TRANSACTION")
    try:
        for t in ("out.forecasts", "out.scenarios", "out.ensemble_weights"):
            con.execute(f"DELETE FROM {t} WHERE run_id = ?", [run_id])
        con.execute("DELETE FROM out.fits WHERE run_id = ? AND model IN "
                    "('renewal', 'compartmental', 'reconciled')", [run_id])
        forecast(con, as_of, settings, run_id=run_id)
        return _wide(con, run_id)
    finally:
        con.execute("ROLLBACK")


def test_own_setting_and_batching(tree_world) -> None:
    con, settings, runs, _ = tree_world
    as_of = START + dt.timedelta(days=DAYS[1])
    ref = _wide(con, runs[1])
    # batch sizes 1 and 7 give the same numbers, parents included (everything pooled over the
    # regions is computed before batching, the reconciliation after it)
    for b in (1, 7):
        got = _rerun_forecast(con, Settings(base={**settings.base, "batch_regions": b}), runs[1],
                              as_of)
        np.testing.assert_allclose(got["value"], ref["value"], rtol=1e-9, atol=1e-9)
    # reconcile_parents = "own": leaves unchanged, parents keep their own fits (they differ)
    own = _rerun_forecast(con, Settings(base={**settings.base, "reconcile_parents": "own"}),
                          runs[1], as_of)
    leaf = ~ref["region"].isin(["North", "South", "Whole"])
    np.testing.assert_allclose(own.loc[leaf, "value"], ref.loc[leaf, "value"], rtol=1e-12)
    diff = (own.loc[~leaf, "value"] - ref.loc[~leaf, "value"]).abs()
    assert diff.max() > 1.0


def test_leaves_do_not_see_their_parents() -> None:
    # parents repeat their leaves' data: no pooled estimate of the forecast stage (pooled R_t
    # of small regions, drift, dispersion, ensemble weights) may count them, so the leaves'
    # forecasts are the same with and without the tree (the earlier stages pool leaves only)
    con, _, runs, _ = _hierarchy_world(False)
    flat = _wide(con, runs[1])
    con.close()
    con, _, runs, _ = _hierarchy_world(True)
    tree = _wide(con, runs[1])
    con.close()
    tree = tree[~tree["region"].isin(["North", "South", "Whole"])].reset_index(drop=True)
    assert len(tree) == len(flat)
    np.testing.assert_allclose(tree["value"], flat["value"], rtol=1e-9, atol=1e-9)


def test_weekly_signals_with_a_hierarchy_are_reconciled_by_week(tmp_path: Path) -> None:
    """A weekly feed with two provinces over six districts: every model's parent forecasts are
    published on the same week dates as the leaves', with the parent median exactly the sum of
    the leaves' medians, and one out.fits note per parent × signal."""
    from benchmarks.weekly_scenario import write_weekly_feed
    from tallywave.pipeline.ingest import ingest_spec

    world = write_weekly_feed(tmp_path, n_regions=6)
    regions = pd.read_csv(tmp_path / "regions.csv")
    regions["province"] = ["North"] * 3 + ["South"] * 3
    regions.to_csv(tmp_path / "regions.csv", index=False)
    world.spec.write_text(world.spec.read_text().replace(
        'population = "population" }', 'population = "population", parent = "province" }'))
    con = store.memory()
    ingest_spec(con, world.spec)
    rid = execute_run(con, world.as_of[-5], Settings(), score_after=False)["run_id"]
    gap = con.execute("""
        WITH f AS (SELECT f.*, r.parent FROM out.forecasts f JOIN core.regions r USING (region)
                   WHERE run_id = ? AND abs(q_level - 0.5) < 1e-9)
        SELECT count(*), max(abs(p.value - s.total)), count(DISTINCT p.model),
               min(dayofweek(p.target_date)), max(dayofweek(p.target_date))
        FROM f p JOIN (SELECT parent, model, signal, target_date, sum(value) AS total FROM f
                       WHERE parent IS NOT NULL GROUP BY ALL) s
          ON s.parent = p.region AND s.model = p.model AND s.signal = p.signal
         AND s.target_date = p.target_date""", [rid]).fetchall()[0]
    n, worst, n_models, dow_lo, dow_hi = gap
    assert n == 2 * 2 * n_models * 4 and n_models >= 3   # 2 parents × 2 signals × 4 weeks
    assert worst < 1e-9
    assert dow_lo == dow_hi                               # week dates: one weekday
    notes = con.execute("SELECT count(*) FROM out.fits WHERE run_id = ? AND model = 'reconciled'",
                        [rid]).fetchone()[0]
    assert notes == 4
