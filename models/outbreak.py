"""Invented demo outbreak: a chain-binomial SEIR-D epidemic over districts and its surveillance.

Everything here is invented for demonstrations, tests and benchmarks: district names are composed
from syllables, populations are drawn at random, and the delays are plausible made-up values.

Epidemic model (one step = one day, all districts updated at once, numpy-vectorised):

* compartments S, E1, E2, I1, I2, R, D per district.  The latent (= incubation) period and the
  infectious period each have two stages, so their durations are sums of two geometric variables
  (a discrete gamma-like shape with shape 2).  A stage of mean ``m/2`` days is left with daily
  probability ``p = 2/m``, so the expected number of days counted in E is ``latent_days`` and in I
  is ``infectious_days`` exactly.
* force of infection on district j on day t: ``lambda_j = beta_j(t) * sum_k C[j,k] I_k / N_k``
  where ``C`` is a row-stochastic mixing matrix (mostly local contact, a small share spread over
  the other districts by a gravity kernel; this is the importation route).
* new infections ~ Binomial(S, 1 - exp(-lambda)); stage moves ~ Binomial(stage, p); people leaving
  I2 die with probability ``ifr`` (to D, "fatal outcome"), else recover (to R).  All moves use the
  state at the start of the day, so S+E1+E2+I1+I2+R+D = N exactly at every step.
* the mean-field version runs the same update with expected values instead of draws.  Because the
  hazard is ``1 - exp(-lambda)`` and every infected person spends ``infectious_days`` days in I on
  average, the mean-field final size obeys z = 1 - s0*exp(-R0*z) exactly (Kermack & McKendrick
  1927), R0 = beta * infectious_days.
* ``rt_true`` is the instantaneous reproduction number on the receiving side,
  ``R_t = beta_j(t) * S_j(t)/N_j * infectious_days`` (state at the start of day t).

Surveillance process (per district, per day):

* cases: each symptom onset (entry to I1, i.e. infection + incubation) is reported with
  probability ``case_probability``; reference date = onset date.  Weekend testing is reduced:
  of Saturday's onsets a share 1 - 0.7 is tested on Monday, of Sunday's 1 - 0.6 on Monday
  (shifted, not lost; shifts past the simulated horizon fall off the end).
* admissions: each onset is admitted with probability ``admission_probability`` after an
  onset-to-admission lag; reference date = admission date.
* deaths: fatal removals (I2 -> D) die after a removal-to-death lag; reference date = death date;
  each death is reported with probability ``death_ascertainment``.
* every reported event gets a reporting delay from the signal's pmf (multinomial split), giving a
  reporting triangle ``tri[r, t, d]`` = reports for reference day t that arrive on day t + d.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from scipy import special

from tallywave.models.distributions import gamma_delay_pmf

__all__ = [
    "SCENARIOS",
    "EpidemicPath",
    "OutbreakScenario",
    "ReportingProcess",
    "SeirdModel",
    "TransmissionSchedule",
    "artefact_window",
    "cumulative_vintage",
    "draw_populations",
    "final_size",
    "gamma_delay_pmf",
    "generation_interval_pmf",
    "gravity_mixing",
    "inject_backlog_dump",
    "inject_duplicate_correction",
    "invent_district_names",
    "move_to_open_days",
    "reporting_scenario",
    "simulate_outbreak",
    "split_by_delay",
    "spread_by_lag",
    "stage_exit_probability",
    "vintage",
]

_FIRST = (
    "Zal", "Quor", "Vesh", "Tam", "Orv", "Kilv", "Brem", "Ith", "Sar", "Mel", "Dov", "Yen",
    "Harr", "Lusk", "Pell", "Fen", "Cor", "Nar", "Tib", "Wend", "Ask", "Gal", "Rov", "Ul",
)
_MIDDLE = (
    "a", "e", "i", "o", "u", "en", "ar", "il", "um", "ov", "es", "an", "ir", "ol", "ev", "ath",
    "ur", "em", "is", "on",
)
_LAST = (
    "ath", "ova", "ene", "und", "ir", "esk", "ora", "ain", "ux", "ely", "ast", "orn", "yl",
    "ent", "iva", "oth",
)


def invent_district_names(n: int, rng: np.random.Generator) -> list[str]:
    """Return ``n`` distinct invented district names, composed from three syllables, sorted.

    Names are fictional by construction (syllable product); beyond 7,680 names a number is added.
    """
    n_combo = len(_FIRST) * len(_MIDDLE) * len(_LAST)
    picks = rng.choice(n_combo, size=min(n, n_combo), replace=False)
    i, rest = np.divmod(picks, len(_MIDDLE) * len(_LAST))
    j, k = np.divmod(rest, len(_LAST))
    names = [_FIRST[a] + _MIDDLE[b] + _LAST[c] for a, b, c in zip(i, j, k, strict=True)]
    names += [f"{names[m % len(names)]}-{m // len(names) + 1}" for m in range(len(names), n)]
    return sorted(names)


def draw_populations(
    n: int, rng: np.random.Generator, low: int = 40_000, high: int = 600_000
) -> np.ndarray:
    """Draw district populations log-uniformly in [low, high] (integers)."""
    return np.round(np.exp(rng.uniform(np.log(low), np.log(high), size=n))).astype(np.int64)


def gravity_mixing(
    populations: np.ndarray, rng: np.random.Generator, outside_share: float = 0.03,
    kernel_km: float = 15.0,
) -> np.ndarray:
    """Row-stochastic mixing matrix: ``1 - outside_share`` local contact, the rest by gravity.

    Districts get random positions (density of one per ~30x30 km); contact with district k is
    proportional to ``N_k / (distance^2 + kernel_km^2)``.  ``C[j, k]`` = share of j's contacts in k.
    """
    n = len(populations)
    if n == 1:
        return np.ones((1, 1))
    xy = rng.uniform(0.0, 30.0 * np.sqrt(n), size=(n, 2))
    d2 = ((xy[:, None, :] - xy[None, :, :]) ** 2).sum(axis=2)
    w = populations[None, :] / (d2 + kernel_km**2)
    np.fill_diagonal(w, 0.0)
    w *= outside_share / w.sum(axis=1, keepdims=True)
    w[np.diag_indices(n)] = 1.0 - outside_share
    return w


def final_size(r0: float, s0: float = 1.0) -> float:
    """Final attack fraction z solving ``1 - z = s0 * exp(-r0 * z)`` via the Lambert W function.

    With s0 = 1 this is the Kermack & McKendrick (1927) relation z = 1 - exp(-R0 z).
    """
    w = special.lambertw(-r0 * s0 * np.exp(-r0), k=0).real
    return float(1.0 + w / r0)


def stage_exit_probability(mean_days: float) -> float:
    """Daily exit probability of each of the two stages of a period with mean ``mean_days``."""
    if mean_days < 2.0:
        raise ValueError(f"period mean must be >= 2 days for two daily stages, got {mean_days}")
    return 2.0 / mean_days


def generation_interval_pmf(
    latent_days: float = 3.0, infectious_days: float = 5.0, max_days: int = 40
) -> np.ndarray:
    """Exact generation-interval pmf (index = days) of the discrete two-stage SEIR model.

    g(t) = P(infector counted in I on day t after its infection) / infectious_days; g(0) = 0.
    """
    pe, pi = stage_exit_probability(latent_days), stage_exit_probability(infectious_days)
    state = np.array([1.0, 0.0, 0.0, 0.0])  # E1, E2, I1, I2 at the start of day 1
    g = np.zeros(max_days + 1)
    for t in range(1, max_days + 1):
        g[t] = state[2] + state[3]
        state = np.array([
            state[0] * (1 - pe),
            state[0] * pe + state[1] * (1 - pe),
            state[1] * pe + state[2] * (1 - pi),
            state[2] * pi + state[3] * (1 - pi),
        ])
    return g / g.sum()


@dataclass(frozen=True)
class TransmissionSchedule:
    """Time-varying transmission: R0 per district, an intervention and a later relaxation.

    m_j(t) = 1 - drop_j * logistic((t - t_int_j)/ramp) + rise_j * logistic((t - t_rel_j)/ramp)
    """

    r0: float = 1.9
    intervention_day: float = 70.0
    intervention_drop: float = 0.5
    relaxation_day: float = 120.0
    relaxation_rise: float = 0.15
    ramp_days: float = 3.0
    district_r0_sd: float = 0.06
    district_effect_sd: float = 0.04
    district_timing_sd: float = 2.5

    def district_r0(self, n_regions: int, rng: np.random.Generator | None) -> np.ndarray:
        """Basic reproduction number per district (lognormal spread around ``r0``)."""
        if rng is None:
            return np.full(n_regions, self.r0)
        return self.r0 * np.exp(rng.normal(0.0, self.district_r0_sd, n_regions))

    def multiplier(
        self, n_days: int, n_regions: int, rng: np.random.Generator | None
    ) -> np.ndarray:
        """Contact multiplier, shape (n_days, n_regions); rng=None gives no district variation."""
        t = np.arange(n_days, dtype=float)[:, None]
        if rng is None:
            jit = np.zeros((4, n_regions))
        else:
            jit = rng.normal(0.0, 1.0, size=(4, n_regions))
        drop = np.clip(self.intervention_drop + self.district_effect_sd * jit[0], 0.0, 0.95)
        rise = np.clip(self.relaxation_rise + self.district_effect_sd * jit[1], 0.0, 0.95)
        t_int = self.intervention_day + self.district_timing_sd * jit[2]
        t_rel = self.relaxation_day + self.district_timing_sd * jit[3]
        return (
            1.0
            - drop * special.expit((t - t_int) / self.ramp_days)
            + rise * special.expit((t - t_rel) / self.ramp_days)
        )

    def beta(
        self, n_days: int, n_regions: int, infectious_days: float,
        rng: np.random.Generator | None = None,
    ) -> np.ndarray:
        """Daily transmission rate beta_j(t) = R0_j * multiplier_j(t) / infectious_days."""
        r0 = self.district_r0(n_regions, rng)
        return r0[None, :] * self.multiplier(n_days, n_regions, rng) / infectious_days


@dataclass
class EpidemicPath:
    """States (n_days + 1, R) at the start of each day and daily flows (n_days, R)."""

    populations: np.ndarray
    beta: np.ndarray
    infectious_days: float
    S: np.ndarray
    E1: np.ndarray
    E2: np.ndarray
    I1: np.ndarray
    I2: np.ndarray
    R: np.ndarray
    D: np.ndarray
    infections: np.ndarray
    onsets: np.ndarray
    removals: np.ndarray
    fatal: np.ndarray

    @property
    def total(self) -> np.ndarray:
        """S+E1+E2+I1+I2+R+D per day and district (equals the population)."""
        return self.S + self.E1 + self.E2 + self.I1 + self.I2 + self.R + self.D

    @property
    def rt(self) -> np.ndarray:
        """Instantaneous reproduction number beta(t) * S(t)/N * infectious_days, shape (T, R)."""
        return self.beta * self.S[:-1] / self.populations * self.infectious_days


class SeirdModel:
    """Chain-binomial SEIR-D with two latent and two infectious stages, over districts.

    ``simulate`` draws binomials; ``mean_field`` runs the same update with expected values.
    """

    def __init__(
        self, *, latent_days: float = 3.0, infectious_days: float = 5.0, ifr: float = 0.004
    ) -> None:
        self.latent_days = latent_days
        self.infectious_days = infectious_days
        self.ifr = ifr

    def simulate(
        self, populations: np.ndarray, beta: np.ndarray, seeds: np.ndarray,
        rng: np.random.Generator, mixing: np.ndarray | None = None,
    ) -> EpidemicPath:
        """Stochastic path; ``beta`` is (n_days, R), ``seeds`` = initial E1 per district."""
        return self._run(populations, beta, seeds, mixing, rng.binomial, np.int64)

    def mean_field(
        self, populations: np.ndarray, beta: np.ndarray, seeds: np.ndarray,
        mixing: np.ndarray | None = None,
    ) -> EpidemicPath:
        """Deterministic (expected-value) path of the same model."""
        return self._run(populations, beta, seeds, mixing, np.multiply, np.float64)

    def _run(
        self, populations: np.ndarray, beta: np.ndarray, seeds: np.ndarray,
        mixing: np.ndarray | None, draw: Callable, dtype: type,
    ) -> EpidemicPath:
        """Shared daily update; ``draw(n, p)`` is a binomial draw or its mean ``n * p``."""
        pop = np.asarray(populations, dtype=np.int64)
        beta = np.atleast_2d(np.asarray(beta, dtype=float))
        n_days, n = beta.shape
        pe = stage_exit_probability(self.latent_days)
        pi = stage_exit_probability(self.infectious_days)
        names = ("S", "E1", "E2", "I1", "I2", "R", "D")
        st = {k: np.zeros((n_days + 1, n), dtype=dtype) for k in names}
        flows: dict[str, np.ndarray] = {k: np.zeros((n_days, n), dtype=dtype) for k in
                 ("infections", "onsets", "removals", "fatal")}
        st["E1"][0] = np.asarray(seeds, dtype=dtype)
        st["S"][0] = pop - st["E1"][0]
        inv_pop = 1.0 / pop
        for t in range(n_days):
            s, e1, e2, i1, i2, r, d = (st[k][t] for k in names)
            prev = (i1 + i2) * inv_pop
            if mixing is not None:
                prev = mixing @ prev
            p_inf = -np.expm1(-beta[t] * prev)
            new_e = draw(s, p_inf)
            e1_e2, e2_i1 = draw(e1, pe), draw(e2, pe)
            i1_i2, out = draw(i1, pi), draw(i2, pi)
            dead = draw(out, self.ifr)
            st["S"][t + 1] = s - new_e
            st["E1"][t + 1] = e1 + new_e - e1_e2
            st["E2"][t + 1] = e2 + e1_e2 - e2_i1
            st["I1"][t + 1] = i1 + e2_i1 - i1_i2
            st["I2"][t + 1] = i2 + i1_i2 - out
            st["R"][t + 1] = r + out - dead
            st["D"][t + 1] = d + dead
            flows["infections"][t], flows["onsets"][t] = new_e, e2_i1
            flows["removals"][t], flows["fatal"][t] = out, dead
        return EpidemicPath(populations=pop, beta=beta, infectious_days=self.infectious_days,
                            **st, **flows)


def split_by_delay(counts: np.ndarray, pmf: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Multinomial split of integer counts (any shape) over delays: result shape + (len(pmf),)."""
    return rng.multinomial(np.asarray(counts, dtype=np.int64), pmf)


