"""Run settings: documented defaults, a TOML file that overrides them, per-signal tables.

The file has a ``[defaults]`` table applying to every signal and optional ``[signal.NAME]`` tables
overriding keys for one signal.  Unknown keys are refused with a message naming the key, so a typo
never silently falls back to a default.
"""

from __future__ import annotations

import copy
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
    "nowcast_weekday_effect": Setting(False, "report-weekday effect in the count model"),
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
    "rt_prior_mean": Setting(5.0, "mean of the gamma prior on R (Cori et al. 2013 use 5)"),
    "rt_prior_sd": Setting(5.0, "sd of the gamma prior on R (Cori et al. 2013 use 5)"),
    "rt_min_infections": Setting(12.0, "no R_t where the window's expected infections are "
                                 "fewer"),
    "generation_interval": Setting({"mean": 5.2, "sd": 2.4},
                                   "days; discretised gamma `{mean, sd}`, or `{pmf = [...]}`, "
                                   "or `{candidates = [[mean, sd], ...]}` to mix"),
    "rt_history_days": Setting(120, "days of R_t published per run"),
    "rt_nowcast_days": Setting(14, "last days whose R_t is flagged nowcast-dependent"),
    # ---- forecasting ----
    "fit_window_weeks": Setting(8, "weeks of data each compartmental refit uses"),
    "horizon_days": Setting(28, "forecast horizon"),
    "quantiles": Setting([0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975],
                         "forecast quantile levels (median + symmetric pairs)"),
    "models": Setting(["baseline", "renewal", "compartmental", "ensemble"], "models to run",
                      ("baseline", "renewal", "compartmental", "ensemble")),
    "forecast_draws": Setting(400, "Monte Carlo draws per forecast"),
    "latent_days": Setting(3.0, "compartmental model: mean latent period (days)"),
    "infectious_days": Setting(5.0, "compartmental model: mean infectious period (days)"),
    "drift_sd": Setting(0.05, "random-walk sd of log transmission per day beyond the data"),
    "ensemble_method": Setting("median", "how quantiles are combined across models",
                               ("median", "mean")),
    # ---- scoring ----
    "settle_days": Setting(14, "truth counts as settled this many days after the target date"),
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


def _check_value(key: str, value: Any, where: str) -> Any:
    default = DEFAULTS[key]
    if key == "generation_interval":
        if not isinstance(value, dict) or not (
            {"mean", "sd"} <= set(value) or "pmf" in value or "candidates" in value
        ):
            raise UserError(
                f"{where}: generation_interval must be {{mean = .., sd = ..}}, {{pmf = [..]}} "
                "or {candidates = [[mean, sd], ...]}"
            )
        return value
    if isinstance(default, bool):
        if not isinstance(value, bool):
            raise UserError(f"{where}: {key} must be true or false, got {value!r}")
        return value
    if isinstance(default, (int, float)):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise UserError(f"{where}: {key} must be a number, got {value!r}")
        if value < 0:
            raise UserError(f"{where}: {key} must not be negative, got {value!r}")
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
    s.source = str(p)
    return s


def _cell(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return f'`"{value}"`'
    if isinstance(value, dict):
        return "`{" + ", ".join(f"{k} = {v}" for k, v in value.items()) + "}`"
    if isinstance(value, list):
        if all(isinstance(v, float) for v in value) and len(value) > 4:
            return f"{value[0]:g} … {value[-1]:g} ({len(value)} levels)"
        return ", ".join(str(v) for v in value)
    return f"{value:g}" if isinstance(value, float) else str(value)


def markdown_table() -> str:
    """The README's settings table, generated from :data:`SPEC`."""
    rows = ["| key | default | allowed | meaning |", "|---|---|---|---|"]
    for key, spec in SPEC.items():
        allowed = ", ".join(f"`{c}`" for c in spec.choices) if spec.choices else ""
        rows.append(f"| `{key}` | {_cell(spec.default)} | {allowed} | {spec.help} |")
    return "\n".join(rows)


if __name__ == "__main__":  # pragma: no cover - prints the README table
    sys.stdout.write(markdown_table() + "\n")
