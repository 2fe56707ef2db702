"""Tests of the invented outbreak simulator (models/outbreak.py) and its feed writer.

Each outside check names its source beside it.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import tomllib
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest
from scipy import optimize, special, stats

from tallywave.models.outbreak import (
    SCENARIOS,
    ReportingProcess,
    SeirdModel,
    TransmissionSchedule,
    draw_populations,
    final_size,
    gamma_delay_pmf,
    generation_interval_pmf,
    gravity_mixing,
    inject_backlog_dump,
    inject_duplicate_correction,
    move_to_open_days,
    reporting_scenario,
    simulate_outbreak,
)
from tallywave.pipeline.simulate import observations_frame, write_scenario

START = dt.date(2026, 3, 2)


# ---------------------------------------------------------------- epidemic core


def test_population_conserved_every_step_stochastic_and_mean_field() -> None:
    # Conservation S+E+I+R+D = N at every step (common practice for compartmental models).
    rng = np.random.default_rng(1)
    pops = draw_populations(6, rng)
    mixing = gravity_mixing(pops, rng)
    np.testing.assert_allclose(mixing.sum(axis=1), 1.0, rtol=1e-12)
    beta = TransmissionSchedule().beta(220, 6, 5.0, rng)
    seeds = np.array([30, 0, 0, 5, 0, 0])
    model = SeirdModel()
    path = model.simulate(pops, beta, seeds, rng, mixing=mixing)
    assert path.infections.sum() > 10_000  # a real epidemic, not a fizzle
    assert np.array_equal(path.total, np.broadcast_to(pops, path.total.shape))
    for comp in (path.S, path.E1, path.E2, path.I1, path.I2, path.R, path.D):
        assert comp.min() >= 0
    mf = model.mean_field(pops, beta, seeds, mixing=mixing)
    np.testing.assert_allclose(mf.total, np.broadcast_to(pops, mf.total.shape), rtol=1e-12)


@pytest.mark.parametrize("r0", [1.3, 1.8, 2.5, 4.0])
def test_mean_field_final_size_matches_kermack_mckendrick(r0: float) -> None:
    n, seeds, days = 1_000_000, 5, 2500
    model = SeirdModel(latent_days=3.0, infectious_days=5.0, ifr=0.004)
    beta = np.full((days, 1), r0 / model.infectious_days)
    path = model.mean_field(np.array([n]), beta, np.array([seeds]))
    z_model = 1.0 - path.S[-1, 0] / n
    assert path.I1[-1, 0] + path.I2[-1, 0] + path.E1[-1, 0] + path.E2[-1, 0] < 1e-3
    # Kermack & McKendrick (1927): z = 1 - exp(-R0 z); solved with scipy.special.lambertw.
    z_km = 1.0 + special.lambertw(-r0 * np.exp(-r0)).real / r0
    assert abs(z_model - z_km) / z_km < 0.01
    # Same relation, independent root finder (scipy.optimize.brentq) checks final_size().
    z_root = optimize.brentq(lambda z: z - 1.0 + np.exp(-r0 * z), 1e-6, 1.0)
    assert final_size(r0) == pytest.approx(z_root, rel=1e-10)
    # With the initial susceptible share s0 the discrete scheme follows 1 - z = s0 exp(-R0 z)
    # exactly (derived in the module docstring), so the match is to rounding error.
    assert z_model == pytest.approx(final_size(r0, s0=(n - seeds) / n), rel=1e-6)


def test_stochastic_final_size_large_population() -> None:
    # Large-N chain binomial follows the Kermack & McKendrick (1927) relation (law of large
    # numbers); 3 seeds of 200 exposed make early extinction negligible.
    rng = np.random.default_rng(7)
    n, r0 = 2_000_000, 2.0
    model = SeirdModel()
    beta = np.full((700, 1), r0 / model.infectious_days)
    sizes = [1.0 - model.simulate(np.array([n]), beta, np.array([200]), rng).S[-1, 0] / n
             for _ in range(3)]
    assert np.allclose(sizes, final_size(r0), rtol=0.01)


def test_generation_interval_pmf_satisfies_euler_lotka_growth() -> None:
    # Early growth rate r of the mean-field model solves 1 = R0 * sum_t g(t) exp(-r t)
    # (Wallinga & Lipsitch 2007, Proc. R. Soc. B), with g the model's generation interval.
    model = SeirdModel(latent_days=3.0, infectious_days=5.0)
    r0 = 1.8
    g = generation_interval_pmf(3.0, 5.0, max_days=60)
    assert g.sum() == pytest.approx(1.0) and g[:3].sum() == 0.0  # E needs >= 2 days
    beta = np.full((120, 1), r0 / model.infectious_days)
    path = model.mean_field(np.array([10**12]), beta, np.array([1]))
    inf = path.infections[:, 0]
    r_obs = np.log(inf[110] / inf[100]) / 10.0
    t = np.arange(len(g))
    r_el = optimize.brentq(lambda r: r0 * np.sum(g * np.exp(-r * t)) - 1.0, 1e-6, 2.0)
    assert r_obs == pytest.approx(r_el, rel=1e-3)
    # rt_true at the start equals R0 exactly when S = N (definition beta * S/N * D_I)
    assert path.rt[0, 0] == pytest.approx(r0, rel=1e-9)


# ---------------------------------------------------------------- surveillance


@pytest.fixture(scope="module")
def long_epidemic():
    """Three districts, 400 days: the outbreak has finished, so every infection had its onset."""
    rng = np.random.default_rng(2024)
    pops = np.array([300_000, 150_000, 80_000])
    beta = TransmissionSchedule().beta(400, 3, 5.0, rng)
    path = SeirdModel().simulate(pops, beta, np.array([20, 0, 0]),
                                 rng, mixing=gravity_mixing(pops, rng))
    rep = ReportingProcess()
    tri = rep.observe(path, first_weekday=0, rng=np.random.default_rng(99))
    return path, rep, tri


def test_reported_fraction_matches_probabilities(long_epidemic) -> None:
    path, rep, tri = long_epidemic
    infected = path.infections.sum() + 20  # seeds
    onsets = path.onsets.sum()
    assert infected - onsets < 1e-4 * infected  # epidemic over
    for sig, n_src, p in (("cases", onsets, rep.case_probability),
                          ("admissions", onsets, rep.admission_probability),
                          ("deaths", path.removals.sum(), SeirdModel().ifr)):
        got = tri[sig].sum()
        sd = np.sqrt(n_src * p * (1 - p))
        # Binomial(n, p) count within 4 standard deviations (binomial tolerance, common practice)
        assert abs(got - n_src * p) < 4 * sd + 5, (sig, got, n_src * p)
    assert tri["cases"].sum() / infected == pytest.approx(0.3, abs=0.005)


def test_empirical_delay_distribution_matches_pmf(long_epidemic) -> None:
    _, rep, tri = long_epidemic
    for sig, pmf in rep.delay_pmfs().items():
        counts = tri[sig].sum(axis=(0, 1))
        n = counts.sum()
        # Pearson chi-square goodness of fit (scipy.stats.chisquare), bins pooled to E >= 5
        expected = n * pmf
        big = expected >= 5
        obs = np.append(counts[big], counts[~big].sum())
        exp = np.append(expected[big], expected[~big].sum())
        assert stats.chisquare(obs, exp).pvalue > 1e-3, sig
        assert np.max(np.abs(counts / n - pmf)) < 4 * np.sqrt(0.25 / n)
    # the configured means (invented): cases ~3 d, admissions ~5 d, deaths ~8 d
    means = {s: float(np.arange(len(p)) @ p) for s, p in rep.delay_pmfs().items()}
    assert means["cases"] == pytest.approx(3.0, abs=0.1)
    assert means["admissions"] == pytest.approx(5.0, abs=0.1)
    assert means["deaths"] == pytest.approx(8.0, abs=0.1)


def test_gamma_delay_pmf_against_scipy() -> None:
    # P(floor X = d) = F(d+1) - F(d) for gamma X (scipy.stats.gamma as reference)
    pmf = gamma_delay_pmf(4.0, 2.0, 200)
    ref = stats.gamma(a=4.0, scale=1.0)
    np.testing.assert_allclose(pmf[:10], ref.cdf(np.arange(1, 11)) - ref.cdf(np.arange(10)),
                               rtol=1e-9)
    assert float(np.arange(201) @ pmf) == pytest.approx(4.0 - 0.5, abs=0.01)  # floor: mean-1/2


def test_weekend_testing_shortfall_moves_to_monday() -> None:
    rng = np.random.default_rng(5)
    rep = ReportingProcess()
    counts = np.full((2, 700), 1000, dtype=np.int64)
    out = rep.weekend_shift(counts, first_weekday=0, rng=rng)
    wd = np.arange(700) % 7
    assert out.sum() <= counts.sum()
    assert out[:, wd == 5].mean() == pytest.approx(700, rel=0.01)  # x0.7 on Saturdays
    assert out[:, wd == 6].mean() == pytest.approx(600, rel=0.01)  # x0.6 on Sundays
    assert out[:, wd == 0][:, 1:].mean() == pytest.approx(1700, rel=0.01)  # +300 +400
    assert out[:, wd == 2].mean() == 1000


def test_artefact_injection_keeps_totals_and_makes_signatures() -> None:
    rng = np.random.default_rng(3)
    pmf = gamma_delay_pmf(3.5, 2.5, 20)
    tri = rng.multinomial(rng.poisson(100, size=(2, 80)), pmf)
    dumped, moved = inject_backlog_dump(tri, 0, 50, rng)
    assert dumped.sum() == tri.sum() and dumped[0, 50, 0] == tri[0, 50, 0] + moved
    assert moved > 5 * tri[0, 41:50].sum(axis=1).mean()  # several days' worth on one day
    fixed, removed = inject_duplicate_correction(tri, 1, 60, rng)
    assert fixed.sum() == tri.sum()  # after the correction totals are right again
    assert fixed[1, 60].sum() == tri[1, 60].sum() - removed < 0  # a negative day
    assert np.array_equal(fixed[:, 61:], tri[:, 61:])


# ---------------------------------------------------------------- written files


@pytest.fixture(scope="module")
def default_set(tmp_path_factory) -> tuple[Path, dict]:
    out = tmp_path_factory.mktemp("default_feeds")
    return out, write_scenario(out)


def _read_cases(path: Path) -> dict[tuple[str, str], int]:
    lines = path.read_text().splitlines()
    assert lines[0] == "district,date,total"
    return {(r, d): int(v) for r, d, v in (ln.split(",") for ln in lines[1:])}


def test_default_files_formats_and_dates(default_set) -> None:
    out, summary = default_set
    scen = json.loads((out / "truth" / "scenario.json").read_text())
    names = [d["name"] for d in scen["districts"]]
    assert len(names) == 10 and all(4e4 <= d["population"] <= 6e5 for d in scen["districts"])
    as_ofs = [START + dt.timedelta(days=140 + k) for k in range(60)]
    miss = next(a for a in scen["artefacts"] if a["kind"] == "missing_day")
    scen_missing_region, missing = miss["region"], miss["ref_date"]
    for sig, ext in (("cases", "csv"), ("admissions", "csv"), ("deaths", "jsonl")):
        got = sorted(p.name for p in (out / sig).iterdir())
        assert got == [f"{sig}_{d.isoformat()}.{ext}" for d in as_ofs]
    for k, a in enumerate(as_ofs):
        first = START if k == 0 else a - dt.timedelta(days=41)
        n_dates = (a - first).days + 1
        want_dates = [(first + dt.timedelta(days=i)).isoformat() for i in range(n_dates)]
        adm = (out / "admissions" / f"admissions_{a}.csv").read_text().splitlines()
        assert adm[0] == "district,date,admitted"
        rows = [ln.split(",") for ln in adm[1:]]
        assert [r[:2] for r in rows] == [[n, d] for n in names for d in want_dates]
        assert all(int(r[2]) >= 0 for r in rows)
        recs = [json.loads(ln) for ln in (out / "deaths" / f"deaths_{a}.jsonl").read_text()
                .splitlines()]
        assert all(list(r) == ["district", "date", "deaths", "published"] for r in recs)
        assert {r["published"] for r in recs} == {a.isoformat()}
        assert [(r["district"], r["date"]) for r in recs] == [(n, d) for n in names
                                                              for d in want_dates]
        assert all(isinstance(r["deaths"], int) and r["deaths"] >= 0 for r in recs)
        cases = _read_cases(out / "cases" / f"cases_{a}.csv")
        want = [(n, d) for n in names for d in want_dates]
        assert list(cases) == [key for key in want if key != (scen_missing_region, missing)]
    spec = tomllib.loads((out / "feeds.toml").read_text())["source"]
    assert spec["district_cases"] == {
        "path": "cases/*.csv", "format": "csv", "signal": "cases", "value_kind": "cumulative",
        "as_of": {"from": "filename", "pattern": "%Y-%m-%d"},
        "columns": {"region": "district", "ref_date": "date", "value": "total"}}
    assert spec["district_admissions"]["columns"]["value"] == "admitted"
    assert spec["district_deaths"]["as_of"] == {"from": "column", "column": "published"}
    assert spec["district_deaths"]["path"] == "deaths/*.jsonl"
    size = sum(p.stat().st_size for p in out.rglob("*") if p.is_file())
    assert size == summary["bytes"] and size <= 5 * 1024**2


def _final(out: Path) -> dict[tuple[str, str, str], int]:
    t = pq.read_table(out / "truth" / "final_counts.parquet").to_pylist()
    return {(r["region"], r["signal"], r["ref_date"].isoformat()): r["value"] for r in t}


def test_snapshots_agree_with_truth_and_only_grow(default_set) -> None:
    out, _ = default_set
    final = _final(out)
    arts = pq.read_table(out / "truth" / "artefacts.parquet").to_pylist()
    touched = {a["region"] for a in arts}
    last = _read_cases(out / "cases" / "cases_2026-09-17.csv")
    first = _read_cases(out / "cases" / "cases_2026-07-20.csv")
    for region in {r for r, _ in first} - touched:
        cum = 0
        for d in range(141):
            day = (START + dt.timedelta(days=d)).isoformat()
            cum += final[(region, "cases", day)]
            if d <= 140 - 20:  # cases reporting delay is at most 20 days: settled
                assert first[(region, day)] == cum
        for (r, day), v in last.items():
            if r == region and day <= "2026-08-28":  # 20 days before the last as_of
                settled = sum(final[(region, "cases", (START + dt.timedelta(days=i)).isoformat())]
                              for i in range((dt.date.fromisoformat(day) - START).days + 1))
                assert v == settled
    # revisions come only from late reports: a (district, date) total never decreases
    seen: dict[tuple[str, str], int] = {}
    for f in sorted((out / "cases").iterdir()):
        for key, v in _read_cases(f).items():
            assert v >= seen.get(key, 0)
            seen[key] = v


def test_injected_artefacts_visible_in_files(default_set) -> None:
    out, _ = default_set
    final = _final(out)
    arts = {a["kind"]: a for a in pq.read_table(out / "truth" / "artefacts.parquet").to_pylist()}
    assert set(arts) == {"backlog_dump", "negative_correction", "missing_day"}
    last = _read_cases(out / "cases" / "cases_2026-09-17.csv")

    def daily(region: str, day: dt.date) -> int:
        return last[(region, day.isoformat())] - last[(region, (day - dt.timedelta(1)).isoformat())]

    neg = arts["negative_correction"]
    assert daily(neg["region"], neg["ref_date"]) < 0
    # settled (> 20 days before the last as_of): exactly the true count minus the duplicates
    assert daily(neg["region"], neg["ref_date"]) == (
        final[(neg["region"], "cases", neg["ref_date"].isoformat())] + neg["delta"])

    dump = arts["backlog_dump"]
    day_count = daily(dump["region"], dump["ref_date"])
    truth_day = final[(dump["region"], "cases", dump["ref_date"].isoformat())]
    assert day_count == truth_day + dump["delta"]
    week = [final[(dump["region"], "cases", (dump["ref_date"] - dt.timedelta(i)).isoformat())]
            for i in range(1, 10)]
    assert 5 * np.mean(week) < dump["delta"] < 9 * np.mean(week)  # roughly a week's worth

    miss = arts["missing_day"]
    gone = (miss["region"], miss["ref_date"].isoformat())
    for f in (out / "cases").iterdir():
        assert gone not in _read_cases(f)
    others = {r for r, d in last if d == miss["ref_date"].isoformat()}
    assert len(others) == 9 and miss["region"] not in others
    adm = (out / "admissions" / "admissions_2026-09-17.csv").read_text()
    assert f"{gone[0]},{gone[1]}," in adm  # only the cases feed lost the row


def test_same_seed_same_bytes_other_seed_differs(tmp_path: Path) -> None:
    kw = {"n_regions": 4, "n_days": 60, "n_snapshots": 8, "window": 14}

    def digest(path: Path) -> dict[str, str]:
        return {str(p.relative_to(path)): hashlib.sha256(p.read_bytes()).hexdigest()
                for p in sorted(path.rglob("*")) if p.is_file()}

    s1 = write_scenario(tmp_path / "a", seed=11, **kw)
    write_scenario(tmp_path / "b", seed=11, **kw)
    write_scenario(tmp_path / "c", seed=12, **kw)
    assert s1["n_files"] == 3 * 8 + 2 + 5  # snapshots, feeds.toml + regions.csv, truth
    assert digest(tmp_path / "a") == digest(tmp_path / "b")
    assert digest(tmp_path / "a") != digest(tmp_path / "c")
    # rewriting with fewer snapshots removes the earlier run's files
    write_scenario(tmp_path / "a", seed=11, n_regions=4, n_days=60, n_snapshots=3, window=14)
    assert len(list((tmp_path / "a" / "cases").iterdir())) == 3


def test_scenario_truth_tables(default_set) -> None:
    out, _ = default_set
    inf = pq.read_table(out / "truth" / "infections.parquet")
    assert inf.column_names[:4] == ["region", "date", "infections", "rt_true"]
    assert inf.num_rows == 10 * 200
    rt = np.asarray(inf.column("rt_true")).reshape(10, 200)
    sc = simulate_outbreak(seed=20260302)  # same as the written default set
    path = sc.path
    # definition R_t = beta(t) S(t)/N * infectious period (5 days)
    np.testing.assert_allclose(rt, (path.beta * path.S[:-1] / sc.populations * 5.0).T, rtol=1e-12)
    assert np.all(np.abs(np.log(rt[:, 0] / 1.9)) < 4 * 0.06)  # R0 1.9, lognormal sd 0.06
    pmf = pq.read_table(out / "truth" / "delay_pmf.parquet").to_pandas()
    for _, grp in pmf.groupby("signal"):
        assert grp["prob"].sum() == pytest.approx(1.0)
        assert grp["delay_days"].tolist() == list(range(len(grp)))
    assert pmf.groupby("signal")["delay_days"].max().to_dict() == {
        "admissions": 21, "cases": 20, "deaths": 28}
    total_cases = sum(v for (_, s, _), v in _final(out).items() if s == "cases")
    assert total_cases == sc.triangles["cases"].sum()


# ---------------------------------------------------------------- reporting scenarios


@pytest.fixture(scope="module")
def scenario_paths():
    """One epidemic (6 districts, 160 days) observed under every named reporting scenario."""
    out = {}
    for name in SCENARIOS:
        rep = reporting_scenario(name, 160, first_weekday=0)
        out[name] = (rep, simulate_outbreak(n_regions=6, n_days=160, n_snapshots=60, window=35,
                                            seed=5, reporting=rep))
    return out


def _mean_delay(x: np.ndarray) -> float:
    return float((x * np.arange(x.size)).sum() / x.sum())


def test_scenarios_share_the_epidemic_and_keep_every_report(scenario_paths) -> None:
    _, base = scenario_paths["default"]
    for name, (_, sc) in scenario_paths.items():
        np.testing.assert_array_equal(sc.path.infections, base.path.infections)
        for sig in ("cases", "admissions", "deaths"):
            # reports are only moved along the delay axis: reference-date totals are binomial
            # draws of the same epidemic (a delay change does not lose or add events)
            assert sc.triangles[sig].sum() == pytest.approx(base.triangles[sig].sum(),
                                                            rel=0.05), (name, sig)
    # the default scenario is the original reporting process, draw for draw
    again = simulate_outbreak(n_regions=6, n_days=160, n_snapshots=60, window=35, seed=5)
    for sig in ("cases", "admissions", "deaths"):
        np.testing.assert_array_equal(again.triangles[sig], base.triangles[sig])


@pytest.mark.parametrize("name, before, after", [("delay_lengthens", 4.0, 8.0),
                                                  ("delay_shortens", 8.0, 4.0)])
def test_drifting_delay_means_follow_the_ramp(scenario_paths, name, before, after) -> None:
    rep, sc = scenario_paths[name]
    path = rep.delay_pmf_path("cases", 160)

    def floored_mean(mean: float) -> float:
        # E[floor X | X < 29] for X ~ gamma(mean, sd = 0.75 mean) (scipy.stats.gamma)
        g = stats.gamma(a=(1 / 0.75) ** 2, scale=0.75**2 * mean)
        p = np.diff(g.cdf(np.arange(30)))
        return float((p * np.arange(29)).sum() / p.sum())

    assert _mean_delay(path[0]) == pytest.approx(floored_mean(before), abs=1e-9)
    assert _mean_delay(path[-1]) == pytest.approx(floored_mean(after), abs=1e-9)
    assert rep.delay_scale(160)[159 - 55] == pytest.approx(1.0)
    assert rep.delay_scale(160)[159 - 14] == pytest.approx(after / before)
    # simulated truth: empirical mean delay of the cases before and after the ramp
    tri = sc.triangles["cases"]
    early = tri[:, 60:100].sum(axis=(0, 1))
    late = tri[:, 146:160].sum(axis=(0, 1))
    assert _mean_delay(early) == pytest.approx(floored_mean(before), abs=0.4)
    assert _mean_delay(late) == pytest.approx(floored_mean(after), abs=0.6)


def test_weekend_and_holiday_report_days_stay_empty(scenario_paths) -> None:
    rep, sc = scenario_paths["weekend_reporting"]
    _, base = scenario_paths["default"]
    assert len(rep.holidays) == 2 and all(h % 7 < 5 for h in rep.holidays)
    for sig in ("cases", "admissions", "deaths"):
        tri = sc.triangles[sig]
        n_t, k = tri.shape[1:]
        day = np.arange(n_t)[:, None] + np.arange(k)[None, :]
        by_day = np.bincount(day.ravel(), weights=tri.sum(axis=0).ravel())
        closed = rep.closed_report_days(by_day.size, 0)
        assert by_day[closed].sum() == 0
        if sig == "cases":  # open days mid-epidemic always carry reports
            assert by_day[60:150][~closed[60:150]].min() > 0
        # moved, not lost: each reference day keeps the eventual total of the same draws
        # without closures (the closures use no random numbers)
        np.testing.assert_array_equal(tri.sum(axis=2), base.triangles[sig].sum(axis=2))
    # Monday after a closed weekend carries about three days of reports (cases, mid-epidemic)
    tri = sc.triangles["cases"]
    day = np.arange(160)[:, None] + np.arange(tri.shape[2])[None, :]
    by_day = np.bincount(day.ravel(), weights=tri.sum(axis=0).ravel())
    mondays = [u for u in range(70, 150) if u % 7 == 0 and u not in rep.holidays]
    fridays = [u - 3 for u in mondays]
    assert by_day[mondays].sum() > 2.0 * by_day[fridays].sum()


def test_move_to_open_days_small_example() -> None:
    tri = np.array([[[5, 1, 0], [2, 2, 2]]])
    closed = np.array([False, True, True, False, False, False, False])
    out = move_to_open_days(tri, closed)
    # ref 0: delay 1 (day 1, closed) -> day 3 = delay 3; delay 2 (day 2) -> delay 3
    # ref 1: delay 0 (day 1) -> day 3 = delay 2; delay 1 (day 2) -> delay 2; delay 2 stays
    np.testing.assert_array_equal(out, [[[5, 0, 0, 1, 0], [0, 0, 6, 0, 0]]])  # width 3 + 2


def test_long_tail_puts_a_fifth_beyond_28_days(scenario_paths) -> None:
    rep, sc = scenario_paths["long_tail"]
    for sig, pmf in rep.delay_pmfs().items():
        assert pmf[29:].sum() >= 0.20, sig
        assert pmf.sum() == pytest.approx(1.0)
    tri = sc.triangles["cases"]
    share = tri[:, :100, 29:].sum() / tri[:, :100].sum()
    # binomial share of a 0.2+ probability over thousands of reports
    assert share == pytest.approx(rep.delay_pmfs()["cases"][29:].sum(), abs=0.02)


def test_observations_frame_replays_the_triangles(scenario_paths) -> None:
    _, sc = scenario_paths["long_tail"]
    obs = observations_frame(sc, START, first_as_of=100, last_as_of=140)
    assert obs["as_of"].min() == np.datetime64(START + dt.timedelta(days=100))
    assert obs["as_of"].max() <= np.datetime64(START + dt.timedelta(days=140))
    cases = obs[obs["signal"] == "cases"].sort_values("as_of")
    known = cases.groupby(["region", "ref_date"])["value"].last()
    tri = sc.triangles["cases"]
    cum = np.cumsum(tri, axis=2)
    for (region, ref), value in known.sample(40, random_state=1).items():
        r = sc.names.index(region)
        t = (ref.date() - START).days
        d = min(140 - t, tri.shape[2] - 1)
        assert value == cum[r, t, d]
    # only changes are rows: no two consecutive rows of a key with the same value
    dup = cases.groupby(["region", "ref_date"])["value"].diff() == 0
    assert not dup.any()


def test_named_scenario_written_with_its_name(tmp_path: Path) -> None:
    info = write_scenario(tmp_path, n_regions=3, n_days=80, n_snapshots=5, window=14,
                          scenario="weekend_reporting")
    scen = json.loads((tmp_path / "truth" / "scenario.json").read_text())
    assert scen["scenario"] == "weekend_reporting"
    assert scen["parameters"]["reporting"]["closed_weekdays"] == [5, 6]
    assert info["n_files"] == 3 * 5 + 2 + 5
    with pytest.raises(ValueError, match="unknown scenario"):
        write_scenario(tmp_path, n_regions=3, n_days=80, n_snapshots=5, window=14,
                       scenario="weekends")
