"""Run settings: documented defaults, a TOML file that overrides them, per-signal tables.

The file has a ``[defaults]`` table applying to every signal and optional ``[signal.NAME]`` tables
overriding keys for one signal.  Unknown keys are refused with a message naming the key, so a typo
never silently falls back to a default.
"""

from __future__ import annotations

import copy
import datetime as dt
import json
import sys
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from tallywave.pipeline.errors import UserError


@dataclass(frozen=True)
class Setting:
    """One setting: its default, what it means, and (for a choice) the values allowed."""

    default: Any
    help: str
    choices: tuple[str, ...] | None = None  # for text or list-of-text settings


#: Every setting, its default, its allowed values and why, grouped by stage.  The README's
#: settings table is generated from this (``python -m tallywave.pipeline.settings``) and a test
#: checks that the README matches it.  Add a setting here, in its stage's group.
SPEC: dict[str, Setting] = {
    # ---- nowcast ----
    "max_delay_days": Setting(28, "longest reporting delay modelled by the nowcast"),
    "nowcast_method": Setting("glm", "`glm` (log-linear count model, intervals) or "
                              "`chain_ladder`", ("glm", "chain_ladder")),
    "nowcast_family": Setting("negbin", "noise of the unreported cells", ("negbin", "poisson")),
    "nowcast_weekday_effect": Setting(True, "report-weekday effects in the count model, kept "
                                      "for a signal where a quasi-likelihood ratio test on its "
                                      "summed triangle supports them (p < 0.001)"),
    "nowcast_holidays": Setting([], "report dates on which nothing is reported (`YYYY-MM-DD`); "
                                "they get their own report-day effect, and closures seen in the "
                                "data (nothing reported on a usually busy weekday) are added"),
    "nowcast_tail": Setting("negbin", "reports later than `max_delay_days` form a \"≥ D\" "
                            "bin whose tail is negative binomial (`negbin`) or geometric, fitted "
                            "on the signal's summed triangle and nowcast; `none`: ignored",
                            ("negbin", "geometric", "none")),
    "nowcast_tail_days": Setting(180, "reference dates of history behind the tail's shape (a "
                                 "tail is seen only by dates older than `max_delay_days`)"),
    "nowcast_drift": Setting("auto", "delay that changes over time: `auto` (per region, when it "
                             "would have nowcast the last `nowcast_backtest_days` better), "
                             "`on`, `off`", ("auto", "on", "off")),
    "nowcast_drift_sd": Setting(0.05, "drifting delay: random-walk sd per week of the tilt "
                                "log(q(d+1)/q(d)) of the delay distribution"),
    "nowcast_backtest_days": Setting(7, "days back the drift choice re-runs the nowcast and "
                                     "scores it on what has arrived since"),
    "nowcast_drift_margin": Setting(1.0, "log-score gain the drifting delay must show in that "
                                    "back-test to be chosen"),
    "nowcast_training_days": Setting(60, "reference dates used to estimate the delay "
                                     "distribution"),
    "nowcast_pool_below": Setting(200.0, "a region with fewer events in its triangle is shrunk "
                                  "toward the delay distribution pooled over the signal's "
                                  "regions; `out.fits` (model `nowcast`) says which"),
    "nowcast_draws": Setting(400, "predictive draws behind the published nowcast quantiles"),
    "nowcast_joint_draws": Setting(100, "of those, joint draws of the nowcast window handed on "
                                   "to R_t and the forecasts"),
    # ---- cleaning ----
    "clean_negative_window_days": Setting(14, "days a negative value is taken back from"),
    "clean_dump_threshold": Setting(6.0, "robust SDs above the local baseline that make a "
                                    "backlog dump"),
    "clean_dump_min_excess": Setting(10.0, "smallest excess (counts) treated as a dump"),
    "clean_dump_spread_days": Setting(14, "days a dump's excess is spread back over"),
    "clean_baseline_days": Setting(21, "local-level window of the artefact detector"),
    "clean_weekday_weeks": Setting(8, "recent weeks used to estimate weekday effects"),
    "use_weekday_adjusted": Setting(False, "R_t from the weekday-adjusted series"),
    # ---- transmission ----
    "rt_window_days": Setting(7, "renewal estimator smoothing window (Cori et al. 2013)"),
    "rt_window_align": Setting("centre", "R_t of a day from the window centred on it (`centre`; "
                               "the last days use what is observed) or ending on it",
                               ("centre", "trailing")),
    "infection_delay": Setting(
        {"mean": 5.0, "sd": 2.5,
         "by_signal": {"cases": {"mean": 3.1, "sd": 1.3}, "admissions": {"mean": 7.0, "sd": 2.8},
                       "deaths": {"mean": 18.0, "sd": 6.6}}},
        "days from infection to the signal's reference date (incubation + onset-to-event "
        "delay; reporting delays are the nowcast's): gamma `{mean, sd}`, `{pmf = [...]}` or "
        "`{candidates = [[mean, sd], ...]}` to mix; `by_signal` entries override it per signal "
        "name (defaults: the demo simulator's delays)"),
    "rt_deconvolution_iterations": Setting(10, "EMS steps of the back-calculation of "
                                           "infections"),
    "rt_draws": Setting(50, "nowcast joint draws mixed into R_t (the first ones; at most "
                        "`nowcast_joint_draws`)"),
    "rt_prior_mean": Setting(5.0, "mean of the gamma prior on R (Cori et al. 2013 use 5)"),
    "rt_prior_sd": Setting(5.0, "sd of the gamma prior on R (Cori et al. 2013 use 5)"),
    "rt_min_infections": Setting(12.0, "no R_t where the window's expected infections already "
                                 "counted are fewer"),
    "generation_interval": Setting({"mean": 5.2, "sd": 2.4},
                                   "days; discretised gamma `{mean, sd}`, or `{pmf = [...]}`, "
                                   "or `{candidates = [[mean, sd], ...]}` to mix"),
    "rt_history_days": Setting(120, "days of R_t published per run"),
    "rt_nowcast_days": Setting(14, "R_t of a day is flagged nowcast-dependent when over 10% of "
                               "its window's infections are counted in the last this many days "
                               "or later"),
    # ---- forecasting ----
    "fit_window_weeks": Setting(8, "weeks of data each compartmental refit uses"),
    "horizon_days": Setting(28, "forecast horizon"),
    "quantiles": Setting([0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975],
                         "forecast quantile levels (median + symmetric pairs)"),
    "models": Setting(["baseline", "renewal", "compartmental", "ensemble", "ensemble_weighted"],
                      "models to run (`baseline` is the yardstick, never an ensemble member)",
                      ("baseline", "renewal", "compartmental", "ensemble", "ensemble_weighted")),
    "forecast_draws": Setting(400, "Monte Carlo draws per forecast"),
    "baseline_scale": Setting("relative", "baseline spread from past h-day changes as log "
                              "ratios (`relative`) or differences (`absolute`)",
                              ("relative", "absolute")),
    "drift_sd": Setting(0.05, "random-walk sd of log transmission per day beyond the data: the "
                        "ceiling of the estimate (and its value when R_t history is too short)"),
    "drift_from_rt": Setting(True, "estimate that drift from the run's R_t history, pooled over "
                             "the signal's regions"),
    "renewal_damping_days": Setting(7.0, "renewal projection: half-life with which today's "
                                    "log R_t relaxes toward 0 (R toward 1) beyond the data (the "
                                    "drift's random walk is not damped); 0 = no damping"),
    "renewal_damping_spread": Setting(5.0, "renewal projection: each draw's half-life is "
                                      "log-uniform over this many doublings either side of "
                                      "`renewal_damping_days` (how long today's R_t lasts is "
                                      "unknown); 0 = that half-life for every draw"),
    "renewal_depletion": Setting(True, "renewal projection: deplete susceptibles, with the pool "
                                 "and the signal's reporting fraction from the compartmental fit"),
    "latent_days": Setting(3.0, "compartmental model: mean latent period (days)"),
    "infectious_days": Setting(5.0, "compartmental model: mean infectious period (days)"),
    "compartmental_delays": Setting(
        {"cases": [3.0, 2.1], "admissions": [7.5, 3.3], "deaths": [18.5, 7.3]},
        "compartmental model: infection to reference date, gamma `[mean, sd]` days per signal"),
    "compartmental_fractions": Setting(
        {"cases": 0.3, "admissions": 0.02, "deaths": 0.005},
        "compartmental model: share of infections counted by each signal (prior mean)"),
    "fraction_prior_sd": Setting(
        {"cases": 1.0, "admissions": 1.0, "deaths": 0.5},
        "compartmental model: prior sd of each fraction on the log scale (0 = known, fixed)"),
    "fraction_drift_sd": Setting(0.2, "compartmental model: sd of a fraction's log change "
                                 "per 4 weeks (0 = constant fractions)"),
    "compartmental_damping_days": Setting(14.0, "compartmental model: half-life with which the "
                                          "last fitted R_t relaxes toward 1 beyond the data; "
                                          "0 = held at its fitted value"),
    "compartmental_damping_spread": Setting(5.0, "compartmental model: each draw's half-life "
                                            "is log-uniform over this many doublings either "
                                            "side of `compartmental_damping_days`; 0 = that "
                                            "half-life for every draw"),
    "ode_method": Setting("rk4", "compartmental model stepping", ("rk4", "euler")),
    "ode_steps_per_day": Setting(1, "compartmental model: steps per day"),
    "immune_fraction": Setting(0.0, "share of every region's population immune before the "
                               "fitted history (earlier waves, vaccination)"),
    "immune_fraction_regions": Setting({}, "per-region immune share, `{region = share}`, "
                                       "overriding `immune_fraction`"),
    "ensemble_method": Setting("median", "how the plain ensemble combines its members' "
                               "quantiles", ("median", "mean")),
    "ensemble_window_days": Setting(42, "weighted ensemble: forecasts issued this many days "
                                    "back whose truth had settled feed the weights"),
    "ensemble_band_days": Setting(7, "weighted ensemble: horizons share weights in bands of "
                                  "this many days"),
    "ensemble_min_scores": Setting(30, "weighted ensemble: common scored forecasts a band needs "
                                   "before its weights leave equal"),
    "ensemble_weight_power": Setting(1.0, "weighted ensemble: weight = (mean WIS)^-power"),
    "reconcile_parents": Setting("bottom_up", "region hierarchies: a parent's published "
                                 "forecast of every model is the sum of its leaf regions' "
                                 "(`bottom_up`), or its own fit to the aggregate (`own`)",
                                 ("bottom_up", "own")),
    "reconcile_correlation": Setting(0.5, "bottom-up parents: pairwise correlation assumed "
                                     "between the leaves' forecast errors (1 = quantiles add "
                                     "up, widest; 0 = independent)"),
    "scenarios": Setting([], "what-if projections: list of `{name, change, start, regions}` "
                         "(transmission × `change` from date `start`, or `after_days` from "
                         "the run date; `regions` optional); published in `out.scenarios`"),
    # ---- scoring ----
    "settle_days": Setting(14, "truth counts as settled this many days after the target date "
                           "(with `settle_rule = \"delay\"` the least: a signal whose 99th "
                           "percentile delay is longer waits that long)"),
    "settle_rule": Setting("delay", "`delay`: per signal, the longer of `settle_days` and the "
                           "99th percentile of its published delay distribution; `fixed`: "
                           "`settle_days`", ("delay", "fixed")),
    "settle_max_days": Setting(90, "`settle_rule = \"delay\"` never waits longer than this (a "
                               "long, uncertain delay tail would otherwise keep truth unsettled)"),
    # ---- retention ----
    "retention_days": Setting(42, "`tallywave prune` keeps every output of the runs of this many "
                              "days before the newest published run (default: horizon + "
                              "settle days, so a forecast's context stays until it is scored); "
                              "older and superseded runs keep their forecasts and fits only"),
    "prune_after_run": Setting(False, "apply the retention policy after every published run "
                               "(without shrinking the file: freed space is reused)"),
    # ---- run ----
    "seed": Setting(20260302, "random seed: runs are reproducible"),
    "batch_regions": Setting(250, "regions per parallel task (never changes the results)"),
}

