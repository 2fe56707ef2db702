"""R_t by date of infection against truth: simulated renewal epidemics with known R_t, delays,
over-dispersion, weekday effects and a nowcast; closed forms; the stage end to end.

Measured figures are printed with ``pytest -s`` (``[measured] ...``) and quoted in the README.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from scipy import special

from tallywave.models.deconvolution import delay_pmf, rounded_gamma_pmf
from tallywave.models.infection_rt import InfectionRt
from tallywave.models.renewal import discretise_gamma_interval, reproduction_number_from_growth
from tallywave.pipeline.errors import UserError
from tallywave.pipeline.settings import load_settings
from tallywave.pipeline.transmission import RT_LEVELS, history_days, transmission

GI = discretise_gamma_interval(5.2, 2.4)


def report(name: str, value: Any) -> None:
    """Print a measured number (shown with ``pytest -s``)."""
    print(f"[measured] {name}: {value}")


# ---------------------------------------------------------------------------------------------
# A renewal epidemic with known R_t, observed through a delay, weekend shifts and a nowcast
# ---------------------------------------------------------------------------------------------


def r_path(n_days: int, r_from: float, r_to: float, t_change: float) -> np.ndarray:
    """R_t moving from r_from to r_to along a logistic of scale 2 days centred on t_change."""
    return r_from + (r_to - r_from) * special.expit((np.arange(n_days) - t_change) / 2.0)


def simulate(r: np.ndarray, f: np.ndarray, n: int, level: tuple[float, float], k: float,
             rng: np.random.Generator, weekend: bool) -> tuple[np.ndarray, np.ndarray]:
    """Infections I_t ~ NB(mean R_t sum_s w_s I_{t-s}, size k) (Poisson when k = inf), half of
    them counted after a delay drawn from f; with ``weekend``, 30 % of Saturday's and 40 % of
    Sunday's counts move to Monday.  Returns infections and counts, (n, T)."""
    n_days, lag = r.size, GI.size - 1
    inf = np.zeros((n, n_days))
    inf[:, :lag] = rng.poisson(np.exp(rng.uniform(*np.log(level), size=(n, 1))) * np.ones(lag))
    for t in range(lag, n_days):
        mu = r[t] * (inf[:, t - lag:t] @ GI[1:][::-1])
        inf[:, t] = rng.poisson(mu if np.isinf(k) else rng.gamma(k, np.maximum(mu, 1e-12) / k))
    parts = rng.multinomial(rng.binomial(inf.astype(np.int64), 0.5), f)
    y = np.zeros((n, n_days), dtype=np.int64)
    for d in range(f.size):
        y[:, d:] += parts[:, : n_days - d, d]
    if weekend:
        for day, share, shift in ((5, 0.3, 2), (6, 0.4, 1)):
            idx = np.arange(day, n_days, 7)
            moved = rng.binomial(y[:, idx], share)
            y[:, idx] -= moved
            keep = idx + shift < n_days
            y[:, idx[keep] + shift] += moved[:, keep]
    return inf, y.astype(float)


def nowcast(y: np.ndarray, rng: np.random.Generator, m: int = 50, window: int = 29
            ) -> tuple[np.ndarray, np.ndarray, int]:
    """A calibrated nowcast of the last ``window`` days: the counts reported so far (reporting
    delay gamma mean 3.5, sd 2.5) plus ``m`` joint draws of the unreported part (gamma-Poisson
    around the expected shortfall of the day's week-averaged count).  Returns the counts with
    the window completed by the draws' mean, the draws of the eventual counts (m, n, t) and the
    window's first column."""
    n_days = y.shape[1]
    rep_cdf = np.cumsum(rounded_gamma_pmf(3.5, 2.5))
    frac = rep_cdf[np.minimum(np.arange(window)[::-1], rep_cdf.size - 1)]
    start = n_days - window
    rep = y.copy()
    rep[:, start:] = rng.binomial(y[:, start:].astype(np.int64), frac)
    cs = np.concatenate([np.zeros((y.shape[0], 1)), np.cumsum(y, axis=1)], axis=1)
    t = np.arange(start, n_days)
    lo, hi = np.maximum(t - 3, 0), np.minimum(t + 4, n_days)
    level = (cs[:, hi] - cs[:, lo]) / (hi - lo)
    miss = level * (1.0 - frac)
    draws = rep[None, :, start:] + rng.poisson(rng.gamma(20.0, miss[None] / 20.0,
                                                          size=(m, *miss.shape)))
    base = rep.copy()
    base[:, start:] = draws.mean(axis=0)
    return base, draws, start


