"""Trend estimator: Theil-Sen over bucket points (each the interquartile, i.e. 25 % trimmed,
mean of its bucket), checked against scipy (an independent implementation) and against
properties published with the method."""

from __future__ import annotations

import math
import random

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from hemostream.core.trends import RobustTrend, theil_sen

scipy_stats = pytest.importorskip("scipy.stats")

T0 = 1_800_000_000.0


finite = st.floats(min_value=-1e4, max_value=1e4, allow_nan=False, allow_infinity=False)


@settings(max_examples=60, deadline=None)
@given(st.lists(finite, min_size=3, max_size=60), st.integers(0, 10_000))
def test_theil_sen_matches_scipy(ys, seed):
    # Independent check: scipy.stats.theilslopes (median of pairwise slopes, intercept
    # median(y) - slope * median(x), its default "separate" method).
    rng = random.Random(seed)
    xs = sorted({round(rng.uniform(0, 1000), 3) for _ in ys})
    ys = ys[:len(xs)]
    if len(xs) < 2:
        return
    s, b, tau = theil_sen(xs, ys)
    ref = scipy_stats.theilslopes(ys, xs)
    assert s == pytest.approx(ref.slope, rel=1e-9, abs=1e-9)
    assert b == pytest.approx(ref.intercept, rel=1e-9, abs=1e-6)


@settings(max_examples=40, deadline=None)
@given(st.lists(st.integers(-50, 50), min_size=3, max_size=40))
def test_kendall_tau_a_matches_scipy_without_ties_in_x(ys):
    # scipy.stats.kendalltau(variant="b") equals tau-a when neither variable has ties; with
    # ties in y only, tau-a = tau-b * sqrt((n0 - n2) / n0) (Kendall 1938; scipy as reference).
    xs = list(range(len(ys)))
    _, _, tau = theil_sen(xs, ys)
    if len(set(ys)) == 1:
        assert tau == 0.0
        return
    ref = scipy_stats.kendalltau(xs, ys).statistic
    n0 = len(ys) * (len(ys) - 1) / 2
    counts = {}
    for y in ys:
        counts[y] = counts.get(y, 0) + 1
    n2 = sum(c * (c - 1) / 2 for c in counts.values())
    assert tau == pytest.approx(ref * math.sqrt((n0 - n2) / n0), abs=1e-9)


def test_theil_sen_resists_a_quarter_of_wild_points():
    # Sen 1968: breakdown point about 29 %. 25 % of the points replaced by huge values
    # must leave the slope near the true one; ordinary least squares is thrown far off.
    rng = random.Random(7)
    x = np.arange(40.0)
    y = 2.0 * x + 5 + np.array([rng.gauss(0, 0.5) for _ in x])
    idx = rng.sample(range(40), 10)
    y[idx] = 1e4
    s, _, _ = theil_sen(x, y)
    assert abs(s - 2.0) < 0.5
    ols = np.polyfit(x, y, 1)[0]
    assert abs(ols - 2.0) > 10


def test_worked_example_slope_and_tau():
    # By hand: points (0,1) (1,3) (2,5) (3,7) (4,100): pairwise slopes are 2 (six pairs among
    # the first four) and 99, 48.5, 31.67, 24.25 (pairs with the last): median of ten is 2.
    s, b, tau = theil_sen([0, 1, 2, 3, 4], [1, 3, 5, 7, 100])
    assert s == 2.0
    assert tau == 1.0      # every pair concordant


def _feed(tr, t0, seconds, fn, step=1.0):
    closed = 0
    k = 0
    while k * step < seconds:
        t = t0 + k * step
        v = fn(t - t0)
        if v is not None:
            closed += tr.update(t, v)
        k += 1
    return closed


def test_bucketed_slope_recovers_a_linear_rise_with_noise():
    rng = random.Random(3)
    tr = RobustTrend(window_s=600, bucket_s=15, min_points=12)
    # 4 mm[Hg] per 10 minutes plus noise of SD 1 at 1 Hz
    _feed(tr, T0, 900, lambda s: 6 + 4 * s / 600 + rng.gauss(0, 1))
    r = tr.reading(T0 + 899)
    assert r is not None
    assert r.slope_per_10min == pytest.approx(4.0, abs=0.5)
    assert r.tau > 0.8
    assert r.direction(1.5, 0.0, 0.3) == "rising"


