"""How much judging and the alert lifecycle add to storing a file (backlog throughput).

Baseline: ``Store.commit_file`` alone. Measured: ``pipeline.commit`` (history queries, judge,
alerts.advance, the same commit) in backlog mode. Prints files per second and the ratio.
Run by hand: ``python tests/benchmarks/bench_commit.py [N]``.
"""
from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from qcd.results import ChannelMeasures, FileMeasures, Measure
from qcd.config import RigConfig
from qcd.ruleset import load_rules
from qcd.pipeline import commit, flush_digest
from qcd.store import Store


def files(n: int, seed: int = 0) -> list[FileMeasures]:
    rng = np.random.default_rng(seed)
    out = []
    for i in range(n):
        ms = {"noise_rms": 0.25, "noise_rms_1k": 0.18, "hum_rms": 0.025, "hum_fraction": 0.01,
              "band_rms_10_70": 0.045, "band_rms_1k_corner": 0.15, "holding": -40.0,
              "access_resistance": 10.0, "seal_resistance": 5.0, "oversampling": 5.1}
        units = {"access_resistance": "MOhm", "seal_resistance": "GOhm", "oversampling": "",
                 "hum_fraction": ""}
        meas = {k: Measure(k, float(v * np.exp(rng.normal(0, 0.05))) if v > 0 else
                           float(v + rng.normal(0, 2)), units.get(k, "pA")) for k, v in ms.items()}
        ch = ChannelMeasures(0, "IN 0", "pA", "A", meas)
        out.append(FileMeasures(path=f"/data/rig/cell{i:05d}.abf", status="ok",
                                mode="voltage_clamp", mtime=1.78e9 + 600 * i,
                                sha256=f"{i:064x}", channels=(ch,)))
    return out


def main() -> None:
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 1000
    fms = files(n)
    rules = load_rules()
    rig = RigConfig(name="rig", folders=(Path("/data/rig"),))
    with tempfile.TemporaryDirectory() as d:
        with Store(Path(d) / "a.sqlite") as s:
            t = time.perf_counter()
            for i, fm in enumerate(fms):
                s.commit_file("rig", fm, analysed_at=1.78e9 + 600 * i + 60)
            base = time.perf_counter() - t
        with Store(Path(d) / "b.sqlite") as s:
            t = time.perf_counter()
            for i, fm in enumerate(fms):
                commit(fm, rig, s, rules, 1.78e9 + 600 * i + 60, batch=True)
            flush_digest(s, rules, 1.78e9 + 600 * n + 60)
            full = time.perf_counter() - t
    print(f"{n} files: commit_file alone {n / base:.0f} files/s; judge+alerts+commit "
          f"{n / full:.0f} files/s; ratio {full / base:.2f}x")


if __name__ == "__main__":
    main()