def crossing_lags(med: np.ndarray, r: np.ndarray) -> np.ndarray:
    """Per series: first day from which the median R stays across 1 for a week, minus the day
    the true R crosses 1."""
    up = r[0] < 1.0
    t_true = int(np.argmax(r > 1.0 if up else r < 1.0))
    lags = []
    for row in med:
        side = (row > 1.0) if up else (row < 1.0)
        for d in range(t_true - 25, row.size - 7):
            if np.all(side[d:d + 7]):
                lags.append(d - t_true)
                break
    return np.array(lags)


SCENARIOS: dict[str, dict[str, Any]] = {
    # a drop in transmission; symptom-onset-like delay; NB(k=20) infections; weekend shifts
    "drop": {"r_from": 1.4, "r_to": 0.8, "t_change": 140, "delay": (5.0, 2.5),
             "level": (20, 200), "k": 20.0, "weekend": True, "seed": 1},
    # a rise; admission-like delay; Poisson infections; no weekday effect
    "rise": {"r_from": 0.85, "r_to": 1.25, "t_change": 140, "delay": (7.0, 2.8),
             "level": (300, 3000), "k": np.inf, "weekend": False, "seed": 2},
}


def run_scenario(name: str, n: int = 40, n_days: int = 200) -> dict[str, Any]:
    """Simulate a scenario, nowcast it, fit; coverage, error, crossing lag."""
    sc = SCENARIOS[name]
    rng = np.random.default_rng(sc["seed"])
    f = delay_pmf(sc["delay"])
    r = r_path(n_days, sc["r_from"], sc["r_to"], sc["t_change"])
    _, y = simulate(r, f, n, sc["level"], sc["k"], rng, sc["weekend"])
    base, draws, start = nowcast(y, rng)
    est = InfectionRt().fit(base, f, GI, draws=draws, draws_start=start)
    q = est.quantiles([0.05, 0.5, 0.95])
    t = np.arange(n_days)
    away = (t >= 40) & (t <= n_days - 15)  # after the seeding, away from the last 14 days
    lo, med, hi = q[:, away, 0], q[:, away, 1], q[:, away, 2]
    ok = np.isfinite(med)
    cover = (lo <= r[away]) & (r[away] <= hi)
    return {"coverage": cover[ok].mean(), "n": int(ok.sum()),
            "mae": np.median(np.abs(med - r[away])[ok]), "lags": crossing_lags(q[..., 1], r),
            "k_hat": np.median(est.dispersion_), "est": est, "r": r, "q": q}


@pytest.mark.parametrize("name", ["drop", "rise"])
def test_intervals_cover_the_true_reproduction_number(name: str) -> None:
    got = run_scenario(name)
    lags = got["lags"]
    report(f"{name}: 90% coverage of true R_t (days >= 40, not the last 14) / region-days",
           f"{got['coverage']:.3f} / {got['n']}")
    report(f"{name}: median |error| of the median; NB size k estimated",
           f"{got['mae']:.3f}; {got['k_hat']:.1f}")
    report(f"{name}: crossing lag (days): median, 10%-90%",
           f"{np.median(lags):.1f}, {np.percentile(lags, 10):.0f} to {np.percentile(lags, 90):.0f}")
    assert got["n"] >= 0.95 * 40 * 146
    assert 0.80 <= got["coverage"] <= 0.97
    assert got["mae"] <= 0.08
    assert len(lags) >= 36 and abs(np.median(lags)) <= 3


def test_the_last_days_are_flagged_and_widen() -> None:
    got = run_scenario("drop")
    est, q = got["est"], got["q"]
    dep = est.dependent_
    assert dep[-14:].all() and not dep[:150].any()
    width = np.nanmedian(q[:, -40:, 2] - q[:, -40:, 0], axis=0)
    # the last days' infections are barely counted yet: wider than a fortnight earlier
    assert width[-3] > 1.5 * width[-30]
    assert est.observability_[-1] < 0.05 and est.observability_[-30] > 0.999


