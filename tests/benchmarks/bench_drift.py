"""Early warning of the shipped history rules, simulated through the real judge and store.

    python tests/benchmarks/bench_drift.py [--rig-years 30] [--rigs 20] [--seed 1]
        [--day-share 0.9] [--quick] [--only control|creep|step] [--jobs N] [--oracle]

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
  median <= 5, p90 <= 7; a missed rig counts as infinitely late);
- steps of 1.5x, 2x, 3x on day 30: files to the first message, counting the first stepped
  file as 1 (goal for 2x: <= 2 files in 90 % of rigs).

`--quick`: only the goals' cases (+5 %/day, 2x). `--only`: one part. `--jobs N`: N worker
processes (each rig its own store; results do not depend on N). `--oracle`: every chart is
given the rig's TRUE reference before its first file (center, scale, day share, AR(1), files
a day; no widening): the known-parameter floor of the same charts, to set beside the real
code, which learns its reference from the rig's files.

Not collected by pytest; figures in docs/methods.md §10, measured with

    python tests/benchmarks/bench_drift.py --quick --rig-years 48 --rigs 30 --jobs 2 --day-share 0
    python tests/benchmarks/bench_drift.py --quick --rig-years 48 --rigs 30 --jobs 2 --day-share 0 --oracle
    python tests/benchmarks/bench_drift.py --quick --rig-years 8 --rigs 10 --day-share 0.5

About 10-20 ms a file and process with learned references (most of it the simulations that
calibrate each new reference's limits, qcd.runlength.widen_for), 2-3 ms with --oracle: 48
rig-years take about 17 minutes with --jobs 2 on a shared machine, 200 about an hour; with
other jobs on the machine 20-36 ms a file, 16-26 minutes for each 50 in-control rig-years
(`--only control --rig-years 50 --seed N`: run seeds in turn and pool them).
"""
from __future__ import annotations

import argparse
import math
import multiprocessing
import sys
import tempfile
import time
import zlib
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from qcd import pipeline
from qcd.charts import CHART_TESTS, Reference
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


PHI = 0.3                       # AR(1) of the day effects


def rig_files(rng, *, days: int, per_day: int, scatter: float, share: float,
              fault: tuple | None = None):
    """[(t, hum, noise, faulty)]; ``fault`` = (measure, kind 'creep'|'step', size, onset day).

    The log scatter ``scatter`` is split between a day effect (a share ``share`` of the
    variance, AR(1) PHI from day to day) and the file's own part."""
    sd_day, sd_file = scatter * math.sqrt(share), scatter * math.sqrt(1.0 - share)
    hum_d, noise_d = day_effects(rng, days, sd_day, PHI), day_effects(rng, days, sd_day, PHI)
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




def oracle_rows(rules, per_day: int, scatter: float, share: float) -> list[dict]:
    """Chart rows holding the TRUE reference of a simulated rig (center, scale, day share,
    AR(1), files a day; no widening): the charts' known-parameter floor."""
    out = []
    for r in rules.history:
        if r.test not in CHART_TESTS:
            continue
        center = math.log(HUM if r.measure == "hum_rms" else NOISE)
        ref = Reference(center=center, scale=scatter, n=10 ** 6, first_at=T0 - 2.0,
                        last_at=T0 - 1.0, log=True, icc=share, per_day=float(per_day), rho=PHI,
                        widen=1.0)
        out.append(dict(mode="voltage_clamp", channel=0, measure=r.measure, rule=r.name,
                        start_at=None, state={}, ref=ref.to_dict()))
    return out


def run_rig(folder: Path, name: str, files, rules, oracle: list[dict] | None = None
            ) -> list[tuple[int, str, str]]:
    """Commit every file; [(file index, measure, rule)] of each alert opening sent as a
    message. ``oracle``: chart rows stored before the first file (known references)."""
    rig = RigConfig(name, ())
    opened = []
    with Store(folder / f"{name}.sqlite") as store:
        if oracle:
            with store.db.conn:
                Store._upsert_charts(store.db.conn, name, oracle, T0)
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
    (folder / f"{name}.sqlite").unlink(missing_ok=True)
    return opened


def pct(xs, q):
    return float(np.percentile(xs, q)) if xs else float("nan")


