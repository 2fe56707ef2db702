"""Scoreboard-weighted ensemble: weights from past scores, no peeking, the combination itself."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest

from tallywave.models.ensemble import inverse_score_weights, quantile_ensemble
from tallywave.pipeline import store
from tallywave.pipeline.ensemble_weights import (
    horizon_bands,
    scoreboard_weights,
    weight_array,
)
from tallywave.pipeline.settings import Settings

Q = [0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975]
Z = np.array([-1.96, -1.645, -1.2816, -0.6745, 0.0, 0.6745, 1.2816, 1.645, 1.96])
D0 = dt.date(2026, 3, 2)
REGIONS = ["Orvane", "Tessaly"]


def test_inverse_score_weights_closed_form() -> None:
    # hand arithmetic: mean WIS 1 and 3 -> weights (1/1, 1/3) normalised = (0.75, 0.25)
    wis = np.column_stack([np.full(40, 1.0), np.full(40, 3.0)])
    w, n = inverse_score_weights(wis, min_forecasts=10)
    assert n == 40 and np.allclose(w, [0.75, 0.25])
    w2, _ = inverse_score_weights(wis, power=2.0)  # (1, 1/9) -> (0.9, 0.1)
    assert np.allclose(w2, [0.9, 0.1])
    assert np.allclose(inverse_score_weights(wis, power=0.0)[0], [0.5, 0.5])
    # too few common forecasts (rows with a missing score do not count): equal weights
    wis[5:, 1] = np.nan
    w3, n3 = inverse_score_weights(wis, min_forecasts=10)
    assert n3 == 5 and np.allclose(w3, [0.5, 0.5])
    with pytest.raises(ValueError):
        inverse_score_weights(np.ones(3))


def _truth(day: int, region: int) -> float:
    """Invented daily counts: a smooth wave, different per region."""
    return 60.0 + 40.0 * np.sin(day / 9.0 + region) + 5.0 * region


def _world(last_issue: int, revise_after: int | None = None):
    """A store with published runs issued on days 0..last_issue of a 'perfect' member (renewal:
    median = truth, narrow) and a poor one (compartmental: 40 % high, wide), and the truth as
    known on each day (optionally revised by a later vintage)."""
    con = store.memory()
    obs, runs, fc = [], [], []
    n_days = last_issue + 30
    for d in range(n_days):
        for r, name in enumerate(REGIONS):
            obs.append((name, "cases", D0 + dt.timedelta(days=d), D0 + dt.timedelta(days=d),
                        _truth(d, r)))
            if revise_after is not None and d + 20 <= n_days:
                # a later vintage, published after revise_after, doubles the value
                obs.append((name, "cases", D0 + dt.timedelta(days=d),
                            D0 + dt.timedelta(days=revise_after), 2.0 * _truth(d, r)))
    for d in range(last_issue + 1):
        run_id = f"run-{d}"
        runs.append((run_id, D0 + dt.timedelta(days=d), "published"))
        for r, name in enumerate(REGIONS):
            for h in range(1, 29):
                y = _truth(d + h, r)
                for q, z in zip(Q, Z, strict=True):
                    fc.append((run_id, D0 + dt.timedelta(days=d), "renewal", name, "cases",
                               D0 + dt.timedelta(days=d + h), h, q, y + 2.0 * z))
                    fc.append((run_id, D0 + dt.timedelta(days=d), "compartmental", name,
                               "cases", D0 + dt.timedelta(days=d + h), h, q,
                               1.4 * y + 15.0 * z))
    con.register("_o", pd.DataFrame(obs, columns=["region", "signal", "ref_date", "as_of",
                                                  "value"]))
    con.execute("INSERT INTO core.observations (region, signal, ref_date, as_of, value) "
                "SELECT * FROM _o")
    con.register("_r", pd.DataFrame(runs, columns=["run_id", "as_of", "status"]))
    con.execute("INSERT INTO out.runs (run_id, as_of, started_at, status) "
                "SELECT run_id, as_of, now(), status FROM _r")
    con.register("_f", pd.DataFrame(fc, columns=["run_id", "issued_on", "model", "region",
                                                 "signal", "target_date", "horizon_days",
                                                 "q_level", "value"]))
    con.execute("INSERT INTO out.forecasts SELECT * FROM _f")
    return con


def _settings() -> Settings:
    s = Settings()
    s.base.update({"ensemble_min_scores": 20, "ensemble_window_days": 60})
    return s


MEMBERS = {"cases": ["renewal", "compartmental"]}


def test_perfect_member_gets_most_of_the_weight() -> None:
    con = _world(last_issue=70)
    as_of = D0 + dt.timedelta(days=70)
    w = scoreboard_weights(con, as_of, _settings(), MEMBERS)
    assert list(w.columns) == ["signal", "horizon_from", "horizon_to", "model", "weight",
                               "mean_wis", "n_scores", "basis"]
    assert sorted(set(zip(w["horizon_from"], w["horizon_to"], strict=True))) == \
        horizon_bands(28, 7)
    good = w[w["model"] == "renewal"].set_index("horizon_from")
    bad = w[w["model"] == "compartmental"].set_index("horizon_from")
    assert (good["weight"] > 0.8).all(), w
    assert np.allclose(good["weight"] + bad["weight"], 1.0)
    # the weights are the inverse mean WIS of the common forecasts, exactly
    ratio = bad["mean_wis"] / good["mean_wis"]
    assert np.allclose(good["weight"], ratio / (1.0 + ratio))
    assert (good["n_scores"] >= 20).all() and good["basis"].str.startswith("inverse").all()
    # the weighted quantile mean then sits next to the perfect member
    arr = weight_array(w, "cases", MEMBERS["cases"], 28)
    assert arr.shape == (28, 2) and np.allclose(arr.sum(axis=1), 1.0)


def test_weights_on_a_date_ignore_every_later_fact() -> None:
    # a backfill must publish what would have been published then: weights as of D computed
    # with later runs and a later (revised) vintage in the store equal those computed without
    as_of = D0 + dt.timedelta(days=60)
    before = scoreboard_weights(_world(last_issue=60), as_of, _settings(), MEMBERS)
    con = _world(last_issue=80, revise_after=75)
    after = scoreboard_weights(con, as_of, _settings(), MEMBERS)
    pd.testing.assert_frame_equal(before, after)
    # ... while on a date that knows the revision the weights move
    later = scoreboard_weights(con, D0 + dt.timedelta(days=80), _settings(), MEMBERS)
    assert not np.allclose(later["weight"], before["weight"])


def test_too_few_scores_means_equal_weights_or_a_shorter_band() -> None:
    # 20 days of runs: with settle 14, only horizons up to 6 have settled forecasts
    con = _world(last_issue=20)
    w = scoreboard_weights(con, D0 + dt.timedelta(days=20), _settings(), MEMBERS)
    first = w[w["horizon_from"] == 1]
    assert first["basis"].str.startswith("inverse").all()
    rest = w[w["horizon_from"] > 1]
    assert rest["basis"].str.contains("weights of horizons 1-7").all()
    assert np.allclose(rest.groupby("model")["weight"].first().sort_index(),
                       first.groupby("model")["weight"].first().sort_index())
    none = scoreboard_weights(_world(last_issue=5), D0 + dt.timedelta(days=5), _settings(),
                              MEMBERS)
    assert np.allclose(none["weight"], 0.5) and none["basis"].str.contains("equal").all()


def test_weighted_quantile_mean_matches_numpy_average() -> None:
    # reference: numpy.average across members, level by level (Vincentization)
    rng = np.random.default_rng(3)
    a, b = (np.sort(rng.gamma(2.0, 10.0, (4, 6, 9)), axis=-1) for _ in range(2))
    out = quantile_ensemble([a, b], "mean", [0.8, 0.2])
    assert np.allclose(out, np.average(np.stack([a, b]), axis=0, weights=[0.8, 0.2]))


def test_parents_do_not_enter_the_weights() -> None:
    # a parent's scores repeat its leaves' data: a parent whose forecasts favour the other
    # member leaves the weights exactly as they are without it
    con = _world(last_issue=70)
    as_of = D0 + dt.timedelta(days=70)
    alone = scoreboard_weights(con, as_of, _settings(), MEMBERS)
    con.execute("INSERT INTO core.regions (region, parent, level, n_children) "
                "VALUES ('Orvane', 'Realm', 1, 0), ('Tessaly', 'Realm', 1, 0), "
                "('Realm', NULL, 0, 2)")
    con.execute("INSERT INTO core.observations SELECT 'Realm', signal, ref_date, as_of, "
                "sum(value), NULL FROM core.observations GROUP BY ALL")
    # the parent: the poor member is perfect there and the perfect one 3x too high
    con.execute("""INSERT INTO out.forecasts
                   SELECT run_id, issued_on, CASE model WHEN 'renewal' THEN 'compartmental'
                          ELSE 'renewal' END, 'Realm', signal, target_date, horizon_days,
                          q_level, value * CASE model WHEN 'renewal' THEN 2.0 ELSE 6.0 END
                   FROM out.forecasts WHERE region = 'Orvane'""")
    counted = scoreboard_weights(con, as_of, _settings(), MEMBERS)
    pd.testing.assert_frame_equal(counted, alone)
    # ... while counting it would have moved them (the check above is not vacuous)
    con.execute("UPDATE core.regions SET parent = NULL, n_children = 0")
    moved = scoreboard_weights(con, as_of, _settings(), MEMBERS)
    assert not np.allclose(moved["weight"], alone["weight"])