def test_back_calculated_r_matches_wallinga_lipsitch_on_exponential_growth() -> None:
    # Wallinga & Lipsitch (2007): growth at rate r gives R = 1 / sum_s w_s e^{-r s}; counts
    # delayed by f grow at the same rate, scaled by the delay's M(-r).  Large counts make the
    # prior negligible.
    f = rounded_gamma_pmf(7.0, 2.8)
    t = np.arange(160)
    for r in (0.08, -0.05):
        m_gen = np.sum(f * np.exp(-r * np.arange(f.size)))
        y = 5e4 * np.exp(r * (t - 80)) * m_gen
        est = InfectionRt(dispersion=np.inf, iterations=40).fit(y[None], f, GI)
        inner = slice(40, 140)
        np.testing.assert_allclose(est.mean_[0, inner], reproduction_number_from_growth(r, GI),
                                   rtol=5e-3)
        # the growth rate returned at the median inverts the relation
        np.testing.assert_allclose(est.growth_rate()[0, inner], r, atol=5e-4)


def test_overdispersion_is_recovered() -> None:
    rng = np.random.default_rng(9)
    f = delay_pmf((5.0, 2.5))
    r = np.full(150, 1.05)
    got = {}
    for k in (5.0, np.inf):
        _, y = simulate(r, f, 40, (100, 400), k, rng, weekend=True)
        got[k] = np.median(InfectionRt().fit(y, f, GI).dispersion_)
    report("NB size k estimated (truth 5 / Poisson)", f"{got[5.0]:.1f} / {got[np.inf]:.0f}")
    assert 3.5 <= got[5.0] <= 8.0
    assert got[np.inf] > 40.0


def test_mixture_over_draws_matches_refits_and_is_not_under_dispersed() -> None:
    rng = np.random.default_rng(12)
    f = delay_pmf((5.0, 2.5))
    r = r_path(120, 1.3, 0.9, 80)
    _, y = simulate(r, f, 3, (50, 60), np.inf, rng, weekend=False)
    base, draws, start = nowcast(y, rng, m=30)
    mix = InfectionRt(dispersion=50.0).fit(base, f, GI, draws=draws, draws_start=start)
    # brute force: one full fit per draw (no linearisation), then the law of total variance
    means, variances = [], []
    for d in draws:
        full = base.copy()
        full[:, start:] = d
        one = InfectionRt(dispersion=50.0).fit(full, f, GI)
        means.append(one.mean_)
        variances.append(one.sd_**2)
    m_ref = np.mean(means, axis=0)
    v_ref = np.mean(variances, axis=0) + np.var(means, axis=0)
    cells = np.s_[:, 70:]
    ok = np.isfinite(m_ref[cells]) & np.isfinite(mix.mean_[cells])
    rel_m = np.abs(mix.mean_[cells] / m_ref[cells] - 1)[ok]
    rel_sd = np.abs(mix.sd_[cells] / np.sqrt(v_ref[cells]) - 1)[ok]
    report("linearised deconvolution per draw vs one refit per draw: max rel. error of the "
           "mixture mean / sd (every day, the last included)",
           f"{rel_m.max():.4f} / {rel_sd.max():.3f}")
    assert rel_m.max() < 0.03 and rel_sd.max() < 0.05
    # never narrower than its components on average (law of total variance)
    assert np.all(mix.sd_[cells][ok] >= np.sqrt(np.mean(variances, axis=0)[cells][ok]) * 0.99)
    # no draws: a single gamma; draws that equal the counts change nothing
    same = InfectionRt(dispersion=50.0).fit(base, f, GI, draws=np.repeat(
        base[None, :, start:], 4, axis=0), draws_start=start)
    single = InfectionRt(dispersion=50.0).fit(base, f, GI)
    np.testing.assert_allclose(same.mean_, single.mean_, rtol=1e-9, equal_nan=True)
    np.testing.assert_allclose(same.sd_, single.sd_, rtol=1e-6, equal_nan=True)


