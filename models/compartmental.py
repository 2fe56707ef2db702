"""S-E-I-R-D compartmental model with time-varying transmission, fitted to reported counts.

Pure mathematics (numpy/scipy in, arrays out).  Three layers:

* ``simulate`` / ``seird_rhs``: the transmission model itself.  Compartments S, E, I, R, D with
  flows S->E at beta(t) S I / N, E->I at 1/latent_days, I->R at (1-ifr)/infectious_days and
  I->D at ifr/infectious_days.  ``latent_days == 0`` routes new infections straight into I (SIR
  shape); ``ifr == 0`` gives no deaths (SEIR / SIR).  Many regions step together: states are
  arrays (n_regions, 5) and transmission paths (n_regions, n_days), beta held constant within a
  day.  Steppers: explicit Euler with step ``dt`` (dt = 1 day is common practice in operational
  models) and classic fourth-order Runge-Kutta.
* ``gamma_delay_pmf`` / ``expected_reports``: observation model.  The expected reported series of
  a signal is fraction x (daily new infections convolved with an infection-to-report delay pmf).
* ``CompartmentalModel``: fits weekly transmission, slowly changing reporting fractions and the
  initial size of the epidemic to the last W weeks of any subset of the signals ``cases``,
  ``admissions`` and ``deaths`` by penalised negative-binomial maximum likelihood, for many
  regions at once (the susceptible pool starts from the whole reported history and any known
  immunity), and forecasts quantiles with parameter uncertainty (Laplace), transmission drift
  and count noise, optionally under a scenario's change of transmission.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import optimize, special

from tallywave.models.base import QuantileForecast, SeriesRandom
from tallywave.models.damping import damping_ratios
from tallywave.models.distributions import gamma_delay_pmf

SIGNALS: tuple[str, ...] = ("cases", "admissions", "deaths")
DEFAULT_QUANTILES: tuple[float, ...] = (0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975)
COMPARTMENTS: tuple[str, ...] = ("S", "E", "I", "R", "D")

# Bounds on the transformed parameters (also keep the optimiser out of absurd regions).
_LOG_BETA_BOUNDS = (math.log(1e-3), math.log(5.0))
_LOG_FRACTION_BOUNDS = (math.log(1e-6), 0.0)  # a fraction lies in (0, 1]
_LOG_I0_LOWER = math.log(1e-3)
_LOG_DISP_BOUNDS = (math.log(0.3), math.log(1e4))


# --------------------------------------------------------------------------------------------
# Transmission model
# --------------------------------------------------------------------------------------------


def seird_rhs(
    t: float,
    y: np.ndarray,
    beta: Any,
    latent_days: float,
    infectious_days: float,
    ifr: float = 0.0,
) -> np.ndarray:
    """Right-hand side of the S-E-I-R-D ODE for one region; for reference integrators (solve_ivp).

    ``beta`` is a number or a callable beta(t).  With ``latent_days == 0`` infections enter I
    directly and E must be zero.
    """
    s, e, i, r, d = (float(v) for v in y)
    n = s + e + i + r + d
    b = float(beta(t)) if callable(beta) else float(beta)
    inf = b * s * i / n
    gamma = 1.0 / infectious_days
    if latent_days > 0:
        ons = e / latent_days
        de = inf - ons
    else:
        ons = inf
        de = 0.0
    out = gamma * i
    return np.array([-inf, de, ons - out, (1.0 - ifr) * out, ifr * out])


@dataclass
class SimulationResult:
    """Output of ``simulate``: compartments at day boundaries and flows integrated over each day."""

    compartments: np.ndarray  # (n_regions, n_days + 1, 5): S, E, I, R, D at the start of day t
    new_infections: np.ndarray  # (n_regions, n_days): S->E flow during day t
    new_onsets: np.ndarray  # (n_regions, n_days): flow into I (E->I, or S->I if latent 0)
    new_deaths: np.ndarray  # (n_regions, n_days): I->D flow during day t


def _substeps(dt: float) -> int:
    """Number of steps per day for step size ``dt``; ``dt`` must divide one day."""
    if not (dt > 0 and math.isfinite(dt)):
        raise ValueError(f"dt must be positive, got {dt}")
    n_sub = round(1.0 / dt)
    if n_sub < 1 or abs(n_sub * dt - 1.0) > 1e-9:
        raise ValueError(f"dt must divide one day (1/dt an integer), got dt={dt}")
    return n_sub


def _integrate(
    state: np.ndarray,
    beta: np.ndarray,
    sigma: np.ndarray | float,
    gamma: np.ndarray | float,
    ifr: np.ndarray | float,
    direct: np.ndarray | float,
    method: str,
    n_sub: int,
    record: bool = False,
    full: bool = True,
    want_s: bool = False,
) -> tuple[np.ndarray | None, np.ndarray, np.ndarray | None, np.ndarray | None, np.ndarray | None]:
    """Step many rows together; return (states, infections, onsets, deaths, S path).

    ``state`` (M, 5); ``beta`` (M, n_days); ``direct`` is 1.0 where latent period is zero.
    States are returned only with ``record``, onsets and deaths only with ``full`` (R and D do
    not feed back, so the fitting path skips them), the S path only with ``want_s``.  Euler caps
    each outflow at the content of its compartment, which only binds for steps far too long
    for the rates (keeps counts non-negative).  RK4 combines the four stage flows first, which
    is algebraically identical to classic RK4 on the full state and integrates the daily flows
    to the same order.
    """
    if method not in ("euler", "rk4"):
        raise ValueError(f"method must be 'euler' or 'rk4', got {method!r}")
    m, n_days = beta.shape
    s, e, i, r, d = (state[:, k].astype(float).copy() for k in range(5))
    inv_n = 1.0 / (s + e + i + r + d)
    nd = 1.0 - direct
    h = 1.0 / n_sub
    sig_h = sigma * h
    gam_h = gamma * h
    inc = np.empty((m, n_days))
    ons = np.empty((m, n_days)) if full else None
    dth = np.empty((m, n_days)) if full else None
    s_path = np.empty((m, n_days)) if want_s else None
    states = np.empty((m, n_days + 1, 5)) if record else None
    if states is not None:
        states[:, 0] = np.stack([s, e, i, r, d], axis=1)
    for t in range(n_days):
        lam = beta[:, t] * inv_n
        lam_h = lam * h
        if s_path is not None:
            s_path[:, t] = s
        c_inf: Any = 0.0
        c_ons: Any = 0.0
        c_dth: Any = 0.0
        for _ in range(n_sub):
            if method == "euler":
                f_inf = lam_h * s * i
                np.minimum(f_inf, s, out=f_inf)
                f_ons = sig_h * e
                np.minimum(f_ons, e, out=f_ons)
                f_out = gam_h * i
                np.minimum(f_out, i, out=f_out)
            else:
                fi1 = lam * s * i
                fo1 = sigma * e
                fx1 = gamma * i
                hh = 0.5 * h
                s2 = s - hh * fi1
                e2 = e + hh * (nd * fi1 - fo1)
                i2 = i + hh * (direct * fi1 + fo1 - fx1)
                fi2 = lam * s2 * i2
                fo2 = sigma * e2
                fx2 = gamma * i2
                s3 = s - hh * fi2
                e3 = e + hh * (nd * fi2 - fo2)
                i3 = i + hh * (direct * fi2 + fo2 - fx2)
                fi3 = lam * s3 * i3
                fo3 = sigma * e3
                fx3 = gamma * i3
                s4 = s - h * fi3
                e4 = e + h * (nd * fi3 - fo3)
                i4 = i + h * (direct * fi3 + fo3 - fx3)
                fi4 = lam * s4 * i4
                fo4 = sigma * e4
                fx4 = gamma * i4
                w = h / 6.0
                f_inf = w * (fi1 + 2.0 * fi2 + 2.0 * fi3 + fi4)
                f_ons = w * (fo1 + 2.0 * fo2 + 2.0 * fo3 + fo4)
                f_out = w * (fx1 + 2.0 * fx2 + 2.0 * fx3 + fx4)
            into_i = direct * f_inf + f_ons
            s = s - f_inf
            e = e + nd * f_inf - f_ons
            i = i + into_i - f_out
            c_inf = c_inf + f_inf
            if full:
                f_dth = ifr * f_out
                r = r + (f_out - f_dth)
                d = d + f_dth
                c_ons = c_ons + into_i
                c_dth = c_dth + f_dth
        inc[:, t] = c_inf
        if ons is not None and dth is not None:
            ons[:, t] = c_ons
            dth[:, t] = c_dth
        if states is not None:
            states[:, t + 1] = np.stack([s, e, i, r, d], axis=1)
    return states, inc, ons, dth, s_path


def _as_region_param(value: Any, n: int, name: str) -> np.ndarray:
    """Broadcast a scalar or (n,) parameter to (n,) floats."""
    arr = np.asarray(value, dtype=float)
    if arr.ndim == 0:
        return np.full(n, float(arr))
    if arr.shape != (n,):
        raise ValueError(f"{name} must be a scalar or have shape ({n},), got {arr.shape}")
    return arr


def simulate(
    initial_state: np.ndarray,
    beta: np.ndarray,
    *,
    latent_days: float | np.ndarray = 3.0,
    infectious_days: float | np.ndarray = 5.0,
    ifr: float | np.ndarray = 0.0,
    method: str = "euler",
    dt: float = 1.0,
) -> SimulationResult:
    """Integrate the S-E-I-R-D model for many regions at once (beta constant within each day).

    ``initial_state``: (5,) or (n_regions, 5) counts S, E, I, R, D; N is their sum (conserved).
    ``beta``: (n_days,) or (n_regions, n_days) transmission rate per day.  Epidemiological
    parameters are scalars or (n_regions,).  Outputs always carry the region axis.  With
    ``latent_days == 0`` any initial E is moved into I.
    """
    state = np.atleast_2d(np.asarray(initial_state, dtype=float))
    b = np.atleast_2d(np.asarray(beta, dtype=float))
    if state.shape[1] != 5:
        raise ValueError(f"initial_state must have 5 columns (S,E,I,R,D), got {state.shape}")
    n = max(state.shape[0], b.shape[0])
    if state.shape[0] == 1 and n > 1:
        state = np.repeat(state, n, axis=0)
    if b.shape[0] == 1 and n > 1:
        b = np.repeat(b, n, axis=0)
    if state.shape[0] != n or b.shape[0] != n:
        raise ValueError("initial_state and beta disagree on the number of regions")
    lat = _as_region_param(latent_days, n, "latent_days")
    dur = _as_region_param(infectious_days, n, "infectious_days")
    f = _as_region_param(ifr, n, "ifr")
    if np.any(lat < 0) or np.any(dur <= 0) or np.any((f < 0) | (f > 1)):
        raise ValueError("need latent_days >= 0, infectious_days > 0 and 0 <= ifr <= 1")
    direct = (lat <= 0).astype(float)
    sigma = np.where(lat > 0, 1.0 / np.where(lat > 0, lat, 1.0), 0.0)
    state = state.copy()
    state[:, 2] += direct * state[:, 1]
    state[:, 1] *= 1.0 - direct
    states, inc, ons, dth, _ = _integrate(
        state, b, sigma, 1.0 / dur, f, direct, method, _substeps(dt), record=True
    )
    assert states is not None and ons is not None and dth is not None
    return SimulationResult(states, inc, ons, dth)


def expected_reports(
    new_infections: np.ndarray, fraction: float | np.ndarray, kernel: np.ndarray
) -> np.ndarray:
    """Expected reported counts = fraction x (daily infections convolved with a delay pmf).

    ``new_infections`` (..., n_days); infections before day 0 are taken as zero;
    ``fraction`` broadcasts against the leading axes.
    """
    x = np.asarray(new_infections, dtype=float)
    k = np.asarray(kernel, dtype=float)
    n_days = x.shape[-1]
    out = np.zeros_like(x)
    for lag in range(min(len(k), n_days)):
        out[..., lag:] += k[lag] * x[..., : n_days - lag]
    frac = np.asarray(fraction, dtype=float)
    return out * frac[..., None] if frac.ndim else out * float(frac)


def _rows_dot(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``a @ b`` computed row by row in the same order whatever the number of rows.

    A BLAS matrix product rounds a row differently depending on where it falls in the blocks
    of the product, so a region's fit would depend on the regions batched with it (by ~1e-16,
    which an optimiser can grow to 1e-8).  ``numpy.einsum`` without optimisation does not.
    """
    return np.einsum("mk,kt->mt", a, b)


