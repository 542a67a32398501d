"""Benchmark: start-up of ``qcd scan`` on one small file against importing numpy and scipy.signal.

    .venv/bin/python tests/benchmarks/bench_startup.py            # 7 alternating runs each
    .venv/bin/python tests/benchmarks/bench_startup.py --runs 15

Variants, each in its own child process, alternated so that a busy moment of a shared machine
hits all of them alike; the fastest run of each counts (wall time and CPU time, user + system,
of that child from os.wait4):

- floor: ``python -c "import numpy, scipy.signal"`` (what measuring needs at the least), with
  one BLAS thread as qcd runs (bench_scan.floor_env), so numpy's import starts no extra threads
  that qcd's does not;
- qcd scan of a 10 s gap-free ABF1 file (written in /tmp, deleted afterwards);
- qcd scan of a file with a test pulse (vc_model_cell_step.abf from ../shared/data/abf or
  QCD_ABF_DATA, when present: the whole-cell fit imports scipy.optimize too).

Target: qcd scan of one small file at most 0.3 s above the floor.

The checkout's qcd is measured (children run in it) with its bytecode compiled first, as pip
leaves an installed package: with PYTHONDONTWRITEBYTECODE=1 an uncompiled checkout compiles
every module at each start (about 0.05 s more, measured), which is not start-up of qcd.
"""
from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_scan import blas_note, floor_env, write_gapfree_abf1  # noqa: E402

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]          # the checkout whose qcd is measured
DATA = Path(os.environ.get("QCD_ABF_DATA", HERE.parents[2] / "shared" / "data" / "abf"))


def run(cmd: list[str], env: dict[str, str] | None = None) -> tuple[float, float]:
    """(wall s, CPU s) of one child."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, cwd=ROOT,
                            env=env)
    err = proc.stderr.read()
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    if os.waitstatus_to_exitcode(status) not in (0, 1):
        raise RuntimeError(f"{cmd} failed: {err.decode()[-2000:]}")
    return wall, usage.ru_utime + usage.ru_stime


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=7)
    ap.add_argument("--no-compile", action="store_true",
                    help="leave qcd's bytecode as it is")
    args = ap.parse_args()
    py = sys.executable
    if not args.no_compile:
        subprocess.run([py, "-m", "compileall", "-q", str(ROOT / "qcd")], check=True)
    print(f"qcd from {ROOT}, bytecode {'not ' if args.no_compile else ''}compiled beforehand; "
          f"{blas_note()}")
    with tempfile.TemporaryDirectory(prefix="qcd-bench-", dir="/tmp") as tmp:
        small = Path(tmp) / "small.abf"
        write_gapfree_abf1(small, 200_000)
        variants = {"floor: import numpy, scipy.signal": [py, "-c", "import numpy, scipy.signal"],
                    "qcd scan, 10 s gap-free": [py, "-m", "qcd", "scan", str(small)]}
        cell = DATA / "vc_model_cell_step.abf"
        if cell.exists():
            variants["qcd scan, test-pulse file"] = [py, "-m", "qcd", "scan", str(cell)]
        else:
            print(f"({cell} not found: test-pulse variant left out)")
        envs = {name: floor_env() if name.startswith("floor") else None for name in variants}
        for name, cmd in variants.items():      # compile caches, page cache
            run(cmd, envs[name])
        best: dict[str, tuple[float, float]] = {}
        for _ in range(args.runs):
            for name, cmd in variants.items():
                wall, cpu = run(cmd, envs[name])
                w0, c0 = best.get(name, (wall, cpu))
                best[name] = (min(w0, wall), min(c0, cpu))
    fw, fc = best["floor: import numpy, scipy.signal"]
    print(f"fastest of {args.runs} alternating runs:")
    for name, (wall, cpu) in best.items():
        extra = "" if name.startswith("floor") else \
            f"   above floor: wall {wall - fw:+.2f} s, CPU {cpu - fc:+.2f} s (target <= 0.3)"
        print(f"  {name:<36} wall {wall:5.2f} s  CPU {cpu:5.2f} s{extra}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
