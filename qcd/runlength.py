"""Average run lengths of EWMA and CUSUM charts, and chart limits for a false-alarm budget.

Brook & Evans (1972): the chart statistic is a Markov chain on a grid of states between its
limits; the expected number of points before it leaves (the average run length, ARL) solves
(I - Q) a = 1 with Q the transitions between in-limit states. Observations are standard
normal with mean ``shift`` (in sigma). Used by ``qcd rules`` and by the rule loader to turn a
rule's ``arl0_files`` (the in-control run length it may have) into the limit L or h.
numpy and scipy only (docs/methods.md §10).
"""
from __future__ import annotations

import math
from functools import lru_cache

import numpy as np
from scipy.stats import norm

__all__ = ["cusum_arl", "ewma_arl", "cusum_h_for", "ewma_L_for", "arl", "limit_for",
           "STATES"]

STATES = 300          # grid states: tables are reproduced to 3 significant digits (tests)


def _solve(Q: np.ndarray, start: int) -> float:
    n = Q.shape[0]
    a = np.linalg.solve(np.eye(n) - Q, np.ones(n))
    return float(a[start])


@lru_cache(maxsize=512)
def cusum_arl(k: float, h: float, shift: float = 0.0, *, side: str = "up",
              head_start: float = 0.0, states: int = STATES) -> float:
    """ARL of a tabular CUSUM S = max(0, S + x - k), signal when S > h (Page 1954).

    ``side`` 'up': the one-sided upper chart at a mean ``shift``; 'both': the two-sided pair
    (S+ and S-) combined as 1/ARL = 1/ARL+ + 1/ARL- (Lucas & Crosier 1982, exact when the two
    cannot both be above zero, k >= 0 and no head start). ``head_start``: S_0 as a fraction of h.
    """
    if side == "both":
        up = cusum_arl(k, h, shift, side="up", head_start=head_start, states=states)
        down = cusum_arl(k, h, -shift, side="up", head_start=head_start, states=states)
        return 1.0 / (1.0 / up + 1.0 / down)
    if side == "down":
        return cusum_arl(k, h, -shift, side="up", head_start=head_start, states=states)
    m = int(states)
    w = 2.0 * h / (2 * m - 1)            # state 0 is S = 0, state i is S = i w (Brook & Evans)
    c = np.arange(m) * w
    edges = (np.arange(m + 1) - 0.5) * w   # state j >= 1 covers ((j-1/2) w, (j+1/2) w]
    # P(S' in state j | S = c_i): S' = c_i + x - k, x ~ N(shift, 1)
    cdf = norm.cdf(edges[None, :] - c[:, None] + k - shift)
    Q = np.diff(cdf, axis=1)
    Q[:, 0] = norm.cdf(0.5 * w - c + k - shift)       # everything at or below zero -> state 0
    start = int(round(head_start * h / w)) if head_start else 0
    return _solve(Q, min(start, m - 1))


def _ewma_half(lam: float, L: float) -> float:
    return L * math.sqrt(lam / (2.0 - lam))


@lru_cache(maxsize=512)
def ewma_arl(lam: float, L: float, shift: float = 0.0, *, side: str = "both",
             states: int = STATES) -> float:
    """ARL of an EWMA z = lam x + (1 - lam) z, z_0 = 0, with the asymptotic limits
    +-L sqrt(lam/(2-lam)) (Lucas & Saccucci 1990). ``side`` 'up': only the upper limit
    signals (the chart runs free below; the grid reaches 8 stationary sd below zero)."""
    c = _ewma_half(lam, L)
    if side == "down":
        return ewma_arl(lam, L, -shift, side="up", states=states)
    sd = math.sqrt(lam / (2.0 - lam))
    lo = -c if side == "both" else -max(c, 8.0 * sd + abs(shift))
    m = int(states) | 1                  # odd: a state sits exactly at zero when symmetric
    w = (c - lo) / m
    edges = lo + np.arange(m + 1) * w
    mid = edges[:-1] + 0.5 * w
    # z' = (1-lam) z + lam x in [e_j, e_j+1)  <=>  x in [(e_j - (1-lam) z)/lam, ...)
    cdf = norm.cdf((edges[None, :] - (1.0 - lam) * mid[:, None]) / lam - shift)
    Q = np.diff(cdf, axis=1)
    if side != "both":
        Q[:, 0] += cdf[:, 0]              # below the grid: lumped into its lowest state
    start = int(np.argmin(np.abs(mid)))
    return _solve(Q, start)


def _search(f, target: float, lo: float, hi: float) -> float:
    """The x in [lo, hi] with f(x) = target, f increasing (bisection on log ARL)."""
    while f(hi) < target:
        hi *= 1.5
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        if f(mid) < target:
            lo = mid
        else:
            hi = mid
        if hi - lo < 2e-5:
            break
    return 0.5 * (lo + hi)


@lru_cache(maxsize=64)
def cusum_h_for(arl0: float, k: float, *, side: str = "up") -> float:
    """The decision interval h whose in-control ARL is ``arl0`` (4 decimals)."""
    return round(_search(lambda h: cusum_arl(k, round(h, 6), side=side), arl0, 1.0, 8.0), 4)


@lru_cache(maxsize=64)
def ewma_L_for(arl0: float, lam: float, *, side: str = "up") -> float:
    """The limit width L whose in-control ARL is ``arl0`` (4 decimals)."""
    return round(_search(lambda L: ewma_arl(lam, round(L, 6), side=side), arl0, 1.5, 4.5), 4)


def arl(test: str, *, side: str, shift: float = 0.0, lam: float = 0.2, L: float = 3.0,
        k: float = 0.5, h: float = 5.0) -> float:
    """ARL of a history rule's chart ('ewma' or 'cusum') at ``shift`` sigma."""
    if test == "ewma":
        return ewma_arl(lam, L, shift, side=side)
    if test == "cusum":
        return cusum_arl(k, h, shift, side=side)
    raise ValueError(f"no run length for test {test!r}")


def limit_for(test: str, arl0: float, *, side: str, lam: float = 0.2, k: float = 0.5) -> float:
    """L (ewma) or h (cusum) for an in-control ARL of ``arl0`` points."""
    if test == "ewma":
        return ewma_L_for(arl0, lam, side=side)
    if test == "cusum":
        return cusum_h_for(arl0, k, side=side)
    raise ValueError(f"no limit search for test {test!r}")