def test_bucket_points_match_scipy_on_the_same_points():
    # The estimate is Theil-Sen of the bucket points: recompute the points independently
    # (interquartile mean per 15 s bucket with scipy.stats.trim_mean(values, 0.25), which
    # cuts int(0.25 n) values at each end, at the mean sample time) and compare with scipy.
    rng = random.Random(11)
    tr = RobustTrend(window_s=600, bucket_s=15, min_points=12)
    samples = [(T0 + k, 80 - 3 * k / 600 + rng.gauss(0, 2)) for k in range(700)]
    for t, v in samples:
        tr.update(t, v)
    buckets = {}
    for t, v in samples:
        buckets.setdefault(math.floor(t / 15), []).append((t, v))
    keys = sorted(buckets)[:-1]                      # the last bucket is still open
    pts = [(np.mean([t for t, _ in buckets[k]]),
            scipy_stats.trim_mean([v for _, v in buckets[k]], 0.25)) for k in keys]
    newest = pts[-1][0]
    pts = [p for p in pts if p[0] >= newest - 600]
    ref = scipy_stats.theilslopes([v for _, v in pts], [t for t, _ in pts])
    r = tr.reading(samples[-1][0])
    assert r.points == len(pts)
    assert r.slope_per_10min == pytest.approx(ref.slope * 600, rel=1e-9)


def test_flat_noise_reads_steady():
    rng = random.Random(5)
    tr = RobustTrend(window_s=600, bucket_s=15, min_points=12)
    _feed(tr, T0, 1200, lambda s: 72 + rng.gauss(0, 3))
    r = tr.reading(T0 + 1199)
    assert r.direction(5.0, 0.0, 0.3) == "steady"
    assert abs(r.slope_per_10min) < 2


def test_needs_min_points_and_span():
    tr = RobustTrend(window_s=600, bucket_s=15, min_points=12)
    _feed(tr, T0, 150, lambda s: 5 + s / 60)   # 10 buckets closed at most
    assert tr.reading(T0 + 150) is None
    _feed(tr, T0 + 150, 200, lambda s: 7.5 + s / 60)
    assert tr.reading(T0 + 350) is not None


def test_gap_restarts_the_trend():
    tr = RobustTrend(window_s=600, bucket_s=15, min_points=12, gap_reset_s=180)
    _feed(tr, T0, 600, lambda s: 5.0)
    assert tr.reading(T0 + 600) is not None
    # 5 minutes without values, then a new level: the old points are dropped
    _feed(tr, T0 + 900, 60, lambda s: 12.0)
    assert tr.reading(T0 + 960) is None


def test_stale_trend_reads_unknown():
    tr = RobustTrend(window_s=600, bucket_s=15, min_points=12, stale_after_s=60)
    _feed(tr, T0, 600, lambda s: 5 + s / 100)
    assert tr.reading(T0 + 600) is not None
    assert tr.reading(T0 + 600 + 120) is None


def test_memory_is_bounded_by_the_window():
    tr = RobustTrend(window_s=600, bucket_s=15, min_points=12)
    _feed(tr, T0, 6 * 3600, lambda s: 5 + math.sin(s / 500), step=1.0)
    assert len(tr._t) <= 600 / 15 + 1
    assert len(tr._bv) <= 15


def test_bucket_value_is_robust_and_resolves_below_the_display_resolution():
    from hemostream.core.trends import bucket_value
    rng = random.Random(12)
    # whole-number readings of a true 6.4 with noise: the median snaps to 6, the
    # interquartile mean stays near 6.4 (checked against scipy.stats.trim_mean)
    vals = [round(6.4 + rng.gauss(0, 0.7)) for _ in range(15)]
    assert bucket_value(vals) == pytest.approx(scipy_stats.trim_mean(vals, 0.25))
    many = [round(6.4 + rng.gauss(0, 0.7)) for _ in range(4000)]
    assert abs(bucket_value(many) - 6.4) < 0.1 and float(np.median(many)) == 6.0
    # two spikes in fifteen values do not move it much
    assert abs(bucket_value([6.0] * 13 + [300.0, 300.0]) - 6.0) < 1e-9


def test_late_sample_is_ignored_and_noted_artifact_dropped_from_open_bucket():
    tr = RobustTrend(window_s=600, bucket_s=15, min_points=3)
    tr.update(T0 + 30, 5.0)
    tr.update(T0 + 31, 5.0)
    assert tr.update(T0 + 2, 99.0) is False          # older than the open bucket
    tr.update(T0 + 32, 300.0)
    tr.drop_since(T0 + 32)
    assert tr.points_between(T0, T0 + 40) == [5.0]


def test_irregular_intermittent_samples():
    # One value per 2 minutes (for example wedge or cuff): still a slope once enough points.
    tr = RobustTrend(window_s=3600, bucket_s=30, min_points=6, stale_after_s=300)
    for k in range(30):
        tr.update(T0 + 120 * k, 10 + 0.1 * k)
    r = tr.reading(T0 + 120 * 29 + 1)
    assert r is not None
    assert r.slope_per_10min == pytest.approx(0.1 * 5, rel=1e-6)   # 0.1 per 2 min
