"""Learning a rig's reference (its normal) for the drift charts, from good files (pure).

Phase I / phase II: the reference of a (rig, mode, channel, measure) is learned from its first
good, unflagged files after the reference starts (the first file, or a re-learn), and then kept
fixed while the charts monitor. It is complete when it holds ``reference_files`` files spread
over ``reference_days`` days: files of one day share that day's conditions, so the days, not the
files, carry most of the information about the rig's day-to-day scatter. With ``follow_days``
set, the reference follows the rig, but only from files older than that guard gap (in days and
in ``follow_files`` files) that were never flagged, so a creep cannot enter its own reference.
Imports numpy, qcd.charts (Reference) and qcd.measures.noise (the MAD scale).
"""
from __future__ import annotations

import math
from typing import Sequence

import numpy as np

from qcd.charts import CHART_TESTS, Reference, inflation
from qcd.charts import limit as chart_limit
from qcd.measures.noise import MAD_SCALE
from qcd.ruleset import HistoryRule
from qcd.runlength import QN_MAX, qn_scale, widen_for

__all__ = ["learn", "follow", "reference_of", "provisional", "day_icc", "day_autocorrelation",
           "progress_text", "readmit"]

DAY_S = 86400.0
# reference sizes the widening is simulated for (a reference counts as the next smaller one)
_FILES_GRID = (3, 5, 7, 10, 12, 15, 20, 25, 30, 40, 50, 60, 80, 100, 120, 160, 200, 250, 300,
               400)


def day_icc(times: Sequence[float], values: Sequence[float]) -> tuple[float, float]:
    """(intraclass correlation of values within a UTC day, files per day).

    One-way analysis of variance with unequal groups (Snedecor & Cochran; the n0 of unequal
    group sizes): sigma_b^2 = (MSB - MSW) / n0, icc = sigma_b^2 / (sigma_b^2 + MSW), floored at 0.
    """
    t = np.asarray(times, dtype=float)
    y = np.asarray(values, dtype=float)
    days = np.floor(t / DAY_S)
    groups = [y[days == d] for d in np.unique(days)]
    k, n = len(groups), len(y)
    per_day = n / k if k else 1.0
    if k < 2 or n <= k:
        return 0.0, per_day
    sizes = np.array([len(g) for g in groups], dtype=float)
    means = np.array([g.mean() for g in groups])
    msb = float(np.sum(sizes * (means - y.mean()) ** 2)) / (k - 1)
    msw = float(sum(np.sum((g - g.mean()) ** 2) for g in groups)) / (n - k)
    n0 = (n - float(np.sum(sizes ** 2)) / n) / (k - 1)
    sb2 = max(0.0, (msb - msw) / n0) if n0 > 0 else 0.0
    if sb2 + msw <= 0:
        return 0.0, per_day
    return sb2 / (sb2 + msw), per_day


def day_autocorrelation(times: Sequence[float], values: Sequence[float]) -> float:
    """Lag-1 autocorrelation of the day means over consecutive recording days (a day effect
    carried to the next day), clipped to [0, 0.9]; 0 with fewer than 4 days."""
    t = np.asarray(times, dtype=float)
    y = np.asarray(values, dtype=float)
    days = np.floor(t / DAY_S)
    uniq = np.unique(days)
    if len(uniq) < 4:
        return 0.0
    means = np.array([y[days == d].mean() for d in uniq])
    dev = means - means.mean()
    den = float(np.sum(dev * dev))
    if den <= 0:
        return 0.0
    r = float(np.sum(dev[1:] * dev[:-1])) / den
    return min(max(r, 0.0), 0.9)


