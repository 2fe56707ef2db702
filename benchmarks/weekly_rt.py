"""R_t from weekly counts against a simulated daily renewal epidemic with known R_t (README
figures for the weekly approximation).

A daily renewal epidemic (Cori et al. 2013 form: infections ~ NB(R_t sum_s w_s I_{t-s}, k)) is
observed through a daily infection-to-count delay, every count summed into weeks, and R_t is
estimated from the weekly totals alone by :class:`~tallywave.models.infection_rt.InfectionRt`
with ``step=7`` (delay and generation interval aggregated to week lags with events spread evenly
over their week).  The truth of infection week k is the daily R_t averaged over the week with
weights Lambda_t (the expected infections of day t are R_t Lambda_t, so this is the R the
week's infections carry).  Figures per scenario: 90 % interval coverage, median |error| of the
median, and the median error (bias) over the weeks of fast growth or decline.

    python -m benchmarks.weekly_rt                 # README figures (60 regions)
    python -m benchmarks.weekly_rt --regions 20

Nothing is asserted here; ``tests/test_weekly_stages.py`` runs a smaller version with bounds.
"""

from __future__ import annotations

import argparse
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import special

from tallywave.models.deconvolution import delay_pmf
from tallywave.models.infection_rt import InfectionRt
from tallywave.models.renewal import discretise_gamma_interval

GI_DAYS = (5.2, 2.4)  # the default generation interval of the settings (days)


@dataclass(frozen=True)
class Scenario:
    """A daily R_t path and how its infections are counted."""

    r_from: float
    r_to: float
    t_change: float  # day of the logistic change (scale ``change_days``)
    delay: tuple[float, float]  # infection-to-count delay (mean, sd) in days
    level: tuple[float, float]  # daily infections at the start, log-uniform per region
    k: float  # NB size of daily infections (inf: Poisson)
    change_days: float = 2.0
    seed: int = 1


#: Scenarios built to break the weekly approximation: fast growth (R 1.8, doubling in ~5 days,
#: where within-week timing matters most), a sharp drop, a long delay (deaths-like) with a rise.
SCENARIOS: dict[str, Scenario] = {
    "drop": Scenario(1.4, 0.8, 120, (5.0, 2.5), (20, 200), 20.0, seed=1),
    "rise, admission delay": Scenario(0.85, 1.25, 120, (7.0, 2.8), (300, 3000), np.inf, seed=2),
    "fast growth then control": Scenario(1.8, 0.7, 90, (3.1, 1.3), (5, 20), 50.0, seed=3),
    "long delay (18 d)": Scenario(0.9, 1.3, 120, (18.0, 6.6), (200, 2000), 20.0, seed=4),
}


def r_path(n_days: int, sc: Scenario) -> np.ndarray:
    """R_t moving from r_from to r_to along a logistic centred on t_change."""
    t = np.arange(n_days)
    return sc.r_from + (sc.r_to - sc.r_from) * special.expit((t - sc.t_change) / sc.change_days)


def simulate_daily(r: np.ndarray, f: np.ndarray, gi: np.ndarray, n: int, sc: Scenario,
                   rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Daily infections, their total infectiousness Lambda and the counts (half of the
    infections, counted after a delay drawn from f), each (n, T)."""
    n_days, lag = r.size, gi.size - 1
    inf = np.zeros((n, n_days))
    lam = np.zeros((n, n_days))
    start = np.exp(rng.uniform(*np.log(sc.level), size=(n, 1)))
    inf[:, :lag] = rng.poisson(start * np.ones(lag))
    lam[:, :lag] = start
    for t in range(lag, n_days):
        lam[:, t] = inf[:, t - lag:t] @ gi[1:][::-1]
        mu = np.maximum(r[t] * lam[:, t], 1e-12)
        inf[:, t] = rng.poisson(mu if np.isinf(sc.k) else rng.gamma(sc.k, mu / sc.k))
    parts = rng.multinomial(rng.binomial(inf.astype(np.int64), 0.5), f)
    y = np.zeros((n, n_days), dtype=np.int64)
    for d in range(f.size):
        y[:, d:] += parts[:, : n_days - d, d]
    return inf, lam, y.astype(float)


def to_weeks(x: np.ndarray) -> np.ndarray:
    """Sums over consecutive 7-day blocks (the last block ends on the last day)."""
    n, n_days = x.shape
    first = n_days % 7
    return x[:, first:].reshape(n, -1, 7).sum(axis=2)


def run(name: str, n: int = 60, n_days: int = 210, correction: bool = True) -> dict[str, Any]:
    """Simulate one scenario, fit R_t on the weekly totals; coverage and errors per week
    (``correction``: the growth correction of the week-lag interval, on by default)."""
    sc = SCENARIOS[name]
    rng = np.random.default_rng(sc.seed)
    gi = discretise_gamma_interval(*GI_DAYS)
    f = delay_pmf(sc.delay)
    r = r_path(n_days, sc)
    _, lam, y = simulate_daily(r, f, gi, n, sc, rng)
    yw = to_weeks(y)
    truth = to_weeks(r[None, :] * lam) / np.maximum(to_weeks(lam), 1e-12)  # (n, W)
    est = InfectionRt(window=1, step=7, recent_days=2, growth_correction=correction).fit(yw, f, gi)
    q = est.quantiles([0.05, 0.5, 0.95])
    n_w = yw.shape[1]
    wk = np.arange(n_w)
    away = (wk >= 6) & (wk <= n_w - 4)  # after the seeding; the last weeks are not counted yet
    lo, med, hi = q[:, away, 0], q[:, away, 1], q[:, away, 2]
    tr = truth[:, away]
    ok = np.isfinite(med)
    # weeks of fast change of the epidemic: weekly growth of the true infections beyond x1.4
    infw = to_weeks(r[None, :] * lam)[:, away]
    growth = np.abs(np.log(np.maximum(infw[:, 1:], 1) / np.maximum(infw[:, :-1], 1)))
    fast = np.zeros_like(ok)
    fast[:, 1:] = growth > np.log(1.4)
    cover = (lo <= tr) & (tr <= hi)
    err = med - tr
    return {"coverage": float(cover[ok].mean()), "n": int(ok.sum()),
            "mae": float(np.median(np.abs(err[ok]))),
            "bias": float(np.median(err[ok] / tr[ok])),
            "bias_fast": float(np.median(err[ok & fast] / tr[ok & fast]))
            if (ok & fast).any() else float("nan"),
            "n_fast": int((ok & fast).sum()),
            "coverage_fast": float(cover[ok & fast].mean()) if (ok & fast).any() else float("nan")}


def main(argv: list[str] | None = None) -> None:
    """Print the figures of every scenario."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--regions", type=int, default=60)
    args = ap.parse_args(argv)
    print("| scenario | growth correction | region-weeks | 90% coverage | median abs error | "
          "median relative error | fast weeks: n, coverage, median relative error |")
    print("|---|---|---|---|---|---|---|")
    for name in SCENARIOS:
        for corr in (False, True):
            got = run(name, args.regions, correction=corr)
            print(f"| {name} | {'on' if corr else 'off'} | {got['n']} | {got['coverage']:.3f} | "
                  f"{got['mae']:.3f} | {got['bias']:+.3f} | {got['n_fast']}, "
                  f"{got['coverage_fast']:.3f}, {got['bias_fast']:+.3f} |")


if __name__ == "__main__":
    main()
