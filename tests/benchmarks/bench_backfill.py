"""Backfill benchmark: ``qcd scan --store`` of an archive inline, with ``--workers 2`` and on a
LocalCluster of 2 worker processes (``--cluster local:2``).

Prints files per second and the client's peak memory of each path, the cluster's throughput
as a fraction of ``--workers`` at equal cores (goal: at least 0.80), the client's peak memory
with 1/5 of the files and with all of them (goal: flat), and the single writer's commits per
second (``pipeline.commit`` of already-measured files, with no rules and with the packaged
rules), from which the note's estimate for a large archive is made.

Each path runs in its own process, so its peak RSS (ru_maxrss) is its own; the workers'
memory is not the client's and is not counted. Mixed sizes: 60 % of the files 1 s, 30 % 10 s
and 10 % 60 s of 10 kHz noise (one ABF1 channel, 20 KB to 1.2 MB).

    nice .venv/bin/python tests/benchmarks/bench_backfill.py [--files 5000] [--keep DIR]
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

RIG = "bench"
FS = 10_000.0
SIZES_S = ((0.60, 1.0), (0.30, 10.0), (0.10, 60.0))


def write_archive(folder: Path, n: int) -> list[Path]:
    """n distinct ABF1 files of mixed length; the mtimes give the recording order."""
    import pyabf.abfWriter
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(0)
    fracs = np.array([f for f, _ in SIZES_S])
    lengths = rng.choice([s for _, s in SIZES_S], size=n, p=fracs / fracs.sum())
    templates = {}
    for s in {float(x) for x in lengths}:
        t = folder / f"template-{s}.abf"
        pyabf.abfWriter.writeABF1(rng.normal(0, 5, size=(1, int(FS * s))).astype(np.float32),
                                  str(t), FS, units="pA")
        templates[s] = t.read_bytes()
        t.unlink()
    out = []
    for i in range(n):
        data = bytearray(templates[float(lengths[i])])
        data[-4:] = int(i).to_bytes(4, "little")          # distinct content, same statistics
        p = folder / f"r{(i * 7919) % n:06d}.abf"          # name order is not recording order
        p.write_bytes(bytes(data))
        os.utime(p, (1.7e9 + 60.0 * i,) * 2)
        out.append(p)
    return out


def _peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _cpu(who: int) -> float:
    r = resource.getrusage(who)
    return r.ru_utime + r.ru_stime


def child(mode: str, folder: Path, db: Path, limit: int) -> None:
    """One path over the archive's first ``limit`` files (in recording order); prints JSON."""
    from qcd.config import RigConfig
    from qcd.pipeline import scan
    from qcd.ruleset import load_rules
    from qcd.store import Store
    files = sorted(folder.glob("*.abf"), key=lambda p: p.stat().st_mtime)[:limit]
    rig = RigConfig(name=RIG, folders=(folder,))
    rules = load_rules()
    base_mb = _peak_mb()
    cpu0 = _cpu(resource.RUSAGE_SELF)
    with Store(db) as store:
        if mode == "cluster":
            from qcd.cluster import Target, backfill, connect
            with connect(Target(None, 2), quiet=True) as client:
                t0 = time.perf_counter()
                res = backfill(files, rig, store, rules, client=client, clock=time.time)
                dt = time.perf_counter() - t0
        else:
            t0 = time.perf_counter()
            res = scan(files, rig, store, rules, clock=time.time,
                       workers=2 if mode == "workers" else 1, keep_files=False)
            dt = time.perf_counter() - t0
    # processor time of the client (all its threads) and of its worker processes (reaped by
    # now), start-up included: on a machine shared with other work this, not the wall time,
    # says what each path costs
    client_cpu = _cpu(resource.RUSAGE_SELF) - cpu0
    print(json.dumps({"mode": mode, "files": res.count, "failed": len(res.failed),
                      "seconds": dt, "rate": res.count / dt, "peak_mb": _peak_mb(),
                      "start_mb": base_mb, "client_cpu": client_cpu,
                      "workers_cpu": _cpu(resource.RUSAGE_CHILDREN)}))


