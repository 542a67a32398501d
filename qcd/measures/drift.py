"""Drift: Theil-Sen slope of baseline medians against time. numpy only, SI in and out."""
from __future__ import annotations

import numpy as np

from qcd.measures.noise import median

__all__ = ["theil_sen", "baseline_drift", "MAX_POINTS"]

MAX_POINTS = 1000     # above this, medians are pooled into MAX_POINTS groups first


def theil_sen(t: np.ndarray, y: np.ndarray) -> tuple[float, float]:
    """(slope, intercept): median of pairwise slopes (Theil 1950; Sen 1968), intercept the
    median of y - slope t. Breakdown point 29.3 % (docs/methods.md §6)."""
    t = np.asarray(t, dtype=float)
    y = np.asarray(y, dtype=float)
    if len(t) < 2:
        raise ValueError("Theil-Sen needs at least two points")
    slopes = _pairwise_slopes(t, y)
    if slopes is None:
        raise ValueError("Theil-Sen needs two distinct times")
    slope = float(_flat_median(slopes))
    return slope, float(median(y - slope * t))


def _flat_median(v: np.ndarray) -> float:
    """numpy.median of a 1-D float array, for the n^2/2 pairwise slopes; reorders ``v`` (a
    buffer of the caller's, partitioned in place: no copy of its 4 MB at 1000 points). One
    partition at the lower middle and the minimum above it give the same middle pair (order
    statistics are values, whatever the selection), then the same mean; a third of the time of
    partitioning at both middles and the end (measured, 499500 random slopes). NaN anywhere:
    median's own path (NaNs sort last, numpy's answer is NaN)."""
    n = len(v)
    half = n // 2
    if n < 2:
        return median(v)
    if n % 2:
        v.partition(half)
        mid = np.mean(v[half:half + 1])
        upper = v[half + 1:].max()
    else:
        v.partition(half - 1)
        mid = np.mean(np.array([v[half - 1], v[half:].min()]))
        upper = v[half:].max()
    if np.isnan(mid) or np.isnan(upper):
        return median(v)
    return mid


def _pairwise_slopes(t: np.ndarray, y: np.ndarray) -> np.ndarray | None:
    """(y[j] - y[i]) / (t[j] - t[i]) for every pair i < j with t[j] != t[i] (row by row into
    one buffer, in numpy.triu_indices order: the same numbers as indexing with the pair
    indices, without their n^2/2 gathers); None when no two times differ."""
    n = len(t)
    out = np.empty(n * (n - 1) // 2)
    if n > 1 and bool(np.all(t[1:] > t[:-1])):
        # strictly increasing times (block times are): no pair has t[j] == t[i], and the
        # difference of two different doubles is never 0, so every pair is divided row by row
        # through one short buffer, without a second n^2/2 array of time differences (its
        # 4 MB of fresh pages cost more than the division, measured at 1000 points)
        line = np.empty(n - 1)
        k = 0
        for a in range(n - 1):
            m = n - 1 - a
            seg = out[k:k + m]
            np.subtract(y[a + 1:], y[a], out=seg)
            seg /= np.subtract(t[a + 1:], t[a], out=line[:m])
            k += m
        return out
    dts = np.empty_like(out)
    k = 0
    for a in range(n - 1):
        m = n - 1 - a
        np.subtract(t[a + 1:], t[a], out=dts[k:k + m])
        np.subtract(y[a + 1:], y[a], out=out[k:k + m])
        k += m
    ok = dts != 0
    if ok.all():
        out /= dts
        return out
    if not ok.any():
        return None
    return out[ok] / dts[ok]


def _pool(t: np.ndarray, y: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Medians of n consecutive groups, split as numpy.array_split does (the first
    len % n groups one longer): two reshapes, so no Python loop over the groups."""
    q, r = divmod(len(t), n)
    cut = r * (q + 1)

    def medians(v: np.ndarray) -> np.ndarray:
        parts = [median(v[:cut].reshape(r, q + 1), axis=1)] if r else []
        if q:
            parts.append(median(v[cut:].reshape(n - r, q), axis=1))
        return np.concatenate(parts)
    return medians(t), medians(y)


def baseline_drift(t_s: np.ndarray, medians: np.ndarray) -> float | None:
    """Theil-Sen slope of window medians, in unit per second (display: per minute).

    More than MAX_POINTS windows (a long gap-free file) are pooled in consecutive groups by
    their median first, keeping the pairwise cost bounded; None with fewer than 3 windows or
    under 1 s of span.
    """
    t = np.asarray(t_s, dtype=float)
    y = np.asarray(medians, dtype=float)
    good = np.isfinite(t) & np.isfinite(y)
    t, y = t[good], y[good]
    if len(t) < 3 or float(t.max() - t.min()) < 1.0:
        return None
    if len(t) > MAX_POINTS:
        t, y = _pool(t, y, MAX_POINTS)
    return theil_sen(t, y)[0]
