"""The step chart's false alarms on a learned reference, and the day share (icc) it is widened for.

    python tests/benchmarks/bench_step_icc.py [--rigs 400] [--files 4000] [--day-share 0 0.5]

Each simulated rig (4 files a day, 20 % log scatter, a share S of its variance common to a
day's files, AR(1) 0.3 from day to day: the rig model of tests/benchmarks/bench_drift.py)
learns its reference through the real code (qcd.history.learn with the shipped step rule:
median, Qn scale, the estimated icc and day-to-day correlation, the Monte Carlo widening of
qcd.runlength.widen_for), then charts `--files` in-control files with the step CUSUM
(k 1.25, h 2.93, one signalling file opens; restarted after a signal). Printed per S: the
estimated icc (mean, quartiles), the widening, and the false signals per file against the
budget (1/8000), overall and by the estimated icc's tercile; then the same with the widening
computed for the TRUE icc and correlation, which tells whether the estimate's error is what
costs the budget, and for an upper confidence bound of the icc (75 % and 90 %, days counted
for their AR(1)), a candidate that trades the step chart's power at S = 0 for the budget at
S = 0.5. Also for a young rig's provisional reference (10 files over 3 days, budget 1000).
numpy, scipy.special and qcd only; about 2-3 minutes with --rigs 200.
"""
from __future__ import annotations

import argparse
import math
import sys
import time

import numpy as np

from qcd import history
from qcd.ruleset import load_rules
from qcd.runlength import widen_for

SCATTER, PHI, PER_DAY, DAY = 0.20, 0.3, 4, 86400.0
LEVELS = (0.75, 0.9)                                       # candidate icc bounds
HOURS = np.array([9.0, 11.25, 13.5, 15.75]) * 3600.0


def series(rng, days: int, share: float) -> np.ndarray:
    sb, sw = SCATTER * math.sqrt(share), SCATTER * math.sqrt(1 - share)
    e = np.empty(days)
    e[0] = rng.standard_normal()
    for d in range(1, days):
        e[d] = PHI * e[d - 1] + math.sqrt(1 - PHI * PHI) * rng.standard_normal()
    return sb * np.repeat(e, PER_DAY) + sw * rng.standard_normal(days * PER_DAY)


def times(days: int) -> np.ndarray:
    return (np.arange(days)[:, None] * DAY + HOURS[None, :]).ravel()


def icc_upper(times, values, level: float) -> float:
    """One-sided upper confidence bound at ``level`` of the within-day icc (the one-way
    analysis of variance of qcd.history.day_icc): F = MSB/MSW, F_q the (1 - level) quantile of
    F(k' - 1, N - k), icc_U = (F/F_q - 1)/(F/F_q + n0 - 1) (Searle 1971), with the days counted
    as k' - 1 = (k - 1)(1 - r)/(1 + r) for their lag-1 autocorrelation r (an AR(1) mean's
    effective sample size). A candidate input for the widening, not what qcd ships."""
    from scipy.special import fdtri
    t, y = np.asarray(times, float), np.asarray(values, float)
    days = np.floor(t / DAY)
    groups = [y[days == d] for d in np.unique(days)]
    k, n = len(groups), len(y)
    if k < 2 or n <= k:
        return 0.0
    sizes = np.array([len(g) for g in groups], float)
    means = np.array([g.mean() for g in groups])
    msb = float(np.sum(sizes * (means - y.mean()) ** 2)) / (k - 1)
    msw = float(sum(np.sum((g - g.mean()) ** 2) for g in groups)) / (n - k)
    n0 = (n - float(np.sum(sizes ** 2)) / n) / (k - 1)
    if msw <= 0:
        return 0.99
    r = history.day_autocorrelation(t, y)
    f = msb / msw / float(fdtri(max(1.0, (k - 1) * (1 - r) / (1 + r)), n - k, 1.0 - level))
    return float(min(max((f - 1.0) / (f + n0 - 1.0), 0.0), 0.99))