def _delay_matrix(kernel: np.ndarray, n_sim: int, start: int, n_out: int) -> np.ndarray:
    """Matrix C (n_sim, n_out) with (infections @ C)[:, j] = sum_d kernel[d] inf[start + j - d]."""
    rows = np.arange(n_sim)[:, None]
    cols = start + np.arange(n_out)[None, :]
    lag = cols - rows
    ok = (lag >= 0) & (lag < len(kernel))
    return np.where(ok, kernel[np.clip(lag, 0, len(kernel) - 1)], 0.0)


# --------------------------------------------------------------------------------------------
# Negative-binomial pieces
# --------------------------------------------------------------------------------------------


def _nb_loglik(y: np.ndarray, mu: np.ndarray, k: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """Negative-binomial (mean mu, dispersion k) log-likelihood summed over the last two axes."""
    mu = np.maximum(mu, 1e-10)
    ll = (
        special.gammaln(y + k)
        - special.gammaln(k)
        - special.gammaln(y + 1.0)
        - k * np.log1p(mu / k)
        + special.xlogy(y, mu / (k + mu))
    )
    return np.where(mask > 0, ll, 0.0).sum(axis=(-2, -1))


def _nb_by_day(rnd: SeriesRandom, mu: np.ndarray, k: np.ndarray) -> np.ndarray:
    """Negative-binomial counts (gamma-Poisson; variance mu + mu^2/k) for ``mu`` (R, D, S, H)
    with sizes ``k`` (R, S), one stream per region, drawn **day-major**: a day's draws use the
    same random numbers whatever later days hold (the gamma variates depend on k only, the
    Poisson ones are taken day by day), so a scenario that changes transmission from some day
    on shares every earlier draw with the forecast."""
    out = np.empty(mu.shape)
    for r, gen in enumerate(rnd.gens):
        day_major = np.ascontiguousarray(np.moveaxis(mu[r], -1, 0))  # (H, D, S)
        g = gen.gamma(np.broadcast_to(k[r], day_major.shape), 1.0)
        lam = g * day_major / k[r]
        out[r] = np.moveaxis(gen.poisson(lam), 0, -1)
    return out


def _safe_solve(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Batched solve a x = b (b (..., P)); a singular matrix falls back to least squares on its
    own (the others keep the exact solve, so a region's answer never depends on its batch)."""
    try:
        return np.linalg.solve(a, b[..., None])[..., 0]
    except np.linalg.LinAlgError:
        out = np.empty_like(b)
        for j in range(a.shape[0]):
            try:
                out[j] = np.linalg.solve(a[j], b[j])
            except np.linalg.LinAlgError:
                out[j] = np.linalg.lstsq(a[j], b[j], rcond=None)[0]
        return out


# --------------------------------------------------------------------------------------------
# The fitted model
# --------------------------------------------------------------------------------------------


@dataclass
class _Layout:
    """Everything fixed during one fit: data in the window, parameter layout, priors, bounds."""

    signals: list[str]
    frac_signals: list[str]  # signals whose reporting fraction is estimated
    n_regions: int
    n_fit: int
    n_burn: int
    knot_days: int
    n_knots: int
    knot_of_day: np.ndarray
    n_fknots: int  # knots of each estimated fraction (1 = constant over the window)
    finterp: np.ndarray  # (n_fit, n_fknots) linear interpolation of the fraction knots
    kernels: dict[str, np.ndarray]
    y: np.ndarray  # (R, S, n_fit), missing -> 0
    mask: np.ndarray  # (R, S, n_fit) 1.0 where observed
    population: np.ndarray  # (R,)
    hist: np.ndarray  # (R,) counts of the primary signal reported before the model's start
    immune: np.ndarray  # (R,) people immune before the model's start (besides ``hist``)
    primary: str
    prior_mean: np.ndarray  # (R, P)
    prior_prec: np.ndarray  # (P, P)
    lower: np.ndarray  # (R, P)
    upper: np.ndarray  # (R, P)
    delay_cache: dict[tuple[int, bool], dict[str, np.ndarray]] = field(default_factory=dict)

    @property
    def n_params(self) -> int:
        """Number of transformed parameters per region."""
        return self.n_knots + len(self.frac_signals) * self.n_fknots + 1

    def frac_slice(self, signal: str) -> slice:
        """Columns of one estimated fraction's knots in the parameter vector."""
        j = self.frac_signals.index(signal)
        lo = self.n_knots + j * self.n_fknots
        return slice(lo, lo + self.n_fknots)

    def ode_params(self) -> np.ndarray:
        """Parameters the transmission model itself depends on (the rest enter only the
        observation model): transmission knots, initial infections, and the primary signal's
        first fraction knot, which turns its reported history into people already infected."""
        idx = list(range(self.n_knots))
        if self.primary in self.frac_signals:  # (whatever the regions batched together)
            idx.append(self.frac_slice(self.primary).start)
        idx.append(self.n_params - 1)
        return np.array(idx)


def _fraction_knots(n_fit: int, spacing: int) -> np.ndarray:
    """Linear interpolation matrix (n_fit, K) for fraction knots ``spacing`` days apart, the
    last on the last data day (K = 1: one constant fraction)."""
    if spacing <= 0 or n_fit <= spacing:
        return np.ones((n_fit, 1))
    n_k = math.ceil((n_fit - 1) / spacing) + 1
    pos = (n_fit - 1) - spacing * np.arange(n_k - 1, -1, -1)
    t = np.arange(n_fit, dtype=float)
    eye = np.eye(n_k)
    return np.stack([np.interp(t, pos, eye[k]) for k in range(n_k)], axis=1)


class CompartmentalModel:
    """S-E-I-R-D model fitted to reported counts of many regions at once; forecasts quantiles.

    Parameters per region (transformed scale): log beta per knot (weekly by default, aligned so
    the last knot ends on the last data day); the log reporting fraction of every supplied
    signal whose ``fraction_prior_sd`` is not 0 (cases and admissions: share of infections
    reported; deaths: infection fatality × ascertainment), as knots ``fraction_knot_days`` apart
    joined linearly, so a fraction may change slowly; log initial daily infections; one log
    negative-binomial dispersion per signal.  A fraction with prior sd 0 is held at its default
    (e.g. a known infection fatality ratio, which then fixes the absolute scale).

    Objective (``objective_``, per region, nats): negative-binomial negative log-likelihood of
    the last ``window_weeks`` weeks of every supplied signal plus Gaussian penalties: a random
    walk on log beta between knots (sd ``smooth_sd``), log beta of the first knot around R = 1
    (sd 1), each fraction's first knot around its default (sd ``fraction_prior_sd``), a random
    walk between its knots (sd ``fraction_drift_sd``), log dispersion around log 20 (sd 2.5) and
    a very weak one (sd 10) on log initial infections.

    The model starts ``n_burn`` days before the window (the longest delay kernel) with the first
    knot's beta, from the exponentially growing (or declining) state implied by that beta.  The
    people already infected before that start are ``immune`` plus the counts of the signal whose
    fraction is best known (smallest ``fraction_prior_sd``) reported before it (``prior_counts``,
    the whole history, plus the days of ``observed`` before the start) divided by its fraction;
    without ``susceptible_from_history`` everybody starts susceptible.

    Optimiser ``"scoring"`` (default): Levenberg-Marquardt-damped Fisher scoring (Gauss-Newton
    for the negative-binomial likelihood) run for all regions together, each with its own
    damping, alternating with Newton steps for the dispersions.  The Jacobian is a forward
    difference for the parameters of the transmission model (parameter j of every region in one
    vectorised model run) and exact for the fraction knots, which only scale the observations.
    ``"lbfgsb"``: scipy's L-BFGS-B on the summed objective (slower; kept as a cross-check).  A
    region has converged when its Gauss-Newton decrement is below ``tol`` nats.

    Stepping: ``method="rk4"`` (default; with dt = 1 its growth rate and peak day agree with a
    ``scipy.integrate.solve_ivp`` reference to < 1e-4 and < 0.01 day) or ``"euler"`` (dt = 1
    runs growth 4.8 % slow and the peak 4.8 days late at R0 = 2).

    Fitted attributes (R = regions): ``params_`` (JSON-serialisable dict, natural scales; pass it
    back as ``init``), ``beta_path_`` and ``rt_path_`` (R, window days; R_t = beta x
    infectious_days x S/N), ``susceptible_`` (S/N at the last data day), ``population_``,
    ``fraction_path_``
    (signal -> (R, window days)), ``fitted_`` (signal -> expected counts), ``objective_``,
    ``converged_``, ``message_``, ``n_iter_``, ``theta_`` (R, P), ``cov_`` (R, P, P) and
    ``precision_`` (its inverse, the Gauss-Newton Hessian) on the transformed scale, ``log_dispersion_`` (R, n_signals), ``at_bound_`` (parameters held at a
    bound: their draws are reflected into the allowed range, keeping the curvature's spread),
    ``usable_``, ``signals_``.
    """

    def __init__(
        self,
        *,
        latent_days: float = 3.0,
        infectious_days: float = 5.0,
        ifr: float = 0.005,
        rho: float = 0.3,
        hosp_frac: float = 0.02,
        case_delay: tuple[float, float] = (3.0, 2.1),
        admission_delay: tuple[float, float] = (7.5, 3.3),
        death_delay: tuple[float, float] = (18.5, 7.3),
        window_weeks: int = 8,
        beta_knots: str | int = "weekly",
        method: str = "rk4",
        dt: float = 1.0,
        smooth_sd: float = 0.3,
        fraction_prior_sd: float | Mapping[str, float] = 1.0,
        fraction_drift_sd: float = 0.0,
        fraction_knot_days: int = 28,
        drift_sd: float = 0.05,
        damping_days: float | None = None,
        damping_spread: float = 0.0,
        draw_knots: int = 2,
        n_draws: int = 500,
        optimizer: str = "scoring",
        max_iter: int = 100,
        tol: float = 1e-6,
        susceptible_from_history: bool = True,
        q_levels: Sequence[float] = DEFAULT_QUANTILES,
        random_state: Any = None,
    ) -> None:
        """Store settings.  Defaults are invented but plausible for a respiratory virus.

        latent_days 3, infectious_days 5 (R = beta x 5 x S/N), ifr 0.5 %, reporting fraction of
        infections 30 %, hospitalised fraction 2 %, infection-to-reference-date delays as gamma
        (mean, sd) in days: cases (3, 2.1; the reference date is symptom onset), admissions
        (7.5, 3.3), deaths (18.5, 7.3).  ``drift_sd`` is the sd per day of the random walk on
        log beta beyond the data (taken in steps of one knot, sd ``drift_sd`` x sqrt(knot
        days)); ``damping_days`` the half-life with which the last knot's R_t relaxes toward 1
        beyond the data (log beta toward -log(infectious_days x S/N); None: held, as fitted),
        each draw's half-life log-uniform within ``damping_spread`` doublings of it
        (:mod:`tallywave.models.damping`);
        ``fraction_drift_sd`` the sd of a fraction's log between knots (0: constant
        fractions).
        """
        self.latent_days = latent_days
        self.infectious_days = infectious_days
        self.ifr = ifr
        self.rho = rho
        self.hosp_frac = hosp_frac
        self.case_delay = case_delay
        self.admission_delay = admission_delay
        self.death_delay = death_delay
        self.window_weeks = window_weeks
        self.beta_knots = beta_knots
        self.method = method
        self.dt = dt
        self.smooth_sd = smooth_sd
        self.fraction_prior_sd = fraction_prior_sd
        self.fraction_drift_sd = fraction_drift_sd
        self.fraction_knot_days = fraction_knot_days
        self.drift_sd = drift_sd
        self.damping_days = damping_days
        self.damping_spread = damping_spread
        self.draw_knots = draw_knots
        self.n_draws = n_draws
        self.optimizer = optimizer
        self.max_iter = max_iter
        self.tol = tol
        self.susceptible_from_history = susceptible_from_history
        self.q_levels = q_levels
        self.random_state = random_state

    # ---------------------------------------------------------------- helpers on settings

    def _knot_days(self) -> int:
        if self.beta_knots == "weekly":
            return 7
        if self.beta_knots == "daily":
            return 1
        if isinstance(self.beta_knots, (int, np.integer)) and int(self.beta_knots) >= 1:
            return int(self.beta_knots)
        raise ValueError(
            f"beta_knots must be 'weekly', 'daily' or a positive int, got {self.beta_knots!r}"
        )

    def _delay(self, signal: str) -> tuple[float, float]:
        return {
            "cases": self.case_delay,
            "admissions": self.admission_delay,
            "deaths": self.death_delay,
        }[signal]

    def _default_fraction(self, signal: str) -> float:
        return {"cases": self.rho, "admissions": self.hosp_frac, "deaths": self.ifr}[signal]

    def _prior_sd(self, signal: str) -> float:
        sd = self.fraction_prior_sd
        value = sd.get(signal, 1.0) if isinstance(sd, Mapping) else sd
        if not (value >= 0 and math.isfinite(float(value))):
            raise ValueError(f"fraction_prior_sd for {signal} must be >= 0, got {value!r}")
        return float(value)

    def _rates(self) -> tuple[float, float, float]:
        lat = float(self.latent_days)
        sigma = 1.0 / lat if lat > 0 else 0.0
        return sigma, 1.0 / float(self.infectious_days), 1.0 if lat <= 0 else 0.0

    def _growth(self, beta: np.ndarray, sfrac: np.ndarray) -> np.ndarray:
        """Exponential growth rate r of the linearised model at transmission beta (per day)."""
        sigma, gamma, direct = self._rates()
        if direct:
            return beta * sfrac - gamma
        disc = (sigma - gamma) ** 2 + 4.0 * beta * sfrac * sigma
        return 0.5 * (-(sigma + gamma) + np.sqrt(disc))

    # ---------------------------------------------------------------- the forward model

    def _fraction_paths(self, theta: np.ndarray) -> dict[str, np.ndarray]:
        """Reporting fraction per signal over the window, (M, n_fit) (fixed ones broadcast)."""
        lay = self._lay
        out: dict[str, np.ndarray] = {}
        for sig in lay.signals:
            if sig in lay.frac_signals:
                out[sig] = np.exp(_rows_dot(theta[:, lay.frac_slice(sig)], lay.finterp.T))
            else:
                out[sig] = np.full((theta.shape[0], lay.n_fit), self._default_fraction(sig))
        return out

    def _first_fraction(self, theta: np.ndarray, signal: str) -> np.ndarray:
        """A signal's fraction at the window start (M,): what turns history into infections."""
        lay = self._lay
        if signal in lay.frac_signals:
            return np.exp(theta[:, lay.frac_slice(signal).start])
        return np.full(theta.shape[0], self._default_fraction(signal))

    def _last_fraction(self, theta: np.ndarray, signal: str) -> np.ndarray:
        """A signal's fraction on the last data day (M,), held beyond the data."""
        lay = self._lay
        if signal in lay.frac_signals:
            return np.exp(theta[:, lay.frac_slice(signal).stop - 1])
        return np.full(theta.shape[0], self._default_fraction(signal))

    def _initial_state(self, theta: np.ndarray, ridx: np.ndarray) -> np.ndarray:
        """S, E, I, R, D at the model's start (M, 5): the growing state of the first knot's
        beta on top of the people already infected or immune."""
        lay = self._lay
        pop = lay.population[ridx]
        b1 = np.exp(np.clip(theta[:, 0], -30.0, 5.0))
        i0 = np.exp(np.minimum(theta[:, -1], 50.0))
        prior = lay.immune[ridx].copy()
        if self.susceptible_from_history:
            prior = prior + lay.hist[ridx] / self._first_fraction(theta, lay.primary)
        prior = np.minimum(prior, 0.95 * pop)
        sfrac = 1.0 - prior / pop
        sigma, gamma, direct = self._rates()
        r = self._growth(b1, sfrac)
        if direct:
            e0 = np.zeros(theta.shape[0])
            i_init = i0 / np.maximum(b1 * sfrac, 1e-12)
        else:
            e0 = i0 / (r + sigma)
            i_init = sigma * e0 / (r + gamma)
        room = 0.5 * (pop - prior)
        scale = np.minimum(1.0, room / np.maximum(e0 + i_init, 1e-300))
        e0, i_init = e0 * scale, i_init * scale
        ifr = float(self.ifr)
        return np.stack([pop - prior - e0 - i_init, e0, i_init, prior * (1.0 - ifr),
                         prior * ifr], axis=1)

    def _beta_path(self, theta: np.ndarray, future_log_beta: np.ndarray | None) -> np.ndarray:
        """Daily beta over burn-in, window and optional future days, (M, n_sim)."""
        lay = self._lay
        logb = np.clip(theta[:, : lay.n_knots], -30.0, 5.0)
        parts = [np.repeat(np.exp(logb[:, :1]), lay.n_burn, axis=1),
                 np.exp(logb)[:, lay.knot_of_day]]
        if future_log_beta is not None:
            parts.append(np.exp(np.clip(future_log_beta, -30.0, 5.0)))
        return np.concatenate(parts, axis=1)

    def _delayed_infections(
        self, theta: np.ndarray, ridx: np.ndarray, future_log_beta: np.ndarray | None = None,
        want_s: bool = False, only_future: bool = False,
    ) -> tuple[np.ndarray, np.ndarray | None]:
        """Infections convolved with each signal's delay, (M, S, n_out), before the fractions;
        plus S at the start of each window day if asked."""
        lay = self._lay
        beta = self._beta_path(theta, future_log_beta)
        n_extra = 0 if future_log_beta is None else future_log_beta.shape[1]
        sigma, gamma, direct = self._rates()
        _, inc, _, _, s_path = _integrate(
            self._initial_state(theta, ridx), beta, sigma, gamma, float(self.ifr), direct,
            self.method, self._n_sub, full=False, want_s=want_s,
        )
        key = (n_extra, only_future)
        mats = lay.delay_cache.get(key)
        if mats is None:
            start = lay.n_burn + lay.n_fit if only_future else lay.n_burn
            n_out = n_extra if only_future else lay.n_fit + n_extra
            mats = {s: _delay_matrix(lay.kernels[s], beta.shape[1], start, n_out)
                    for s in lay.signals}
            lay.delay_cache[key] = mats
        conv = np.stack([_rows_dot(inc, mats[s]) for s in lay.signals], axis=1)
        s_out = None if s_path is None else s_path[:, lay.n_burn : lay.n_burn + lay.n_fit]
        return conv, s_out

    def _simulate_means(
        self, theta: np.ndarray, ridx: np.ndarray, future_log_beta: np.ndarray | None = None,
        want_s: bool = False, only_future: bool = False,
    ) -> tuple[np.ndarray, np.ndarray | None]:
        """Expected signals (M, S, n_out) for parameter rows ``theta`` (M, P).

        ``ridx`` maps each row to its region.  ``future_log_beta`` (M, n_extra) extends the run
        beyond the last data day (``only_future`` then returns just those days, at each
        fraction's last value).  Also returns S at the start of each window day if asked.
        """
        conv, s_out = self._delayed_infections(theta, ridx, future_log_beta, want_s,
                                               only_future)
        lay = self._lay
        n_out = conv.shape[2]
        if only_future:
            fr = np.stack([np.repeat(self._last_fraction(theta, s)[:, None], n_out, axis=1)
                           for s in lay.signals], axis=1)
        else:
            paths = self._fraction_paths(theta)
            extra = n_out - lay.n_fit
            fr = np.stack([np.concatenate(
                [paths[s], np.repeat(paths[s][:, -1:], extra, axis=1)], axis=1)
                for s in lay.signals], axis=1)
        return fr * conv, s_out

    # ---------------------------------------------------------------- objective pieces

    def _penalty(self, theta: np.ndarray, ridx: np.ndarray) -> np.ndarray:
        dev = theta - self._lay.prior_mean[ridx]
        return 0.5 * np.einsum("ap,pq,aq->a", dev, self._lay.prior_prec, dev)

    @staticmethod
    def _phi_penalty(phi: np.ndarray) -> np.ndarray:
        return 0.5 * (((phi - math.log(20.0)) / 2.5) ** 2).sum(axis=-1)

    def _objective(
        self, theta: np.ndarray, phi: np.ndarray, mu: np.ndarray, ridx: np.ndarray
    ) -> np.ndarray:
        lay = self._lay
        k = np.exp(phi)[:, :, None]
        nll = -_nb_loglik(lay.y[ridx], mu, k, lay.mask[ridx])
        return nll + self._penalty(theta, ridx) + self._phi_penalty(phi)

    def _update_phi(
        self, phi: np.ndarray, mu: np.ndarray, ridx: np.ndarray, steps: int = 3
    ) -> np.ndarray:
        """A few safeguarded Newton steps on each log dispersion with the means held fixed."""
        y = self._lay.y[ridx]
        w = self._lay.mask[ridx]
        mu = np.maximum(mu, 1e-10)
        pm, psd = math.log(20.0), 2.5
        for _ in range(steps):
            k = np.exp(phi)[:, :, None]
            km = k + mu
            g_k = (
                w * (special.digamma(y + k) - special.digamma(k) - np.log1p(mu / k) + (mu - y) / km)
            ).sum(-1)
            h_k = (
                w
                * (
                    special.polygamma(1, y + k)
                    - special.polygamma(1, k)
                    + 1.0 / k
                    - 1.0 / km
                    - (mu - y) / km**2
                )
            ).sum(-1)
            kk = k[:, :, 0]
            g = kk * g_k - (phi - pm) / psd**2
            hh = kk * g_k + kk**2 * h_k - 1.0 / psd**2
            step = np.where(hh < 0, -g / np.where(hh < 0, hh, -1.0), np.sign(g) * 0.5)
            step = np.nan_to_num(np.clip(step, -1.0, 1.0))
            phi = np.clip(phi + step, *_LOG_DISP_BOUNDS)
        return phi

    def _jacobian(
        self, theta: np.ndarray, ridx: np.ndarray, h: float = 1e-6
    ) -> tuple[np.ndarray, np.ndarray]:
        """Means (A, S*T) and Jacobian (A, P, S*T).

        Parameters of the transmission model: forward differences, parameter j of every region
        perturbed in the same vectorised run (the cost does not grow with the regions fitted
        together).  Fraction knots only scale a signal's expected counts, so their columns are
        exact: with f the log fraction, d mu_s(t) / d f_k = mu_s(t) L[t, k].
        """
        lay = self._lay
        a, p = theta.shape
        ode = lay.ode_params()
        offsets = np.zeros((ode.size + 1, p))
        offsets[np.arange(1, ode.size + 1), ode] = h
        batch = (theta[:, None, :] + offsets[None]).reshape(-1, p)
        mu_b, _ = self._simulate_means(batch, np.repeat(ridx, ode.size + 1))
        mu_b = mu_b.reshape(a, ode.size + 1, len(lay.signals), lay.n_fit)
        mu0 = mu_b[:, 0]
        jac = np.zeros((a, p, len(lay.signals), lay.n_fit))
        jac[:, ode] = (mu_b[:, 1:] - mu0[:, None]) / h
        for j, sig in enumerate(lay.signals):
            if sig not in lay.frac_signals:
                continue
            sl = lay.frac_slice(sig)
            dlog = mu0[:, j]  # mu = exp(f) x delayed infections: d mu / d f = mu
            for k, col in enumerate(range(sl.start, sl.stop)):
                if col in ode:
                    continue  # also moves the susceptible pool: left to the difference above
                jac[:, col, j] = dlog * lay.finterp[:, k][None, :]
        return mu0.reshape(a, -1), jac.reshape(a, p, -1)

    def _gn_terms(
        self,
        theta: np.ndarray,
        phi: np.ndarray,
        mu0: np.ndarray,
        jac: np.ndarray,
        ridx: np.ndarray,
    ) -> tuple[np.ndarray, np.ndarray]:
        """Gradient of the objective and Gauss-Newton (expected Fisher) matrix plus priors."""
        lay = self._lay
        a = theta.shape[0]
        k = np.repeat(np.exp(phi), lay.n_fit, axis=1)  # (A, S*T)
        y = lay.y[ridx].reshape(a, -1)
        mask = lay.mask[ridx].reshape(a, -1)
        mu_c = np.maximum(mu0, 1e-10)
        w = mask / (mu_c + mu_c**2 / k)
        dev = theta - lay.prior_mean[ridx]
        grad = -np.einsum("apt,at->ap", jac, (y - mu0) * w) + _rows_dot(dev, lay.prior_prec)
        hess = np.matmul(jac * w[:, None, :], jac.transpose(0, 2, 1)) + lay.prior_prec
        return grad, hess

    def _gn_system(
        self, theta: np.ndarray, phi: np.ndarray, ridx: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Means (A, S, T), gradient and Gauss-Newton matrix at ``theta``."""
        mu0, jac = self._jacobian(theta, ridx)
        grad, hess = self._gn_terms(theta, phi, mu0, jac, ridx)
        return mu0.reshape(theta.shape[0], len(self._lay.signals), self._lay.n_fit), grad, hess

    # ---------------------------------------------------------------- fitting

    def fit(
        self,
        observed: Mapping[str, np.ndarray],
        population: float | np.ndarray,
        init: Mapping[str, Any] | Sequence[Mapping[str, Any]] | None = None,
        *,
        prior_counts: Mapping[str, Any] | None = None,
        immune: float | np.ndarray | None = None,
    ) -> CompartmentalModel:
        """Fit every region to the last ``window_weeks`` weeks of the supplied signals.

        ``observed``: signal name ('cases', 'admissions', 'deaths'; any non-empty subset) ->
        daily counts (n_days,) or (n_regions, n_days), all the same length, last column = last
        data day.  NaN, inf and negative values are treated as missing.  ``population``: scalar
        or (n_regions,).  ``init``: a previous ``params_`` (or one region's dict, or a list of
        them) used as a warm start.  ``prior_counts``: signal -> counts reported before the first
        day of ``observed`` (the rest of the history; default 0).  ``immune``: people (fraction
        of the population when <= 1) immune from earlier waves or vaccination.  Regions that
        cannot be fitted get ``converged_`` False and a message; the others are unaffected.
        """
        self._n_sub = _substeps(self.dt)
        if self.optimizer not in ("scoring", "lbfgsb"):
            raise ValueError(f"optimizer must be 'scoring' or 'lbfgsb', got {self.optimizer!r}")
        if self.method not in ("euler", "rk4"):
            raise ValueError(f"method must be 'euler' or 'rk4', got {self.method!r}")
        signals, data, pop = self._stack_observed(observed, population)
        self._lay = self._layout(signals, data, pop, prior_counts, immune)
        lay = self._lay
        theta0, phi0 = self._initial_guess(lay.y, lay.mask, lay.population)
        lay.prior_mean[:, -1] = theta0[:, -1]  # weak anchor for log initial infections
        if init is not None:
            theta0, phi0 = self._apply_init(init, theta0, phi0)
        theta0 = np.clip(theta0, lay.lower, lay.upper)
        usable, messages = self._usable(pop)
        self._optimise(theta0, phi0, usable, messages)
        return self

    def _stack_observed(self, observed: Mapping[str, np.ndarray], population: Any
                        ) -> tuple[list[str], np.ndarray, np.ndarray]:
        """Validated (signals, data (R, S, n_days) with NaN for missing, population (R,))."""
        if not isinstance(observed, Mapping) or not observed:
            raise ValueError("observed must be a non-empty dict of signal -> counts")
        unknown = [s for s in observed if s not in SIGNALS]
        if unknown:
            raise ValueError(f"unknown signal(s) {unknown}; expected a subset of {SIGNALS}")
        signals = [s for s in SIGNALS if s in observed]
        arrays = [np.atleast_2d(np.asarray(observed[s], dtype=float)) for s in signals]
        n_days = arrays[0].shape[1]
        n_reg = max(a.shape[0] for a in arrays)
        for sig, a in zip(signals, arrays, strict=True):
            if a.ndim != 2 or a.shape[1] != n_days or a.shape[0] not in (1, n_reg):
                raise ValueError(
                    f"observed[{sig!r}] has shape {a.shape}; all signals need (n_regions, "
                    f"{n_days})"
                )
        data = np.stack([np.broadcast_to(a, (n_reg, n_days)) for a in arrays], axis=1)
        data = np.where(np.isfinite(data) & (data >= 0), data, np.nan)
        pop = np.asarray(population, dtype=float)
        pop = np.full(n_reg, float(pop)) if pop.ndim == 0 else pop.reshape(-1)
        if pop.shape != (n_reg,):
            raise ValueError(f"population must be scalar or ({n_reg},), got {pop.shape}")
        return signals, data, pop

    def _layout(self, signals: list[str], data: np.ndarray, pop: np.ndarray,
                prior_counts: Mapping[str, Any] | None, immune: Any) -> _Layout:
        """Window, delay kernels, history before the start, parameter layout, priors, bounds."""
        n_reg, _, n_days = data.shape
        knot_days = self._knot_days()
        n_fit = int(min(7 * int(self.window_weeks), n_days))
        if n_fit < 1:
            raise ValueError("window_weeks must be >= 1 and observed must have at least one day")
        n_knots = math.ceil(n_fit / knot_days)
        knot_of_day = n_knots - 1 - (n_fit - 1 - np.arange(n_fit)) // knot_days
        kernels = {s: gamma_delay_pmf(*self._delay(s)) for s in signals}
        n_burn = max(7, max(len(k) for k in kernels.values()) - 1)
        window = data[:, :, n_days - n_fit :]
        safe_pop = np.where(np.isfinite(pop) & (pop > 0), pop, 1.0)

        # people infected before the model's start, from the whole reported history of the
        # signal whose fraction is best known (smallest prior sd; a known IFR makes deaths it)
        primary = min(signals, key=lambda s: (self._prior_sd(s), signals.index(s)))
        cutoff = n_days - n_fit - n_burn + round(self._delay(primary)[0])
        hist = np.nansum(data[:, signals.index(primary), : max(cutoff, 0)], axis=1)
        if prior_counts is not None and primary in prior_counts:
            before = np.broadcast_to(np.asarray(prior_counts[primary], dtype=float), (n_reg,))
            hist = hist + np.where(np.isfinite(before) & (before > 0), before, 0.0)
        imm = np.zeros(n_reg) if immune is None else \
            np.broadcast_to(np.asarray(immune, dtype=float), (n_reg,))
        imm = np.where(np.isfinite(imm) & (imm > 0), imm, 0.0)
        imm = np.where(imm <= 1.0, imm * safe_pop, imm)

        frac_signals = [s for s in signals if self._prior_sd(s) > 0]
        finterp = _fraction_knots(n_fit, int(self.fraction_knot_days)) \
            if float(self.fraction_drift_sd) > 0 else np.ones((n_fit, 1))
        n_fk = finterp.shape[1]
        p = n_knots + len(frac_signals) * n_fk + 1
        mean = np.zeros((n_reg, p))
        mean[:, :n_knots] = math.log(self._rates()[1])  # R = 1
        prec = np.zeros((p, p))
        if n_knots > 1:
            diff = np.diff(np.eye(n_knots), axis=0)
            prec[:n_knots, :n_knots] += diff.T @ diff / float(self.smooth_sd) ** 2
        prec[0, 0] += 1.0
        lower = np.empty((n_reg, p))
        upper = np.empty((n_reg, p))
        lower[:, :n_knots], upper[:, :n_knots] = _LOG_BETA_BOUNDS
        for j, s in enumerate(frac_signals):
            sl = slice(n_knots + j * n_fk, n_knots + (j + 1) * n_fk)
            mean[:, sl] = math.log(self._default_fraction(s))
            prec[sl.start, sl.start] += 1.0 / self._prior_sd(s) ** 2
            if n_fk > 1:
                diff = np.diff(np.eye(n_fk), axis=0)
                prec[sl, sl] += diff.T @ diff / float(self.fraction_drift_sd) ** 2
            lower[:, sl], upper[:, sl] = _LOG_FRACTION_BOUNDS
        prec[-1, -1] = 1e-2
        lower[:, -1] = _LOG_I0_LOWER
        upper[:, -1] = np.log(0.05 * safe_pop)
        return _Layout(
            signals=signals, frac_signals=frac_signals, n_regions=n_reg, n_fit=n_fit,
            n_burn=n_burn, knot_days=knot_days, n_knots=n_knots, knot_of_day=knot_of_day,
            n_fknots=n_fk, finterp=finterp, kernels=kernels,
            y=np.nan_to_num(window, nan=0.0), mask=np.isfinite(window).astype(float),
            population=safe_pop, hist=hist, immune=imm, primary=primary, prior_mean=mean,
            prior_prec=prec, lower=lower, upper=upper,
        )

    def _usable(self, pop: np.ndarray) -> tuple[np.ndarray, list[str]]:
        """Regions that can be fitted at all, and a message for the others."""
        lay = self._lay
        messages = [""] * lay.n_regions
        usable = np.ones(lay.n_regions, dtype=bool)
        n_obs = lay.mask.sum(axis=(1, 2))
        for r in range(lay.n_regions):
            if not (np.isfinite(pop[r]) and pop[r] > 0):
                usable[r] = False
                messages[r] = f"invalid population {pop[r]!r}; region not fitted"
            elif n_obs[r] < 7:
                usable[r] = False
                messages[r] = (
                    f"only {int(n_obs[r])} usable observations in the {lay.n_fit}-day window "
                    "(need >= 7); region not fitted"
                )
        return usable, messages

    def _optimise(self, theta0: np.ndarray, phi0: np.ndarray, usable: np.ndarray,
                  messages: list[str]) -> None:
        """Run the optimiser on the usable regions and set every fitted attribute."""
        lay = self._lay
        n_reg, p = theta0.shape
        theta, phi = theta0.copy(), phi0.copy()
        conv = np.zeros(n_reg, dtype=bool)
        obj = np.full(n_reg, np.nan)
        hess = np.tile(lay.prior_prec, (n_reg, 1, 1))
        active = np.zeros((n_reg, p), dtype=bool)
        n_iter = np.zeros(n_reg, dtype=int)
        idx = np.flatnonzero(usable)
        if idx.size:
            fit = self._fit_scoring if self.optimizer == "scoring" else self._fit_lbfgsb
            res = fit(theta[idx], phi[idx], idx)
            theta[idx], phi[idx], conv[idx], obj[idx], hess[idx], active[idx], n_iter[idx], \
                msgs = res
            for j, r in enumerate(idx.tolist()):
                messages[r] = msgs[j]
        all_zero = usable & (np.where(lay.mask > 0, lay.y, 0.0).sum(axis=(1, 2)) == 0)
        for r in np.flatnonzero(all_zero).tolist():
            conv[r] = False
            messages[r] = (
                "all observations in the fit window are zero; transmission is not identifiable "
                "(initial infections pinned at their lower bound; forecast without parameter "
                "uncertainty)"
            )
        self.usable_ = usable
        self.theta_ = theta
        self.log_dispersion_ = phi
        self.converged_ = conv
        self.objective_ = obj
        self.message_ = messages
        self.n_iter_ = n_iter
        self.at_bound_ = active
        self.precision_ = 0.5 * (hess + hess.transpose(0, 2, 1))
        self.cov_ = self._covariance(hess)
        self.informative_ = ~all_zero
        self.cov_[all_zero] = 0.0  # the zeros carry no information on the scale of anything
        self.signals_ = list(lay.signals)
        self._describe_fit()

    def _describe_fit(self) -> None:
        """Paths and summaries of the fit: beta, R_t, S/N, fractions, expected counts."""
        lay = self._lay
        theta, usable = self.theta_, self.usable_
        mu, s_win = self._simulate_means(theta, np.arange(lay.n_regions), want_s=True)
        assert s_win is not None
        beta_path = np.exp(theta[:, : lay.n_knots])[:, lay.knot_of_day]
        beta_path[~usable] = np.nan
        self.beta_path_ = beta_path
        sfrac = s_win / lay.population[:, None]
        self.rt_path_ = beta_path * float(self.infectious_days) * sfrac
        self.susceptible_ = np.where(usable, sfrac[:, -1], np.nan)
        self.population_ = lay.population
        self.fraction_path_ = {s: np.where(usable[:, None], v, np.nan)
                               for s, v in self._fraction_paths(theta).items()}
        self.fitted_ = {
            s: np.where(usable[:, None], mu[:, j], np.nan) for j, s in enumerate(lay.signals)
        }
        self.params_ = self._export_params()

    def _initial_guess(
        self, y: np.ndarray, mask: np.ndarray, pop: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """Start from the growth of the first signal between knots, shifted back by its delay.

        Growth rates r of the knot means of log(1 + y) are turned into beta through the
        linearised model; the level at the window start, divided by the default fraction, gives
        the initial infections.
        """
        lay = self._lay
        n_reg, k = y.shape[0], lay.n_knots
        ly = np.log(y[:, 0] + 1.0)
        ww = mask[:, 0]
        onehot = (lay.knot_of_day[None, :] == np.arange(k)[:, None]).astype(float)  # (K, T)
        t = np.arange(lay.n_fit, dtype=float)
        centre = onehot @ t / onehot.sum(1)
        wk = _rows_dot(ww, onehot.T)  # (R, K)
        mk = np.where(wk > 0, _rows_dot(ww * ly, onehot.T) / np.maximum(wk, 1e-12), np.nan)
        # overall log-linear growth, the fallback wherever knot means are missing
        sw = np.maximum(ww.sum(1), 1e-9)
        tm = (ww * t).sum(1) / sw
        lm = (ww * ly).sum(1) / sw
        cov = (ww * (t - tm[:, None]) * (ly - lm[:, None])).sum(1)
        var = np.maximum((ww * (t - tm[:, None]) ** 2).sum(1), 1e-9)
        overall = np.clip(cov / var, -0.2, 0.2)
        lead = lay.signals[0]  # the growth and level are read off the first signal
        mean_delay = self._delay(lead)[0]
        if k > 1:
            mids = 0.5 * (centre[1:] + centre[:-1])
            g = np.diff(mk, axis=1) / np.diff(centre)[None, :]
            g = np.where(np.isfinite(g), g, overall[:, None])
            eye = np.eye(k - 1)
            interp = np.stack([np.interp(centre + mean_delay, mids, eye[j]) for j in range(k - 1)])
            growth = np.clip(_rows_dot(g, interp), -0.2, 0.2)  # (R, K) growth per knot
        else:
            growth = overall[:, None]
        sigma, gamma, direct = self._rates()
        beta = (growth + gamma) if direct else (growth + sigma) * (growth + gamma) / sigma
        sfrac = np.ones(n_reg)
        if self.susceptible_from_history:
            prior = lay.immune + lay.hist / self._default_fraction(lay.primary)
            sfrac = 1.0 - np.minimum(prior, 0.95 * pop) / pop
        beta = np.clip(beta / np.maximum(sfrac, 0.05)[:, None], 0.05 * gamma, 10.0 * gamma)
        m0 = np.where(np.isfinite(mk[:, 0]), mk[:, 0], lm - overall * tm)
        c0 = centre[0] if np.isfinite(mk[:, 0]).any() else 0.0
        level = np.maximum(np.exp(m0 + growth[:, 0] * (mean_delay - c0)) - 1.0, 0.0)
        inf_start = level / self._default_fraction(lead)
        r_burn = self._growth(beta[:, 0], sfrac)
        i0 = inf_start * np.exp(-r_burn * lay.n_burn)
        theta = np.empty((n_reg, lay.n_params))
        theta[:, :k] = np.log(beta)
        for s in lay.frac_signals:
            theta[:, lay.frac_slice(s)] = math.log(self._default_fraction(s))
        theta[:, -1] = np.log(np.maximum(i0, 1e-3))
        theta = np.clip(np.nan_to_num(theta, nan=0.0), lay.lower, lay.upper)
        phi = np.full((n_reg, len(lay.signals)), math.log(20.0))
        return theta, phi

    def _apply_init(
        self, init: Any, theta: np.ndarray, phi: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """Overwrite the starting point with a saved ``params_`` (bad entries are ignored)."""
        lay = self._lay
        if isinstance(init, Mapping) and "regions" in init:
            regions = list(init["regions"])
        elif isinstance(init, Mapping):
            regions = [init]
        else:
            regions = list(init)
        if len(regions) == 1:
            regions = regions * lay.n_regions
        if len(regions) != lay.n_regions:
            return theta, phi  # a saved fit for a different set of regions: ignore it
        theta = theta.copy()
        phi = phi.copy()
        k = lay.n_knots
        for r, reg in enumerate(regions):
            try:
                if not isinstance(reg, Mapping):
                    continue
                beta = np.asarray(reg.get("beta", []), dtype=float).reshape(-1)
                if beta.size and np.all(np.isfinite(beta)) and np.all(beta > 0):
                    b = beta[-k:]
                    b = np.concatenate([np.full(k - b.size, b[0]), b])
                    theta[r, :k] = np.log(b)
                fracs = reg.get("fractions") or {}
                for s in lay.frac_signals:
                    vals = np.asarray(fracs.get(s, []), dtype=float).reshape(-1)
                    if vals.size == 0:  # older saved fits: one fraction per signal
                        old = reg.get({"cases": "rho", "admissions": "hosp_frac"}.get(s, ""))
                        vals = np.asarray([np.nan if old is None else old], dtype=float)
                    if vals.size and np.all((vals > 0) & (vals < 1)):
                        last = vals[-lay.n_fknots:]
                        knots = np.concatenate([np.full(lay.n_fknots - last.size, last[0]),
                                                last])
                        theta[r, lay.frac_slice(s)] = np.log(knots)
                v = float(reg.get("initial_infections", np.nan))
                if v > 0 and math.isfinite(v):
                    theta[r, -1] = math.log(v)
                disp = reg.get("dispersion", {}) or {}
                for j, s in enumerate(lay.signals):
                    v = float(disp.get(s, np.nan))
                    if v > 0 and math.isfinite(v):
                        phi[r, j] = math.log(v)
            except (TypeError, ValueError):
                continue
        return theta, phi

    def _fit_scoring(
        self, theta: np.ndarray, phi: np.ndarray, ridx: np.ndarray
    ) -> tuple[Any, ...]:
        """Vectorised Levenberg-Marquardt Fisher scoring; each region has its own damping."""
        lay = self._lay
        n, p = theta.shape
        lo, hi = lay.lower[ridx], lay.upper[ridx]
        lam = np.full(n, 1e-2)
        done = np.zeros(n, dtype=bool)
        conv = np.zeros(n, dtype=bool)
        iters = np.zeros(n, dtype=int)
        msgs = [""] * n
        eye = np.eye(p)
        n_sig = len(lay.signals)
        for it in range(1, int(self.max_iter) + 1):
            act = np.flatnonzero(~done)
            if act.size == 0:
                break
            th, ri = theta[act], ridx[act]
            mu_flat, jac = self._jacobian(th, ri)
            mu0 = mu_flat.reshape(act.size, n_sig, lay.n_fit)
            phi_new = self._update_phi(phi[act], mu0, ri, steps=3 if it == 1 else 1)
            phi_new = np.nan_to_num(phi_new, nan=math.log(20.0))
            dphi = np.abs(phi_new - phi[act]).max(axis=1)
            phi[act] = phi_new
            grad, h = self._gn_terms(th, phi_new, mu_flat, jac, ri)
            f0 = self._objective(th, phi_new, mu0, ri)
            iters[act] = it
            # projected Newton: freeze parameters sitting on a bound and pushed outwards
            d_full = _safe_solve(h, -grad)
            out_lo = (th <= lo[act] + 1e-9) & (d_full < 0)
            out_hi = (th >= hi[act] - 1e-9) & (d_full > 0)
            free = ~(out_lo | out_hi)
            ff = free[:, :, None] & free[:, None, :]
            hf = np.where(ff, h, 0.0) + eye[None] * (~free)[:, :, None]
            gf = np.where(free, grad, 0.0)
            d_newton = _safe_solve(hf, -gf)
            dec = -0.5 * (gf * d_newton).sum(axis=1)
            finite = np.isfinite(f0) & np.isfinite(dec)
            ok = finite & (dec < self.tol) & (dphi < 1e-3)
            for j in np.flatnonzero(ok):
                r = act[j]
                done[r] = conv[r] = True
                msgs[r] = f"converged in {it} iterations (decrement {dec[j]:.2e})"
            for j in np.flatnonzero(~finite):
                r = act[j]
                done[r] = True
                msgs[r] = "objective not finite at the current parameters; fit abandoned"
            step_rows = np.flatnonzero(finite & ~ok)
            if step_rows.size == 0:
                continue
            sub = act[step_rows]
            diag = np.einsum("app->ap", hf[step_rows]) + 1e-12
            damped = hf[step_rows] + lam[sub, None, None] * (diag[:, :, None] * eye[None])
            step = _safe_solve(damped, -gf[step_rows])
            big = np.abs(step).max(axis=1, initial=0.0)
            step *= np.minimum(1.0, 1.0 / np.maximum(big, 1e-300))[:, None]
            th_new = np.clip(th[step_rows] + step, lo[sub], hi[sub])
            mu_new, _ = self._simulate_means(th_new, ridx[sub])
            f_new = self._objective(th_new, phi[sub], mu_new, ridx[sub])
            better = np.isfinite(f_new) & (f_new < f0[step_rows])
            theta[sub[better]] = th_new[better]
            lam[sub[better]] = np.maximum(lam[sub[better]] / 5.0, 1e-9)
            lam[sub[~better]] *= 10.0
            stalled = sub[(~better) & (lam[sub] > 1e8)]
            for r in stalled:
                done[r] = True
                conv[r] = False
                msgs[r] = f"stalled after {it} iterations: no step reduced the objective"
        for r in np.flatnonzero(~done):
            msgs[r] = f"iteration limit ({self.max_iter}) reached without convergence"
        # final objective and curvature at the accepted parameters
        mu0, grad, h = self._gn_system(theta, phi, ridx)
        obj = self._objective(theta, phi, mu0, ridx)
        return theta, phi, conv, obj, h, self._active(theta, grad, ridx), iters, msgs

    def _fit_lbfgsb(
        self, theta: np.ndarray, phi: np.ndarray, ridx: np.ndarray
    ) -> tuple[Any, ...]:
        """Joint L-BFGS-B on the summed objective with a vectorised central-difference gradient.

        Variables are rescaled by the square root of the diagonal of the Gauss-Newton matrix at
        the start (Jacobi preconditioning, which keeps the bounds a box).
        """
        lay = self._lay
        n, p = theta.shape
        n_s = phi.shape[1]
        hstep = 1e-5
        offsets = np.vstack([np.zeros((1, p)), hstep * np.eye(p), -hstep * np.eye(p)])
        rep = np.repeat(ridx, 2 * p + 1)
        n_calls = [0]
        _, _, h0 = self._gn_system(theta, phi, ridx)
        scale_th = np.sqrt(np.maximum(np.einsum("app->ap", h0), 1e-8))
        scale_ph = np.full((n, n_s), 3.0)
        scale = np.concatenate([scale_th.ravel(), scale_ph.ravel()])

        def fun(u: np.ndarray) -> tuple[float, np.ndarray]:
            n_calls[0] += 1
            x = u / scale
            th = x[: n * p].reshape(n, p)
            ph = x[n * p :].reshape(n, n_s)
            batch = (th[:, None, :] + offsets[None]).reshape(-1, p)
            mu, _ = self._simulate_means(batch, rep)
            f = self._objective(batch, np.repeat(ph, 2 * p + 1, axis=0), mu, rep)
            f = f.reshape(n, 2 * p + 1)
            g_th = (f[:, 1 : p + 1] - f[:, p + 1 :]) / (2 * hstep)
            mu0 = mu.reshape(n, 2 * p + 1, n_s, -1)[:, 0]
            g_ph = np.empty((n, n_s))
            for j in range(n_s):
                e = np.zeros(n_s)
                e[j] = hstep
                fp = self._objective(th, ph + e, mu0, ridx)
                fm = self._objective(th, ph - e, mu0, ridx)
                g_ph[:, j] = (fp - fm) / (2 * hstep)
            total = float(f[:, 0].sum())
            grad = np.concatenate([g_th.ravel(), g_ph.ravel()]) / scale
            if not (np.isfinite(total) and np.all(np.isfinite(grad))):
                return 1e300, np.zeros_like(u)
            return total, grad

        lo = np.concatenate([lay.lower[ridx].ravel(), np.full(n * n_s, _LOG_DISP_BOUNDS[0])])
        hi = np.concatenate([lay.upper[ridx].ravel(), np.full(n * n_s, _LOG_DISP_BOUNDS[1])])
        x0 = np.concatenate([theta.ravel(), phi.ravel()])
        res = optimize.minimize(
            fun,
            x0 * scale,
            jac=True,
            method="L-BFGS-B",
            bounds=list(zip(lo * scale, hi * scale, strict=True)),
            options={
                "maxiter": 50 * int(self.max_iter),
                "maxfun": 100 * int(self.max_iter),
                "ftol": 1e-13,
                "gtol": 1e-7,
            },
        )
        x = res.x / scale
        theta = x[: n * p].reshape(n, p)
        phi = x[n * p :].reshape(n, n_s)
        mu0, grad, h = self._gn_system(theta, phi, ridx)
        obj = self._objective(theta, phi, mu0, ridx)
        conv = np.full(n, bool(res.success)) & np.isfinite(obj)
        msg = f"L-BFGS-B ({res.nit} iterations, {n_calls[0]} gradient calls): {res.message}"
        active = self._active(theta, grad, ridx)
        return theta, phi, conv, obj, h, active, np.full(n, int(res.nit)), [msg] * n

    def _active(self, theta: np.ndarray, grad: np.ndarray, ridx: np.ndarray) -> np.ndarray:
        """Parameters held at a bound by the objective (gradient pointing out of the box)."""
        lo, hi = self._lay.lower[ridx], self._lay.upper[ridx]
        return ((theta <= lo + 1e-6) & (grad > 0)) | ((theta >= hi - 1e-6) & (grad < 0))

    @staticmethod
    def _covariance(hess: np.ndarray) -> np.ndarray:
        """Laplace covariance: inverse of the (Gauss-Newton) Hessian, eigenvalues floored.

        Parameters held at a bound keep the spread their curvature gives; their draws are
        reflected back into the allowed range (a one-sided posterior with the same scale), where
        zero variance would claim a certainty the data do not give.
        """
        hs = 0.5 * (hess + hess.transpose(0, 2, 1))
        hs = np.nan_to_num(hs, nan=0.0, posinf=0.0, neginf=0.0)
        vals, vecs = np.linalg.eigh(hs)
        floor = np.maximum(vals.max(axis=1, keepdims=True) * 1e-10, 1e-6)
        vals = np.maximum(vals, floor)
        return np.einsum("apk,ak,aqk->apq", vecs, 1.0 / vals, vecs)

    def _export_params(self) -> dict[str, Any]:
        """JSON-serialisable snapshot of the fit (natural scales), accepted back as ``init``."""
        lay = self._lay
        regions = []
        for r in range(lay.n_regions):
            th = self.theta_[r]
            fracs = {s: [float(v) for v in np.exp(th[lay.frac_slice(s)])]
                     for s in lay.frac_signals}
            reg: dict[str, Any] = {
                "beta": [float(v) for v in np.exp(th[: lay.n_knots])],
                "initial_infections": float(np.exp(th[-1])),
                "fractions": fracs,
                "susceptible": float(self.susceptible_[r])
                if np.isfinite(self.susceptible_[r]) else None,
                "dispersion": {
                    s: float(np.exp(self.log_dispersion_[r, j])) for j, s in enumerate(lay.signals)
                },
                "converged": bool(self.converged_[r]),
                "objective": float(self.objective_[r]) if np.isfinite(self.objective_[r])
                else None,
            }
            if "cases" in fracs:
                reg["rho"] = fracs["cases"][-1]
            if "admissions" in fracs:
                reg["hosp_frac"] = fracs["admissions"][-1]
            regions.append(reg)
        return {
            "model": "seird",
            "version": 2,
            "signals": list(lay.signals),
            "knot_days": lay.knot_days,
            "window_days": lay.n_fit,
            "latent_days": float(self.latent_days),
            "infectious_days": float(self.infectious_days),
            "ifr": float(self.ifr),
            "method": str(self.method),
            "regions": regions,
        }

    # ---------------------------------------------------------------- forecasting

    def _drawn_knots(self) -> np.ndarray:
        """The transmission knots whose uncertainty the forecast draws: the last ``draw_knots``."""
        k = self._lay.n_knots
        return np.arange(max(k - max(int(self.draw_knots), 1), 0), k)

    def _parameter_draws(self, rnd: SeriesRandom, n_draws: int) -> np.ndarray:
        """Laplace draws of the parameters (R, n_draws, P), reflected into the allowed box.

        The last ``draw_knots`` transmission knots are drawn from their Gaussian posterior
        *conditional* on everything else (precision = the Hessian's block of those knots); the
        rest stays at the fit.  The scale parameters (fractions, initial size) lie on a ridge
        along which the fitted counts barely change, and drawing them too sent the nonlinear
        model's draws off the data (measured: horizon-1 medians 17 % below the fitted level on
        the demo outbreak); earlier knots barely move a forecast (drawing all eight instead of
        the last two changed the 5-95 % range at 14 days by 3 %), and holding them lets every
        draw start from the fitted state two weeks back.  Regions without information (all-zero
        data) get no parameter uncertainty.
        """
        lay = self._lay
        c = self._drawn_knots()
        h_cc = self.precision_[:, c[:, None], c[None, :]]
        vals, vecs = np.linalg.eigh(0.5 * (h_cc + h_cc.transpose(0, 2, 1)))
        vals = np.maximum(vals, np.maximum(vals.max(axis=1, keepdims=True) * 1e-10, 1e-6))
        root = vecs / np.sqrt(vals)[:, None, :]
        root[~self.informative_] = 0.0
        z = rnd.normal((n_draws, c.size))
        theta = np.repeat(self.theta_[:, None, :], n_draws, axis=1)
        theta[:, :, c] += np.einsum("apk,adk->adp", root, z)
        lo, hi = lay.lower[:, None, :], lay.upper[:, None, :]
        theta = np.where(theta < lo, 2.0 * lo - theta, theta)
        theta = np.where(theta > hi, 2.0 * hi - theta, theta)
        return np.clip(theta, lo, hi)

    def _future_means(self, theta: np.ndarray, future: np.ndarray) -> np.ndarray:
        """Expected counts (R, D, S, H) beyond the data for parameter draws (R, D, P) and future
        log beta (R, D, H): the fitted path is run once up to the first drawn knot, every draw
        continues from that state (the draws differ only from there on)."""
        lay = self._lay
        n_reg, n_draws, p = theta.shape
        horizon = future.shape[2]
        d0 = int(np.argmax(lay.knot_of_day == self._drawn_knots()[0]))
        s0 = lay.n_burn + d0  # simulation day where the drawn knots start
        sigma, gamma, direct = self._rates()
        regions = np.arange(n_reg)
        beta_fit = self._beta_path(self.theta_, None)[:, :s0]
        states, inc_fit, _, _, _ = _integrate(  # full: R and D too, so S+E+I+R+D stays N
            self._initial_state(self.theta_, regions), beta_fit, sigma, gamma, float(self.ifr),
            direct, self.method, self._n_sub, record=True, full=True)
        assert states is not None
        key = (horizon, True)
        mats = lay.delay_cache.get(key)
        n_sim = lay.n_burn + lay.n_fit + horizon
        if mats is None:
            mats = {s: _delay_matrix(lay.kernels[s], n_sim, lay.n_burn + lay.n_fit, horizon)
                    for s in lay.signals}
            lay.delay_cache[key] = mats
        fr = np.stack([self._last_fraction(self.theta_, s) for s in lay.signals], axis=1)
        out = np.empty((n_reg, n_draws, len(lay.signals), horizon))
        chunk = max(1, 20000 // n_draws)  # regions per model run: bounds memory
        for lo in range(0, n_reg, chunk):
            rs = regions[lo:lo + chunk]
            th = theta[rs].reshape(-1, p)
            beta = self._beta_path(th, future[rs].reshape(-1, horizon))[:, s0:]
            start = np.repeat(states[rs, s0], n_draws, axis=0)
            _, inc, _, _, _ = _integrate(start, beta, sigma, gamma, float(self.ifr), direct,
                                         self.method, self._n_sub, full=False)
            inc = np.concatenate([np.repeat(inc_fit[rs], n_draws, axis=0), inc], axis=1)
            conv = np.stack([_rows_dot(inc, mats[s]) for s in lay.signals], axis=1)
            out[rs] = conv.reshape(rs.size, n_draws, len(lay.signals), horizon) \
                * fr[rs][:, None, :, None]
        return out

    def sample_forecast(
        self,
        horizon: int = 28,
        n_draws: int | None = None,
        *,
        multiplier: np.ndarray | None = None,
        dispersion: Mapping[str, np.ndarray] | None = None,
    ) -> dict[str, np.ndarray]:
        """Predictive draws: signal -> array (n_regions, n_draws, horizon) of counts.

        Each draw combines a Laplace draw of the parameters, a random walk on log beta beyond
        the data (one step per knot period, sd ``drift_sd`` x sqrt(knot days), from the last
        knot, whose R_t relaxes toward 1 with half-life ``damping_days`` when set: damped trend,
        Gardner & McKenzie 1985) and negative-binomial count noise.  ``multiplier`` (n_regions, horizon) scales transmission
        on each future day (scenarios; 1 = unchanged).  ``dispersion`` (signal -> (n_regions,))
        caps the fitted sizes of the count noise: an in-sample fit of a smooth curve can find
        the counts nearly Poisson while its forecasts meet wider errors (e.g. sizes estimated
        from one-day-ahead errors, :func:`tallywave.models.renewal_forecast.estimate_dispersion`).  Randomness: one stream per region from
        ``random_state``, rebuilt on every call.  Regions that could not be fitted get NaN.
        Sets ``future_log_beta_`` (regions, draws, horizon): log beta beyond the data.
        """
        if not hasattr(self, "theta_"):
            raise RuntimeError("call fit() before forecasting")
        horizon = int(horizon)
        if horizon < 1:
            raise ValueError(f"horizon must be >= 1, got {horizon}")
        if self.damping_days is not None and not float(self.damping_days) > 0.0:
            raise ValueError(f"damping_days must be > 0 (or None), got {self.damping_days}")
        if not float(self.damping_spread) >= 0.0:
            raise ValueError(f"damping_spread must be >= 0, got {self.damping_spread}")
        n_draws = int(self.n_draws if n_draws is None else n_draws)
        lay = self._lay
        n_reg = self.theta_.shape[0]
        rnd = SeriesRandom(self.random_state, n_reg)
        theta = self._parameter_draws(rnd, n_draws)
        n_steps = math.ceil(horizon / lay.knot_days)
        step_sd = float(self.drift_sd) * math.sqrt(lay.knot_days)  # random walk over a knot
        walk = np.cumsum(rnd.normal((n_draws, n_steps)) * step_sd, axis=2)
        step_of_day = np.arange(horizon) // lay.knot_days
        last = theta[:, :, lay.n_knots - 1 : lay.n_knots]
        if self.damping_days is not None:  # today's R_t relaxes toward 1 (module notes)
            phi: Any = 0.5 ** (1.0 / float(self.damping_days))
            if self.damping_spread > 0.0:
                phi = damping_ratios(float(self.damping_days), float(self.damping_spread),
                                     rnd.uniform((n_draws,)))[..., None]
            level = -np.log(float(self.infectious_days)
                            * np.clip(self.susceptible_, 1e-6, 1.0))[:, None, None]
            last = level + (last - level) * phi ** np.arange(1, horizon + 1)
        future = last + walk[:, :, step_of_day]
        self.future_log_beta_ = future  # (R, draws, horizon), before any scenario multiplier
        if multiplier is not None:
            m = np.broadcast_to(np.asarray(multiplier, dtype=float), (n_reg, horizon))
            if np.any(~(m >= 0)):
                raise ValueError("multiplier must be non-negative")
            with np.errstate(divide="ignore"):
                future = future + np.log(m)[:, None, :]
        mu = self._future_means(theta, future)
        k = np.exp(self.log_dispersion_)
        for j, sig in enumerate(lay.signals):
            if dispersion is not None and sig in dispersion:
                cap = np.asarray(dispersion[sig], dtype=float)
                k[:, j] = np.where(np.isfinite(cap) & (cap > 0), np.minimum(k[:, j], cap), k[:, j])
        draws = _nb_by_day(rnd, np.nan_to_num(mu, nan=0.0), k)
        draws[~self.usable_] = np.nan
        return {s: draws[:, :, j, :] for j, s in enumerate(lay.signals)}

    def forecast(
        self,
        horizon: int = 28,
        levels: Sequence[float] | None = None,
        n_draws: int | None = None,
        *,
        multiplier: np.ndarray | None = None,
        dispersion: Mapping[str, np.ndarray] | None = None,
    ) -> dict[str, QuantileForecast]:
        """Forecast quantiles per signal: (regions × days 1..horizon × levels).

        Horizon 1 is the day after the last data day.  Quantiles are non-decreasing in the level
        and non-negative (NaN for regions that could not be fitted).  ``levels`` defaults to the
        model's ``q_levels``; ``multiplier`` and ``dispersion`` as in :meth:`sample_forecast`.
        """
        q = np.asarray(self.q_levels if levels is None else levels, dtype=float)
        if q.ndim != 1 or np.any((q < 0) | (q > 1)) or np.any(np.diff(q) <= 0):
            raise ValueError("levels must be increasing probabilities in [0, 1]")
        draws = self.sample_forecast(horizon, n_draws, multiplier=multiplier,
                                     dispersion=dispersion)
        out: dict[str, QuantileForecast] = {}
        for s, d in draws.items():
            with np.errstate(invalid="ignore"):
                qs = np.moveaxis(np.quantile(d, q, axis=1), 0, -1)  # (R, H, n_q)
            qs = np.maximum(qs, 0.0)
            good = np.isfinite(qs).all(axis=-1, keepdims=True)
            qs = np.where(good, np.maximum.accumulate(np.where(good, qs, 0.0), axis=-1), np.nan)
            out[s] = QuantileForecast(qs, q, np.arange(1, horizon + 1), model="compartmental")
        return out