#: The defaults alone (what :class:`Settings` starts from).
DEFAULTS: dict[str, Any] = {k: v.default for k, v in SPEC.items()}

_SIGNAL_KEYS = set(DEFAULTS)  # every key may be overridden per signal


@dataclass
class Settings:
    """Resolved settings: defaults, then the file's [defaults], then [signal.NAME] per signal."""

    base: dict[str, Any] = field(default_factory=lambda: copy.deepcopy(DEFAULTS))
    per_signal: dict[str, dict[str, Any]] = field(default_factory=dict)
    source: str = "built-in defaults"

    def get(self, key: str, signal: str | None = None) -> Any:
        """The value of ``key`` for ``signal`` (or the general value)."""
        if signal is not None and key in self.per_signal.get(signal, {}):
            return self.per_signal[signal][key]
        return self.base[key]

    def for_signal(self, signal: str) -> dict[str, Any]:
        """All settings as they apply to one signal."""
        out = dict(self.base)
        out.update(self.per_signal.get(signal, {}))
        return out

    def to_json(self) -> str:
        """The full resolved settings, stored with every run for reproducibility."""
        return json.dumps({"defaults": self.base, "signal": self.per_signal}, sort_keys=True)


def _check_delay(value: Any, where: str, nested: bool = True) -> dict:
    """An infection_delay value: {mean, sd}, {pmf}, {candidates}, optionally by_signal entries."""
    if not isinstance(value, dict):
        raise UserError(f"{where}: infection_delay must be a table, got {value!r}")
    unknown = set(value) - {"mean", "sd", "pmf", "candidates", "by_signal"}
    if unknown:
        raise UserError(f"{where}: infection_delay has unknown key {min(unknown)!r}")
    if {"mean", "sd"} <= set(value):
        pairs = [[value["mean"], value["sd"]]]
    elif "candidates" in value:
        pairs = value["candidates"]
        if not isinstance(pairs, list) or not pairs or not all(
                isinstance(c, list) and len(c) == 2 for c in pairs):
            raise UserError(f"{where}: infection_delay candidates must be [[mean, sd], ...]")
    elif "pmf" in value:
        pmf = value["pmf"]
        if not isinstance(pmf, list) or not pmf or not all(
                isinstance(x, (int, float)) and not isinstance(x, bool) and x >= 0 for x in pmf) \
                or sum(pmf) <= 0:
            raise UserError(f"{where}: infection_delay pmf must be a list of probabilities >= 0 "
                            "with a positive sum")
        pairs = []
    else:
        raise UserError(f"{where}: infection_delay needs {{mean, sd}}, {{pmf = [..]}} or "
                        "{candidates = [[mean, sd], ...]}")
    for m, sd in pairs:
        if any(isinstance(x, bool) or not isinstance(x, (int, float)) or not x > 0
               for x in (m, sd)):
            raise UserError(f"{where}: infection_delay mean and sd must be positive numbers")
    by = value.get("by_signal")
    if by is not None:
        if not nested or not isinstance(by, dict):
            raise UserError(f"{where}: infection_delay by_signal must be a table of signals")
        for sig, sub in by.items():
            _check_delay(sub, f"{where}.by_signal.{sig}", nested=False)
    return value