def writer(folder: Path, tmp: Path, n: int) -> dict[str, float]:
    """Commits per second of the single writer over n measured files."""
    from dataclasses import replace

    from qcd.config import RigConfig
    from qcd.pipeline import commit, measure_all
    from qcd.ruleset import Rules, load_rules
    from qcd.store import Store
    files = sorted(folder.glob("*.abf"), key=lambda p: p.stat().st_mtime)[:n]
    rig = RigConfig(name=RIG, folders=(folder,))
    measured = list(measure_all(files, rig, 2))
    out = {}
    for name, rules in (("no rules", Rules()), ("packaged rules", load_rules())):
        with Store(tmp / f"writer-{len(out)}.sqlite") as store:
            t0 = time.perf_counter()
            for i, fm in enumerate(measured):
                commit(replace(fm, sha256=f"{i:064x}"), rig, store, rules, 1.8e9 + i,
                       batch=True)
            out[name] = len(measured) / (time.perf_counter() - t0)
    return out


def _run(mode: str, folder: Path, db: Path, limit: int) -> dict:
    got = subprocess.run([sys.executable, __file__, "--child", mode, "--folder", str(folder),
                          "--db", str(db), "--files", str(limit)], check=True,
                         capture_output=True, text=True)
    return json.loads(got.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--files", type=int, default=5000)
    ap.add_argument("--keep", type=Path, help="write the archive here and keep it")
    ap.add_argument("--child", choices=("inline", "workers", "cluster"))
    ap.add_argument("--folder", type=Path)
    ap.add_argument("--db", type=Path)
    args = ap.parse_args()
    if args.child:
        child(args.child, args.folder, args.db, args.files)
        return
    tmp = Path(tempfile.mkdtemp(prefix="qcd-backfill-"))
    try:
        folder = args.keep or tmp / "archive"
        t0 = time.perf_counter()
        if not any(folder.glob("*.abf")):
            write_archive(folder, args.files)
        print(f"archive: {args.files} files, {sum(p.stat().st_size for p in folder.glob('*.abf')) / 1e6:.0f} MB "
              f"(written in {time.perf_counter() - t0:.0f} s); 2 cores, load {os.getloadavg()[0]:.1f}")
        rows = {}
        for mode in ("inline", "workers", "cluster"):
            rows[mode] = r = _run(mode, folder, tmp / f"{mode}.sqlite", args.files)
            cpu = (r["client_cpu"] + r["workers_cpu"]) / r["files"] * 1000
            print(f"{mode:8} {r['files']:6d} files {r['seconds']:7.1f} s {r['rate']:7.1f} files/s"
                  f"  client peak {r['peak_mb']:6.0f} MB  CPU {cpu:5.1f} ms/file (client "
                  f"{r['client_cpu'] / r['files'] * 1000:.1f})", flush=True)
        print(f"cluster / workers throughput: {rows['cluster']['rate'] / rows['workers']['rate']:.2f}"
              f" (goal >= 0.80)")
        cost = {m: (r["client_cpu"] + r["workers_cpu"]) / r["files"] for m, r in rows.items()}
        print(f"cluster / workers by processor time per file (throughput at equal, fully "
              f"used cores): {cost['workers'] / cost['cluster']:.2f}")
        small = _run("cluster", folder, tmp / "small.sqlite", args.files // 5)
        print(f"cluster client peak: {small['peak_mb']:.0f} MB at {small['files']} files, "
              f"{rows['cluster']['peak_mb']:.0f} MB at {rows['cluster']['files']} files "
              f"(ratio {rows['cluster']['peak_mb'] / small['peak_mb']:.2f}; flat = 1)")
        w = writer(folder, tmp, min(1000, args.files))
        for name, rate in w.items():
            print(f"single writer, {name}: {rate:.0f} commits/s")
        # one core's seconds per file: inline's processor time (measure + commit, its own
        # wall time is the machine's load) less the writer's share
        per_file = rows["inline"]["client_cpu"] / rows["inline"]["files"] - 1.0 / w["packaged rules"]
        print(f"measuring cost: {per_file * 1000:.1f} ms of one core per file (inline's "
              f"processor time less the writer)")
        for n_files, n_workers in ((500_000, 64),):
            measure_s = n_files * per_file / n_workers
            write_s = n_files / w["packaged rules"]
            print(f"{n_files} files on {n_workers} workers: measuring {measure_s / 3600:.2f} h, "
                  f"writer {write_s / 3600:.2f} h -> about {max(measure_s, write_s) / 3600:.2f} h "
                  f"({'writer' if write_s > measure_s else 'workers'}-bound); the writer "
                  f"becomes the bottleneck beyond {w['packaged rules'] * per_file:.0f} workers")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
