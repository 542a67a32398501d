"""Drift: Theil-Sen slope of baseline medians against time. numpy only, SI in and out."""
from __future__ import annotations

import functools

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
    i, j = _pairs(len(t))
    dt = t[j] - t[i]
    ok = dt != 0
    if not ok.any():
        raise ValueError("Theil-Sen needs two distinct times")
    slope = float(median((y[j] - y[i])[ok] / dt[ok]))
    return slope, float(median(y - slope * t))


@functools.lru_cache(maxsize=4)
def _pairs(n: int) -> tuple[np.ndarray, np.ndarray]:
    """Index pairs i < j of n points (the same for every channel of a file: made once)."""
    i, j = np.triu_indices(n, k=1)
    i.flags.writeable = j.flags.writeable = False
    return i, j


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