_SIGNALS3 = ("cases", "admissions", "deaths")


def _number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _check_per_signal(key: str, value: Any, where: str) -> dict[str, Any]:
    """The compartmental model's per-signal tables: known signals, sensible numbers."""
    if not isinstance(value, dict):
        raise UserError(f"{where}: {key} must be a table {{cases = .., admissions = .., "
                        "deaths = ..}}")
    out = copy.deepcopy(DEFAULTS[key])
    for sig, v in value.items():
        if sig not in _SIGNALS3:
            raise UserError(f"{where}: {key} has {sig!r}, which is not one of "
                            f"{', '.join(_SIGNALS3)}")
        if key == "compartmental_delays":
            ok = isinstance(v, list) and len(v) == 2 and all(_number(x) and x > 0 for x in v)
            need = "[mean, sd] in days, both > 0"
        elif key == "compartmental_fractions":
            ok = _number(v) and 0 < v < 1
            need = "a share between 0 and 1"
        else:
            ok = _number(v) and v >= 0
            need = "a number >= 0"
        if not ok:
            raise UserError(f"{where}: {key}.{sig} = {v!r} must be {need}")
        out[sig] = [float(x) for x in v] if isinstance(v, list) else float(v)
    return out


def _check_scenarios(value: Any, where: str) -> list[dict[str, Any]]:
    """Scenario list: unique names, change > 0, a start date or days after the run date."""
    import datetime as dt

    if not isinstance(value, list):
        raise UserError(f"{where}: scenarios must be a list of tables")
    out: list[dict[str, Any]] = []
    names: set[str] = set()
    for i, sc in enumerate(value):
        at = f"{where}: scenarios[{i}]"
        if not isinstance(sc, dict):
            raise UserError(f"{at} must be a table {{name, change, start, regions}}")
        extra = set(sc) - {"name", "change", "start", "after_days", "regions"}
        if extra:
            raise UserError(f"{at}: unknown key {min(extra)!r} (allowed: name, change, start, "
                            "after_days, regions)")
        name = sc.get("name")
        if not isinstance(name, str) or not name.strip() or name in names:
            raise UserError(f"{at}: name must be a non-empty text, different for each scenario")
        names.add(name)
        change = sc.get("change")
        if not isinstance(change, (int, float)) or isinstance(change, bool) or not change > 0:
            raise UserError(f"{at}: change must be a number > 0 (0.8 = transmission -20 %), "
                            f"got {change!r}")
        item: dict[str, Any] = {"name": name, "change": float(change)}
        if ("start" in sc) == ("after_days" in sc):
            raise UserError(f"{at}: give exactly one of start (a date) or after_days")
        if "start" in sc:
            start = sc["start"]
            try:
                item["start"] = (start if isinstance(start, dt.date)
                                 else dt.date.fromisoformat(str(start))).isoformat()
            except ValueError:
                raise UserError(f"{at}: start {start!r} is not a date (YYYY-MM-DD)") from None
        else:
            days = sc["after_days"]
            if not isinstance(days, int) or isinstance(days, bool) or days < 0:
                raise UserError(f"{at}: after_days must be a whole number >= 0, got {days!r}")
            item["after_days"] = days
        if "regions" in sc:
            regs = sc["regions"]
            if not isinstance(regs, list) or not regs or not all(isinstance(r, str)
                                                                 for r in regs):
                raise UserError(f"{at}: regions must be a non-empty list of region names")
            item["regions"] = list(regs)
        out.append(item)
    return out


