"""Robust windowed trend estimates at bounded cost per sample.

Method
------
Samples of one parameter are reduced to one point per fixed time bucket (``bucket_s``,
aligned to multiples of it in epoch time): the point is the **interquartile mean** of the
bucket's values, i.e. the **25 % trimmed mean** (sort, drop ``n // 4`` values at each end,
average the middle half; the same number as ``scipy.stats.trim_mean(values, 0.25)``, which
the tests check it against; the median for fewer than four values), at the mean of their
times. Buckets are *not* medians: like the median the trimmed mean ignores a spike or two;
unlike the median it resolves changes smaller than the device's display resolution, because
noise dithers whole-number readings (a CVP sent as 6, 7, 6, 6, 7 ... averages 6.4, its median
is 6) (trimmed means as robust estimators of location: common practice in robust
statistics, e.g. Wilcox RR, Introduction to Robust Estimation and Hypothesis Testing;
from memory). The trend is the **Theil-Sen slope** of the bucket points
inside the window: the median of the slopes of all pairs of points.

- Theil H, "A rank-invariant method of linear and polynomial regression analysis",
  Proc. Koninklijke Nederlandse Akademie van Wetenschappen 1950;53:386-392, 521-525,
  1397-1412 (published).
- Sen PK, "Estimates of the regression coefficient based on Kendall's tau",
  J Am Stat Assoc 1968;63:1379-1389 (published). Its breakdown point is about 29 %: up to
  that share of wild points cannot move the slope arbitrarily.

Alongside, **Kendall's tau** (tau-a) of time against value from the same pairs:
Kendall MG, "A new measure of rank correlation", Biometrika 1938;30:81-93; as a trend test:
Mann HB, "Nonparametric tests against trend", Econometrica 1945;13:245-259 (published; the
use as a consistency check on the direction is the project's). A direction needs the slope
beyond the steady band *and* tau beyond ``min_tau``, so a slope carried by a few points does
not count.

Cost: adding a sample is O(1) (append to the open bucket). When a bucket closes, its value
is taken (O(k log k) for k samples in the bucket) and the slope is recomputed over the n
window points with numpy: O(n^2) pairs, n = window_s / bucket_s (40 points and 780 pairs for
10 minutes at 15 s; 120 points for 30 minutes), i.e. once per bucket, not once per sample.
Memory per estimator: two float arrays of n points plus the open bucket.

Gaps and steps: a gap between points longer than ``gap_reset_s`` drops the points before
it, and so does a jump between consecutive points larger than ``step_reset`` (when set: a
step is not a trend; a transducer moved to another height shifts the reading at once, a
physiological change takes minutes). An estimate needs ``min_points`` points spanning ``min_span_fraction`` of the window; a trend
whose newest point is older than ``stale_after_s`` reads as unknown (None).
"""

from __future__ import annotations

import math
from array import array

import numpy as np

_PAIRS: dict[int, tuple[np.ndarray, np.ndarray]] = {}


def _pairs(n: int) -> tuple[np.ndarray, np.ndarray]:
    p = _PAIRS.get(n)
    if p is None:
        i, j = np.triu_indices(n, k=1)
        p = _PAIRS[n] = (i.astype(np.intp), j.astype(np.intp))
    return p