def reference_of(rows: Sequence[tuple[float, float]], *, log: bool, min_spread: float = 0.0
                 ) -> Reference | None:
    """The reference of (recorded_at, value) rows: median and Qn scale of the values (their
    logs when ``log``; Rousseeuw & Croux 1993, qcd.runlength.qn_scale), the scale floored at
    ``min_spread`` (log units, or a fraction of the median's size otherwise).

    Qn rather than 1.4826 MAD: both resist a few odd files, but the MAD has 37 % efficiency at
    the normal, Qn 82 %, and a chart's false-alarm rate grows steeply when its scale comes out
    small: with Qn the limits need less widening for the same budget (``_widened``)."""
    pts = [(float(t), float(v)) for t, v in rows if v is not None and math.isfinite(float(v))
           and (not log or float(v) > 0)]
    if len(pts) < 3:
        return None
    t = np.array([p[0] for p in pts])
    y = np.array([math.log(p[1]) if log else p[1] for p in pts])
    center = float(np.median(y))
    scale = float(qn_scale(y)) if len(y) <= QN_MAX else \
        MAD_SCALE * float(np.median(np.abs(y - center)))
    floor = min_spread if log else min_spread * abs(center)
    scale = max(scale, floor, 1e-12)
    icc, per_day = day_icc(t, y)
    return Reference(center=center, scale=scale, n=len(pts), first_at=float(t.min()),
                     last_at=float(t.max()), log=log, icc=icc, per_day=per_day,
                     rho=day_autocorrelation(t, y))


READMIT_Z = 3.5        # flagged files within this many scales of the good files' median


def readmit(all_rows: Sequence[tuple[float, float]], good_rows: Sequence[tuple[float, float]],
            *, log: bool, z: float = READMIT_Z) -> list[tuple[float, float]]:
    """The rows to learn a reference from: the good (unflagged) rows, plus the flagged ones
    (in ``all_rows`` but not in ``good_rows``) that lie within ``z`` robust scales (Qn) of
    the good rows' median, in recording order.

    Leaving out every flagged file biases the reference when some flags were false alarms
    (a young rig's provisional step chart, a jump rule): the files left out are the high ones,
    so the center comes out low and the scale small, and the charts then signal again and
    again. A file the checks flagged as far off (a real fault) stays out; one that is a
    plausible part of the rig's scatter comes back (|z| < 3.5: Iglewicz & Hoaglin 1993)."""
    good = [(float(t), float(v)) for t, v in good_rows]
    if all_rows is good_rows or (len(all_rows) == len(good)
                                 and [tuple(r) for r in all_rows] == good):
        return good                          # nothing flagged (a young rig's usual case)
    left: dict[tuple[float, float], int] = {}
    for r in good:
        left[r] = left.get(r, 0) + 1
    flagged = []
    for t, v in all_rows:
        r = (float(t), float(v))
        if left.get(r, 0) > 0:
            left[r] -= 1
        else:
            flagged.append(r)
    if not flagged:
        return good
    ref = reference_of(good, log=log)
    if ref is None:
        return good
    back = []
    for t, v in flagged:
        if not math.isfinite(v) or (log and v <= 0):
            continue
        y = math.log(v) if log else v
        if abs(y - ref.center) <= z * ref.scale:
            back.append((t, v))
    return sorted(good + back)


def _widened(ref: Reference | None, rows: Sequence[tuple[float, float]], margin: float,
             rule: HistoryRule | None = None, arl0: float | None = None) -> Reference | None:
    """``ref`` with its limits widened for the estimation error of its center and scale.

    A chart rule with a false-alarm budget (``arl0_files``): by the factor whose mean
    in-control false-alarm rate, over rigs whose reference has as many files, days, files a
    day, icc and day-to-day correlation as this one, meets the budget (Monte Carlo of the chart
    on simulated references, qcd.runlength.widen_for). Otherwise by 1 + margin/sqrt(days) for
    the days the rows span. ``arl0``: another budget than the rule's (a provisional
    reference's, which charts only until the full reference is learned)."""
    if ref is None:
        return None
    days = len({math.floor(t / DAY_S) for t, _ in rows})
    if rule is not None and rule.arl0_files and rule.test in CHART_TESTS:
        stat, lim = (rule.k, rule.h) if rule.test == "cusum" else (rule.lam, chart_limit(rule))
        n = max([g for g in _FILES_GRID if g <= ref.n] or [ref.n])     # shared simulations
        w = widen_for(rule.test, rule.side, stat, lim, arl0 or rule.arl0_files, files=n,
                      days=days, per_day=ref.n / max(days, 1), icc=ref.icc, rho=ref.rho,
                      inflate=inflation(rule, ref), opens=rule.open_after_files)
    else:
        w = 1.0 + margin / math.sqrt(max(days, 1))
    return Reference(**{**ref.to_dict(), "widen": w})