def _check_value(key: str, value: Any, where: str) -> Any:
    default = DEFAULTS[key]
    if key == "infection_delay":
        return _check_delay(value, where)
    if key in ("compartmental_delays", "compartmental_fractions", "fraction_prior_sd"):
        return _check_per_signal(key, value, where)
    if key == "scenarios":
        return _check_scenarios(value, where)
    if key == "immune_fraction_regions":
        if not isinstance(value, dict) or not all(_number(v) and 0 <= v <= 1
                                                  for v in value.values()):
            raise UserError(f"{where}: immune_fraction_regions must be a table "
                            "{region = share between 0 and 1}")
        return {str(k): float(v) for k, v in value.items()}
    if key == "generation_interval":
        if not isinstance(value, dict) or not (
            {"mean", "sd"} <= set(value) or "pmf" in value or "candidates" in value
        ):
            raise UserError(
                f"{where}: generation_interval must be {{mean = .., sd = ..}}, {{pmf = [..]}} "
                "or {candidates = [[mean, sd], ...]}"
            )
        return value
    if key == "nowcast_holidays":
        return _holiday_list(value, where)
    if isinstance(default, bool):
        if not isinstance(value, bool):
            raise UserError(f"{where}: {key} must be true or false, got {value!r}")
        return value
    if isinstance(default, (int, float)):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise UserError(f"{where}: {key} must be a number, got {value!r}")
        if value < 0:
            raise UserError(f"{where}: {key} must not be negative, got {value!r}")
        if key in ("immune_fraction", "reconcile_correlation") and value > 1:
            raise UserError(f"{where}: {key} must be a share between 0 and 1, got {value!r}")
        return type(default)(value) if isinstance(default, int) and float(value).is_integer() \
            else value
    choices = SPEC[key].choices
    if isinstance(default, list):
        if not isinstance(value, list):
            raise UserError(f"{where}: {key} must be a list, got {value!r}")
        if choices is not None:
            for item in value:
                if item not in choices:
                    raise UserError(f"{where}: {key} has {item!r}, which is not one of "
                                    f"{', '.join(choices)}")
            if len(set(value)) != len(value):
                raise UserError(f"{where}: {key} names a value twice")
        if key == "quantiles":
            qs = sorted(float(q) for q in value)
            if any(not 0 < q < 1 for q in qs) or 0.5 not in qs:
                raise UserError(f"{where}: quantiles must lie in (0, 1) and include 0.5")
            if any(abs(a + b - 1) > 1e-9 for a, b in zip(qs, reversed(qs), strict=True)):
                raise UserError(f"{where}: quantiles must come in symmetric pairs around 0.5")
            return qs
        return value
    if isinstance(default, str) and not isinstance(value, str):
        raise UserError(f"{where}: {key} must be text, got {value!r}")
    if choices is not None and value not in choices:
        raise UserError(f"{where}: {key} = {value!r} is not one of {', '.join(choices)}")
    return value