def bucket_value(vals: list[float]) -> float:
    """Interquartile (25 % trimmed) mean: the mean of the middle half of the sorted values
    (for n >= 4; drops ``n // 4`` values at each end, as ``scipy.stats.trim_mean(vals, 0.25)``),
    the median below four values.

    >>> bucket_value([6, 7, 6, 6, 7, 6, 300, 6])     # the spike is dropped
    6.25
    >>> bucket_value([5.0, 9.0])
    7.0
    """
    s = sorted(vals)
    n = len(s)
    if n >= 4:
        k = n // 4
        mid = s[k:n - k]
        return sum(mid) / len(mid)
    return s[n // 2] if n % 2 else 0.5 * (s[n // 2 - 1] + s[n // 2])


def theil_sen(x, y) -> tuple[float, float, float]:
    """Theil-Sen slope, intercept and Kendall's tau-a of points ``(x, y)``.

    The slope is the median of ``(y[j] - y[i]) / (x[j] - x[i])`` over all pairs with
    ``x[i] != x[j]``; the intercept is ``median(y) - slope * median(x)`` (the convention of
    scipy.stats.theilslopes' default); tau-a is ``(concordant - discordant) / pairs``.

    >>> s, b, tau = theil_sen([0, 1, 2, 3, 4], [1.0, 3.0, 5.0, 7.0, 100.0])
    >>> s, b, tau        # the wild last point does not move the slope
    (2.0, 1.0, 1.0)
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    n = len(x)
    if n < 2:
        raise ValueError("need at least two points")
    i, j = _pairs(n)
    dx = x[j] - x[i]
    dy = y[j] - y[i]
    ok = dx != 0
    if not ok.all():
        dx, dy = dx[ok], dy[ok]
        if len(dx) == 0:
            raise ValueError("all x are equal")
    slopes = dy / dx
    slope = float(np.median(slopes))
    intercept = float(np.median(y) - slope * np.median(x))
    tau = float(np.sum(np.sign(dx) * np.sign(dy))) / len(dx)
    return slope, intercept, tau


class TrendReading:
    """What a trend says now: slope per 10 minutes, tau, level (median of points), points."""

    __slots__ = ("slope_per_10min", "tau", "level", "points", "last_t")

    def __init__(self, slope_per_10min: float, tau: float, level: float, points: int,
                 last_t: float) -> None:
        self.slope_per_10min = slope_per_10min
        self.tau = tau
        self.level = level
        self.points = points
        self.last_t = last_t

    def direction(self, steady_abs: float, steady_rel: float, min_tau: float,
                  scale: float = 1.0) -> str:
        """``rising``, ``falling`` or ``steady`` against the band
        ``scale * max(steady_abs, steady_rel * |level|)`` per 10 minutes and ``scale * min_tau``.
        """
        band = scale * max(steady_abs, steady_rel * abs(self.level))
        t = scale * min_tau
        s = self.slope_per_10min
        if s >= band and s > 0 and self.tau >= t:
            return "rising"
        if s <= -band and s < 0 and self.tau <= -t:
            return "falling"
        return "steady"


class RobustTrend:
    """Theil-Sen trend of one parameter over bucket points, each the interquartile (25 %
    trimmed) mean of its bucket (see the module docstring).

    >>> tr = RobustTrend(window_s=600, bucket_s=15, min_points=12)
    >>> for k in range(600):           # 10 minutes at 1 Hz, rising 0.01 per second
    ...     _ = tr.update(1000.0 + k, 5.0 + 0.01 * k)
    >>> r = tr.reading(1599.0)
    >>> round(r.slope_per_10min, 6), r.tau      # 0.01/s = 6 per 10 minutes
    (6.0, 1.0)
    """

    __slots__ = ("window_s", "bucket_s", "min_points", "min_span_s", "gap_reset_s",
                 "stale_after_s", "step_reset", "_t", "_v", "_bucket", "_bt", "_bv", "_reading",
                 "_dirty", "open_start", "open_end")

    def __init__(self, window_s: float, bucket_s: float, min_points: int,
                 min_span_fraction: float = 0.5, gap_reset_s: float = 180.0,
                 stale_after_s: float = 60.0, step_reset: float | None = None) -> None:
        self.window_s = window_s
        self.bucket_s = bucket_s
        self.min_points = min_points
        self.min_span_s = min_span_fraction * window_s
        self.gap_reset_s = gap_reset_s
        self.stale_after_s = stale_after_s
        self.step_reset = step_reset
        self._t = array("d")          # bucket point times, increasing
        self._v = array("d")          # bucket values (interquartile, 25 % trimmed, means)
        self._bucket: int | None = None
        self._bt: list[float] = []    # open bucket: sample times ...
        self._bv: list[float] = []    # ... and values
        self._reading: TrendReading | None = None
        self._dirty = False
        #: time range of the open bucket [open_start, open_end): a sample in it is appended
        #: at once (the fast path of :meth:`update`)
        self.open_start = float("inf")
        self.open_end = float("-inf")

    # ------------------------------------------------------------------ input

    def update(self, t: float, v: float) -> bool:
        """Add a sample; return True when a bucket closed (the estimate is then recomputed
        at the next :meth:`reading`, so unread trends cost nothing).

        A sample older than the open bucket is ignored (it is late for the trend).
        """
        if self.open_start <= t < self.open_end:
            self._bt.append(t)
            self._bv.append(v)
            return False
        b = math.floor(t / self.bucket_s)
        cur = self._bucket
        if cur is not None and b <= cur:
            if b == cur:                 # float edge of the bucket bounds
                self._bt.append(t)
                self._bv.append(v)
            return False
        changed = self._close() if cur is not None else False
        self._bucket = b
        self.open_start = b * self.bucket_s
        self.open_end = (b + 1) * self.bucket_s
        self._bt = [t]
        self._bv = [v]
        return changed

    def reset(self) -> None:
        """Forget the points (the trend restarts); the open bucket is dropped too."""
        del self._t[:]
        del self._v[:]
        self._bt = []
        self._bv = []
        self._reading = None
        self._dirty = False

    def drop_since(self, t: float) -> None:
        """Remove samples at or after ``t`` from the open bucket (an artifact noted late)."""
        if self._bt and self._bt[-1] >= t:
            keep = [k for k, bt in enumerate(self._bt) if bt < t]
            self._bt = [self._bt[k] for k in keep]
            self._bv = [self._bv[k] for k in keep]

    def _close(self) -> bool:
        vals = self._bv
        if not vals:
            return False
        n = len(vals)
        med = bucket_value(vals)          # trimmed mean, not a median (see bucket_value)
        pt = sum(self._bt) / n
        tt, vv = self._t, self._v
        if tt and (pt - tt[-1] > self.gap_reset_s or (
                self.step_reset is not None and abs(med - vv[-1]) > self.step_reset)):
            del tt[:]
            del vv[:]
        tt.append(pt)
        vv.append(med)
        cut = pt - self.window_s
        k = 0
        while k < len(tt) and tt[k] < cut:
            k += 1
        if k:
            del tt[:k]
            del vv[:k]
        self._dirty = True
        return True

    def _recompute(self) -> None:
        tt, vv = self._t, self._v
        n = len(tt)
        if n < self.min_points or tt[-1] - tt[0] < self.min_span_s:
            self._reading = None
            return
        x = np.frombuffer(tt, dtype=float)
        y = np.frombuffer(vv, dtype=float)
        i, j = _pairs(n)
        dy = y[j] - y[i]
        slopes = dy / (x[j] - x[i])             # x strictly increasing: every dx > 0
        m = len(slopes)
        h = m // 2
        if m % 2:
            slope = float(np.partition(slopes, h)[h])
        else:
            part = np.partition(slopes, (h - 1, h))
            slope = 0.5 * (float(part[h - 1]) + float(part[h]))
        tau = float(np.count_nonzero(dy > 0) - np.count_nonzero(dy < 0)) / m
        s = sorted(vv)
        level = s[n // 2] if n % 2 else 0.5 * (s[n // 2 - 1] + s[n // 2])
        self._reading = TrendReading(slope * 600.0, tau, level, n, tt[-1])

    # ------------------------------------------------------------------ read-out

    def reading(self, now: float) -> TrendReading | None:
        """The latest estimate, or None when there is none or it is stale at ``now``."""
        if self._dirty:
            self._dirty = False
            self._recompute()
        r = self._reading
        if r is None or now - r.last_t > self.stale_after_s + self.bucket_s:
            return None
        return r

    def points_between(self, t0: float, t1: float) -> list[float]:
        """Bucket points with point time in [t0, t1], plus the open bucket's value from its
        samples in the range (for baselines)."""
        out = [v for t, v in zip(self._t, self._v) if t0 <= t <= t1]
        if self._bv:
            vals = [v for t, v in zip(self._bt, self._bv) if t0 <= t <= t1]
            if vals:
                out.append(bucket_value(vals))
        return out

    def last_point(self) -> tuple[float, float] | None:
        if not self._t:
            return None
        return self._t[-1], self._v[-1]
