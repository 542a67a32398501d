"""Sequential drift charts: one EWMA or CUSUM statistic per (rig, mode, channel, measure, rule),
carried forward file by file against a fixed reference (pure).

A chart standardises each file's value with its reference, x = (v - center) / scale (log v for
positive, skewed measures), and updates its statistic by one step: EWMA z = lam x + (1 - lam) z
(Roberts 1959), tabular CUSUM S+ = max(0, S+ + x - k), S- = max(0, S- - x - k) (Page 1954).
The statistic is never re-computed over a window centred on its own median, so a creep adds up
instead of being absorbed. ``ChartState`` is what the store keeps between files; ``reset``
starts a chart again (after a resolve or a re-learn). Imports numpy and qcd.ruleset (the rule).
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass, fields, replace
from datetime import datetime, timezone
from typing import Any, Iterable, Mapping

import numpy as np

from qcd.ruleset import HistoryRule

__all__ = ["Reference", "ChartState", "step", "replay", "verdict", "reset", "standardise",
           "CHART_TESTS", "span_text", "inflation", "limit", "ChartInput", "hold",
           "signal_files", "budget_lines"]

CHART_TESTS = ("ewma", "cusum")


@dataclass(frozen=True)
class Reference:
    """A rig's normal for one (mode, channel, measure): center and robust scale of the values
    (their logs when ``log``) of the reference files recorded from ``first_at`` to ``last_at``.
    Files of one day share that day's conditions: ``icc`` is the part of the variance they
    have in common, ``per_day`` how many a day there are (``inflation``)."""
    center: float
    scale: float
    n: int
    first_at: float
    last_at: float
    log: bool = False
    icc: float = 0.0                 # share of the variance that files of one day have in common
    per_day: float = 1.0             # files a day in the reference
    widen: float = 1.0               # > 1: a provisional reference's wider limits
    rho: float = 0.0                 # day effects carried to the next day (lag-1 correlation)

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: Mapping[str, Any] | None) -> "Reference | None":
        if not d:
            return None
        return cls(**{k: d[k] for k in ("center", "scale", "n", "first_at", "last_at", "log",
                                        "icc", "per_day", "widen", "rho") if k in d})

    @property
    def median(self) -> float:
        """The reference median in the measure's own unit."""
        return math.exp(self.center) if self.log else self.center


@dataclass(frozen=True)
class ChartState:
    """A chart between files: ``up`` is the EWMA (or CUSUM S+), ``down`` CUSUM S-; ``n`` files
    charted since ``since`` (a recording time: files recorded after it are charted);
    ``last_at`` the recording time of the latest charted file."""
    up: float = 0.0
    down: float = 0.0
    n: int = 0
    since: float | None = None
    last_at: float | None = None

    def to_dict(self) -> dict[str, Any]:
        """``dataclasses.asdict``, made directly (every field is a number or None)."""
        return {name: getattr(self, name) for name in _CHART_STATE_FIELDS}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any] | None) -> "ChartState":
        if not d:
            return cls()
        return cls(**{k: d[k] for k in ("up", "down", "n", "since", "last_at") if k in d})


_CHART_STATE_FIELDS = tuple(f.name for f in fields(ChartState))


def inflation(rule: HistoryRule, ref: Reference) -> float:
    """Var(chart statistic) / Var(the same chart on independent files) when files of one day
    share a part ``icc`` of their variance (days of ``per_day`` files) and a day's effect is
    carried to the next with correlation ``rho`` (files d days apart: icc rho^d).

    EWMA: sum over pairs of weights w_i w_j (w_i = lam (1-lam)^i) of their correlation, over
    the sum of w_i^2, averaged over where in its day the newest file falls. CUSUM (which sums
    many files): the long-run ratio 1 + (m - 1) icc + 2 m icc rho / (1 - rho), the design
    effect of a day's mean (Kish 1965) with the days' autocorrelation added."""
    if rule.step:
        return 1.0                   # a step chart's limit is calibrated with the day effects
    m = max(1, int(round(ref.per_day)))
    icc = min(max(ref.icc, 0.0), 1.0)
    rho = min(max(ref.rho, 0.0), 0.9)
    if icc == 0.0 or (m == 1 and rho == 0.0):
        return 1.0
    if rule.test != "ewma":
        return 1.0 + (m - 1) * icc + 2.0 * m * icc * rho / (1.0 - rho)
    n = int(min(2000, max(50, 40 / rule.lam)))
    w = rule.lam * (1.0 - rule.lam) ** np.arange(n)
    iid = float(np.sum(w * w))
    total = 0.0
    for phase in range(m):
        day = (np.arange(n) + phase) // m
        sums = np.bincount(day, weights=w)
        lag = np.abs(np.subtract.outer(np.arange(len(sums)), np.arange(len(sums))))
        total += iid + icc * (float(sums @ (rho ** lag) @ sums) - iid)
    return total / m / iid


@dataclass(frozen=True)
class ChartInput:
    """What the judge needs to chart one file: the reference (None while it learns), the chart
    as it stood just before this file (recorded ``at``), and the stored files recorded after
    it (a backlog file: stepped through after it, so the chart stays in recording order)."""
    ref: Reference | None
    state: ChartState
    at: float
    tail: tuple[tuple[float, float], ...] = ()
    start_at: float | None = None
    learning: str = ""
    provisional: bool = False        # ``ref`` is a young rig's provisional reference


