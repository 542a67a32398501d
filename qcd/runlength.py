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
from scipy.special import ndtr   # the standard normal CDF (scipy.stats.norm.cdf without loading scipy.stats)

__all__ = ["cusum_arl", "ewma_arl", "cusum_h_for", "ewma_L_for", "arl", "limit_for",
           "false_rates", "widen_for", "WIDEN_GRID", "qn_scale",
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
    cdf = ndtr(edges[None, :] - c[:, None] + k - shift)
    Q = np.diff(cdf, axis=1)
    Q[:, 0] = ndtr(0.5 * w - c + k - shift)       # everything at or below zero -> state 0
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
    cdf = ndtr((edges[None, :] - (1.0 - lam) * mid[:, None]) / lam - shift)
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


# --- limits for an estimated reference -----------------------------------------------------

WIDEN_GRID = np.round(np.geomspace(0.5, 6.0, 52), 4)   # candidate widening factors, 5 % apart
MC_RIGS, MC_FILES, MC_SEED = 256, 4000, 20261203


QN_MAX = 400               # Qn of up to this many values (pairwise differences); above, the MAD
QN_C = 2.21914              # 1 / (sqrt(2) Phi^-1(5/8)): Qn consistent for the normal sd
_QN_SMALL = {2: 0.399, 3: 0.994, 4: 0.512, 5: 0.844, 6: 0.611, 7: 0.857, 8: 0.669, 9: 0.872}


def qn_scale(values: np.ndarray) -> np.ndarray:
    """Rousseeuw & Croux (1993) Qn of each row (last axis) of ``values``: 2.2219 times the
    k-th smallest of the |x_i - x_j|, i < j, with k = C(n//2 + 1, 2), times the small-sample
    factor d_n (Croux & Rousseeuw 1992: the table for n <= 9, n/(n + 1.4) for odd and
    n/(n + 3.8) for even n above; from memory, checked against simulated normal samples in
    tests/test_runlength.py). A robust scale with 82 % efficiency at the normal (the MAD:
    37 %), so a reference of n files carries a scale about as good as the MAD's from 2.2 n."""
    x = np.asarray(values, dtype=float)
    n = x.shape[-1]
    if n < 2:
        return np.zeros(x.shape[:-1])
    i, j = np.triu_indices(n, 1)
    h = n // 2 + 1
    k = h * (h - 1) // 2
    d = np.abs(x[..., i] - x[..., j])
    kth = np.partition(d, k - 1, axis=-1)[..., k - 1]
    dn = _QN_SMALL.get(n, n / (n + 1.4) if n % 2 else n / (n + 3.8))
    return QN_C * dn * kth


def _day_series(rng: np.random.Generator, rigs: int, days: int, per_day: int, icc: float,
                rho: float) -> np.ndarray:
    """(rigs, days * per_day) standard values: an AR(1) day effect (variance icc, lag-1
    correlation rho) shared by a day's files, plus each file's own part (variance 1 - icc)."""
    e = np.empty((rigs, days))
    e[:, 0] = rng.standard_normal(rigs)
    for d in range(1, days):
        e[:, d] = rho * e[:, d - 1] + math.sqrt(1.0 - rho * rho) * rng.standard_normal(rigs)
    y = math.sqrt(icc) * np.repeat(e, per_day, axis=1)
    return y + math.sqrt(1.0 - icc) * rng.standard_normal((rigs, days * per_day))


@lru_cache(maxsize=256)
def false_rates(test: str, side: str, stat: float, limit: float, files: int, days: int,
                per_day: int, icc: float, rho: float, inflate: float, opens: int = 1, *,
                rigs: int = MC_RIGS, monitor: int = MC_FILES, seed: int = MC_SEED
                ) -> tuple[float, ...]:
    """In-control signals per file of a chart on an ESTIMATED reference, for each factor of
    ``WIDEN_GRID``, averaged over simulated rigs (Monte Carlo, fixed seed).

    Each simulated rig learns its reference (median and Qn, as qcd.history) from ``files`` files over
    ``days`` days (``per_day`` a day), with the day effects of ``_day_series``, then charts
    ``monitor`` more files standardised as qcd.charts does, x = (y - center) / (scale
    sqrt(inflate) w). A signal is ``opens`` files in a row beyond the limit (the rule's
    open_after_files: what opens an alert); the chart restarts after it (as on a resolve). ``stat``: k (cusum) or lambda
    (ewma); ``limit``: h or the EWMA's asymptotic limit L sqrt(lam/(2-lam)). The rate is the
    mean over rigs, so it is the false-alarm rate a fleet of such rigs would see; a reference
    from few days gives some rigs a far too small scale, and those rigs dominate it."""
    rng = np.random.default_rng(seed)
    m = max(1, int(per_day))
    ref_days = max(1, int(days))
    mon_days = -(-int(monitor) // m)
    y = _day_series(rng, rigs, ref_days + mon_days, m, icc, rho)
    n_ref = max(3, min(int(files), ref_days * m))
    idx = np.round(np.linspace(0, ref_days * m - 1, n_ref)).astype(int)   # spread over the days
    ref = y[:, idx]
    center = np.median(ref, axis=1)
    if n_ref <= QN_MAX:
        scale = np.concatenate([qn_scale(ref[i:i + 16]) for i in range(0, rigs, 16)])
    else:
        scale = 1.482602218505602 * np.median(np.abs(ref - center[:, None]), axis=1)
    scale = np.maximum(scale, 1e-6)
    x = (y[:, ref_days * m:] - center[:, None]) / (scale[:, None] * math.sqrt(max(inflate, 1e-9)))
    sides = [1.0] if side == "up" else [-1.0] if side == "down" else [1.0, -1.0]
    inv_w = 1.0 / WIDEN_GRID[None, :]
    count = np.zeros(len(WIDEN_GRID))
    for sgn in sides:
        xs = sgn * x
        s = np.zeros((rigs, len(WIDEN_GRID)))
        run = np.zeros((rigs, len(WIDEN_GRID)), dtype=int)
        for t in range(xs.shape[1]):
            v = xs[:, t, None] * inv_w
            if test == "cusum":
                s = np.maximum(s + v - stat, 0.0)
            else:
                s = stat * v + (1.0 - stat) * s
            beyond = s > limit
            run = np.where(beyond, run + 1, 0)
            hit = run >= opens
            count += hit.sum(axis=0)
            s[hit] = 0.0
            run[hit] = 0
    return tuple(float(c) / (rigs * xs.shape[1]) for c in count)


def widen_for(test: str, side: str, stat: float, limit: float, arl0: float, *, files: int,
              days: int, per_day: float, icc: float, rho: float, inflate: float = 1.0,
              opens: int = 1) -> float:
    """The smallest widening factor w (of ``WIDEN_GRID``, interpolated in log rate) whose
    mean in-control false-alarm rate on an estimated reference (``false_rates``) is at most
    1/``arl0`` per file. Inputs are rounded (days and files a day to whole numbers, icc and rho
    to 0.05, the inflation to 2 digits) so that similar references share one simulation
    (cached); about 0.1-0.3 s for a new one."""
    rates = false_rates(test, side, round(stat, 4), round(limit, 4), int(files),
                        max(1, int(round(days))), max(1, int(round(per_day))),
                        round(min(max(icc, 0.0), 0.95) * 20) / 20,
                        round(min(max(rho, 0.0), 0.9) * 20) / 20, round(inflate, 2),
                        max(1, int(opens)))
    target = 1.0 / arl0
    for i, r in enumerate(rates):
        if r <= target:
            if i == 0:
                return float(WIDEN_GRID[0])
            r0, w0, w1 = rates[i - 1], WIDEN_GRID[i - 1], WIDEN_GRID[i]
            if r <= 0 or r0 <= 0:
                return float(w1)
            f = (math.log(r0) - math.log(target)) / (math.log(r0) - math.log(r))
            return float(w0 + f * (w1 - w0))
    return float(WIDEN_GRID[-1])
