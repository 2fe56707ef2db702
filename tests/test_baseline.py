"""Tests of models/baseline.py (flat baseline) and models/ensemble.py (quantile averaging)."""

from __future__ import annotations

import numpy as np
import pytest

from tallywave.models.baseline import FlatBaseline
from tallywave.models.ensemble import quantile_ensemble

Q = [0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975]


# ------------------------------------------------------------------ flat baseline


def test_flat_poisson_interval_coverage() -> None:
    # known truth: 300 flat Poisson(100) series; the 90 % interval should cover about 90 % of
    # the 28 held-out days (the accumulated level changes widen it slowly with the horizon)
    rng = np.random.default_rng(1)
    y = rng.poisson(100.0, (300, 120)).astype(float)
    model = FlatBaseline(window_days=56, n_samples=1000, seed=2).fit(y[:, :92])
    q = model.quantiles(28, [0.05, 0.5, 0.95])
    held = y[:, 92:]
    covered = (held >= q[..., 0]) & (held <= q[..., 2])
    assert 0.75 <= covered.mean() <= 0.97  # measured 0.94 (0.99 with level="last")
    assert 0.80 <= covered[:, 0].mean() <= 0.97  # horizon 1: measured 0.89
    # the median is the mean of the last 7 days, exactly (the sample is mirror-symmetric)
    assert np.allclose(q[..., 1], y[:, 85:92].mean(axis=1)[:, None], atol=1e-9)


def test_last_value_variant_is_a_symmetric_random_walk() -> None:
    # closed form: with level="last", horizon h is last + sum of h independent symmetrised
    # changes, so its variance is h * mean(change^2) and its median the last value
    y = np.tile([100.0, 104.0], 30)[None, :]  # changes are +4 and -4; last value 104
    model = FlatBaseline(window_days=40, level="last", n_samples=20000, seed=3).fit(y)
    draws = model.sample(4)
    assert np.allclose(np.median(draws, axis=1), 104.0)
    for h in range(4):
        assert abs(draws[0, :, h].var() / (16.0 * (h + 1)) - 1.0) < 0.05
    q = model.quantiles(1, [0.25, 0.75])  # half the mass at 100, half at 108
    assert np.allclose(q[0, 0], [100.0, 108.0])


def test_quantiles_monotone_non_negative_and_missing() -> None:
    rng = np.random.default_rng(4)
    y = np.vstack([
        rng.poisson(0.5, 80),  # near zero: truncation at 0 matters
        rng.poisson(50.0, 80) * (1 + 0.5 * (np.arange(80) % 7 == 0)),  # weekday effect
        np.full(80, 25.0),  # constant: no spread at all
        np.full(80, np.nan),  # nothing observed
    ]).astype(float)
    y[1, 40:45] = np.nan
    y[0, 10] = -3.0  # a negative value is treated as missing
    q = FlatBaseline(n_samples=1000, seed=5).fit(y).quantiles(28, Q)
    assert q.shape == (4, 28, len(Q))
    ok = q[:3]
    assert np.all(np.diff(ok, axis=-1) >= 0) and np.all(ok >= 0)
    assert ok[0, :, 0].max() == 0.0  # lower quantiles of a near-zero series are truncated
    assert np.allclose(ok[2], 25.0)
    assert np.isnan(q[3]).all()


def test_baseline_rejects_bad_settings() -> None:
    with pytest.raises(ValueError, match="level"):
        FlatBaseline(level="median").fit(np.ones(20))
    with pytest.raises(RuntimeError):
        FlatBaseline().quantiles(7)


# ------------------------------------------------------------------ quantile ensemble


def _monotone(rng: np.random.Generator, shape: tuple[int, ...]) -> np.ndarray:
    return np.sort(rng.gamma(2.0, 10.0, shape), axis=-1)


def test_ensemble_of_identical_inputs_returns_input() -> None:
    rng = np.random.default_rng(6)
    a = _monotone(rng, (5, 7, len(Q)))
    assert np.array_equal(quantile_ensemble([a, a, a]), a)
    assert np.allclose(quantile_ensemble([a, a, a], method="mean"), a, rtol=1e-14, atol=0)
    for method in ("median", "mean"):
        out = quantile_ensemble([a, a], method=method, weights=[0.2, 3.0])
        assert np.allclose(out, a, rtol=1e-14, atol=0)


def test_ensemble_matches_numpy_reference() -> None:
    # reference library: numpy.median and numpy.average across models, level by level
    rng = np.random.default_rng(7)
    models = [_monotone(rng, (4, 6, len(Q))) for _ in range(4)]
    stack = np.stack(models)
    assert np.allclose(quantile_ensemble(models), np.median(stack, axis=0))
    assert np.allclose(quantile_ensemble(models[:3]), np.median(stack[:3], axis=0))
    w = [1.0, 2.0, 3.0, 4.0]
    assert np.allclose(quantile_ensemble(models, "mean", w), np.average(stack, axis=0, weights=w))
    for method in ("median", "mean"):
        out = quantile_ensemble(models, method, w)
        assert np.all(np.diff(out, axis=-1) >= 0)  # Vincentization keeps monotone inputs monotone


def test_weighted_median_and_missing_models() -> None:
    # hand-worked: values 1, 2, 3 with weights .2/.3/.5 -> cumulative .2/.5/1.0; 0.5 is reached
    # exactly at 2, so the median is the midpoint of 2 and 3 (as numpy does for an even count)
    vals = [np.full((1, 1, 1), v) for v in (1.0, 2.0, 3.0)]
    assert quantile_ensemble(vals, weights=[0.2, 0.3, 0.5]).item() == 2.5
    assert quantile_ensemble(vals, weights=[0.2, 0.2, 0.6]).item() == 3.0
    assert quantile_ensemble(vals, "mean", weights=[0.2, 0.2, 0.6]).item() == pytest.approx(2.4)
    rng = np.random.default_rng(8)
    a, b, c = (_monotone(rng, (3, 2, 5)) for _ in range(3))
    b[1] = np.nan  # model b has no forecast for series 1
    out = quantile_ensemble([a, b, c])
    assert np.allclose(out[1], np.median(np.stack([a[1], c[1]]), axis=0))
    assert np.allclose(out[0], np.median(np.stack([a[0], b[0], c[0]]), axis=0))
    with pytest.raises(ValueError):
        quantile_ensemble([a, a[:2]])


def test_ensemble_of_baselines_is_valid() -> None:
    rng = np.random.default_rng(9)
    y = rng.poisson(30.0, (10, 70)).astype(float)
    q1 = FlatBaseline(n_samples=500, seed=1).fit(y).quantiles(14, Q)
    q2 = FlatBaseline(level="last", n_samples=500, seed=2).fit(y).quantiles(14, Q)
    out = quantile_ensemble([q1, q2, 1.1 * q1])
    assert out.shape == q1.shape
    assert np.all(np.diff(out, axis=-1) >= 0) and np.all(out >= 0)
