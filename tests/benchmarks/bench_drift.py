"""Early warning of the shipped history rules, simulated through the real judge and store.

    python tests/benchmarks/bench_drift.py [--rig-years 20] [--rigs 20] [--seed 1]

Each simulated rig records `per_day` files a day (2-8) at working hours. Its log hum and log
broadband noise scatter by 10-30 % (the sd of the log); a share `--day-share` (0.9) of that
variance is a day effect the day's files have in common, AR(1) with coefficient 0.3 from day
to day, the rest each file's own. Every file goes through
qcd.pipeline.commit (judge with the rig's stored history and charts, alert lifecycle, one store
transaction) with the packaged rules, into a real SQLite store; a message is what lands in the
outbox. Printed:

- in control: false alerts per rig-year for hum and for noise (goal <= 0.5), over
  `--rig-years` rig-years (each rig one year, the learning phase included);
- creeps of +3, +5, +10 %/day from day 30 (20 % scatter, 4 files a day): median and 90th
  percentile days from the onset to the first message on that measure (goal for +5 %/day:
  median <= 5, p90 <= 7);
- steps of 1.5x, 2x, 3x on day 30: files to the first message, counting the first stepped
  file as 1 (goal for 2x: <= 2 files in 90 % of rigs).

Not collected by pytest; figures go in the notes. 200 rig-years take about an hour on one core.
"""
from __future__ import annotations

import argparse
import math
import sys
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from qcd import pipeline
from qcd.config import RigConfig
from qcd.results import ChannelMeasures, FileMeasures, Measure
from qcd.ruleset import load_rules
from qcd.store import Store

DAY = 86400.0
T0 = datetime(2026, 1, 5, tzinfo=timezone.utc).timestamp()
HUM, NOISE = 0.01, 1.5          # pA: typical medians (invented for the simulation)


def day_effects(rng, days: int, scatter: float, phi: float = 0.3) -> np.ndarray:
    """AR(1) day effects with marginal sd ``scatter`` (log units)."""
    e = np.empty(days)
    e[0] = rng.normal(0.0, scatter)
    for d in range(1, days):
        e[d] = phi * e[d - 1] + rng.normal(0.0, scatter * math.sqrt(1.0 - phi * phi))
    return e


DAY_SHARE = 0.9


def rig_files(rng, *, days: int, per_day: int, scatter: float, fault: tuple | None = None):
    """[(t, hum, noise, faulty)]; ``fault`` = (measure, kind 'creep'|'step', size, onset day).

    The log scatter ``scatter`` is split between a day effect (a share DAY_SHARE of the
    variance, AR(1) 0.3 from day to day) and the file's own part."""
    sd_day, sd_file = scatter * math.sqrt(DAY_SHARE), scatter * math.sqrt(1.0 - DAY_SHARE)
    hum_d, noise_d = day_effects(rng, days, sd_day), day_effects(rng, days, sd_day)
    out = []
    for d in range(days):
        for k in range(per_day):
            t = T0 + d * DAY + 9 * 3600.0 + k * (9 * 3600.0 / per_day) + rng.uniform(0, 600)
            lh = math.log(HUM) + hum_d[d] + rng.normal(0, sd_file)
            ln = math.log(NOISE) + noise_d[d] + rng.normal(0, sd_file)
            faulty = False
            if fault is not None and d >= fault[3]:
                measure, kind, size, onset = fault
                frac = (t - (T0 + onset * DAY)) / DAY
                shift = math.log1p(size) * max(frac, 0.0) if kind == "creep" else math.log(size)
                if measure == "hum_rms":
                    lh += shift
                else:
                    ln += shift
                faulty = True
            out.append((t, math.exp(lh), math.exp(ln), faulty))
    return out


def fm(i: int, t: float, hum: float, noise: float) -> FileMeasures:
    ch = ChannelMeasures(0, "Im", "pA", "A", {"hum_rms": Measure("hum_rms", hum, "pA"),
                                               "noise_rms": Measure("noise_rms", noise, "pA")})
    return FileMeasures(f"/sim/f{i:06d}.abf", "ok", mode="voltage_clamp",
                        recorded_at=datetime.fromtimestamp(t, timezone.utc), mtime=t, size=1,
                        sha256=f"{i:064d}", channels=(ch,))