def spread_by_lag(counts: np.ndarray, pmf: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Move each event of ``counts`` (R, T) forward by a lag drawn from ``pmf``; drop past T."""
    parts = split_by_delay(counts, pmf, rng)
    out = np.zeros(counts.shape, dtype=np.int64)
    n_days = counts.shape[1]
    for lag in range(min(len(pmf), n_days)):
        out[:, lag:] += parts[:, : n_days - lag, lag]
    return out


class ReportingProcess:
    """Surveillance of an :class:`EpidemicPath`: ascertainment, clinical lags, reporting delays.

    Defaults are invented but plausible: cases 30 % of infections, reporting delay mean ~3 d
    (max 20); admissions 2 %, onset->admission mean ~4 d, reporting delay mean ~5 d (max 21);
    deaths all fatal outcomes, removal->death mean ~10 d, reporting delay mean ~8 d (max 28).
    """

    def __init__(
        self,
        *,
        case_probability: float = 0.3,
        admission_probability: float = 0.02,
        death_ascertainment: float = 1.0,
        weekend_factors: tuple[float, float] = (0.7, 0.6),
        case_delay: tuple[float, float, int] = (3.5, 2.5, 20),
        admission_delay: tuple[float, float, int] = (5.5, 3.5, 21),
        death_delay: tuple[float, float, int] = (8.5, 5.0, 28),
        onset_to_admission: tuple[float, float, int] = (4.5, 2.5, 14),
        removal_to_death: tuple[float, float, int] = (10.5, 6.0, 35),
        delay_drift: tuple[int, int, float] | None = None,
        tail_share: float = 0.0,
        tail_delay: tuple[float, float, int] = (50.0, 20.0, 150),
        closed_weekdays: tuple[int, ...] = (),
        holidays: tuple[int, ...] = (),
    ) -> None:
        self.case_probability = case_probability
        self.admission_probability = admission_probability
        self.death_ascertainment = death_ascertainment
        self.weekend_factors = weekend_factors
        self.case_delay = case_delay
        self.admission_delay = admission_delay
        self.death_delay = death_delay
        self.onset_to_admission = onset_to_admission
        self.removal_to_death = removal_to_death
        self.delay_drift = delay_drift
        self.tail_share = tail_share
        self.tail_delay = tail_delay
        self.closed_weekdays = closed_weekdays
        self.holidays = holidays

    def _delays(self) -> dict[str, tuple[float, float, int]]:
        return {"cases": self.case_delay, "admissions": self.admission_delay,
                "deaths": self.death_delay}

    def _pmf(self, delay: tuple[float, float, int], scale: float = 1.0) -> np.ndarray:
        """One signal's delay pmf with its time scale multiplied by ``scale`` (mean and sd), and
        the long-tail component mixed in when ``tail_share`` > 0."""
        mean, sd, max_days = delay
        pmf = gamma_delay_pmf(mean * scale, sd * scale, max_days)
        if self.tail_share <= 0:
            return pmf
        tail = gamma_delay_pmf(*self.tail_delay)
        out = np.zeros(max(pmf.size, tail.size))
        out[: pmf.size] += (1.0 - self.tail_share) * pmf
        out[: tail.size] += self.tail_share * tail
        return out

    def delay_pmfs(self) -> dict[str, np.ndarray]:
        """Reporting-delay pmf (index = days from reference date to report) per signal, before
        any drift (reference day 0)."""
        if self.tail_share <= 0:  # the original scenario, unchanged
            return {
                "cases": gamma_delay_pmf(*self.case_delay),
                "admissions": gamma_delay_pmf(*self.admission_delay),
                "deaths": gamma_delay_pmf(*self.death_delay),
            }
        return {sig: self._pmf(d) for sig, d in self._delays().items()}

    def delay_scale(self, n_days: int) -> np.ndarray:
        """Time scale of the reporting delay per reference day, shape (n_days,): 1 before
        ``delay_drift[0]``, ``delay_drift[2]`` after ``delay_drift[1]``, log-linear between."""
        if self.delay_drift is None:
            return np.ones(n_days)
        start, end, factor = self.delay_drift
        frac = np.clip((np.arange(n_days) - start) / max(end - start, 1), 0.0, 1.0)
        return np.exp(np.log(factor) * frac)

    def delay_pmf_path(self, signal: str, n_days: int) -> np.ndarray:
        """The delay pmf of each reference day, shape (n_days, max delay + 1).  Scaling the
        mean and sd of a gamma together keeps its shape: only the time scale drifts."""
        scale = self.delay_scale(n_days)
        levels, inverse = np.unique(scale, return_inverse=True)
        pmfs = [self._pmf(self._delays()[signal], float(f)) for f in levels]
        width = max(p.size for p in pmfs)
        table = np.zeros((len(pmfs), width))
        for i, p in enumerate(pmfs):
            table[i, : p.size] = p
        return table[inverse]

    def closed_report_days(self, n_report_days: int, first_weekday: int) -> np.ndarray:
        """Which report days (day 0 = first simulated day) have no reporting at all."""
        day = np.arange(n_report_days)
        closed = np.isin((first_weekday + day) % 7, np.asarray(self.closed_weekdays, dtype=int))
        hol = np.asarray(self.holidays, dtype=int)
        closed[hol[(hol >= 0) & (hol < n_report_days)]] = True
        return closed

    def clinical_pmfs(self) -> dict[str, np.ndarray]:
        """Lags from the epidemic event to the reference date (onset->admission, removal->death)."""
        return {
            "onset_to_admission": gamma_delay_pmf(*self.onset_to_admission),
            "removal_to_death": gamma_delay_pmf(*self.removal_to_death),
        }

    def weekend_shift(
        self, counts: np.ndarray, first_weekday: int, rng: np.random.Generator
    ) -> np.ndarray:
        """Move the untested share of Saturday/Sunday counts (R, T) to the following Monday."""
        out = counts.copy()
        n_days = counts.shape[1]
        weekday = (first_weekday + np.arange(n_days)) % 7
        for wd, factor, shift in ((5, self.weekend_factors[0], 2), (6, self.weekend_factors[1], 1)):
            days = np.flatnonzero(weekday == wd)
            moved = rng.binomial(counts[:, days], 1.0 - factor)
            out[:, days] -= moved
            keep = days + shift < n_days
            out[:, days[keep] + shift] += moved[:, keep]
        return out

    def reference_counts(
        self, path: EpidemicPath, first_weekday: int, rng: np.random.Generator
    ) -> dict[str, np.ndarray]:
        """Eventual reported counts per (district, reference day), shape (R, T), per signal."""
        onsets = np.asarray(path.onsets, dtype=np.int64).T
        fatal = np.asarray(path.fatal, dtype=np.int64).T
        clin = self.clinical_pmfs()
        cases = self.weekend_shift(rng.binomial(onsets, self.case_probability), first_weekday, rng)
        admitted = spread_by_lag(rng.binomial(onsets, self.admission_probability),
                                 clin["onset_to_admission"], rng)
        deaths = spread_by_lag(rng.binomial(fatal, self.death_ascertainment),
                               clin["removal_to_death"], rng)
        return {"cases": cases, "admissions": admitted, "deaths": deaths}

    def observe(
        self, path: EpidemicPath, first_weekday: int, rng: np.random.Generator
    ) -> dict[str, np.ndarray]:
        """Triangles ``tri[r, t, d]`` (reports for day t arriving on day t+d) by signal."""
        pmfs = self.delay_pmfs()
        ref = self.reference_counts(path, first_weekday, rng)
        if self.delay_drift is None:
            out = {sig: split_by_delay(ref[sig], pmfs[sig], rng) for sig in ref}
        else:
            n_days = ref["cases"].shape[1]
            out = {sig: split_by_delay(ref[sig], self.delay_pmf_path(sig, n_days), rng)
                   for sig in ref}
        if self.closed_weekdays or self.holidays:
            for sig, tri in out.items():
                n_rep = tri.shape[1] + tri.shape[2] + 14
                out[sig] = move_to_open_days(tri, self.closed_report_days(n_rep, first_weekday))
        return out


def move_to_open_days(tri: np.ndarray, closed: np.ndarray) -> np.ndarray:
    """Reports due on a closed report day (weekend, holiday) arrive on the next open day.

    ``tri[r, t, d]`` reports of reference day t at delay d are due on report day t + d;
    ``closed`` flags report days (index 0 = reference day 0, long enough to cover t + d).
    The delay axis grows by the longest closure so nothing is lost.
    """
    n_t, k = tri.shape[1], tri.shape[2]
    closed = np.asarray(closed, dtype=bool)
    next_open = np.full(closed.size, closed.size, dtype=np.int64)
    nxt = closed.size
    for day in range(closed.size - 1, -1, -1):  # next open day at or after each day
        if not closed[day]:
            nxt = day
        next_open[day] = nxt
    shift = next_open - np.arange(closed.size)
    due = np.arange(n_t)[:, None] + np.arange(k)[None, :]
    if due.max() >= closed.size:
        raise ValueError("closed must cover every report day t + d")
    s = shift[due]
    out = np.zeros(tri.shape[:2] + (k + int(s.max()),), dtype=tri.dtype)
    for step in np.unique(s):
        tt, dd = np.nonzero(s == step)
        out[:, tt, dd + step] += tri[:, tt, dd]
    return out


#: Named reporting scenarios of the simulator (built by :func:`reporting_scenario`).
SCENARIOS: dict[str, str] = {
    "default": "stationary signal-specific delays; weekend testing shortfall by reference date",
    "delay_lengthens": "every signal's delay slows from mean 4 d (sd 3) to 8 d (sd 6) over the "
                       "six weeks before the last fortnight",
    "delay_shortens": "every signal's delay speeds up from mean 8 d (sd 6) to 4 d (sd 3) over "
                      "the six weeks before the last fortnight",
    "weekend_reporting": "nothing is reported on Saturdays, Sundays and two weekday holidays; "
                         "those reports arrive on the next working day",
    "long_tail": "a quarter of every signal's reports come late (mean 50 d, sd 20): over 20 % "
                 "of the delay mass lies beyond 28 days",
}


def reporting_scenario(name: str, n_days: int = 200, first_weekday: int = 0
                       ) -> ReportingProcess:
    """The reporting process of a named scenario (:data:`SCENARIOS`); the epidemic is the same.

    Changes are placed relative to the last simulated day L = n_days - 1: drifts ramp over
    reference days L - 55 .. L - 14; holidays fall on the weekdays nearest L - 9 and L - 37.
    """
    last = n_days - 1
    if name == "default":
        return ReportingProcess()
    if name in ("delay_lengthens", "delay_shortens"):
        base, factor = ((4.0, 3.0, 28), 2.0) if name == "delay_lengthens" else ((8.0, 6.0, 28), 0.5)
        return ReportingProcess(case_delay=base, admission_delay=base, death_delay=base,
                                delay_drift=(last - 55, last - 14, factor))
    if name == "weekend_reporting":
        days = []
        for target in (last - 9, last - 37):
            day = target
            while (first_weekday + day) % 7 >= 5:
                day -= 1
            days.append(day)
        return ReportingProcess(closed_weekdays=(5, 6), holidays=tuple(days))
    if name == "long_tail":
        return ReportingProcess(tail_share=0.25)
    raise ValueError(f"unknown scenario {name!r}; choose one of {', '.join(SCENARIOS)}")


def inject_backlog_dump(
    tri: np.ndarray, region: int, day: int, rng: np.random.Generator,
    span: int = 9, share: float = 0.9,
) -> tuple[np.ndarray, int]:
    """Hold back ``share`` of one district's reports for the ``span`` days before ``day`` and
    publish them all with reference date ``day`` (delay 0).  Returns (new triangle, moved count)."""
    out = tri.copy()
    max_d = tri.shape[2] - 1
    moved = 0
    for t in range(max(0, day - span), day):
        d_hi = min(day - t, max_d)
        held = rng.binomial(out[region, t, : d_hi + 1], share)
        out[region, t, : d_hi + 1] -= held
        moved += int(held.sum())
    out[region, day, 0] += moved
    return out, moved


def inject_duplicate_correction(
    tri: np.ndarray, region: int, day: int, rng: np.random.Generator, span: int = 14,
) -> tuple[np.ndarray, int]:
    """Duplicate some of one district's reports over ``span`` days, then remove them all on
    ``day`` (delay 0), so that day's increment is negative.  Returns (new triangle, removed)."""
    out = tri.copy()
    max_d = tri.shape[2] - 1
    lo = max(0, day - span)
    arrived = [out[region, t, : min(day - t, max_d) + 1] for t in range(lo, day)]
    total_arrived = sum(int(a.sum()) for a in arrived)
    final_today = int(tri[region, day].sum())
    share = float(np.clip(2.0 * final_today / max(total_arrived, 1), 0.1, 0.9))
    removed = 0
    for t, a in zip(range(lo, day), arrived, strict=True):
        dup = rng.binomial(a, share)
        out[region, t, : len(a)] += dup
        removed += int(dup.sum())
    if removed <= final_today:  # guarantee a negative day whatever the draws
        out[region, day - 1, 0] += final_today + 1 - removed
        removed = final_today + 1
    out[region, day, 0] -= removed
    return out, removed


def vintage(cum_tri: np.ndarray, as_of: int, first: int) -> np.ndarray:
    """Daily values for reference days first..as_of as known on ``as_of``, shape (R, W).

    ``cum_tri`` is the reporting triangle cumulated over the delay axis.
    """
    t = np.arange(first, as_of + 1)
    d = np.minimum(as_of - t, cum_tri.shape[2] - 1)
    return cum_tri[:, t, d]


def cumulative_vintage(
    cum_tri: np.ndarray, final_cum: np.ndarray, as_of: int, first: int
) -> np.ndarray:
    """Cumulative totals (from day 0) for reference days first..as_of as known on ``as_of``.

    ``final_cum`` is the cumsum over days of the eventual daily counts, shape (R, T).
    """
    start = max(0, min(first, as_of - cum_tri.shape[2] + 1))
    base = final_cum[:, start - 1] if start > 0 else np.zeros(cum_tri.shape[0], dtype=np.int64)
    known = np.cumsum(vintage(cum_tri, as_of, start), axis=1) + base[:, None]
    return known[:, first - start:]


def artefact_window(n_days: int, n_snapshots: int, window: int) -> tuple[int, int]:
    """Range of days where artefacts are placed: visible in the last snapshot, after the first."""
    last, first_asof = n_days - 1, n_days - n_snapshots
    lo, hi = max(15, last - window + 2), last - 3
    if max(lo, first_asof + 1) <= hi:
        lo = max(lo, first_asof + 1)
    if lo > hi:
        raise ValueError("scenario too short for artefacts: need n_days >= 30 and window >= 6")
    return lo, hi


#: Options added after the demo set was committed, with their neutral values: left out of the
#: recorded parameters when neutral, so the default scenario's files stay byte-identical.
_NEW_OPTIONS: dict[str, object] = {"delay_drift": None, "tail_share": 0.0,
                                   "tail_delay": (50.0, 20.0, 150), "closed_weekdays": (),
                                   "holidays": ()}


@dataclass
class OutbreakScenario:
    """A whole simulated scenario: districts, epidemic path, clean and published triangles."""

    names: list[str]
    populations: np.ndarray
    seeds: np.ndarray
    mixing: np.ndarray
    path: EpidemicPath
    triangles: dict[str, np.ndarray]
    published: dict[str, np.ndarray]
    delay_pmfs: dict[str, np.ndarray]
    clinical_pmfs: dict[str, np.ndarray]
    generation_interval: np.ndarray
    artefacts: list[dict] = field(default_factory=list)
    parameters: dict = field(default_factory=dict)


def simulate_outbreak(
    *, n_regions: int = 10, n_days: int = 200, n_snapshots: int = 60, window: int = 42,
    seed: int = 20260302, first_weekday: int = 0,
    model: SeirdModel | None = None, schedule: TransmissionSchedule | None = None,
    reporting: ReportingProcess | None = None, outside_share: float = 0.03,
    seeds_per_district: int = 20,
) -> OutbreakScenario:
    """Simulate the invented province: epidemic, surveillance and the three injected artefacts.

    ``first_weekday`` is the weekday of day 0 (Monday = 0).  Independent random streams are spawned
    from ``seed`` for districts, transmission, epidemic, reporting and artefacts.
    """
    if n_regions < 1 or n_days < 30 or not 1 <= n_snapshots <= n_days or window < 6:
        raise ValueError("need n_regions >= 1, n_days >= 30, 1 <= n_snapshots <= n_days, "
                         "window >= 6")
    model = model or SeirdModel()
    schedule = schedule or TransmissionSchedule()
    reporting = reporting or ReportingProcess()
    g_names, g_trans, g_epi, g_rep, g_art = (
        np.random.default_rng(s) for s in np.random.SeedSequence(seed).spawn(5))

    names = invent_district_names(n_regions, g_names)
    pops = draw_populations(n_regions, g_names)
    mixing = gravity_mixing(pops, g_names, outside_share=outside_share)
    n_seeded = 1 if n_regions < 4 else 2
    seeds = np.zeros(n_regions, dtype=np.int64)
    seeds[g_names.choice(n_regions, size=n_seeded, replace=False)] = seeds_per_district
    beta = schedule.beta(n_days, n_regions, model.infectious_days, g_trans)
    path = model.simulate(pops, beta, seeds, g_epi, mixing=mixing)
    tri = reporting.observe(path, first_weekday, g_rep)

    lo, hi = artefact_window(n_days, n_snapshots, window)
    cases_final = tri["cases"].sum(axis=2)
    order = np.argsort(-cases_final[:, lo: hi + 1].sum(axis=1), kind="stable")
    r_corr, r_dump, r_miss = (int(order[i % n_regions]) for i in range(3))
    t_dump = lo + round(0.15 * (hi - lo))
    t_corr = lo + round(0.5 * (hi - lo))
    t_miss = lo + round(0.85 * (hi - lo))
    pub_cases, moved = inject_backlog_dump(tri["cases"], r_dump, t_dump, g_art)
    pub_cases, removed = inject_duplicate_correction(pub_cases, r_corr, t_corr, g_art)
    artefacts = [
        {"region": r_dump, "signal": "cases", "day": t_dump, "kind": "backlog_dump",
         "delta": moved,
         "detail": f"90% of the reports for the 9 previous days held back and published on "
                   f"this day ({moved} reports)"},
        {"region": r_corr, "signal": "cases", "day": t_corr, "kind": "negative_correction",
         "delta": -removed,
         "detail": f"{removed} duplicate reports accumulated over 14 days removed on this day"},
        {"region": r_miss, "signal": "cases", "day": t_miss, "kind": "missing_day",
         "delta": int(cases_final[r_miss, t_miss]),
         "detail": "row absent from every cases snapshot; next day's cumulative total covers both"},
    ]
    published = {"cases": pub_cases, "admissions": tri["admissions"], "deaths": tri["deaths"]}
    params = {
        "seed": seed, "n_regions": n_regions, "n_days": n_days, "n_snapshots": n_snapshots,
        "window": window, "first_weekday": first_weekday, "outside_share": outside_share,
        "seeds_per_district": seeds_per_district,
        "model": dict(vars(model)), "schedule": dict(vars(schedule)),
        "reporting": {k: list(v) if isinstance(v, tuple) else v
                      for k, v in vars(reporting).items() if k not in _NEW_OPTIONS
                      or getattr(reporting, k) != _NEW_OPTIONS[k]},
    }
    return OutbreakScenario(
        names=names, populations=pops, seeds=seeds, mixing=mixing, path=path, triangles=tri,
        published=published, delay_pmfs=reporting.delay_pmfs(),
        clinical_pmfs=reporting.clinical_pmfs(),
        generation_interval=generation_interval_pmf(model.latent_days, model.infectious_days),
        artefacts=artefacts, parameters=params,
    )
