"""Store benchmark: commit_file rate and history/report query times on a grown database.

Baseline: plain sqlite3 inserting the same rows (file, channels, measures, spectra) with one
transaction per file, synchronous=FULL and WAL, no dedup/supersede checks. Prints qcd's
figures and the ratio qcd / baseline (1.0 = no overhead).

    .venv/bin/python tests/benchmarks/bench_store.py [--files 2000]
"""
from __future__ import annotations

import argparse
import sqlite3
import sys
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from qcd.results import ChannelMeasures, FileMeasures, Measure, Spectrum  # noqa: E402
from qcd.store import Store  # noqa: E402

NAMES = [f"m{i:02d}" for i in range(25)]
T0 = 1_780_000_000.0


def make(i: int, rng: np.random.Generator) -> FileMeasures:
    freqs = tuple(np.geomspace(0.5, 10000.0, 200).tolist())
    chans = tuple(
        ChannelMeasures(index=c, name=f"IN {c}", unit="pA", dimension="A",
                        measures={n: Measure(n, float(rng.normal(1.0, 0.1)), "pA") for n in NAMES},
                        spectrum=Spectrum(freqs, tuple(rng.random(200).tolist()), "pA"))
        for c in range(2))
    at = datetime.fromtimestamp(T0 - (5000 - i) * 600.0, timezone.utc).replace(tzinfo=None)
    return FileMeasures(path=f"/data/f{i}.abf", status="ok", mode="voltage_clamp", format="ABF2",
                        fs_hz=20000.0, duration_s=10.0, n_sweeps=10, gap_free=False,
                        recorded_at=at, size=1000, mtime=T0, sha256=f"{i:064x}", channels=chans)


def baseline(path: Path, fms: list[FileMeasures]) -> float:
    conn = sqlite3.connect(path, isolation_level=None)
    conn.execute("PRAGMA journal_mode=wal")
    conn.execute("PRAGMA synchronous=FULL")
    conn.execute("CREATE TABLE files (id INTEGER PRIMARY KEY, rig, path, recorded_at, sha256)")
    conn.execute("CREATE TABLE measures (file_id, channel, name, value, unit, "
                 "PRIMARY KEY (file_id, channel, name))")
    conn.execute("CREATE TABLE spectra (file_id, channel, freqs, density)")
    t = time.perf_counter()
    for fm in fms:
        conn.execute("BEGIN")
        fid = conn.execute("INSERT INTO files (rig, path, recorded_at, sha256) VALUES (?,?,?,?)",
                           ("r", fm.path, fm.recorded_at.timestamp(), fm.sha256)).lastrowid
        for ch in fm.channels:
            conn.executemany("INSERT INTO measures VALUES (?,?,?,?,?)",
                             [(fid, ch.index, m.name, m.value, m.unit)
                              for m in ch.measures.values()])
            conn.execute("INSERT INTO spectra VALUES (?,?,?,?)",
                         (fid, ch.index, np.asarray(ch.spectrum.freqs_hz, "<f4").tobytes(),
                          np.asarray(ch.spectrum.density, "<f4").tobytes()))
        conn.execute("COMMIT")
    dt = time.perf_counter() - t
    conn.close()
    return dt


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--files", type=int, default=2000)
    n = ap.parse_args().files
    rng = np.random.default_rng(1)
    fms = [make(i, rng) for i in range(n)]
    with tempfile.TemporaryDirectory() as tmp:
        base_s = baseline(Path(tmp) / "base.sqlite", fms)
        with Store(Path(tmp) / "qcd.sqlite") as s:
            t = time.perf_counter()
            for fm in fms:
                s.commit_file("r", fm, analysed_at=T0)
            qcd_s = time.perf_counter() - t
            t = time.perf_counter()
            for k in range(200):
                s.history("r", "voltage_clamp", k % 2, NAMES[k % 25], before=T0)
            hist_ms = (time.perf_counter() - t) / 200 * 1e3
            t = time.perf_counter()
            for k in range(20):
                s.reference_spectrum("r", "voltage_clamp", k % 2, before=T0)
            ref_ms = (time.perf_counter() - t) / 20 * 1e3
            t = time.perf_counter()
            for k in range(20):
                s.measure_series("r", NAMES[k], channel=0)
            series_ms = (time.perf_counter() - t) / 20 * 1e3
            size_mb = (Path(tmp) / "qcd.sqlite").stat().st_size / 1e6
            wal_mb = s.wal_bytes() / 1e6
    print(f"files: {n}, 2 channels x {len(NAMES)} measures + 200-point spectra each")
    print(f"commit_file: {n / qcd_s:.0f} files/s ({qcd_s / n * 1e3:.2f} ms/file); "
          f"baseline {n / base_s:.0f} files/s; ratio qcd/baseline time {qcd_s / base_s:.2f}")
    print(f"history(30 newest): {hist_ms:.2f} ms; reference_spectrum: {ref_ms:.2f} ms; "
          f"measure_series({n} points): {series_ms:.1f} ms")
    print(f"database {size_mb:.1f} MB + wal {wal_mb:.1f} MB")


if __name__ == "__main__":
    main()