def _holiday_list(value: Any, where: str) -> list[str]:
    """A list of dates (TOML dates or `YYYY-MM-DD` text) as ISO strings."""
    if not isinstance(value, list):
        raise UserError(f"{where}: nowcast_holidays must be a list of dates, got {value!r}")
    out = []
    for item in value:
        text = item.isoformat()[:10] if isinstance(item, dt.date) else str(item)
        try:
            out.append(dt.date.fromisoformat(text).isoformat())
        except ValueError:
            raise UserError(f"{where}: nowcast_holidays has {item!r}, which is not a date "
                            "(YYYY-MM-DD)") from None
    return out


def load_settings(path: str | Path | None = None) -> Settings:
    """Read a settings TOML file (or return the defaults when ``path`` is None)."""
    s = Settings()
    if path is None:
        return s
    p = Path(path)
    if not p.is_file():
        raise UserError(f"{p}: settings file not found")
    try:
        data = tomllib.loads(p.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise UserError(f"{p}: not valid TOML ({exc})") from exc
    unknown_top = set(data) - {"defaults", "signal"}
    if unknown_top:
        raise UserError(f"{p}: unknown table [{min(unknown_top)}] (allowed: defaults, signal)")
    for key, value in data.get("defaults", {}).items():
        if key not in DEFAULTS:
            raise UserError(f"{p}: unknown setting defaults.{key}")
        s.base[key] = _check_value(key, value, f"{p}: defaults.{key}")
    for sig, table in data.get("signal", {}).items():
        if not isinstance(table, dict):
            raise UserError(f"{p}: [signal.{sig}] must be a table")
        for key, value in table.items():
            if key not in _SIGNAL_KEYS:
                raise UserError(f"{p}: unknown setting signal.{sig}.{key}")
            s.per_signal.setdefault(sig, {})[key] = _check_value(key, value, f"{p}: signal.{sig}")
    for sig in ["", *s.per_signal]:
        models = s.get("models", sig or None)
        if {"ensemble", "ensemble_weighted"} & set(models) and \
                not {"renewal", "compartmental"} & set(models):
            where = f"signal.{sig}.models" if sig else "models"
            raise UserError(f"{p}: {where} asks for an ensemble but names none of its members "
                            "(renewal, compartmental); the baseline is the yardstick, not a member")
    s.source = str(p)
    return s


def _cell(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return f'`"{value}"`'
    if isinstance(value, dict):
        return "`" + _toml_inline(value) + "`"
    if isinstance(value, list) and not value:
        return "none"
    if isinstance(value, list):
        if all(isinstance(v, float) for v in value) and len(value) > 4:
            return f"{value[0]:g} … {value[-1]:g} ({len(value)} levels)"
        return ", ".join(str(v) for v in value)
    return f"{value:g}" if isinstance(value, float) else str(value)


def _toml_inline(value: Any) -> str:
    """A value as an inline TOML fragment (tables nested)."""
    if isinstance(value, dict):
        return "{" + ", ".join(f"{k} = {_toml_inline(v)}" for k, v in value.items()) + "}"
    return str(value)


def markdown_table() -> str:
    """The README's settings table, generated from :data:`SPEC`."""
    rows = ["| key | default | allowed | meaning |", "|---|---|---|---|"]
    for key, spec in SPEC.items():
        allowed = ", ".join(f"`{c}`" for c in spec.choices) if spec.choices else ""
        rows.append(f"| `{key}` | {_cell(spec.default)} | {allowed} | {spec.help} |")
    return "\n".join(rows)


if __name__ == "__main__":  # pragma: no cover - prints the README table
    sys.stdout.write(markdown_table() + "\n")