def task(job: tuple) -> tuple:
    """One simulated rig (run in a worker process): (kind, case, result)."""
    kind, case, seed, r, share, oracle = job
    rules = load_rules()
    rng = np.random.default_rng([seed, r, zlib.crc32(f"{kind}{case}".encode())])
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        if kind == "control":
            per_day = int(rng.integers(2, 9))
            scatter = float(rng.uniform(0.10, 0.30))
            files = rig_files(rng, days=365, per_day=per_day, scatter=scatter, share=share)
            rows = oracle_rows(rules, per_day, scatter, share) if oracle else None
            got = [(i, m, rule, i < per_day * 30) for i, m, rule in
                   run_rig(folder, f"ic{r}", files, rules, rows)]
            return kind, case, (len(files), got)
        measure, size = case
        days = 60 if kind == "creep" else 40
        files = rig_files(rng, days=days, per_day=4, scatter=0.20, share=share,
                          fault=(measure, kind, size, 30))
        rows = oracle_rows(rules, 4, 0.20, share) if oracle else None
        first = next(((i, rule) for i, m, rule in run_rig(folder, f"r{r}", files, rules, rows)
                      if m == measure and files[i][3]), None)
        if first is None:
            return kind, case, (len(files), None, "")
        if kind == "creep":
            return kind, case, (len(files), (files[first[0]][0] - (T0 + 30 * DAY)) / DAY,
                                first[1])
        onset = next(i for i, f in enumerate(files) if f[3])
        return kind, case, (len(files), first[0] - onset + 1, first[1])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rig-years", type=int, default=30, help="in-control rig-years (30)")
    ap.add_argument("--rigs", type=int, default=20, help="rigs per creep/step case (20)")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--only", choices=("control", "creep", "step"), action="append",
                    help="run only these parts (repeatable; default all)")
    ap.add_argument("--quick", action="store_true",
                    help="only +5 %%/day creeps and 2x steps (the goals' cases)")
    ap.add_argument("--jobs", type=int, default=1, help="worker processes (1)")
    ap.add_argument("--oracle", action="store_true",
                    help="give the charts the true reference (known-parameter floor)")
    ap.add_argument("--day-share", type=float, default=0.9,
                    help="share of the log variance the files of one day have in common (0.9)")
    args = ap.parse_args(argv)
    parts = set(args.only or ("control", "creep", "step"))
    jobs = []
    if "control" in parts:
        jobs += [("control", "", args.seed, r, args.day_share, args.oracle)
                 for r in range(args.rig_years)]
    for measure in ("hum_rms", "noise_rms"):
        if "creep" in parts:
            for rate in ((0.05,) if args.quick else (0.03, 0.05, 0.10)):
                jobs += [("creep", (measure, rate), args.seed, r, args.day_share, args.oracle)
                         for r in range(args.rigs)]
        if "step" in parts:
            for size in ((2.0,) if args.quick else (1.5, 2.0, 3.0)):
                jobs += [("step", (measure, size), args.seed, r, args.day_share, args.oracle)
                         for r in range(args.rigs)]
    t_start = time.perf_counter()
    if args.jobs > 1:
        with multiprocessing.get_context("fork").Pool(args.jobs) as pool:
            results = pool.map(task, jobs, chunksize=1)
    else:
        results = [task(j) for j in jobs]
    n_files = sum(res[0] for _, _, res in results)
    what = (f"day share {args.day_share:g}, AR(1) {PHI:g}"
            + (", ORACLE: true reference" if args.oracle else ""))
    print(what)
    control = [res for kind, _, res in results if kind == "control"]
    if control:
        false = {"hum_rms": 0, "noise_rms": 0}
        young = {"hum_rms": 0, "noise_rms": 0}
        by_rule: dict[str, int] = {}
        for _, got in control:
            for i, measure, rule, is_young in got:
                if measure in false:
                    false[measure] += 1
                    young[measure] += is_young
                    by_rule[rule] = by_rule.get(rule, 0) + 1
        n = len(control)
        print(f"in control, {n} rig-years (2-8 files a day, 10-30 % scatter): false alerts per "
              f"rig-year: hum {false['hum_rms'] / n:.2f}, noise {false['noise_rms'] / n:.2f} "
              f"(goal <= 0.5); in a rig's first 30 days: hum {young['hum_rms']}, noise "
              f"{young['noise_rms']}; by rule: "
              + ", ".join(f"{k} {v}" for k, v in sorted(by_rule.items())))
    cases: dict[tuple, list] = {}
    for kind, case, res in results:
        if kind != "control":
            cases.setdefault((kind, case), []).append(res)
    for (kind, (measure, size)), res in cases.items():
        hits = [r[1] for r in res if r[1] is not None]
        missed = len(res) - len(hits)
        rules_used: dict[str, int] = {}
        for r in res:
            if r[1] is not None:
                rules_used[r[2]] = rules_used.get(r[2], 0) + 1
        by = ", ".join(f"{k} {v}" for k, v in sorted(rules_used.items()))
        if kind == "creep":
            print(f"creep {measure} +{size:.0%}/day: days to first message median "
                  f"{pct(hits, 50):.2f}, p90 {pct(hits + [math.inf] * missed, 90):.2f}, missed "
                  f"{missed} of {len(res)} (goal +5 %: median <= 5, p90 <= 7); by rule: {by}")
        else:
            within2 = sum(c <= 2 for c in hits) / max(len(res), 1)
            print(f"step {measure} {size:g}x: files to first message median "
                  f"{pct(hits, 50):.1f}, p90 {pct(hits + [math.inf] * missed, 90):.1f}, within "
                  f"2 files {within2:.0%}, missed {missed} of {len(res)} (goal 2x: >= 90 %); "
                  f"by rule: {by}")
    dt = time.perf_counter() - t_start
    print(f"{n_files} files through judge and store in {dt:.0f} s with {args.jobs} process(es) "
          f"({1e3 * dt * args.jobs / max(n_files, 1):.2f} ms a file a process)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
