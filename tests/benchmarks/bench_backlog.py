"""Backlog benchmark: the watch service catching up on a 10,000-file folder.

Prints files per second of the service's catch-up against a plain loop that measures and
commits the same kind of files one by one (the baseline), and the delay between closing a new
file dropped in during the catch-up and its row in the store (goal: well under a minute).

    .venv/bin/python tests/benchmarks/bench_backlog.py [--files 10000] [--workers N]
"""
from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

from qcd.config import Config, RigConfig  # noqa: E402
from qcd.store import Store  # noqa: E402
from qcd.watch import Service  # noqa: E402

RIG = "bench"


def _template(path: Path) -> bytes:
    import pyabf.abfWriter
    rng = np.random.default_rng(0)
    pyabf.abfWriter.writeABF1(rng.normal(0, 5, size=(1, 2000)).astype(np.float32), str(path),
                              10000.0, units="pA")
    return path.read_bytes()


def _write_files(folder: Path, n: int, template: bytes, start: int = 0) -> None:
    """n distinct valid files: the template with its last samples set to the file number."""
    for i in range(start, start + n):
        data = bytearray(template)
        data[-4:] = int(i % 2**31).to_bytes(4, "little", signed=False)
        p = folder / f"f{i:05d}.abf"
        p.write_bytes(bytes(data))
        os.utime(p, (1e9 + i, 1e9 + i))


def _parts(store):
    """``pipeline.measure`` and ``pipeline.commit``, as the service runs them."""
    from qcd import pipeline
    from qcd.ruleset import load_rules
    rules = load_rules()
    return "real pipeline", pipeline.measure, (
        lambda fm, rig, now, batch=False: pipeline.commit(fm, rig, store, rules, now))


def baseline(tmp: Path, template: bytes, n: int) -> float:
    folder = tmp / "base"
    folder.mkdir()
    _write_files(folder, n, template)
    rig = RigConfig(RIG, (folder,))
    with Store(tmp / "base.sqlite") as store:
        _, measure, commit = _parts(store)
        t0 = time.perf_counter()
        for p in sorted(folder.iterdir()):
            commit(measure(p, rig), rig, time.time())
        return n / (time.perf_counter() - t0)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--files", type=int, default=10000)
    ap.add_argument("--workers", type=int, default=None)
    ap.add_argument("--new-after", type=float, default=5.0,
                    help="drop the new file this many seconds into the catch-up")
    a = ap.parse_args()
    tmp = Path(tempfile.mkdtemp(prefix="qcd-bench-"))
    try:
        template = _template(tmp / "template.abf")
        folder = tmp / "rig"
        folder.mkdir()
        t0 = time.perf_counter()
        _write_files(folder, a.files, template)
        print(f"wrote {a.files} files ({len(template)} bytes each) in "
              f"{time.perf_counter() - t0:.1f} s")
        cfg = Config(path=None, database=tmp / "qcd.sqlite", rules=(), settle_seconds=1.0,
                     give_up_hours=1.0, rigs=(RigConfig(RIG, (folder,)),))
        with Store(cfg.database) as store:
            label, measure, commit = _parts(store)
            print(f"parts: {label}")
            committed: dict[str, float] = {}

            def counting_commit(fm, rig, now, batch=False):
                commit(fm, rig, now)
                committed[Path(fm.path).name] = time.perf_counter()
            svc = Service(cfg, store, workers=a.workers, commit=counting_commit,
                          progress_tty=False, poll_s=0.05)
            t_start = time.perf_counter()
            cpu_start = time.process_time()
            svc.start(time.time())
            t_scan = time.perf_counter() - t_start
            new_closed = None
            while len(committed) < a.files + (1 if new_closed else 0):
                busy = svc.step(time.time())
                if new_closed is None and time.perf_counter() - t_start > a.new_after:
                    _write_files(folder, 1, template, start=a.files)   # f{files}.abf
                    new_closed = time.perf_counter()
                if not busy:
                    svc.wait_idle()
            t_total = time.perf_counter() - t_start
            cpu_main = time.process_time() - cpu_start
            svc.close()
            new_name = f"f{a.files:05d}.abf"
            delay = committed[new_name] - new_closed
            rank = sorted(committed, key=committed.get).index(new_name)
        rate = a.files / t_total
        n_base = min(a.files, 500)
        base_rate = baseline(tmp, template, n_base)
        print(f"start-up scan: {t_scan:.2f} s for {a.files} files")
        print(f"catch-up: {a.files} files in {t_total:.1f} s = {rate:.1f} files/s "
              f"(workers {svc.workers}); the service process (intake, judging, storing) "
              f"{1000 * cpu_main / a.files:.2f} ms CPU per file")
        print(f"baseline (one loop, no service, {n_base} files): {base_rate:.1f} files/s; "
              f"ratio service/baseline = {rate / base_rate:.2f}")
        print(f"new file dropped {a.new_after:g} s into the catch-up: stored {delay:.2f} s after "
              f"it was closed (settle_seconds 1.0), as number {rank + 1} of {a.files + 1}")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