def test_candidate_delays_and_intervals_mix_by_the_law_of_total_variance() -> None:
    rng = np.random.default_rng(5)
    f = delay_pmf((5.0, 2.5))
    _, y = simulate(np.full(120, 1.3), f, 4, (30, 40), np.inf, rng, weekend=False)
    days = np.s_[:, 40:100]

    def check(mix: InfectionRt, parts: list[InfectionRt]) -> None:
        means = np.stack([p.mean_ for p in parts])
        var = (np.stack([p.sd_ for p in parts]) ** 2).mean(axis=0) + means.var(axis=0)
        np.testing.assert_allclose(mix.mean_[days], means.mean(axis=0)[days], rtol=1e-9)
        np.testing.assert_allclose(mix.sd_[days], np.sqrt(var)[days], rtol=1e-6)
        assert np.mean(mix.sd_[days] > np.stack([p.sd_ for p in parts]).mean(axis=0)[days]) > 0.9

    fix = {"dispersion": 30.0}
    cands = [(4.2, 2.0), (5.2, 2.4), (6.2, 2.8)]
    parts = [InfectionRt(**fix).fit(y, f, c) for c in cands]
    gi_mix = InfectionRt(**fix).fit(y, f, cands)
    check(gi_mix, parts)
    # a growing epidemic: a longer interval means a larger R (Wallinga & Lipsitch 2007)
    assert np.all((parts[0].mean_[days] < gi_mix.mean_[days])
                  & (gi_mix.mean_[days] < parts[2].mean_[days]))
    delays = [[4.0, 2.0], [5.0, 2.5], [6.0, 3.0]]
    d_parts = [InfectionRt(**fix).fit(y, tuple(d), GI) for d in delays]
    check(InfectionRt(**fix).fit(y, {"candidates": delays}, GI), d_parts)


def test_input_validation() -> None:
    f = delay_pmf((3.0, 1.0))
    y = np.ones((2, 60)) * 10
    with pytest.raises(ValueError, match="align"):
        InfectionRt(align="middle").fit(y, f, GI)
    with pytest.raises(ValueError, match="draws"):
        InfectionRt().fit(y, f, GI, draws=np.ones((3, 2, 10)), draws_start=55)
    with pytest.raises(ValueError, match="non-negative"):
        InfectionRt().fit(-y, f, GI)
    with pytest.raises(RuntimeError, match="not fitted"):
        InfectionRt().quantiles([0.5])


# ---------------------------------------------------------------------------------------------
# The stage
# ---------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def inputs() -> Any:
    """A simulated outbreak's stage inputs (cleaned series + nowcast) in a memory database."""
    from benchmarks.rt_stage import build

    return build(24, 220, seed=3, n_draws=40)


def _outputs(inp: Any) -> dict[str, pd.DataFrame]:
    con = inp.con
    return {t: con.execute(f"SELECT * EXCLUDE (run_id) FROM out.{t} ORDER BY ALL").df()
            for t in ("rt", "growth")}


def _run(inp: Any, **overrides: Any) -> dict[str, pd.DataFrame]:
    for t in ("rt", "growth"):
        inp.con.execute(f"DELETE FROM out.{t}")
    s = inp.settings
    saved = dict(s.base)
    s.base.update(overrides)
    try:
        transmission(inp.con, inp.as_of, s, run_id=inp.run_id)
    finally:
        s.base.clear()
        s.base.update(saved)
    return _outputs(inp)