def signals(x: np.ndarray, k: float, h: float) -> int:
    s, n = 0.0, 0
    for v in x:
        s = max(0.0, s + v - k)
        if s > h:
            n, s = n + 1, 0.0
    return n


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rigs", type=int, default=400)
    ap.add_argument("--files", type=int, default=4000)
    ap.add_argument("--day-share", type=float, nargs="+", default=[0.0, 0.5])
    ap.add_argument("--seed", type=int, default=3)
    args = ap.parse_args(argv)
    rules = {r.name: r for r in load_rules().history}
    rule = rules["hum_step"]
    st = load_rules().settings
    t0 = time.perf_counter()
    for share in args.day_share:
        rng = np.random.default_rng([args.seed, int(100 * share)])
        for phase, files, days, budget in (("full", st.reference_files, st.reference_days,
                                            rule.arl0_files),
                                           ("provisional", st.learning_files, 3.0,
                                            st.provisional_arl0_files)):
            ref_days = int(math.ceil(days)) + 1
            mon_days = -(-args.files // PER_DAY)
            iccs, widens, rates, rates_true = [], [], [], []
            alt = {lv: ([], []) for lv in LEVELS}          # level -> (widening, rate)
            for _ in range(args.rigs):
                y = series(rng, ref_days + mon_days, share)
                t = times(ref_days + mon_days)
                rows = [(float(a), float(math.exp(b))) for a, b in
                        zip(t[: ref_days * PER_DAY], y[: ref_days * PER_DAY])]
                if phase == "full":
                    ref = history.learn(rows, files=files, days=days, log=True, rule=rule)
                else:
                    ref = history.provisional(rows, files=files, log=True, rule=rule,
                                              arl0=budget, days=days)
                assert ref is not None
                n_ref = ref.n
                x = y[n_ref:n_ref + args.files]
                iccs.append(ref.icc)
                widens.append(ref.widen)
                z = (x - ref.center) / (ref.scale * ref.widen)
                rates.append(signals(z, rule.k, rule.h) / len(x))
                grid_n = max(g for g in history._FILES_GRID if g <= n_ref)
                w_true = widen_for(rule.test, rule.side, rule.k, rule.h, budget, files=grid_n,
                                   days=len({math.floor(a / DAY) for a, _ in rows[:n_ref]}),
                                   per_day=PER_DAY, icc=share, rho=PHI,
                                   opens=rule.open_after_files)
                rates_true.append(signals((x - ref.center) / (ref.scale * w_true), rule.k,
                                          rule.h) / len(x))
                n_days = len({math.floor(a / DAY) for a, _ in rows[:n_ref]})
                for lv in LEVELS:
                    icc_u = max(ref.icc, icc_upper(t[:n_ref], y[:n_ref], lv))
                    w = widen_for(rule.test, rule.side, rule.k, rule.h, budget, files=grid_n,
                                  days=n_days, per_day=ref.n / n_days, icc=icc_u, rho=ref.rho,
                                  opens=rule.open_after_files)
                    alt[lv][0].append(w)
                    alt[lv][1].append(signals((x - ref.center) / (ref.scale * w), rule.k,
                                              rule.h) / len(x))
            iccs, widens = np.array(iccs), np.array(widens)
            rates, rates_true = np.array(rates), np.array(rates_true)
            q = np.quantile(iccs, [1 / 3, 2 / 3])
            by = [rates[(iccs >= lo) & (iccs <= hi)].mean() * budget
                  for lo, hi in ((-1, q[0]), (q[0], q[1]), (q[1], 2))]
            print(f"S {share:g}, {phase} reference ({files} files over {days:g} days, budget "
                  f"{budget:g}): estimated icc mean {iccs.mean():.3f} (quartiles "
                  f"{np.quantile(iccs, 0.25):.2f} {np.median(iccs):.2f} "
                  f"{np.quantile(iccs, 0.75):.2f}); widening mean {widens.mean():.2f}; "
                  f"false signals x budget: {rates.mean() * budget:.2f} (by icc tercile, low to "
                  f"high: {by[0]:.2f} {by[1]:.2f} {by[2]:.2f}); widened for the true icc "
                  f"instead: {rates_true.mean() * budget:.2f}", flush=True)
            for lv, (ws, rs) in alt.items():
                print(f"    widened for the icc's {lv:.0%} upper confidence bound: widening "
                      f"mean {np.mean(ws):.2f}, false signals x budget {np.mean(rs) * budget:.2f}",
                      flush=True)
    print(f"({time.perf_counter() - t0:.0f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
