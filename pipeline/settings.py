"""Run settings: documented defaults, a TOML file that overrides them, per-signal tables.

The file has a ``[defaults]`` table applying to every signal and optional ``[signal.NAME]`` tables
overriding keys for one signal.  Unknown keys are refused with a message naming the key, so a typo
never silently falls back to a default.
"""

from __future__ import annotations

import copy
import json
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from tallywave.pipeline.errors import UserError

#: Every setting, its default and why.  The README's settings table is generated from this.
DEFAULTS: dict[str, Any] = {
    # ---- nowcast ----
    "max_delay_days": 28,  # longest reporting delay modelled; later corrections are ignored
    "nowcast_method": "glm",  # "glm" (count model, intervals) | "chain_ladder"
    "nowcast_family": "negbin",  # "negbin" | "poisson": noise of the unreported cells
    "nowcast_weekday_effect": False,  # report-weekday effect in the count model (slower)
    "nowcast_training_days": 60,  # reference dates used to estimate the delay distribution
    "nowcast_pool_below": 200.0,  # a region with fewer events in its triangle borrows strength
    "nowcast_draws": 400,  # predictive draws for nowcast quantiles and Rt propagation
    # ---- cleaning ----
    "clean_negative_window_days": 14,  # days a negative value is taken back from
    "clean_dump_threshold": 6.0,  # robust SDs above the local baseline that make a backlog dump
    "clean_dump_min_excess": 10.0,  # smallest excess (counts) treated as a dump
    "clean_dump_spread_days": 14,  # days a dump's excess is spread back over
    "clean_baseline_days": 21,  # local baseline window for dump detection
    "clean_weekday_weeks": 8,  # recent weeks used to estimate weekday effects
    "use_weekday_adjusted": False,  # later stages read the weekday-adjusted series
    # ---- transmission ----
    "rt_window_days": 7,  # renewal estimator smoothing window (Cori et al. 2013)
    "rt_prior_mean": 5.0,  # gamma prior on R (Cori et al. 2013 use mean 5, sd 5)
    "rt_prior_sd": 5.0,
    "rt_min_infections": 12.0,  # no estimate when the window's expected infections are fewer
    "generation_interval": {"mean": 5.2, "sd": 2.4},  # days; discretised gamma, or {"pmf": [...]}
    "rt_history_days": 120,  # days of history estimated and published each run
    "rt_nowcast_days": 14,  # last days flagged as depending on the nowcast
    # ---- forecasting ----
    "fit_window_weeks": 8,  # weeks of data each compartmental refit uses
    "horizon_days": 28,
    "quantiles": [0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975],
    "models": ["baseline", "renewal", "compartmental", "ensemble"],
    "forecast_draws": 400,
    "latent_days": 3.0,  # compartmental model: mean latent period
    "infectious_days": 5.0,  # compartmental model: mean infectious period
    "drift_sd": 0.05,  # random-walk sd of log transmission per day beyond the data
    "ensemble_method": "median",  # "median" | "mean" quantile averaging
    # ---- scoring ----
    "settle_days": 14,  # truth counts as settled this many days after target_date
    # ---- run ----
    "seed": 20260302,  # random seed: runs are reproducible
    "batch_regions": 250,  # regions per parallel task in the flows
}

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
    if isinstance(default, list):
        if not isinstance(value, list):
            raise UserError(f"{where}: {key} must be a list, got {value!r}")
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