def test_stage_publishes_by_date_of_infection(inputs: Any) -> None:
    out = _run(inputs)
    rt, g = out["rt"], out["growth"]
    assert set(rt["date_basis"]) == {"infection"} and set(g["date_basis"]) == {"infection"}
    assert set(rt["signal"]) == {"cases", "admissions", "deaths"}
    levels = rt.groupby(["region", "signal", "ref_date"])["q_level"].apply(list)
    assert all(v == RT_LEVELS for v in levels)
    assert rt.groupby(["region", "signal", "ref_date"])["value"].apply(
        lambda v: bool(np.all(np.diff(v.to_numpy()) > 0))).all()
    assert pd.to_datetime(rt["ref_date"]).max().date() <= inputs.as_of
    assert g["p_growing"].between(0, 1).all()
    ok = np.isfinite(g["growth_rate"]) & (g["growth_rate"] != 0)
    np.testing.assert_allclose(g.loc[ok, "doubling_days"] * g.loc[ok, "growth_rate"], np.log(2))
    med = rt[rt["q_level"] == 0.5].merge(g, on=["region", "signal", "ref_date"])
    clear = (med["value"] - 1).abs() > 1e-9
    assert ((med.loc[clear, "p_growing"] > 0.5) == (med.loc[clear, "value"] > 1)).all()
    assert ((med.loc[clear, "growth_rate"] > 0) == (med.loc[clear, "value"] > 1)).all()
    # the last days depend on the nowcast, the old ones do not
    dep = rt.groupby(["signal", "ref_date"])["nowcast_dependent"].all().reset_index()
    cases = dep[dep["signal"] == "cases"]
    assert cases["nowcast_dependent"].iloc[-5:].all()
    assert not cases["nowcast_dependent"].iloc[:60].any()
    # against the simulator's true R_t of the infection date (cases, away from the last 14)
    c = rt[(rt["signal"] == "cases") & rt["q_level"].isin([0.05, 0.95])].pivot_table(
        index=["region", "ref_date"], columns="q_level", values="value").reset_index()
    day = (pd.to_datetime(c["ref_date"]) - pd.Timestamp(inputs.as_of)).dt.days + 219
    truth = inputs.rt_true[c["region"].str[1:].astype(int).to_numpy(), day.to_numpy()]
    away = day.to_numpy() <= 219 - 15
    cov = ((c[0.05] <= truth) & (truth <= c[0.95]))[away].mean()
    report("stage on the SEIR simulator: cases 90% coverage of true R_t (not the last 14 days)",
           f"{cov:.3f} over {int(away.sum())} region-days")
    assert cov >= 0.75


def test_stage_results_do_not_depend_on_batching(inputs: Any) -> None:
    outs = [_run(inputs, batch_regions=b) for b in (1, 7, 250)]
    for other in outs[1:]:
        for t in ("rt", "growth"):
            pd.testing.assert_frame_equal(outs[0][t], other[t], rtol=1e-9, atol=1e-12)


def test_stage_fallback_draws_use_per_region_streams(inputs: Any) -> None:
    con = inputs.con
    con.execute("CREATE TEMP TABLE _kept AS SELECT * FROM nowcast_draws")
    con.execute("DROP TABLE nowcast_draws")
    try:
        a = _run(inputs, batch_regions=5)
        b = _run(inputs, batch_regions=250)
    finally:
        con.execute("CREATE TEMP TABLE nowcast_draws AS SELECT * FROM _kept")
        con.execute("DROP TABLE _kept")
    pd.testing.assert_frame_equal(a["rt"], b["rt"], rtol=1e-9, atol=1e-12)
    assert len(a["rt"]) > 0


def test_delay_settings_are_checked(tmp_path: Path) -> None:
    good = tmp_path / "good.toml"
    good.write_text("[defaults]\ninfection_delay = {mean = 4.0, sd = 2.0}\n"
                    "[signal.deaths]\ninfection_delay = {pmf = [0.0, 0.2, 0.5, 0.3]}\n")
    s = load_settings(good)
    assert history_days(s) > int(s.get("rt_history_days"))
    for body, words in [
        ("[defaults]\ninfection_delay = {mean = -1.0, sd = 2.0}\n", "positive"),
        ("[defaults]\ninfection_delay = {median = 4.0}\n", "unknown key"),
        ("[signal.cases]\ninfection_delay = {pmf = [0.5, -0.5]}\n", "pmf"),
        ("[defaults]\nrt_window_align = \"left\"\n", "centre"),
    ]:
        bad = tmp_path / "bad.toml"
        bad.write_text(body)
        with pytest.raises(UserError, match=words):
            load_settings(bad)


def test_history_covers_the_longest_delay() -> None:
    s = load_settings(None)
    # published days + window + interval + the deaths delay (the longest default) + a week
    assert history_days(s) >= 120 + 7 + 18 + 40
    assert dt.timedelta(days=history_days(s)) < dt.timedelta(days=260)