def learn(rows: Sequence[tuple[float, float]], *, files: int, days: float, log: bool,
          min_spread: float = 0.0, margin: float = 0.0, rule: HistoryRule | None = None,
          arl0: float | None = None) -> Reference | None:
    """The fixed reference from good rows (oldest first, recorded after the reference start):
    the first rows up to the one that makes ``files`` files over at least ``days`` days; None
    while there are not enough yet (still learning).

    ``margin``: the limits are widened by 1 + margin/sqrt(days) for the days the reference
    spans. A scale estimated from a few independent days can be far too small (the MAD of n
    normal values has a relative error of about 1.2/sqrt(n), and a day's files count as about
    one), and a chart's false-alarm rate grows steeply as its scale shrinks; the margin keeps
    the budget for most rigs (docs/methods.md §7; tests/benchmarks/bench_drift.py). With a
    ``rule`` that states its budget, the widening is calibrated for it instead (``_widened``)."""
    rows = rows if isinstance(rows, (list, tuple)) else list(rows)
    values = [v for _, v in rows]
    if math.isfinite(sum(values)) and (not log or min(values, default=1.0) > 0):
        usable = list(rows)            # every row usable (the usual case): no filter to run
    else:
        usable = [(t, v) for t, v in rows if math.isfinite(v) and (not log or v > 0)]
    if not usable:
        return None
    first = usable[0][0]
    for i in range(max(math.ceil(files) - 1, 0), len(usable)):   # i + 1 >= files
        t = usable[i][0]
        if t - first >= days * DAY_S:
            return _widened(reference_of(usable[: i + 1], log=log, min_spread=min_spread),
                            usable[: i + 1], margin, rule, arl0)
    return None


def follow(rows_newest_first: Sequence[tuple[float, float]], *, files: int, days: float,
           log: bool, min_spread: float = 0.0, margin: float = 0.0,
           rule: HistoryRule | None = None) -> Reference | None:
    """A following reference: the NEWEST good rows (already behind the guard gap) back to the
    one that makes ``files`` files over ``days`` days; None when there are not enough."""
    usable = [(t, v) for t, v in rows_newest_first if math.isfinite(v) and (not log or v > 0)]
    if not usable:
        return None
    newest = usable[0][0]
    for i, (t, _) in enumerate(usable):
        if i + 1 >= files and newest - t >= days * DAY_S:
            chosen = usable[: i + 1][::-1]
            return _widened(reference_of(chosen, log=log, min_spread=min_spread), chosen,
                            margin, rule)
    return None


PROVISIONAL_DAYS = 3.0     # a provisional reference spans at least 3 days (common practice)
PROVISIONAL_GUARD_DAYS = 2.0   # ... and holds the good files older than 2 days


def provisional(rows: Sequence[tuple[float, float]], *, files: int, log: bool,
                min_spread: float = 0.0, margin: float = 1.0,
                days: float = PROVISIONAL_DAYS, rule: HistoryRule | None = None,
                arl0: float | None = None, before: float | None = None) -> Reference | None:
    """A young rig's provisional reference while the full one learns: its good rows recorded
    before ``before`` (a guard gap behind the file charted, so a fault of the last days
    cannot enter), once there are ``files`` of them over ``days`` days; it grows with the
    rig, so its scale gets better day by day. Its limits are widened like ``learn``'s: with a
    ``rule`` that states a budget, calibrated (``_widened``) for ``arl0`` files per false
    alarm (a provisional reference charts only until the full one is learned); otherwise by
    1 + margin/sqrt(days). None before that."""
    usable = [(t, v) for t, v in rows if math.isfinite(v) and (not log or v > 0)
              and (before is None or t < before)]
    if len(usable) < files or usable[-1][0] - usable[0][0] < days * DAY_S:
        return None
    return _widened(reference_of(usable, log=log, min_spread=min_spread), usable, margin,
                    rule, arl0)


def progress_text(rows: Sequence[tuple[float, float]], files: int, days: float) -> str:
    """'learning the reference: 12 of 40 files, 3.0 of 10 days'."""
    n = len(rows)
    span = (rows[-1][0] - rows[0][0]) / DAY_S if n > 1 else 0.0
    return (f"learning the reference: {n} of {files} files, {span:.1f} of {days:g} days")
