"""Detection and repair of reporting artefacts in daily surveillance count series.

Input convention: ``y`` is a float array ``(n_series, T)`` of daily reported counts as known on
``as_of`` (columns ordered by consecutive dates, negative values allowed, NaN = day absent from the
feed) and ``dates`` is a ``datetime64[D]`` array ``(T,)``.  Weekday columns are ordered Monday=0 …
Sunday=6.

Repairs are applied in this order (each logged with its own action codes, see ``ACTION_CODES``):

0. Preliminary weekday effects and a robust local level are estimated with the suspect days
   (negative, missing) masked; they give the "expected shape" ``level × weekday effect`` used below.
1. Negative values: the negative mass (plus, by default, the day's own expected count) is taken back
   out of the preceding days in proportion to their counts.
2. Missing days and improbable zero runs followed by a catch-up day: the catch-up is spread over the
   gap and itself in proportion to the expected shape.  Missing days with no catch-up become 0.
3. Backlog dumps: a single day far above its robust baseline (short rolling median of
   weekday-adjusted values, noise scale from a 21-day rolling MAD-type residual scale with a Poisson
   floor) gives its excess back to the preceding days in proportion to the expected shape.
4. Weekday effects are estimated on the repaired series; ``adjusted = clean / effect`` renormalised.

Every step moves mass between days of one series, so ``clean.sum(axis=1)`` equals the reported total
(NaN counted as 0) up to float rounding, and ``clean >= 0``.  The only exception: a series whose
reported total is negative cannot satisfy both; it is set to 0 everywhere and flagged
``negative_total``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
from numpy.lib.stride_tricks import sliding_window_view

__all__ = [
    "ACTION_CODES",
    "FLAG_CODES",
    "RepairResult",
    "ReportingRepair",
    "repair_series",
    "rolling_median_mad",
    "weekday_effects",
    "weekday_index",
]

MAD_TO_SD = 1.4826  # MAD of a normal sample x 1.4826 = its SD (common practice)

FLAG_CODES: dict[str, str] = {
    "negative": "reported value was negative; replaced by the expected level (or 0)",
    "takeback": "mass taken out of this day to offset a later (or earlier) negative value",
    "gap": "day missing from the feed (NaN)",
    "zero_run": "zero report that is improbable at the local level",
    "catch_up": "day whose excess was spread back over the preceding gap / zero run",
    "backlog": "backlog dump: excess above the baseline moved to the preceding days",
    "spread_in": "day that received part of a backlog",
    "negative_total": "series total is negative; series set to 0 (mass not preserved)",
}
"""Per-day flag codes; a day carrying several is written ``code1|code2``."""

ACTION_CODES: dict[str, str] = {
    "negative_set": "negative day raised to its expected level (or 0)",
    "negative_takeback": "mass taken from a day to pay for a negative value",
    "gap_spread": "missing or zero day filled from the following catch-up day",
    "catchup_source": "catch-up day lowered by the mass spread over the gap",
    "gap_zero": "missing day with no catch-up set to 0 (delta 0: nothing moved)",
    "zero_run_kept": "improbable zero run with no catch-up, left as reported (delta 0)",
    "backlog_source": "backlog day lowered to its baseline",
    "backlog_spread": "day raised by its share of a backlog",
    "negative_total": "series with a negative total set to 0",
}
"""Action codes written to ``RepairResult.actions['action']``."""


# --------------------------------------------------------------------------------------------
# vectorised helpers
# --------------------------------------------------------------------------------------------
def weekday_index(dates: np.ndarray) -> np.ndarray:
    """Weekday of each date, Monday=0 … Sunday=6 (1970-01-01 was a Thursday)."""
    d = np.asarray(dates, dtype="datetime64[D]")
    return ((d.astype(np.int64) + 3) % 7).astype(np.int64)


def _nanmedian_last(a: np.ndarray) -> np.ndarray:
    """Median along the last axis ignoring NaN (NaN where a slice is all NaN); sort-based, fast."""
    s = np.sort(a, axis=-1)  # NaN sorts to the end
    k = np.sum(~np.isnan(a), axis=-1)
    lo = np.maximum((k - 1) // 2, 0)[..., None]
    hi = np.maximum(k // 2 - (k == 0), 0)[..., None]
    med = 0.5 * (np.take_along_axis(s, lo, axis=-1) + np.take_along_axis(s, hi, axis=-1))[..., 0]
    return np.where(k > 0, med, np.nan)


def _fill_along_time(a: np.ndarray, default: float = 0.0) -> np.ndarray:
    """Fill NaN along axis 1 with the last valid value, then the next; all-NaN rows → default."""
    n, t_len = a.shape
    rows = np.arange(n)[:, None]
    cols = np.arange(t_len)[None, :]
    ok = np.isfinite(a)
    last = np.maximum.accumulate(np.where(ok, cols, -1), axis=1)
    ff = np.where(last >= 0, a[rows, np.maximum(last, 0)], np.nan)
    nxt = np.minimum.accumulate(np.where(ok, cols, t_len)[:, ::-1], axis=1)[:, ::-1]
    bf = np.where(nxt < t_len, a[rows, np.minimum(nxt, t_len - 1)], np.nan)
    out = np.where(np.isfinite(ff), ff, bf)
    return np.where(np.isfinite(out), out, default)


def rolling_median_mad(z: np.ndarray, window: int) -> tuple[np.ndarray, np.ndarray]:
    """Centred rolling median and MAD along time, NaN-aware, windows truncated at the edges.

    ``window`` is rounded up to an odd number.  Returns arrays shaped like ``z`` (NaN where a
    window holds no finite value).
    """
    z = np.atleast_2d(np.asarray(z, dtype=float))
    half = max(int(window) // 2, 0)
    pad = np.full((z.shape[0], half), np.nan)
    win = sliding_window_view(np.concatenate([pad, z, pad], axis=1), 2 * half + 1, axis=1)
    med = _nanmedian_last(win)
    mad = _nanmedian_last(np.abs(win - med[..., None]))
    return med, mad


def weekday_effects(
    y: np.ndarray,
    dates: np.ndarray,
    *,
    n_weeks: int = 8,
    prior_count: float = 5.0,
    trim_z: float = 4.0,
    n_iter: int = 2,
) -> np.ndarray:
    """Multiplicative day-of-week effects (n_series, 7), mean 1, from the last ``n_weeks`` weeks.

    Ratio-to-centred-7-day-moving-average (classical multiplicative decomposition): the trend is
    the centred 7-day mean (of the weekday-adjusted series from the 2nd iteration on); per weekday
    the effect is ``(sum y + prior_count) / (sum trend + prior_count)`` over the days whose ratio
    lies within ``trim_z`` robust SDs (MAD, with a Poisson floor) of that weekday's median ratio.
    ``prior_count`` shrinks effects towards 1 when counts are small.  NaN days are skipped.
    """
    x = np.atleast_2d(np.asarray(y, dtype=float))
    n, t_len = x.shape
    eff = np.ones((n, 7))
    if t_len < 8:
        return eff
    dow = weekday_index(dates)
    t_end = t_len - 4
    t_start = max(3, t_end - 7 * int(n_weeks) + 1)
    sel = np.arange(t_start, t_end + 1)
    xs = x[:, sel]
    for _ in range(max(int(n_iter), 1)):
        base = x / eff[:, dow]
        ma = sliding_window_view(base, 7, axis=1).mean(axis=-1)  # centre j + 3
        ms = ma[:, sel - 3]
        valid = np.isfinite(xs) & np.isfinite(ms) & (ms > 0)
        ratio = np.where(valid, xs / np.where(valid, ms, 1.0), np.nan)
        new = np.ones((n, 7))
        for d in range(7):
            cols = dow[sel] == d
            if not cols.any():
                continue
            r = ratio[:, cols]
            m = ms[:, cols]
            med = _nanmedian_last(r)
            mad = _nanmedian_last(np.abs(r - med[:, None]))
            floor = np.sqrt(np.maximum(np.nan_to_num(med), 0.05)[:, None] / np.where(m > 0, m, 1))
            scale = np.maximum(MAD_TO_SD * np.nan_to_num(mad)[:, None], floor)
            with np.errstate(invalid="ignore"):
                keep = valid[:, cols] & (np.abs(r - med[:, None]) <= trim_z * scale)
            num = np.where(keep, xs[:, cols], 0.0).sum(axis=1)
            den = np.where(keep, m, 0.0).sum(axis=1)
            with np.errstate(invalid="ignore", divide="ignore"):
                new[:, d] = (num + prior_count) / (den + prior_count)
        new = np.where(np.isfinite(new), new, 1.0)
        new = np.maximum(new, 1e-3)
        eff = new / new.mean(axis=1, keepdims=True)
    return eff


# --------------------------------------------------------------------------------------------
# result container
# --------------------------------------------------------------------------------------------
@dataclass
class RepairResult:
    """Output of the artefact repair: repaired counts, per-day flags, audit log, weekday effects."""

    clean: np.ndarray  # (n_series, T) repaired counts, >= 0
    flag: np.ndarray  # (n_series, T) object array of '' or '|'-joined FLAG_CODES
    actions: pd.DataFrame  # series, t, date, action, delta, detail
    weekday_effect: np.ndarray  # (n_series, 7) Monday..Sunday, mean 1
    adjusted: np.ndarray  # clean / weekday effect, rescaled to the clean total per series
    reported: np.ndarray  # input with NaN as 0 (the mass that is preserved)


# --------------------------------------------------------------------------------------------
# the repair model
# --------------------------------------------------------------------------------------------
class ReportingRepair:
    """Detect and repair reporting artefacts, vectorised over series; mass-preserving per series.

    Parameters (defaults in brackets):

    negative_window [14]
        Days before a negative value that pay for it, in proportion to their counts.  The window
        doubles (back to the series start) until it holds ``negative_cover`` times the mass to
        take; if the whole history holds less than the negative mass, all of it is taken and the
        rest comes from the following days (same proportional rule, window growing forward).
    negative_cover [2.0]
        Minimum ratio (window mass / mass taken) before the window stops growing.
    negative_restore_level [True]
        A negative daily value is the day's own new counts minus a correction, so the day is set
        to its expected count (local level × weekday effect) and that mass is taken back too.
        Skipped (day set to 0) when the window cannot hold ``negative_cover`` times the total.
    level_window [21]
        Days (odd) of the centred rolling windows that give the local level: median of
        weekday-adjusted values (expected shape), the neighbours of a gap (10 days each side) and
        the backlog noise scale (rolling median of absolute residuals).
    zero_p [1e-3]
        A run of zero reports is improbable when P(all zero | Poisson(expected)) < ``zero_p``
        (Poisson, so overdispersed series are flagged a little more often).
    catchup_z [1.0], catchup_min_share [0.5]
        The day after a gap / improbable zero run is a catch-up when its excess over expectation
        exceeds ``catchup_z`` robust SDs (Poisson floor) and ``catchup_min_share`` × the expected
        mass of the gap (0.5 = midway between "no catch-up" and "full catch-up").  Its whole value
        is then spread over gap + itself in proportion to the expected shape.
    backlog_baseline_window [7]
        Days (odd) of the centred rolling median that is the baseline of a day in backlog
        detection; short so that it follows fast epidemic growth.
    backlog_z [6.0], backlog_min_excess [10.0], backlog_min_ratio [2.0], backlog_min_level [1.0]
        A day is a backlog dump when its weekday-adjusted value exceeds the baseline by more than
        ``backlog_z`` robust SDs (max of 1.4826 × the rolling median absolute residual and the
        Poisson SD), its excess is at least ``backlog_min_excess`` counts, its value at least
        ``backlog_min_ratio`` × the expected count, and the expected count is at least
        ``backlog_min_level`` (else there is no shape to spread over).  The first day of a series
        is never a backlog (no history).  The day keeps its expected count.
    backlog_window [14]
        Days before the dump that receive the excess, in proportion to the expected shape
        (``level_window`` rolling median × weekday effect).
    weekday_weeks [8], weekday_prior [5.0], weekday_trim_z [4.0]
        Passed to :func:`weekday_effects` (``n_weeks``, ``prior_count``, ``trim_z``).
    step [1]
        Days between two columns of ``y``: 1 for daily series; 7 for weekly totals, whose
        columns are weeks (every window above then counts weeks) and which have no weekday
        effects (all effects are 1; the audit text speaks of weeks).

    Fitted attributes: ``clean_``, ``flag_``, ``actions_``, ``weekday_effect_``, ``adjusted_``,
    ``reported_``, ``expected_`` (level × weekday effect used by the last repair step).
    """

    def __init__(
        self,
        *,
        negative_window: int = 14,
        negative_cover: float = 2.0,
        negative_restore_level: bool = True,
        level_window: int = 21,
        zero_p: float = 1e-3,
        catchup_z: float = 1.0,
        catchup_min_share: float = 0.5,
        backlog_z: float = 6.0,
        backlog_min_excess: float = 10.0,
        backlog_min_ratio: float = 2.0,
        backlog_min_level: float = 1.0,
        backlog_window: int = 14,
        backlog_baseline_window: int = 7,
        weekday_weeks: int = 8,
        weekday_prior: float = 5.0,
        weekday_trim_z: float = 4.0,
        step: int = 1,
    ) -> None:
        self.negative_window = negative_window
        self.negative_cover = negative_cover
        self.negative_restore_level = negative_restore_level
        self.level_window = level_window
        self.zero_p = zero_p
        self.catchup_z = catchup_z
        self.catchup_min_share = catchup_min_share
        self.backlog_z = backlog_z
        self.backlog_min_excess = backlog_min_excess
        self.backlog_min_ratio = backlog_min_ratio
        self.backlog_min_level = backlog_min_level
        self.backlog_window = backlog_window
        self.backlog_baseline_window = backlog_baseline_window
        self.weekday_weeks = weekday_weeks
        self.weekday_prior = weekday_prior
        self.weekday_trim_z = weekday_trim_z
        self.step = step

    # ---- small utilities ---------------------------------------------------------------------
    def get_params(self) -> dict[str, object]:
        """Settings as a dict (for logging in ``out.runs.settings_json``)."""
        return {k: v for k, v in vars(self).items() if not k.endswith("_")}

    def _effects(self, x: np.ndarray) -> np.ndarray:
        if int(self.step) != 1:  # weekly totals hold every weekday once: no weekday effect
            return np.ones((np.atleast_2d(x).shape[0], 7))
        return weekday_effects(
            x,
            self._dates,
            n_weeks=self.weekday_weeks,
            prior_count=self.weekday_prior,
            trim_z=self.weekday_trim_z,
        )

    def _level(self, x: np.ndarray, eff: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Rolling median / MAD of weekday-adjusted values; NaN level filled along time, else 0."""
        med, mad = rolling_median_mad(x / eff[:, self._dow], self.level_window)
        return _fill_along_time(med), np.nan_to_num(mad)

    def _flag(self, i: int, idx: np.ndarray | list[int] | int, code: str) -> None:
        for t in np.atleast_1d(idx):
            cur = self._flags[i, t]
            if code not in cur.split("|"):
                self._flags[i, t] = code if cur == "" else f"{cur}|{code}"

    def _log(self, i: int, t: int, action: str, delta: float, detail: str) -> None:
        self._actions.append((int(i), int(t), action, float(delta), detail))

    def _d(self, t: int) -> str:
        return str(self._dates[t])

    @staticmethod
    def _share(total: float, weights: np.ndarray) -> np.ndarray:
        """Split ``total`` ∝ ``weights`` (uniform if they sum to 0), exactly summing to total."""
        w = np.maximum(np.asarray(weights, dtype=float), 0.0)
        s = w.sum()
        parts = total * (w / s) if s > 0 else np.full(w.shape, total / max(w.size, 1))
        if parts.size:
            parts[np.argmax(parts)] += total - parts.sum()
        return parts

    # ---- fit ---------------------------------------------------------------------------------
    def fit(self, y: np.ndarray, dates: np.ndarray) -> ReportingRepair:
        """Run repairs 1–4 on ``y`` (n_series, T) with consecutive ``dates`` (T,); returns self."""
        y = np.atleast_2d(np.asarray(y, dtype=float))
        if y.ndim != 2:
            raise ValueError(f"y must be 1-D or 2-D (n_series, T), got shape {y.shape}")
        dates = np.asarray(dates, dtype="datetime64[D]")
        n, t_len = y.shape
        if dates.shape != (t_len,):
            raise ValueError(f"dates has shape {dates.shape}, expected ({t_len},) to match y")
        step = int(self.step)
        if step < 1:
            raise ValueError(f"step must be a positive number of days, got {self.step}")
        if t_len > 1 and not np.all(np.diff(dates).astype(np.int64) == step):
            what = "consecutive days" if step == 1 else f"{step} days apart"
            raise ValueError(f"dates must be {what} (fill absent dates with NaN in y)")
        if np.isinf(y).any():
            raise ValueError("y contains infinite values")
        self._dates = dates
        self._dow = weekday_index(dates)
        self._flags = np.full((n, t_len), "", dtype=object)
        self._actions: list[tuple[int, int, str, float, str]] = []

        reported = np.nan_to_num(y, nan=0.0)
        target = reported.sum(axis=1)
        cur = y.copy()
        neg_total = target < 0

        # exception rule: negative total → everything 0
        for i in map(int, np.flatnonzero(neg_total)):
            for t in map(int, np.flatnonzero(reported[i] != 0)):
                self._log(
                    i,
                    t,
                    "negative_total",
                    -reported[i, t],
                    f"series total {target[i]:.6g} is negative: a non-negative series cannot "
                    "keep it, so every day is set to 0",
                )
            self._flag(i, np.arange(t_len), "negative_total")
            cur[i] = 0.0

        self._flags[np.isnan(y) & ~neg_total[:, None]] = "gap"

        # 0. preliminary shape with suspect days masked
        masked = np.where(cur < 0, np.nan, cur)
        eff0 = self._effects(masked)
        lev0, _ = self._level(masked, eff0)
        expected0 = lev0 * eff0[:, self._dow]

        # 1. negative values
        negative_day = np.zeros((n, t_len), dtype=bool)
        for i, t in np.argwhere(cur < 0):
            self._repair_negative(cur, i, t, expected0[i, t])
            negative_day[i, t] = True

        # 2. gaps and improbable zero runs followed by a catch-up
        eff1 = self._effects(cur)
        lev1, _ = self._level(cur, eff1)
        exclude = self._repair_gaps(cur, eff1, lev1 * eff1[:, self._dow], negative_day)

        # 3. backlog dumps
        x2 = np.where(exclude, np.nan, cur)
        eff2 = self._effects(x2)
        self._repair_backlogs(cur, eff2, exclude)

        # 4. weekday effects on the repaired series, exact mass bookkeeping
        clean = np.maximum(np.nan_to_num(cur, nan=0.0), 0.0)
        clean[neg_total] = 0.0
        rows = np.arange(n)
        for _ in range(2):
            diff = np.where(neg_total, 0.0, target - clean.sum(axis=1))
            j = np.argmax(clean, axis=1)
            clean[rows, j] = np.maximum(clean[rows, j] + diff, 0.0)
        eff = self._effects(np.where(exclude, np.nan, clean))
        adjusted = clean / eff[:, self._dow]
        tot_adj = adjusted.sum(axis=1, keepdims=True)
        adjusted = np.where(
            tot_adj > 0,
            adjusted * (clean.sum(axis=1, keepdims=True) / np.where(tot_adj > 0, tot_adj, 1.0)),
            0.0,
        )
        lev, _ = self._level(np.where(exclude, np.nan, clean), eff)

        self.reported_ = reported
        self.clean_ = clean
        self.flag_ = self._flags
        self.weekday_effect_ = eff
        self.adjusted_ = adjusted
        self.expected_ = lev * eff[:, self._dow]
        acts = pd.DataFrame(self._actions, columns=["series", "t", "action", "delta", "detail"])
        acts.insert(2, "date", dates[acts["t"].to_numpy(dtype=np.int64)])
        if step != 1:  # the columns are weeks: say so in the audit text
            acts["detail"] = acts["detail"].str.replace(r"\bday(s?)\b", r"week\1", regex=True)
        self.actions_ = acts.sort_values(["series", "t"], kind="stable").reset_index(drop=True)
        del self._flags, self._actions
        return self

    def result(self) -> RepairResult:
        """Fitted outputs bundled as a :class:`RepairResult`."""
        return RepairResult(
            clean=self.clean_,
            flag=self.flag_,
            actions=self.actions_,
            weekday_effect=self.weekday_effect_,
            adjusted=self.adjusted_,
            reported=self.reported_,
        )

    # ---- step 1 ------------------------------------------------------------------------------
    def _donors(self, pos: np.ndarray, t: int, need: float, backward: bool) -> np.ndarray:
        """Indices of the window before (after) ``t`` grown until it holds cover × need."""
        w = max(int(self.negative_window), 1)
        t_len = pos.size
        while True:
            idx = (
                np.arange(max(0, t - w), t) if backward else np.arange(t + 1, min(t_len, t + 1 + w))
            )
            at_edge = (idx.size == 0) or (idx[0] == 0 if backward else idx[-1] == t_len - 1)
            if pos[idx].sum() >= self.negative_cover * need or at_edge:
                return idx
            w *= 2

    def _take(
        self, cur: np.ndarray, i: int, idx: np.ndarray, amount: float, t: int, v: float
    ) -> None:
        pos = np.maximum(np.nan_to_num(cur[i, idx]), 0.0)
        parts = np.minimum(self._share(amount, pos), pos)
        cur[i, idx] -= parts
        for s, p in zip(idx[parts > 0], parts[parts > 0], strict=True):
            self._log(
                i,
                s,
                "negative_takeback",
                -p,
                f"{p:.4g} taken out to pay for the negative value {v:.6g} reported on "
                f"{self._d(t)} (share in proportion to this day's count)",
            )
        self._flag(i, idx[parts > 0], "takeback")

    def _repair_negative(self, cur: np.ndarray, i: int, t: int, expected: float) -> None:
        v = float(cur[i, t])
        need = -v
        mu = max(float(expected), 0.0) if self.negative_restore_level else 0.0
        pos = np.maximum(np.nan_to_num(cur[i]), 0.0)
        pos[t] = 0.0
        back = self._donors(pos, t, need + mu, backward=True)
        avail = pos[back].sum()
        if avail < self.negative_cover * (need + mu):
            mu = max(0.0, min(mu, avail / self.negative_cover - need))
        from_back = min(need + mu, avail)
        rest = need + mu - from_back
        if from_back > 0:
            self._take(cur, i, back, from_back, t, v)
        fwd = np.array([], dtype=np.int64)
        if rest > 0:
            pos = np.maximum(np.nan_to_num(cur[i]), 0.0)
            pos[t] = 0.0
            fwd = self._donors(pos, t, rest, backward=False)
            self._take(cur, i, fwd, rest, t, v)
        cur[i, t] = mu
        where = f"the preceding {back.size} days" if back.size else "no preceding day"
        if fwd.size:
            where += f" and the following {fwd.size} days"
        self._log(
            i,
            t,
            "negative_set",
            mu - v,
            f"negative value {v:.6g} set to {mu:.4g} (expected count {expected:.4g} "
            f"{'restored' if mu > 0 else 'not restored'}); {need + mu:.6g} taken back from "
            f"{where} in proportion to their counts",
        )
        self._flag(i, t, "negative")

    # ---- step 2 ------------------------------------------------------------------------------
    def _gap_runs(self, cur: np.ndarray, expected: np.ndarray, isnan: np.ndarray,
                  iszero: np.ndarray) -> list[tuple[int, int, int]]:
        """Runs of missing or zero days worth a look: (series, first day, last day + 1) for every
        run with a missing day or with more expected counts than ``zero_p`` allows."""
        run = (isnan | iszero).astype(np.int8)
        edges = np.diff(np.pad(run, ((0, 0), (1, 1))), axis=1)
        starts = np.argwhere(edges == 1)
        ends = np.argwhere(edges == -1)  # exclusive
        if starts.size == 0:
            return []
        si, sa, sb = starts[:, 0], starts[:, 1], ends[:, 1]
        zc = np.pad(np.cumsum(np.where(iszero, expected, 0.0), axis=1), ((0, 0), (1, 0)))
        nc = np.pad(np.cumsum(isnan, axis=1), ((0, 0), (1, 0)))
        mu_zero = zc[si, sb] - zc[si, sa]
        has_nan = (nc[si, sb] - nc[si, sa]) > 0
        cand = has_nan | (mu_zero > -math.log(self.zero_p))
        return [(int(i), int(a), int(b)) for i, a, b in
                zip(si[cand], sa[cand], sb[cand], strict=True)]

    def _local_level(self, cur: np.ndarray, eff: np.ndarray, expected: np.ndarray, i: int,
                     a: int, b: int) -> tuple[float, float]:
        """Weekday-adjusted local level and its MAD from the days around the run a..b."""
        t_len = cur.shape[1]
        half = int(self.level_window) // 2
        dow = self._dow
        nb = np.r_[np.arange(max(0, a - half), a), np.arange(b + 2, min(t_len, b + 2 + half))]
        vals = cur[i, nb] / eff[i, dow[nb]]
        vals = vals[np.isfinite(vals)]
        if vals.size >= 3:
            lev = float(np.median(vals))
            return lev, float(np.median(np.abs(vals - lev)))
        return float(expected[i, a] / eff[i, dow[a]]), 0.0

    def _is_catchup(self, cur: np.ndarray, eff: np.ndarray, i: int, c: int, lev: float,
                    mad: float, mu: np.ndarray) -> bool:
        """Is day ``c`` (just after a run with expected counts ``mu``) a catch-up report?"""
        if not (c < cur.shape[1] and np.isfinite(cur[i, c]) and cur[i, c] > 0 and mu.sum() > 0):
            return False
        mu_c = lev * eff[i, self._dow[c]]
        sd = max(MAD_TO_SD * mad * eff[i, self._dow[c]], math.sqrt(max(mu_c, 1.0)))
        excess = cur[i, c] - mu_c
        return bool(excess > self.catchup_z * sd and excess >= self.catchup_min_share * mu.sum())

    def _spread_catchup(self, cur: np.ndarray, eff: np.ndarray, isnan: np.ndarray, i: int,
                        days: np.ndarray, c: int, lev: float, mu: np.ndarray,
                        zdays: np.ndarray) -> None:
        """Share the catch-up on day ``c`` over the run and itself, in proportion to expected
        counts, and log every day's share."""
        dow = self._dow
        total = float(cur[i, c])
        parts = self._share(total, np.r_[mu, lev * eff[i, dow[c]]])
        for s, p in zip(days, parts[:-1], strict=True):
            what = "missing day" if isnan[i, s] else "zero report"
            self._log(i, s, "gap_spread", p,
                      f"{what} given {p:.4g} of the catch-up {total:.6g} reported on "
                      f"{self._d(c)} (expected {lev * eff[i, dow[s]]:.4g} here)")
        self._log(i, c, "catchup_source", parts[-1] - total,
                  f"catch-up {total:.6g} after {days.size} missing/zero day(s) spread "
                  f"over {days.size + 1} days in proportion to expected counts "
                  f"(local level {lev:.4g}/day x weekday effect); {parts[-1]:.4g} kept")
        cur[i, days] = parts[:-1]
        cur[i, c] = parts[-1]
        self._flag(i, c, "catch_up")
        if zdays.any():
            self._flag(i, days[zdays], "zero_run")

    def _keep_gap(self, cur: np.ndarray, isnan: np.ndarray, exclude: np.ndarray, i: int,
                  days: np.ndarray, zdays: np.ndarray, improbable: bool, lev: float,
                  p_zero: float) -> None:
        """No catch-up follows: missing days become 0 (no mass moved), improbable zero runs are
        flagged and kept; both are left out of later baselines."""
        for s in days[isnan[i, days]]:
            self._log(i, s, "gap_zero", 0.0,
                      "missing day with no catch-up on the next reported day: set to 0 "
                      "(no mass moved)")
            cur[i, s] = 0.0
            exclude[i, s] = True
        if improbable:
            a = int(days[0])
            self._flag(i, days[zdays], "zero_run")
            exclude[i, days[zdays]] = True
            self._log(i, a, "zero_run_kept", 0.0,
                      f"{int(zdays.sum())} zero report(s) from {self._d(a)} are improbable "
                      f"(P={p_zero:.2g} at local level {lev:.4g}/day) but the next day "
                      "shows no catch-up; left as reported")

    def _repair_gaps(
        self, cur: np.ndarray, eff: np.ndarray, expected: np.ndarray, negative_day: np.ndarray
    ) -> np.ndarray:
        """Spread catch-ups over gaps / improbable zero runs; returns mask of unrepaired gaps."""
        isnan = np.isnan(cur)
        iszero = (cur == 0) & ~negative_day
        exclude = np.zeros(cur.shape, dtype=bool)
        for i, a, b_end in self._gap_runs(cur, expected, isnan, iszero):
            b = b_end - 1
            days = np.arange(a, b + 1)
            lev, mad = self._local_level(cur, eff, expected, i, a, b)
            mu = lev * eff[i, self._dow[days]]
            zdays = iszero[i, days]
            p_zero = math.exp(-float(mu[zdays].sum())) if zdays.any() else 1.0
            improbable = bool(zdays.any()) and p_zero < self.zero_p
            if not improbable and not isnan[i, days].any():
                continue
            if self._is_catchup(cur, eff, i, b + 1, lev, mad, mu):
                self._spread_catchup(cur, eff, isnan, i, days, b + 1, lev, mu, zdays)
            else:
                self._keep_gap(cur, isnan, exclude, i, days, zdays, improbable, lev, p_zero)
        # NaN days outside candidate runs cannot exist (every NaN run is a candidate)
        return exclude

    # ---- step 3 ------------------------------------------------------------------------------
    def _repair_backlogs(self, cur: np.ndarray, eff: np.ndarray, exclude: np.ndarray) -> None:
        dow = self._dow
        e = eff[:, dow]
        z = np.where(exclude, np.nan, cur) / e
        base, _ = rolling_median_mad(z, self.backlog_baseline_window)
        base = _fill_along_time(base)
        resid_scale, _ = rolling_median_mad(np.abs(z - base), self.level_window)
        sigma = np.maximum(
            MAD_TO_SD * np.nan_to_num(resid_scale), np.sqrt(np.maximum(base, 1.0) / e)
        )
        lev, _ = rolling_median_mad(z, self.level_window)
        shape = _fill_along_time(lev) * e
        mu = base * e
        score = (cur / e - base) / sigma
        hit = (
            (score > self.backlog_z)
            & (cur - mu >= self.backlog_min_excess)
            & (cur >= self.backlog_min_ratio * mu)
            & (mu >= self.backlog_min_level)
            & ~exclude
        )
        hit[:, 0] = False
        for i, t in np.argwhere(hit):
            value = float(cur[i, t])
            excess = value - float(mu[i, t])
            idx = np.arange(max(0, t - int(self.backlog_window)), t)
            parts = self._share(excess, shape[i, idx])
            cur[i, idx] += parts
            cur[i, t] = mu[i, t]
            self._log(
                i,
                t,
                "backlog_source",
                -excess,
                f"value {value:.6g} is {value / mu[i, t]:.3g}x the expected "
                f"{mu[i, t]:.4g} ({score[i, t]:.3g} robust SD above the "
                f"{self.backlog_baseline_window}-day median); excess {excess:.6g} moved to the "
                f"preceding {idx.size} days in proportion to expected counts",
            )
            for s, p in zip(idx, parts, strict=True):
                self._log(
                    i,
                    s,
                    "backlog_spread",
                    p,
                    f"{p:.4g} of the backlog reported on {self._d(t)} placed here",
                )
            self._flag(i, t, "backlog")
            self._flag(i, idx, "spread_in")


def repair_series(y: np.ndarray, dates: np.ndarray, **settings: object) -> RepairResult:
    """Repair artefacts of ``y`` (n_series, T) with :class:`ReportingRepair` settings; one call."""
    return ReportingRepair(**settings).fit(y, dates).result()  # type: ignore[arg-type]