def run_rig(folder: Path, name: str, files, rules) -> list[tuple[int, str]]:
    """Commit every file; [(file index, measure)] of each alert opening sent as a message."""
    rig = RigConfig(name, ())
    opened = []
    with Store(folder / f"{name}.sqlite") as store:
        last = 0
        for i, (t, hum, noise, _) in enumerate(files):
            pipeline.commit(fm(i, t, hum, noise), rig, store, rules, t + 60.0)
            rows = store.db.conn.execute("SELECT id, body FROM outbox WHERE id > ? ORDER BY id",
                                         (last,)).fetchall()
            for rid, body in rows:
                last = rid
                for line in body.splitlines():
                    if line.startswith("OPEN") and ":" in line:
                        rule = line.split("rule ", 1)[1].split(",")[0] if "rule " in line else ""
                        opened.append((i, line.split(":", 1)[1].split()[0], rule))
    return opened


def pct(xs, q):
    return float(np.percentile(xs, q)) if xs else float("nan")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rig-years", type=int, default=30, help="in-control rig-years (30)")
    ap.add_argument("--rigs", type=int, default=20, help="rigs per creep/step case (20)")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--skip-control", action="store_true")
    ap.add_argument("--day-share", type=float, default=0.9,
                    help="share of the log variance the files of one day have in common (0.9)")
    args = ap.parse_args(argv)
    global DAY_SHARE
    DAY_SHARE = args.day_share
    rules = load_rules()
    rng = np.random.default_rng(args.seed)
    t_start = time.perf_counter()
    n_files = 0
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        if not args.skip_control:
            false = {"hum_rms": 0, "noise_rms": 0}
            young = {"hum_rms": 0, "noise_rms": 0}
            by_rule: dict[str, int] = {}
            for r in range(args.rig_years):
                per_day = int(rng.integers(2, 9))
                scatter = float(rng.uniform(0.10, 0.30))
                files = rig_files(rng, days=365, per_day=per_day, scatter=scatter)
                n_files += len(files)
                for i, measure, rule in run_rig(folder, f"ic{r}", files, rules):
                    if measure in false:
                        false[measure] += 1
                        by_rule[rule] = by_rule.get(rule, 0) + 1
                        if i < per_day * 30:
                            young[measure] += 1
            print(f"in control, {args.rig_years} rig-years (2-8 files a day, 10-30 % scatter, "
                  f"day share {DAY_SHARE:g}, AR(1) 0.3): false alerts per rig-year: "
                  f"hum {false['hum_rms'] / args.rig_years:.2f}, "
                  f"noise {false['noise_rms'] / args.rig_years:.2f} (goal <= 0.5); "
                  f"of these in a rig's "
                  f"first 30 days: hum {young['hum_rms']}, noise {young['noise_rms']}; by rule: "
                  + ", ".join(f"{k} {v}" for k, v in sorted(by_rule.items())))
            sys.stdout.flush()
        for measure in ("hum_rms", "noise_rms"):
            for rate in (0.03, 0.05, 0.10):
                delays, missed = [], 0
                for r in range(args.rigs):
                    files = rig_files(rng, days=60, per_day=4, scatter=0.20,
                                      fault=(measure, "creep", rate, 30))
                    n_files += len(files)
                    first = next((i for i, m, _ in run_rig(folder, f"c{measure}{rate}{r}", files,
                                                        rules)
                                  if m == measure and files[i][3]), None)
                    if first is None:
                        missed += 1
                    else:
                        delays.append((files[first][0] - (T0 + 30 * DAY)) / DAY)
                print(f"creep {measure} +{rate:.0%}/day: days to first message median "
                      f"{pct(delays, 50):.2f}, p90 {pct(delays, 90):.2f}, missed {missed} of "
                      f"{args.rigs}")
                sys.stdout.flush()
            for size in (1.5, 2.0, 3.0):
                counts, missed = [], 0
                for r in range(args.rigs):
                    files = rig_files(rng, days=40, per_day=4, scatter=0.20,
                                      fault=(measure, "step", size, 30))
                    n_files += len(files)
                    onset = next(i for i, f in enumerate(files) if f[3])
                    first = next((i for i, m, _ in run_rig(folder, f"s{measure}{size}{r}", files,
                                                        rules)
                                  if m == measure and files[i][3]), None)
                    if first is None:
                        missed += 1
                    else:
                        counts.append(first - onset + 1)
                within2 = sum(c <= 2 for c in counts) / max(args.rigs, 1)
                print(f"step {measure} {size:g}x: files to first message median "
                      f"{pct(counts, 50):.1f}, p90 {pct(counts, 90):.1f}, within 2 files "
                      f"{within2:.0%}, missed {missed} of {args.rigs}")
                sys.stdout.flush()
    dt = time.perf_counter() - t_start
    print(f"{n_files} files through judge and store in {dt:.0f} s "
          f"({1e3 * dt / max(n_files, 1):.2f} ms a file)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