def standardise(value: float, ref: Reference, rule: HistoryRule | None = None) -> float | None:
    """(v - center) / (scale sqrt(inflation)), on log v for a log reference; None when the
    value cannot be charted (not finite, or not positive on a log scale). The inflation makes
    the chart's in-control spread what its limit (qcd.runlength, independent files) expects."""
    if value is None or not math.isfinite(value):
        return None
    if ref.log:
        if value <= 0:
            return None
        value = math.log(value)
    f = inflation(rule, ref) if rule is not None else 1.0
    return (value - ref.center) / (ref.scale * math.sqrt(f) * max(ref.widen, 0.5))


def step(rule: HistoryRule, state: ChartState, x: float, at: float) -> ChartState:
    """The chart after one more standardised value ``x`` recorded at ``at``."""
    if rule.test == "ewma":
        up, down = rule.lam * x + (1.0 - rule.lam) * state.up, 0.0
    elif rule.test == "cusum":
        up = max(0.0, state.up + x - rule.k)
        down = max(0.0, state.down - x - rule.k)
    else:
        raise ValueError(f"rule {rule.name}: {rule.test!r} is not a sequential chart")
    last = at if state.last_at is None else max(state.last_at, at)
    return replace(state, up=up, down=down, n=state.n + 1, last_at=last)


def replay(rule: HistoryRule, state: ChartState, points: Iterable[tuple[float, float]],
           ref: Reference) -> ChartState:
    """``step`` over (recorded_at, value) points in the order given (recording order)."""
    for at, v in points:
        x = standardise(v, ref, rule)
        if x is not None:
            state = step(rule, state, x, at)
    return state


def limit(rule: HistoryRule) -> float:
    """The signal level of the statistic, in sigma units: L sqrt(lam/(2-lam)) or h."""
    if rule.test == "ewma":
        return rule.L * math.sqrt(rule.lam / (2.0 - rule.lam))
    return rule.h


def verdict(rule: HistoryRule, state: ChartState) -> tuple[bool, bool, float, float]:
    """(bad, clear, statistic, limit) of a chart now. The EWMA is compared with its
    asymptotic limit (the one its run length is computed for, qcd.runlength); it clears below
    3/4 of it, a CUSUM below h/2 (hysteresis; common practice)."""
    lim = limit(rule)
    up, down = rule.side in ("up", "both"), rule.side in ("down", "both")
    if rule.test == "ewma":
        s = state.up
        bad = (up and s > lim) or (down and s < -lim)
        clear = not bad and (not up or s < 0.75 * lim) and (not down or s > -0.75 * lim)
        return bad, clear, s, lim
    sp, sm = state.up, state.down
    bad = (up and sp > lim) or (down and sm > lim)
    clear = not bad and (not up or sp < lim / 2) and (not down or sm < lim / 2)
    stat = sp if rule.side == "up" else sm if rule.side == "down" else max(sp, sm)
    return bad, clear, stat, lim


def hold(rule: HistoryRule, state: ChartState) -> ChartState:
    """The chart held at its clear level (3/4 of an EWMA's limit, half a CUSUM's) at most."""
    lim = limit(rule) * (0.75 if rule.test == "ewma" else 0.5)
    if rule.test == "ewma":
        return replace(state, up=min(max(state.up, -lim), lim))
    return replace(state, up=min(state.up, lim), down=min(state.down, lim))


def reset(state: ChartState, at: float | None) -> ChartState:
    """A chart started again after ``at``: files recorded after it are charted from zero."""
    return ChartState(since=at, last_at=at)


def signal_files(rule: HistoryRule) -> float:
    """In-control files per signal of a history rule on independent normal values: the chart's
    Brook-Evans ARL (qcd.runlength), or 1/P(|z| beyond z) for a robust-z rule (one tail for
    'up'/'down', two for 'both')."""
    from qcd.runlength import arl
    if rule.test in CHART_TESTS:
        return arl(rule.test, side=rule.side, lam=rule.lam, L=rule.L, k=rule.k, h=rule.h)
    tail = 0.5 * math.erfc(rule.z / math.sqrt(2.0))
    return 1.0 / (tail * (2.0 if rule.side == "both" else 1.0))


def budget_lines(rules: Any, per_day: Mapping[str, float]) -> list[str]:
    """``qcd rules``: each history rule, its limit, and how often it signals in control, in
    files and in days at each rig's observed file rate (``per_day``: rig -> files a day)."""
    out = []
    for r in rules.history:
        if r.test == "ewma":
            what = f"EWMA lambda {r.lam:g}, L {r.L:.3g}"
        elif r.test == "cusum":
            what = f"CUSUM k {r.k:g}, h {r.h:.3g}"
        else:
            what = f"robust z beyond {r.z:g}"
        n = signal_files(r)
        budget = f" (set for {r.arl0_files:g})" if r.arl0_files else ""
        out.append(f"{r.name}: {r.measure}, {what}, side {r.side}{', log' if r.log else ''}; "
                   f"in control one signal per {n:,.0f} files{budget}; an alert needs "
                   f"{r.open_after_files} in a row")
        for rig, rate in sorted(per_day.items()):
            if rate > 0:
                out.append(f"    {rig}: {rate:.1f} files a day -> one signal per "
                           f"{n / rate:,.0f} days ({n / rate / 365.25:.1f} years)")
    return out


def _day(t: float) -> str:
    return datetime.fromtimestamp(t, timezone.utc).strftime("%Y-%m-%d")


def span_text(ref: Reference) -> str:
    """'2026-09-01...09-10' (the reference files' recording days, UTC)."""
    a, b = _day(ref.first_at), _day(ref.last_at)
    if a == b:
        return a
    return f"{a}...{b[5:] if a[:4] == b[:4] else b}"
